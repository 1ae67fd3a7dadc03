"""Bad input raises ValueError with a one-line message naming the argument, and never
crashes the interpreter."""

import numpy as np
import pytest

import sinew
from conftest import phantom

SCAN, LABELS = phantom((16, 14, 12), seed=8)
OTHER, _ = phantom((16, 14, 12), shift=(1, 0, 0), seed=9)
QUICK = dict(preset="fast", iterations=[2, 2, 2, 2], threads=1)


def _raises(match, fn, *a, **kw):
    with pytest.raises(ValueError, match=match) as e:
        fn(*a, **kw)
    assert "\n" not in str(e.value)
    return str(e.value)


def test_bad_scans():
    _raises("fixed: expected a 3-D array", sinew.register, SCAN[0], OTHER, **QUICK)
    _raises("moving: 1 voxels are NaN or infinite", sinew.register, SCAN, _with(OTHER, (1, 1, 1), np.inf), **QUICK)
    _raises(r"fixed: the image is constant \(3\); nothing to register", sinew.register, np.full((8, 8, 8), 3.0), OTHER, **QUICK)
    _raises("fixed: expected real numbers", sinew.register, SCAN.astype(np.complex64), OTHER, **QUICK)
    _raises("fixed: expected real numbers", sinew.register, np.full((4, 4, 4), "a"), OTHER, **QUICK)
    _raises("fixed: empty shape", sinew.register, np.zeros((0, 4, 4)), OTHER, **QUICK)
    _raises("fixed: an array or image is required", sinew.register, None, OTHER, **QUICK)


def _with(a, idx, v):
    b = a.copy()
    b[idx] = v
    return b


def test_bad_grids():
    _raises("fixed: spacing must be", sinew.register, SCAN, OTHER, spacing=-1, **QUICK)
    _raises("fixed: spacing must be", sinew.register, SCAN, OTHER, spacing=(1, 2), **QUICK)
    _raises("fixed: give spacing or affine, not both", sinew.register, SCAN, OTHER, spacing=1, affine=np.eye(4), **QUICK)
    _raises("fixed: the affine must be a 4x4 matrix", sinew.register, SCAN, OTHER, affine=np.eye(3), **QUICK)
    _raises("fixed: singular or non-finite voxel-to-world affine", sinew.register, SCAN, OTHER,
            affine=np.diag([1.0, 0.0, 1.0, 1.0]), **QUICK)  # fmt: skip
    _raises("fixed: the affine holds NaN", sinew.register, SCAN, OTHER, affine=np.full((4, 4), np.nan), **QUICK)
    bad = np.eye(4)
    bad[3, 0] = 1
    _raises(r"fixed: the affine's last row must be \[0, 0, 0, 1\]", sinew.register, SCAN, OTHER, affine=bad, **QUICK)


def test_bad_labels_and_masks():
    _raises(r"fixed_labels: grid \[16, 14, 11\] does not match its scan fixed \(\[16, 14, 12\]\); resample it", sinew.register, SCAN, OTHER,
            fixed_labels=LABELS[:, :, :11], **QUICK)  # fmt: skip
    _raises("moving_labels: negative label -1", sinew.register, SCAN, OTHER, moving_labels=LABELS.astype(int) - 1, **QUICK)
    _raises(r"fixed_labels: labels are not integers \(found value 0.5\)", sinew.register, SCAN, OTHER,
            fixed_labels=LABELS + 0.5, **QUICK)  # fmt: skip
    _raises("fixed_labels: label 70000 exceeds 65535", sinew.register, SCAN, OTHER,
            fixed_labels=_with(LABELS.astype(np.int64), (0, 0, 0), 70000), **QUICK)  # fmt: skip
    _raises(r"fixed_labels: the label map is empty \(every voxel is 0", sinew.register, SCAN, OTHER,
            fixed_labels=np.zeros_like(LABELS), **QUICK)  # fmt: skip
    _raises(r"mask: the mask is empty \(no non-zero voxel\)", sinew.register, SCAN, OTHER, mask=np.zeros(SCAN.shape, bool),
            **QUICK)  # fmt: skip


def test_bad_parameters(tmp_path):
    _raises("unknown preset 'quick'", sinew.register, SCAN, OTHER, preset="quick")
    _raises('unknown parameter "lamda"', sinew.register, SCAN, OTHER, lamda=0.1, **QUICK)
    _raises("parameters: invalid parameter lambda", sinew.register, SCAN, OTHER, lambda_=-1.0, **QUICK)
    _raises("parameters: invalid parameter iterations: needs 4 values", sinew.register, SCAN, OTHER, preset="fast",
            iterations=[1, 2])  # fmt: skip
    _raises("parameters: unknown variant `bogus`", sinew.register, SCAN, OTHER, similarity="bogus", **QUICK)
    _raises("parameters: invalid type", sinew.register, SCAN, OTHER, levels="three", **QUICK)
    _raises("params: ", sinew.register, SCAN, OTHER, lambda_=float("nan"), **QUICK)
    _raises("params: ", sinew.register, SCAN, OTHER, lambda_=object(), **QUICK)
    _raises("threads must be at least 1", sinew.register, SCAN, OTHER, threads=0)
    _raises('units must be "voxel" or "mm"', sinew.register, SCAN, OTHER, units="cm", **QUICK)
    _raises("progress: must be callable", sinew.register, SCAN, OTHER, progress=3, **QUICK)
    _raises("working_spacing: -1: must be 0 or a positive number of mm", sinew.register, SCAN, OTHER,
            working_spacing=-1, **QUICK)  # fmt: skip
    _raises("working_spacing: inf: must be 0 or a positive", sinew.register, SCAN, OTHER, working_spacing=np.inf, **QUICK)
    _raises("working_spacing: must be a number of mm", sinew.register, SCAN, OTHER, working_spacing="2", **QUICK)
    _raises('initial: expected "auto", "centres", "axes" or "off", got "center"', sinew.register, SCAN, OTHER,
            initial="center", **QUICK)  # fmt: skip
    _raises("antialias: must be True or False", sinew.register, SCAN, OTHER, antialias="no", **QUICK)
    missing = tmp_path / "none.toml"
    _raises(f"{missing}: cannot read", sinew.register, SCAN, OTHER, config=missing, **QUICK)
    bad = tmp_path / "bad.toml"
    bad.write_text("lambda = = 1\n")
    _raises(f"{bad}: not valid TOML", sinew.register, SCAN, OTHER, config=bad, **QUICK)
    unknown = tmp_path / "unknown.toml"
    unknown.write_text("lamda = 1\n")
    _raises(f"{unknown}: unknown field `lamda`", sinew.register, SCAN, OTHER, config=unknown, **QUICK)
    _raises("config: unknown field `x`", sinew.register, SCAN, OTHER, config={"x": 1}, **QUICK)
    _raises("config: expected a dict", sinew.register, SCAN, OTHER, config=3, **QUICK)


def test_bad_fields_and_scores():
    u = np.zeros((16, 14, 12, 3), np.float32)
    _raises(r"field: expected shape \(nx, ny, nz, 3\)", sinew.warp, SCAN, u[..., 0])
    _raises("field: the vector axis has 2 entries", sinew.warp, SCAN, u[..., :2])
    _raises("field: the field holds NaN or infinite vectors", sinew.warp, SCAN, _with(u, (0, 0, 0, 0), np.nan))
    _raises("field: the field holds NaN", sinew.jacobian_determinant, _with(u, (1, 1, 1, 2), np.inf))
    _raises('layout must be "channel-last" or "channel-first"', sinew.jacobian_determinant, u, layout="nhwc")
    _raises("moving: 1 voxels are NaN or infinite", sinew.warp, _with(SCAN, (0, 0, 0), np.nan), u)
    _raises("pad: must be a number", sinew.warp, SCAN, u, pad="x")
    _raises("field: shape .* does not match the fixed labels", sinew.score, LABELS, LABELS, u[:8])
    _raises(r"give a field or warped_labels \(exactly one\)", sinew.score, LABELS, LABELS)
    _raises('direction must be "pull" or "push"', sinew.score, LABELS, LABELS, u, direction="forward")
    _raises("landmarks: give both", sinew.score, LABELS, LABELS, u, fixed_landmarks=[[0, 0, 0]])
    _raises("LandmarkCount|landmark", sinew.score, LABELS, LABELS, u, fixed_landmarks=[[0, 0, 0]],
            moving_landmarks=[[0, 0, 0], [1, 1, 1]])  # fmt: skip
    _raises(r"fixed_landmarks: expected shape \(n, 3\)", sinew.score, LABELS, LABELS, u, fixed_landmarks=[[0, 0]],
            moving_landmarks=[[0, 0]])  # fmt: skip
    _raises("batch sizes differ", sinew.score, np.stack([LABELS] * 2), LABELS, np.stack([u] * 3))
    _raises("a batch of label maps needs a batch of fields", sinew.score, np.stack([LABELS] * 2), LABELS, u)
    _raises(r"fixed_labels: the label map is empty", sinew.score, np.zeros_like(LABELS), LABELS, u)
    _raises("mind_ssc: MIND-SSC dilation must be at least 1 voxel", sinew.mind_ssc, SCAN, dilation=0)
    _raises("mind_ssc: radius must be a non-negative integer", sinew.mind_ssc, SCAN, radius=-1)
    _raises("mind_ssc: radius 9", sinew.mind_ssc, SCAN, radius=9)


def test_nibabel_images_with_an_affine_too_or_on_another_grid():
    nib = pytest.importorskip("nibabel")
    img = nib.Nifti1Image(SCAN, np.eye(4))
    _raises("fixed: a nibabel image carries its own affine", sinew.register, img, OTHER, affine=np.eye(4), **QUICK)
    shifted = np.eye(4)
    shifted[0, 3] = 1.0
    labels = nib.Nifti1Image(LABELS, shifted)
    _raises(r"fixed_labels: grid \[16, 14, 12\] does not match its scan fixed .*resample it onto the scan's grid first",
            sinew.register, img, nib.Nifti1Image(OTHER, np.eye(4)), fixed_labels=labels, **QUICK)  # fmt: skip


def test_the_native_module_refuses_wrong_dtypes_without_crashing():
    # The wrappers convert dtypes; the native functions take exactly one and raise TypeError.
    from sinew import _sinew

    with pytest.raises(TypeError):
        _sinew.mind_ssc(SCAN.astype(np.float64), np.eye(4))


def test_huge_finite_fields_sample_outside_without_a_panic():
    # Every sample lands far outside the moving scan: the padding value everywhere.
    u = np.full(SCAN.shape + (3,), 1e30, np.float32)
    np.testing.assert_array_equal(sinew.warp(SCAN, u, pad=-5.0), np.full(SCAN.shape, -5.0, np.float32))
    assert (sinew.warp(LABELS, u, labels=True) == 0).all()
    r = sinew.score(LABELS, LABELS, u)
    assert all(lab["dice"] == 0.0 for lab in r["labels"])
