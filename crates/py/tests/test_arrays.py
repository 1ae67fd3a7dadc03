"""Shapes, dtypes and memory layouts, and the field tools checked against numpy and scipy."""

import numpy as np
import pytest
import scipy.ndimage as ndi

import sinew
from conftest import phantom

FAST = dict(preset="fast", iterations=[10, 10, 10, 10], threads=1)


@pytest.fixture(scope="module")
def scans():
    fixed, fl = phantom((32, 28, 24), seed=3)
    moving, ml = phantom((32, 28, 24), shift=(1.5, -1.0, 0.5), seed=4)
    return fixed, moving, fl, ml


@pytest.fixture(scope="module")
def reference(scans):
    fixed, moving, fl, ml = scans
    return sinew.register(fixed, moving, spacing=(2.0, 2.0, 2.5), fixed_labels=fl, moving_labels=ml, **FAST)


def test_result_shapes_and_dtypes(reference):
    r = reference
    assert r.field.shape == (32, 28, 24, 3) and r.field.dtype == np.float32
    assert r.field.flags.c_contiguous
    assert r.warped.shape == (32, 28, 24) and r.warped.dtype == np.float32
    assert r.warped_labels.shape == (32, 28, 24) and r.warped_labels.dtype == np.uint16
    assert r.jacobian_determinant.shape == (32, 28, 24) and r.jacobian_determinant.dtype == np.float32
    assert set(r.jacobian) >= {"folding_fraction", "sd_log_j", "min", "max", "mean"}
    assert r.report["caution"] == sinew.CAUTION
    np.testing.assert_array_equal(r.affine, np.diag([2.0, 2.0, 2.5, 1.0]))
    assert "mean_after" in r.dice and r.dice["mean_after"] >= r.dice["mean_before"]


def test_float64_non_contiguous_and_integer_inputs_equal_float32(scans, reference):
    fixed, moving, fl, ml = scans
    kw = dict(spacing=(2.0, 2.0, 2.5), **FAST)
    # float64 holding float32 values: converted exactly (numpy's cast, like the CLI's reader).
    a = sinew.register(fixed.astype(np.float64), moving.astype(np.float64), fixed_labels=fl.astype(np.int64),
                       moving_labels=ml.astype(np.float32), **kw)  # fmt: skip
    np.testing.assert_array_equal(a.field, reference.field)
    np.testing.assert_array_equal(a.warped_labels, reference.warped_labels)
    # Fortran order and a strided view of a larger array hold the same voxels.
    big = np.zeros((64, 28, 24), np.float32)
    big[::2] = moving
    b = sinew.register(np.asfortranarray(fixed), big[::2], **kw)
    assert not big[::2].flags.c_contiguous
    np.testing.assert_array_equal(b.field, reference.field)
    # A reversed view is another scan: equal to its contiguous copy, not to the original.
    rev = fixed[::-1]
    c1 = sinew.register(rev, moving, **kw)
    c2 = sinew.register(np.ascontiguousarray(rev), moving, **kw)
    np.testing.assert_array_equal(c1.field, c2.field)
    # Integer scans (e.g. int16 CT) are read as their values.
    i16 = np.round(fixed).astype(np.int16)
    d1 = sinew.register(i16, moving, **kw)
    d2 = sinew.register(i16.astype(np.float32), moving, **kw)
    np.testing.assert_array_equal(d1.field, d2.field)


def test_progress_callback_sees_every_level(scans):
    fixed, moving, _, _ = scans
    seen = []
    sinew.register(fixed, moving, progress=lambda *a: seen.append(a), **FAST)
    levels = sorted({lv for lv, stage, _, _ in seen if stage == "optimise"})
    assert levels == [0, 1, 2, 3]
    assert {s for _, s, _, _ in seen} >= {"pyramid", "descriptors", "optimise", "jacobian"}


def test_progress_callback_errors_propagate(scans):
    fixed, moving, _, _ = scans

    def boom(*_):
        raise KeyError("stop")

    with pytest.raises(KeyError):
        sinew.register(fixed, moving, progress=boom, **FAST)


def test_jacobian_of_a_linear_field_is_exact():
    # Exact maths: for u(x) = A·x (voxels), x + u(x) = (I + A)·x, so det J = det(I + A)
    # everywhere (central and one-sided differences are exact on linear functions).
    A = np.array([[0.1, 0.02, -0.03], [0.05, -0.2, 0.01], [0.0, 0.04, 0.15]])
    idx = np.indices((10, 9, 8)).astype(np.float64)
    u = np.einsum("ab,bijk->ijka", A, idx).astype(np.float32)
    det, stats = sinew.jacobian_determinant(u, stats=True)
    want = np.linalg.det(np.eye(3) + A)  # numpy
    np.testing.assert_allclose(det, want, rtol=1e-5)
    assert stats["folding_fraction"] == 0.0
    assert stats["sd_log_j"] == pytest.approx(0.0, abs=1e-5)
    # Channel-first layout and mm units with spacing: the same map.
    det_cf = sinew.jacobian_determinant(np.moveaxis(u, -1, 0), layout="channel-first")
    np.testing.assert_array_equal(det_cf, det)
    sp = np.array([2.0, 1.0, 3.0])
    det_mm = sinew.jacobian_determinant(u * sp.astype(np.float32), spacing=sp, units="mm")
    np.testing.assert_allclose(det_mm, want, rtol=1e-5)
    # A fold: u = -2.5·x along i maps x to -1.5·x: det = -1.5 (exact), all voxels fold.
    fold = np.zeros((6, 5, 4, 3), np.float32)
    fold[..., 0] = -2.5 * np.indices((6, 5, 4))[0]
    d, s = sinew.jacobian_determinant(fold, stats=True)
    np.testing.assert_allclose(d, -1.5)
    assert s["folding_fraction"] == 1.0


def test_warp_matches_scipy_map_coordinates():
    # scipy.ndimage.map_coordinates(order=1, mode="grid-constant", cval=pad) is the same
    # trilinear pull with a constant padding value.
    rng = np.random.default_rng(5)
    img = ndi.gaussian_filter(rng.standard_normal((20, 18, 16)), 2).astype(np.float32)
    u = (3.0 * ndi.gaussian_filter(rng.standard_normal((20, 18, 16, 3)), (3, 3, 3, 0))).astype(np.float32)
    coords = np.indices(img.shape).astype(np.float64) + np.moveaxis(u.astype(np.float64), -1, 0)
    pad = float(img.min())
    want = ndi.map_coordinates(img.astype(np.float64), coords, order=1, mode="grid-constant", cval=pad)
    got = sinew.warp(img, u)
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, want, atol=1e-5)
    np.testing.assert_allclose(sinew.warp(img, u, pad=0.0),
                               ndi.map_coordinates(img.astype(np.float64), coords, order=1, mode="grid-constant", cval=0.0),
                               atol=1e-5)  # fmt: skip
    # Labels by nearest neighbour: an integer shift moves them exactly (numpy slicing).
    lab = (rng.random((20, 18, 16)) * 4).astype(np.uint16)
    shift = np.zeros((20, 18, 16, 3), np.float32)
    shift[..., 1] = 2.0
    w = sinew.warp(lab, shift, labels=True)
    assert w.dtype == np.uint16
    np.testing.assert_array_equal(w[:, :-2], lab[:, 2:])
    assert (w[:, -2:] == 0).all()


def test_score_dice_matches_numpy():
    rng = np.random.default_rng(6)
    f = np.zeros((16, 15, 14), np.uint16)
    f[3:10, 4:11, 2:9] = 1
    f[11:14, 2:6, 8:12] = 2
    m = np.roll(f, 1, axis=0)
    u = np.zeros((16, 15, 14, 3), np.float32)
    u[..., 0] = 1.0  # pulls m back onto f exactly in the interior
    r = sinew.score(f, m, u)
    w = sinew.warp(m, u, labels=True)
    for lab in r["labels"]:
        a, b = f == lab["label"], w == lab["label"]
        assert lab["dice"] == pytest.approx(2 * (a & b).sum() / (a.sum() + b.sum()))  # numpy Dice
        a0 = m == lab["label"]
        assert lab["dice_before"] == pytest.approx(2 * (a & a0).sum() / (a.sum() + a0.sum()))
    assert r["labels"][0]["dice"] == 1.0 and r["labels"][0]["surface"]["hd95_mm"] == 0.0
    # Warped labels instead of a field: the same Dice, no Jacobian.
    r2 = sinew.score(f, m, warped_labels=w)
    assert [x["dice"] for x in r2["labels"]] == [x["dice"] for x in r["labels"]]
    assert r2["jacobian"] is None
    # Landmarks: |x + u(x) - y| in mm; voxel (5, 5, 5) with 2 mm spacing at origin 0.
    lm = sinew.score(f, m, u, spacing=2.0, fixed_landmarks=[[10.0, 10.0, 10.0]], moving_landmarks=[[12.0, 10.0, 10.0]])
    assert lm["landmarks"]["mean_mm"] == pytest.approx(0.0, abs=1e-6)
    del rng


def test_mind_ssc_shape_and_contrast_invariance():
    # MIND descriptors are invariant to a global affine change of intensities (the
    # descriptor's defining property, Medical Image Analysis 2012).
    img, _ = phantom((20, 18, 16), seed=7)
    d = sinew.mind_ssc(img)
    assert d.shape == (20, 18, 16, 12) and d.dtype == np.float32
    d2 = sinew.mind_ssc(3.0 * img.astype(np.float64) + 100.0)
    np.testing.assert_allclose(d2, d, atol=2e-3)
    assert not np.allclose(sinew.mind_ssc(img, dilation=1), d)


def test_scans_in_far_apart_frames(scans):
    # The moving header puts the same body 400 mm away along x. With initial="off" the frames
    # are trusted, the bodies do not overlap at all, and the call warns as the command line
    # does; with the default ("auto") the initial alignment is applied and finds the shift.
    fixed, moving, _, _ = scans
    far = np.diag([2.0, 2.0, 2.5, 1.0])
    far[0, 3] = 400.0
    with pytest.warns(UserWarning, match="fixed and moving: the bodies overlap only 0 % after the initial alignment"):
        off = sinew.register(fixed, moving, affine=(np.diag([2.0, 2.0, 2.5, 1.0]), far), initial="off", **FAST)
    assert off.report["initial_alignment"]["applied"] is False
    assert off.report["initial_alignment"]["overlap_final"] < sinew.WARN_OVERLAP
    auto = sinew.register(fixed, moving, affine=(np.diag([2.0, 2.0, 2.5, 1.0]), far), **FAST)
    assert auto.report["initial_alignment"]["applied"] is True
    assert auto.report["initial_alignment"]["overlap_final"] > 0.8
    # The linear map moves fixed points about 400 mm along x (the bodies differ by 1.5 voxels
    # = 3 mm besides), and the field carries it: x + u(x) lands about 200 voxels away.
    assert abs(auto.linear_map[0, 3] - 400.0) < 10.0, auto.linear_map
    assert abs(float(np.median(auto.field[..., 0])) - 200.0) < 5.0
