"""Checks of the accuracy benchmark's own scorer (scripts/accuracy_scorer.py) against exact facts.

Every expected value below is worked out by hand from a published definition or an exact
mathematical fact named beside it, so a wrong scorer fails here.
"""

import math
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "scripts"))
import accuracy_scorer as S  # noqa: E402
import accuracy_bench as B  # noqa: E402


def test_dice_of_known_boxes():
    # Sørensen–Dice coefficient 2|A∩B| / (|A|+|B|): two 10×10×10 boxes offset by 5 voxels
    # along i share 5×10×10 = 500 voxels → 2·500 / (1000 + 1000) = 0.5 exactly.
    a = np.zeros((30, 20, 20), np.uint8)
    b = np.zeros_like(a)
    a[0:10, 0:10, 0:10] = 1
    b[5:15, 0:10, 0:10] = 1
    # Label 2: identical 4×4×4 boxes → Dice 1. Label 3: only in the fixed map → Dice 0.
    a[20:24, 10:14, 10:14] = 2
    b[20:24, 10:14, 10:14] = 2
    a[26:28, 0:2, 0:2] = 3
    d = S.dice_per_label(a, b)
    assert d == {1: 0.5, 2: 1.0, 3: 0.0}
    assert S.mean_dice(a, b) == pytest.approx(0.5)
    # Dice of 1 (8 voxels) against a map holding it shifted half out (4 shared):
    # 2·4 / (8 + 8) = 0.5; labels present in neither map are not averaged in.
    c = np.zeros((4, 4, 4), np.uint8)
    c[0:2, 0:2, 0:2] = 1
    e = np.zeros_like(c)
    e[1:3, 0:2, 0:2] = 1
    assert S.dice_per_label(c, e) == {1: 0.5}


def test_pull_convention_on_a_known_shift():
    # warped(x) = moving(x + u(x)): with u = +3 voxels along i, the voxel at i takes the
    # moving value at i + 3, so a box at i ∈ [10, 20) appears at i ∈ [7, 17).
    moving = np.zeros((30, 8, 8), np.uint8)
    moving[10:20, 2:6, 2:6] = 4
    u = np.zeros((30, 8, 8, 3))
    u[..., 0] = 3.0
    warped = S.pull(moving, u, order=0)
    expect = np.zeros_like(moving)
    expect[7:17, 2:6, 2:6] = 4
    np.testing.assert_array_equal(warped, expect)
    # Linear interpolation of a ramp moving(i) = i at i + 2.5 gives i + 2.5 exactly (inside).
    ramp = np.broadcast_to(np.arange(30.0)[:, None, None], (30, 8, 8)).copy()
    u[..., 0] = 2.5
    w = S.pull(ramp, u, order=1)
    np.testing.assert_allclose(w[:27], ramp[:27] + 2.5, atol=1e-12)
    # Same as scipy.ndimage.shift with the opposite sign (its output(x) = input(x − shift)).
    np.testing.assert_allclose(w, ndimage.shift(ramp, (-2.5, 0, 0), order=1, mode="nearest"), atol=1e-12)


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (2.0, 3.0, 1.5)])
def test_jacobian_of_an_affine_field_is_the_matrix_determinant(spacing):
    # φ(x) = A x (x in mm) has Jacobian A everywhere, so det J = det A at every voxel; central
    # and one-sided differences are exact on a linear function.
    a = np.array([[1.1, 0.2, -0.1], [0.05, 0.9, 0.3], [0.0, -0.2, 1.2]])
    shape = (9, 7, 6)
    aff = np.diag(list(spacing) + [1.0])
    x_mm = np.moveaxis(S.identity_coords(shape), 0, -1) * np.array(spacing)
    u_mm = x_mm @ (a - np.eye(3)).T
    u_vox = u_mm / np.array(spacing)
    det = S.jacobian_det(u_vox, aff)
    np.testing.assert_allclose(det, np.linalg.det(a), rtol=1e-12)
    st = S.folding_stats(det)
    assert st["folding_pct"] == 0.0
    assert st["sdlogj"] == pytest.approx(0.0, abs=1e-12)
    # A reflection (det A < 0) folds every voxel.
    r = np.diag([-1.0, 1.0, 1.0])
    det_r = S.jacobian_det((x_mm @ (r - np.eye(3)).T) / np.array(spacing), aff)
    np.testing.assert_allclose(det_r, -1.0, rtol=1e-12)
    assert S.folding_stats(det_r)["folding_pct"] == 100.0


def test_folding_and_sdlogj_definitions():
    # det ≤ 0 counts as folded (2 of 4 → 50 %); SDlogJ is the population standard deviation of
    # log det over det > 0: log 1 = 0 and log e = 1 → std([0, 1]) = 0.5.
    det = np.array([-1.0, 0.0, 1.0, math.e])
    st = S.folding_stats(det)
    assert st["folding_pct"] == 50.0
    assert st["sdlogj"] == pytest.approx(0.5, abs=1e-15)
    assert st["det_min"] == -1.0


def test_endpoint_error_exact_values():
    rng = np.random.default_rng(0)
    u = rng.normal(size=(5, 6, 7, 3))
    mask = np.ones((5, 6, 7), bool)
    aff = np.diag([3.0, 4.0, 2.0, 1.0])
    # A field against itself: 0.
    e = S.endpoint_error(u, u, aff, mask)
    assert e == {"epe_mean_mm": 0.0, "epe_p95_mm": 0.0}
    # A shift of (1, 1, 0) voxels at spacing (3, 4, 2) mm is √(3² + 4²) = 5 mm long (Pythagoras).
    shift = np.zeros_like(u)
    shift[..., 0] = 1.0
    shift[..., 1] = 1.0
    e = S.endpoint_error(u + shift, u, aff, mask)
    assert e["epe_mean_mm"] == pytest.approx(5.0, abs=1e-12)
    assert e["epe_p95_mm"] == pytest.approx(5.0, abs=1e-12)
    # Only the masked voxels count: 2 mm errors outside the mask are ignored.
    half = np.zeros((5, 6, 7), bool)
    half[:2] = True
    v = u.copy()
    v[2:, ..., 2] += 1.0
    assert S.endpoint_error(v, u, aff, half)["epe_mean_mm"] == 0.0


def test_block_mean_keeps_world_positions():
    # Each new voxel is the mean of its 2×2×1 block and sits at the mean world position of
    # that block's voxel centres (a flipped axis, as in scanner LPS-stored scans, included).
    aff = np.array([[-0.5, 0, 0, 100.0], [0, 0.5, 0, -20.0], [0, 0, 5.0, 7.0], [0, 0, 0, 1]])
    a = np.arange(5 * 4 * 3, dtype=float).reshape(5, 4, 3)
    out, aff2 = S.block_mean(a, aff, (2, 2, 1))
    assert out.shape == (2, 2, 3)
    assert out[1, 0, 2] == a[2:4, 0:2, 2].mean()
    centres = [aff @ np.array([i, j, 2, 1.0]) for i in (2, 3) for j in (0, 1)]
    np.testing.assert_allclose(aff2 @ np.array([1, 0, 2, 1.0]), np.mean(centres, axis=0))
    np.testing.assert_allclose(S.spacing_of(aff2), [1.0, 1.0, 5.0])


def test_known_field_is_smooth_scaled_and_zero_on_the_border():
    u = S.sine_field_mm((40, 30, 20), 12.0, seed=3)
    assert np.linalg.norm(u, axis=-1).max() == pytest.approx(12.0)
    # sin(π n t) vanishes at t = 0 and t = 1 (integer n).
    for axis in range(3):
        assert np.abs(np.take(u, [0, -1], axis=axis)).max() < 1e-12
    np.testing.assert_array_equal(u, S.sine_field_mm((40, 30, 20), 12.0, seed=3))  # fixed seed


def test_sinew_key_values_become_toml():
    assert B.toml_value("0.05") == "0.05"
    assert B.toml_value("[200,150,100]") == "[200,150,100]"
    assert B.toml_value("true") == "true"
    assert B.toml_value("bspline") == '"bspline"'
    assert B.toml_value('"lncc"') == '"lncc"'
