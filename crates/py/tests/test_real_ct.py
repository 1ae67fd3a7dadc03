"""Real scans as they come, through the Python module: a known warp of a real chest CT with
the moving scan in the fixed scan's world frame and in another frame, registered by
``sinew.register`` and by ``sinew register`` on the same files: the same field, bit for bit
(the command line's ``field.npy``), the same report figures, and the known warp recovered.

Source of the scan: ``chest_ct_a.nii.gz`` in the shared real-CT folder (an open chest CT,
512x512x48 at 0.57x0.57x5 mm, from the ``data/`` folder of the pyradiomics 3.1.0 source
distribution, BSD-3-Clause; see that folder's README). Read in place with nibabel, never
copied into the repository; the derived scans are written to pytest's temporary folder. The
folder is ``/work/shared/data/real-ct`` unless ``SINEW_REAL_CT`` names another; the tests skip
when the scan is missing.

Construction (the usual synthetic-deformation protocol): the scan is averaged over 2x2 voxel
blocks in-plane (256x256x48 at 1.14x1.14x5 mm, so that the test runs in seconds); a smooth
known pull field ``u*`` of at most 8 mm gives ``fixed(x) = moving(x + u*(x))`` (trilinear,
``scipy.ndimage.map_coordinates`` of order 1). The "other frame" moving scan holds the same
array flipped along i and j, with a header that puts every voxel's anatomy 177 mm away
(translation (140, -60, 90) mm), as another scanner or scan date would.
"""

import json
import os
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

import sinew
from conftest import run_cli

REAL_CT = Path(os.environ.get("SINEW_REAL_CT", "/work/shared/data/real-ct")) / "chest_ct_a.nii.gz"
SHIFT = np.array([140.0, -60.0, 90.0])

pytestmark = pytest.mark.skipif(not REAL_CT.exists(), reason=f"{REAL_CT}: the real-CT test scan is missing")


def _save(arr, aff, path):
    img = nib.Nifti1Image(arr.astype(np.float32), aff)
    img.set_sform(aff, code=1)
    img.set_qform(aff, code=1)
    nib.save(img, path)
    return path


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    d = tmp_path_factory.mktemp("real_ct")
    src = nib.load(REAL_CT)
    a = np.asanyarray(src.dataobj).astype(np.float64)
    nx, ny, nz = a.shape
    half = a.reshape(nx // 2, 2, ny // 2, 2, nz).mean(axis=(1, 3))
    # Voxel (i, j, k) of the half grid is the centre of source voxels 2i, 2i+1 (and 2j, 2j+1).
    scale = np.diag([2.0, 2.0, 1.0, 1.0])
    scale[:3, 3] = [0.5, 0.5, 0.0]
    aff = src.affine @ scale
    shape = half.shape
    # The known pull field in mm along the world axes of this axis-aligned grid, at most 8 mm.
    x, y, z = (np.indices(shape, dtype=np.float64) / np.reshape(shape, (3, 1, 1, 1)))
    u_mm = np.stack(
        [
            6.0 * np.sin(np.pi * x) * np.sin(2 * np.pi * y),
            -5.0 * np.sin(np.pi * y) * np.cos(np.pi * x),
            2.0 * np.sin(np.pi * z) * np.sin(np.pi * x),
        ]
    )
    sp = np.abs(np.diag(aff)[:3])
    u_vox = u_mm * np.sign(np.diag(aff)[:3]).reshape(3, 1, 1, 1) / sp.reshape(3, 1, 1, 1)
    assert np.abs(aff[:3, :3] - np.diag(np.diag(aff)[:3])).max() < 1e-6, "axis-aligned source grid"
    pos = np.indices(shape, dtype=np.float64) + u_vox
    fixed = ndimage.map_coordinates(half, pos, order=1, mode="nearest")
    # The other frame: the array flipped along i and j; the header maps flipped voxel p to
    # the world point of original voxel (nx-1-p_i, ny-1-p_j, p_k), moved by SHIFT.
    flip = np.diag([-1.0, -1.0, 1.0, 1.0])
    flip[:3, 3] = [shape[0] - 1, shape[1] - 1, 0]
    other = aff @ flip
    other[:3, 3] += SHIFT
    paths = {
        "fixed": _save(fixed, aff, d / "fixed.nii.gz"),
        "moving": _save(half, aff, d / "moving.nii.gz"),
        "moving_other": _save(half[::-1, ::-1, :], other, d / "moving_other.nii.gz"),
    }
    return d, paths, fixed, u_vox, aff


def _endpoint_error(field_vox, truth_vox, fixed, aff, shift):
    """Mean |A_f (x + u(x)) - (A_f (x + u*(x)) + shift)| in mm over the body of the fixed scan
    (> -500 HU) where the true endpoint lies inside the moving scan's slices."""
    nz = fixed.shape[2]
    x = np.indices(fixed.shape, dtype=np.float64)
    end_true = x + truth_vox
    inside = (fixed > -500) & (end_true[2] >= 0.5) & (end_true[2] <= nz - 1.5)
    got = np.moveaxis(x + np.moveaxis(field_vox.astype(np.float64), -1, 0), 0, -1)[inside]
    want = np.moveaxis(end_true, 0, -1)[inside]
    world = lambda p: p @ aff[:3, :3].T + aff[:3, 3]  # noqa: E731
    return float(np.linalg.norm(world(got) - world(want) - shift, axis=1).mean())


@pytest.mark.parametrize("frame", ["same", "other"])
def test_known_warp_matches_the_cli_in_both_frames(sinew_bin, case, frame):
    d, paths, fixed, truth, aff = case
    moving = paths["moving" if frame == "same" else "moving_other"]
    out = d / f"cli_{frame}"
    run_cli(sinew_bin, "register", "-f", str(paths["fixed"]), "-m", str(moving), "-o", str(out), "--npy", "--no-qc",
            "-q", "-j", "2", "--preset", "fast")  # fmt: skip
    reg = sinew.register(nib.load(paths["fixed"]), nib.load(moving), preset="fast", threads=2)
    cli_field = np.load(out / "field.npy")
    # The same computation: the field on the fixed native grid, bit for bit.
    assert reg.field.shape == cli_field.shape == fixed.shape + (3,)
    assert np.array_equal(reg.field.view(np.uint32), cli_field.view(np.uint32))
    warped = np.asanyarray(nib.load(out / "warped.nii.gz").dataobj).astype(np.float32)
    assert np.array_equal(reg.warped.view(np.uint32), warped.view(np.uint32))
    report = json.loads((out / "report.json").read_text())
    for key in ("scan", "working_grid", "moving_working_grid", "working_is_fixed_grid", "initial_alignment",
                "linear_map", "jacobian"):  # fmt: skip
        assert reg.report[key] == report[key], key
    # The rigid stage (run after the initial alignment in the other frame), less its wall time.
    untimed = lambda r: None if r["linear"] is None else {k: v for k, v in r["linear"].items() if k != "seconds"}  # noqa: E731
    assert untimed(reg.report) == untimed(report)
    if frame == "other":  # the initial alignment brings a rigid stage at least
        assert report["linear"] is not None
    np.testing.assert_array_equal(reg.linear_map, np.array(report["linear_map"]))
    # Thick slices kept, in-plane brought to about 2 mm (128 x 1.14 mm over 146 voxels).
    assert reg.report["working_grid"]["shape"] == [146, 146, 48]
    assert reg.report["initial_alignment"]["applied"] is (frame == "other")
    # The known warp is recovered: endpoints in world mm, the other frame's moved by SHIFT.
    epe = _endpoint_error(reg.field, truth, fixed, aff, SHIFT if frame == "other" else 0.0)
    assert epe <= 1.5, f"{frame} frame: mean endpoint error {epe:.3f} mm"


def test_mm_field_and_scan_options_match_the_cli(sinew_bin, case):
    # --working-spacing, --initial and --no-antialias against working_spacing, initial and
    # antialias; the field in mm against field.nii.gz.
    d, paths, _, _, _ = case
    out = d / "cli_opts"
    run_cli(sinew_bin, "register", "-f", str(paths["fixed"]), "-m", str(paths["moving_other"]), "-o", str(out), "--no-qc",
            "-q", "-j", "2", "--preset", "fast", "--iterations", "10,10,10,10", "--working-spacing", "3", "--initial",
            "axes", "--no-antialias")  # fmt: skip
    reg = sinew.register(nib.load(paths["fixed"]), nib.load(paths["moving_other"]), preset="fast", threads=2,
                         iterations=[10, 10, 10, 10], working_spacing=3, initial="axes", antialias=False, units="mm")  # fmt: skip
    f = np.asanyarray(nib.load(out / "field.nii.gz").dataobj)[:, :, :, 0, :]
    assert np.array_equal(reg.field.view(np.uint32), f.view(np.uint32))
    report = json.loads((out / "report.json").read_text())
    assert reg.report["scan"] == report["scan"] == {"working_spacing_mm": 3.0, "initial": "axes", "antialias": False}
    assert reg.report["initial_alignment"] == report["initial_alignment"]
    assert reg.report["working_grid"]["shape"] == [97, 97, 48]
