"""Shared fixtures of the Python module's tests: synthetic scans written with nibabel, and the
`sinew` command-line binary to compare against (built from this checkout if missing)."""

import os
import subprocess
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[3]


def _target_dir() -> Path:
    t = os.environ.get("CARGO_TARGET_DIR")
    return Path(t) if t else REPO / "target"


@pytest.fixture(scope="session")
def sinew_bin() -> Path:
    """The command-line binary: $SINEW_BIN, else target/release/sinew (built if missing)."""
    env = os.environ.get("SINEW_BIN")
    if env:
        return Path(env)
    exe = _target_dir() / "release" / "sinew"
    if not exe.exists():
        subprocess.run(["cargo", "build", "--release", "-p", "sinew-cli"], cwd=REPO, check=True)
    return exe


def run_cli(exe: Path, *args: str) -> subprocess.CompletedProcess:
    r = subprocess.run([str(exe), *args], capture_output=True, text=True)
    if r.returncode != 0:
        raise AssertionError(f"sinew {' '.join(args)} failed ({r.returncode}): {r.stderr}")
    return r


def phantom(shape, shift=(0.0, 0.0, 0.0), seed=0):
    """A smooth synthetic scan with structure at several scales and a label map of it: three
    ellipsoids of different brightness in a body, shifted by `shift` voxels."""
    rng = np.random.default_rng(seed)
    idx = np.indices(shape).astype(np.float64)
    c = [(s - 1) / 2 for s in shape]
    pos = [idx[d] - c[d] - shift[d] for d in range(3)]
    r2 = sum((pos[d] / (0.42 * shape[d])) ** 2 for d in range(3))
    body = (r2 < 1).astype(np.float64)
    img = 200.0 * body
    labels = np.zeros(shape, np.uint8)
    blobs = [((-0.2, -0.1, 0.1), 0.18, 500.0, 1), ((0.2, 0.15, -0.1), 0.14, 900.0, 2), ((0.0, 0.2, 0.2), 0.1, -150.0, 3)]
    for off, rad, val, lab in blobs:
        q = sum(((pos[d] - off[d] * shape[d]) / (rad * shape[d])) ** 2 for d in range(3))
        inside = q < 1
        img = np.where(inside, val, img)
        labels[inside & (body > 0)] = lab
    img = img + 20.0 * rng.standard_normal(shape)
    return img.astype(np.float32), labels


@pytest.fixture(scope="session")
def pair_files(tmp_path_factory):
    """A fixed and a moving scan (48x40x36 voxels, 2.0/2.5/3.0 mm, an oblique sform) with
    label maps, written by nibabel."""
    import nibabel as nib

    d = tmp_path_factory.mktemp("pair")
    shape = (48, 40, 36)
    fixed, fl = phantom(shape, seed=1)
    moving, ml = phantom(shape, shift=(2.0, -1.5, 1.0), seed=2)
    th = np.deg2rad(10.0)
    rot = np.array([[np.cos(th), -np.sin(th), 0], [np.sin(th), np.cos(th), 0], [0, 0, 1]])
    aff = np.eye(4)
    aff[:3, :3] = rot @ np.diag([2.0, 2.5, 3.0])
    aff[:3, 3] = [-40.0, 12.5, 30.0]
    paths = {}
    for name, arr in (("fixed", fixed), ("moving", moving), ("fixed_labels", fl), ("moving_labels", ml)):
        img = nib.Nifti1Image(arr, aff)
        img.set_sform(aff, code=1)
        img.set_qform(aff, code=1)
        p = d / f"{name}.nii.gz"
        nib.save(img, p)
        paths[name] = p
    paths["dir"] = d
    return paths
