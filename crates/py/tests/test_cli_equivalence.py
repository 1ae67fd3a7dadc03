"""The Python module computes what the command line computes: same inputs (read by nibabel
here, by sinew's own reader there), same parameters, same thread count → bit-identical
field, warped scan, labels and Jacobian, and the same report figures."""

import json

import nibabel as nib
import numpy as np
import pytest

import sinew
from conftest import run_cli


def _bits_equal(a, b):
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape, (a.shape, b.shape)
    assert a.dtype == b.dtype, (a.dtype, b.dtype)
    if a.dtype.kind == "f":
        assert np.array_equal(a.view(np.uint32 if a.itemsize == 4 else np.uint64), b.view(np.uint32 if b.itemsize == 4 else np.uint64))
    else:
        assert np.array_equal(a, b)


@pytest.fixture(scope="module", params=[1, 2], ids=["1-thread", "2-threads"])
def cli_and_py(request, sinew_bin, pair_files, tmp_path_factory):
    threads = request.param
    out = tmp_path_factory.mktemp(f"cli{threads}")
    p = pair_files
    run_cli(
        sinew_bin, "register", "-f", str(p["fixed"]), "-m", str(p["moving"]),
        "--fixed-labels", str(p["fixed_labels"]), "--moving-labels", str(p["moving_labels"]),
        "-o", str(out), "--npy", "--no-qc", "-q", "-j", str(threads), "--preset", "fast",
    )  # fmt: skip
    reg = sinew.register(
        nib.load(p["fixed"]),
        nib.load(p["moving"]),
        fixed_labels=nib.load(p["fixed_labels"]),
        moving_labels=nib.load(p["moving_labels"]),
        preset="fast",
        threads=threads,
    )
    return out, reg, threads


def test_field_is_bit_identical_to_the_cli(cli_and_py):
    out, reg, _ = cli_and_py
    # field.npy: (nx, ny, nz, 3) float32 voxels, written by the CLI, read by numpy.
    _bits_equal(reg.field, np.load(out / "field.npy"))
    assert reg.field.dtype == np.float32 and reg.field.shape == (48, 40, 36, 3)
    # The recovered shift is not trivial (the scans differ by about 2 voxels).
    assert np.abs(reg.field).max() > 1.0


def test_outputs_and_report_match_the_cli(cli_and_py):
    out, reg, threads = cli_and_py
    _bits_equal(reg.warped, np.asanyarray(nib.load(out / "warped.nii.gz").dataobj).astype(np.float32))
    _bits_equal(reg.warped_labels, np.asanyarray(nib.load(out / "warped_labels.nii.gz").dataobj).astype(np.uint16))
    _bits_equal(reg.jacobian_determinant, np.asanyarray(nib.load(out / "jacdet.nii.gz").dataobj))
    report = json.loads((out / "report.json").read_text())
    assert reg.report["params"] == report["params"]
    assert reg.jacobian == report["jacobian"]
    assert reg.dice == report["dice"]
    assert reg.report["threads"] == report["threads"] == threads
    assert [lv["energy_end"] for lv in reg.report["levels"]] == [lv["energy_end"] for lv in report["levels"]]
    assert reg.report["caution"] == report["caution"]


def test_mm_field_matches_the_cli_nifti_field(sinew_bin, pair_files, tmp_path):
    p = pair_files
    run_cli(sinew_bin, "register", "-f", str(p["fixed"]), "-m", str(p["moving"]), "-o", str(tmp_path),
            "--no-qc", "-q", "-j", "1", "--preset", "fast")  # fmt: skip
    reg = sinew.register(nib.load(p["fixed"]), nib.load(p["moving"]), preset="fast", threads=1, units="mm")
    f = np.asanyarray(nib.load(tmp_path / "field.nii.gz").dataobj)  # (nx, ny, nz, 1, 3), mm
    _bits_equal(reg.field, f[:, :, :, 0, :])
    assert reg.units == "mm"
    # u_mm = M · u_vox (the affine's linear part; exact up to float32 rounding).
    vox = sinew.register(nib.load(p["fixed"]), nib.load(p["moving"]), preset="fast", threads=1).field
    lin = nib.load(p["fixed"]).affine[:3, :3]
    np.testing.assert_allclose(reg.field, vox.astype(np.float64) @ lin.T, atol=2e-5)


def test_parameters_apply_in_the_cli_order(sinew_bin, pair_files, tmp_path):
    # preset → TOML table → keywords, levels changed with the per-level lists resized.
    p = pair_files
    cfg = tmp_path / "params.toml"
    cfg.write_text('lambda = 0.3\niterations = [30, 20, 10, 10]\nsimilarity = "lncc"\n')
    out = tmp_path / "out"
    run_cli(sinew_bin, "register", "-f", str(p["fixed"]), "-m", str(p["moving"]), "-o", str(out), "--npy",
            "--no-qc", "-q", "-j", "1", "--config", str(cfg), "--lambda", "0.2", "--levels", "3",
            "--diffeomorphic")  # fmt: skip
    reg = sinew.register(
        nib.load(p["fixed"]), nib.load(p["moving"]), config=cfg, lambda_=0.2, levels=3, diffeomorphic=True, threads=1
    )
    report = json.loads((out / "report.json").read_text())
    assert reg.report["params"] == report["params"]
    assert report["params"]["iterations"] == [20, 10, 10]
    _bits_equal(reg.field, np.load(out / "field.npy"))
    # The same table as a dict.
    reg2 = sinew.register(
        nib.load(p["fixed"]),
        nib.load(p["moving"]),
        config={"lambda": 0.3, "iterations": [30, 20, 10, 10], "similarity": "lncc"},
        lambda_=0.2, levels=3, diffeomorphic=True, threads=1,
    )  # fmt: skip
    _bits_equal(reg2.field, reg.field)


def test_arrays_with_the_image_affine_equal_the_images(pair_files):
    p = pair_files
    fi, mi = nib.load(p["fixed"]), nib.load(p["moving"])
    a = sinew.register(fi, mi, preset="fast", threads=1, iterations=[5, 5, 5, 5])
    b = sinew.register(fi.get_fdata(), mi.get_fdata(), affine=fi.affine, preset="fast", threads=1, iterations=[5, 5, 5, 5])
    _bits_equal(a.field, b.field)
    np.testing.assert_array_equal(a.affine, fi.affine)


def _score_cli(exe, p, field_path, *extra):
    r = run_cli(exe, "score", "--fixed-labels", str(p["fixed_labels"]), "--moving-labels", str(p["moving_labels"]),
                "--field", str(field_path), "-j", "1", *extra)  # fmt: skip
    return json.loads(r.stdout)


def test_score_matches_the_cli(sinew_bin, pair_files, cli_and_py, tmp_path):
    out, reg, _ = cli_and_py
    p = pair_files
    fl, ml = nib.load(p["fixed_labels"]), nib.load(p["moving_labels"])
    cli = _score_cli(sinew_bin, p, out / "field.npy")
    py = sinew.score(fl, ml, reg.field, threads=1)
    for key in ("labels", "mean_dice_before", "mean_dice", "mean_hd95_mm", "jacobian"):
        assert py[key] == cli["score"][key], key
    # Dice after equals the registration's own report.
    assert [lab["dice"] for lab in py["labels"]] == [reg.dice["after"][str(lab["label"])] for lab in py["labels"]]
    # Channel-first layout, as `--layout channel-first`.
    cf = np.ascontiguousarray(np.moveaxis(reg.field, -1, 0))
    np.save(tmp_path / "cf.npy", cf)
    cli_cf = _score_cli(sinew_bin, p, tmp_path / "cf.npy", "--layout", "channel-first")
    py_cf = sinew.score(fl, ml, cf, layout="channel-first", threads=1)
    assert py_cf["labels"] == cli_cf["score"]["labels"] == cli["score"]["labels"]
    # A push field, inverted first (as `--direction push`).
    cli_push = _score_cli(sinew_bin, p, out / "field.npy", "--direction", "push")
    py_push = sinew.score(fl, ml, reg.field, direction="push", threads=1)
    assert py_push["labels"] == cli_push["score"]["labels"]
    assert py_push["inverted"] == cli_push["field"]["inverted"]


def test_score_batches_equal_single_calls(pair_files, cli_and_py):
    _, reg, _ = cli_and_py
    p = pair_files
    fl, ml = nib.load(p["fixed_labels"]), nib.load(p["moving_labels"])
    aff = fl.affine
    f_arr, m_arr = np.asarray(fl.dataobj), np.asarray(ml.dataobj)
    batch = np.stack([reg.field, np.zeros_like(reg.field), 0.5 * reg.field])
    singles = [sinew.score(f_arr, m_arr, u, affine=aff) for u in batch]
    assert sinew.score(f_arr, m_arr, batch, affine=aff) == singles
    cf = np.moveaxis(batch, -1, 1)  # (batch, 3, nx, ny, nz), a non-contiguous view
    assert sinew.score(f_arr, m_arr, cf, affine=aff, layout="channel-first") == singles
    labels_batch = np.stack([f_arr] * 3)
    assert sinew.score(labels_batch, np.stack([m_arr] * 3), batch, affine=aff) == singles
    # The zero field scores like the unwarped labels (exact: nothing moves).
    z = singles[1]
    assert all(lab["dice"] == lab["dice_before"] for lab in z["labels"])
    assert z["jacobian"]["folding_fraction"] == 0.0 and z["jacobian"]["min"] == 1.0


def test_moving_on_another_grid_matches_the_cli(sinew_bin, pair_files, tmp_path):
    # A moving scan cropped (another shape and origin): both bring it onto the fixed grid
    # through world coordinates first.
    p = pair_files
    mi = nib.load(p["moving"])
    crop = np.asanyarray(mi.dataobj)[3:45, 2:, :33]
    aff = mi.affine.copy()
    aff[:3, 3] = mi.affine[:3, :3] @ [3, 2, 0] + mi.affine[:3, 3]
    img = nib.Nifti1Image(crop, aff)
    img.set_sform(aff, code=1)
    img.set_qform(aff, code=1)
    nib.save(img, tmp_path / "moving_crop.nii.gz")
    out = tmp_path / "out"
    run_cli(sinew_bin, "register", "-f", str(p["fixed"]), "-m", str(tmp_path / "moving_crop.nii.gz"), "-o", str(out),
            "--npy", "--no-qc", "-q", "-j", "1", "--preset", "fast")  # fmt: skip
    reg = sinew.register(nib.load(p["fixed"]), nib.load(tmp_path / "moving_crop.nii.gz"), preset="fast", threads=1)
    assert reg.report["moving_resampled"] is True
    _bits_equal(reg.field, np.load(out / "field.npy"))
    _bits_equal(reg.warped, np.asanyarray(nib.load(out / "warped.nii.gz").dataobj).astype(np.float32))
    # The same from arrays with a pair of affines (as stored: the file holds float32).
    stored = nib.load(tmp_path / "moving_crop.nii.gz").affine
    reg2 = sinew.register(np.asanyarray(nib.load(p["fixed"]).dataobj), crop, affine=(nib.load(p["fixed"]).affine, stored),
                          preset="fast", threads=1)  # fmt: skip
    _bits_equal(reg2.field, reg.field)


@pytest.mark.parametrize("policy", ["pad", -1024.0])
def test_nan_voxels_are_treated_as_the_cli_treats_them(sinew_bin, pair_files, tmp_path, policy):
    # A block of voxels outside the scanned volume, marked NaN as some exporters do (and one
    # +inf): `nan=` must do what `--nan` does, bit for bit, and record the same counts.
    p = pair_files
    fixed = nib.load(p["fixed"])
    data = np.asanyarray(fixed.dataobj).astype(np.float32)
    data[:6, :, :] = np.nan
    data[10, 10, 10] = np.inf
    bad = tmp_path / "fixed_nan.nii.gz"
    nib.save(nib.Nifti1Image(data, fixed.affine), bad)
    out = tmp_path / "cli"
    run_cli(sinew_bin, "register", "-f", str(bad), "-m", str(p["moving"]), "-o", str(out), "--npy",
            "--no-qc", "-q", "-j", "1", "--preset", "fast", "--nan", str(policy))  # fmt: skip
    reg = sinew.register(nib.load(bad), nib.load(p["moving"]), preset="fast", threads=1, nan=policy)
    _bits_equal(reg.field, np.load(out / "field.npy"))
    report = json.loads((out / "report.json").read_text())
    assert reg.report["nan"] == report["nan"]
    # The count is the number of non-finite voxels numpy sees in the file (6 planes + 1).
    assert reg.report["nan"]["fixed_voxels"] == int(np.count_nonzero(~np.isfinite(data)))
    assert reg.report["nan"]["moving_voxels"] == 0
    assert np.isfinite(reg.warped).all() and np.isfinite(reg.field).all()
    # Refused by default, with the CLI's one-line reason.
    with pytest.raises(ValueError, match=r"fixed: \d+ voxels are NaN or infinite") as e:
        sinew.register(nib.load(bad), nib.load(p["moving"]), preset="fast", threads=1)
    assert "\n" not in str(e.value)
    with pytest.raises(ValueError, match="nan: zero: expected refuse, pad or a finite number"):
        sinew.register(nib.load(bad), nib.load(p["moving"]), preset="fast", threads=1, nan="zero")
