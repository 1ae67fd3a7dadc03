"""Independent scorer of the accuracy benchmark (numpy and scipy only; never sinew's scorer).

Conventions (the same as sinew's and the reference's field files):

* A displacement field ``u`` is an array of shape ``(nx, ny, nz, 3)`` in VOXEL units along the
  array axes ``(i, j, k)``, living on the fixed grid, and it PULLS:
  ``warped(x) = moving(x + u(x))``.
* ``affine`` is the fixed grid's 4x4 voxel-to-world matrix (NIfTI, mm). Its 3x3 part ``M``
  turns a voxel-unit vector into a world vector in mm: ``v_mm = M @ v_vox``.

Figures:

* Dice of label ``l``: ``2 |A ∩ B| / (|A| + |B|)`` with ``A = {fixed == l}`` and
  ``B = {warped moving == l}`` (Sørensen–Dice coefficient).
* Jacobian determinant of the map ``φ(x) = x + u(x)`` with ``x`` and ``u`` in mm:
  ``det J = det(I + ∂u_mm/∂x_mm)``, derivatives by central differences (one-sided at the
  border) from ``numpy.gradient`` with the voxel spacing in mm.
* Folding: percentage of voxels with ``det J ≤ 0``. SDlogJ: population standard deviation of
  ``log det J`` over the voxels with ``det J > 0``.
* Endpoint error: ``|M (u − u*)|`` in mm, mean and 95th percentile over a mask.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def spacing_of(affine: np.ndarray) -> np.ndarray:
    """Voxel spacing in mm along i, j, k: the lengths of the affine's first three columns."""
    return np.linalg.norm(np.asarray(affine, dtype=np.float64)[:3, :3], axis=0)


def identity_coords(shape) -> np.ndarray:
    """Voxel index coordinates, shape ``(3, nx, ny, nz)``, float64."""
    return np.stack(np.meshgrid(*[np.arange(n, dtype=np.float64) for n in shape], indexing="ij"))


def pull(moving: np.ndarray, u_vox: np.ndarray, order: int, mode: str = "nearest") -> np.ndarray:
    """``warped(x) = moving(x + u(x))`` by ``scipy.ndimage.map_coordinates``.

    ``u_vox`` is ``(nx, ny, nz, 3)`` in voxels on the output grid (the moving scan must share
    that grid). ``order=0`` (nearest neighbour) for label maps, ``order=1`` or ``3`` for
    intensities. Samples beyond the border take the nearest border value (``mode``).
    """
    u = np.asarray(u_vox, dtype=np.float64)
    if u.shape[:3] != moving.shape or u.shape[3] != 3:
        raise ValueError(f"field of shape {u.shape} does not fit a scan of shape {moving.shape}")
    coords = identity_coords(moving.shape) + np.moveaxis(u, -1, 0)
    return ndimage.map_coordinates(moving, coords, order=order, mode=mode)


def dice_per_label(fixed_labels: np.ndarray, warped_labels: np.ndarray) -> dict[int, float]:
    """Dice of every non-zero label present in either map (``2|A∩B| / (|A|+|B|)``)."""
    a = np.asarray(fixed_labels).astype(np.int64).ravel()
    b = np.asarray(warped_labels).astype(np.int64).ravel()
    present = np.union1d(np.unique(a), np.unique(b))
    present = present[present != 0]
    n = int(present.max()) + 1 if present.size else 1
    count_a = np.bincount(a, minlength=n)
    count_b = np.bincount(b, minlength=n)
    both = np.bincount(a[a == b], minlength=n)
    return {int(l): float(2.0 * both[l] / (count_a[l] + count_b[l])) for l in present}


def mean_dice(fixed_labels: np.ndarray, warped_labels: np.ndarray) -> float:
    """Mean Dice over the non-zero labels present in either map."""
    d = dice_per_label(fixed_labels, warped_labels)
    return float(np.mean(list(d.values()))) if d else float("nan")


def to_mm(u_vox: np.ndarray, affine: np.ndarray) -> np.ndarray:
    """Voxel-unit vectors to world vectors in mm: ``v_mm = M @ v_vox`` per voxel."""
    m = np.asarray(affine, dtype=np.float64)[:3, :3]
    return np.asarray(u_vox, dtype=np.float64) @ m.T


def jacobian_det(u_vox: np.ndarray, affine: np.ndarray) -> np.ndarray:
    """``det(I + ∂u_mm/∂x_mm)`` of ``x ↦ x + u(x)``, shape ``(nx, ny, nz)``.

    Along the array axes the displacement in mm is ``u_a · s_a`` and the step between
    neighbouring voxels is ``s_b`` mm (``s`` = spacing), so
    ``∂u_a/∂x_b = numpy.gradient(u_a · s_a, s_b, axis=b)``. (For an affine with orthogonal
    columns this equals the world-axis Jacobian up to a rotation, which keeps the determinant.)
    """
    s = spacing_of(affine)
    u = np.asarray(u_vox, dtype=np.float64)
    jac = np.empty(u.shape[:3] + (3, 3))
    for a in range(3):
        grads = np.gradient(u[..., a] * s[a], *s)
        for b in range(3):
            jac[..., a, b] = grads[b] + (1.0 if a == b else 0.0)
    return np.linalg.det(jac)


def folding_stats(det: np.ndarray, mask: np.ndarray | None = None) -> dict[str, float]:
    """Folding percentage (det ≤ 0), SDlogJ over det > 0, min det, within ``mask`` if given."""
    d = det if mask is None else det[np.asarray(mask, dtype=bool)]
    d = d.ravel()
    pos = d[d > 0]
    return {
        "folding_pct": float(100.0 * np.count_nonzero(d <= 0) / d.size),
        "sdlogj": float(np.std(np.log(pos))) if pos.size else float("nan"),
        "det_min": float(d.min()),
    }


def endpoint_error(u_vox: np.ndarray, truth_vox: np.ndarray, affine: np.ndarray, mask: np.ndarray) -> dict:
    """Mean and 95th percentile of ``|M (u − u*)|`` in mm over the voxels of ``mask``."""
    diff = to_mm(np.asarray(u_vox, dtype=np.float64) - np.asarray(truth_vox, dtype=np.float64), affine)
    e = np.linalg.norm(diff, axis=-1)[np.asarray(mask, dtype=bool)]
    if e.size == 0:
        raise ValueError("endpoint error over an empty mask")
    return {"epe_mean_mm": float(e.mean()), "epe_p95_mm": float(np.percentile(e, 95))}


def sine_field_mm(shape, max_mm: float, seed: int, modes: int = 4, max_wave: int = 2) -> np.ndarray:
    """A known smooth displacement field in mm along the array axes, ``(nx, ny, nz, 3)``.

    Each component is a sum of ``modes`` products of half-sines
    ``c · Π_b sin(π n_b t_b + ...)`` with ``t_b = x_b / L_b`` the position along axis ``b``
    over the field of view's extent ``L_b`` in mm (so the field is smooth in mm whatever the
    spacing, and vanishes on the border), wave numbers ``n_b ∈ {1..max_wave}`` and random
    coefficients from ``numpy.random.default_rng(seed)``; then scaled so the largest vector is
    ``max_mm`` long.
    """
    rng = np.random.default_rng(seed)
    t = [np.arange(n, dtype=np.float64) / max(n - 1, 1) for n in shape]  # 0..1 over the extent
    u = np.zeros(tuple(shape) + (3,))
    for a in range(3):
        for _ in range(modes):
            waves = rng.integers(1, max_wave + 1, size=3)
            c = rng.normal()
            f = [np.sin(np.pi * waves[b] * t[b]) for b in range(3)]
            u[..., a] += c * f[0][:, None, None] * f[1][None, :, None] * f[2][None, None, :]
    norm = np.linalg.norm(u, axis=-1).max()
    return u * (max_mm / norm)


def mm_along_axes_to_vox(u_mm_axes: np.ndarray, affine: np.ndarray) -> np.ndarray:
    """A field in mm ALONG THE ARRAY AXES to voxel units (divide each component by its spacing)."""
    return np.asarray(u_mm_axes, dtype=np.float64) / spacing_of(affine)


def block_mean(a: np.ndarray, affine: np.ndarray, factors) -> tuple[np.ndarray, np.ndarray]:
    """Block average by integer ``factors`` per axis (trailing voxels that do not fill a block
    are dropped) and the matching affine (new voxel centre = centre of its block)."""
    f = np.asarray(factors, dtype=int)
    n = np.asarray(a.shape) // f
    a = np.asarray(a, dtype=np.float64)[: n[0] * f[0], : n[1] * f[1], : n[2] * f[2]]
    out = a.reshape(n[0], f[0], n[1], f[1], n[2], f[2]).mean(axis=(1, 3, 5))
    aff = np.array(affine, dtype=np.float64)
    centre = aff[:3, :3] @ ((f - 1) / 2.0) + aff[:3, 3]
    aff[:3, :3] = aff[:3, :3] * f
    aff[:3, 3] = centre
    return out, aff


def body_mask(image: np.ndarray, threshold: float) -> np.ndarray:
    """Largest connected component of ``image > threshold``, holes filled (scipy.ndimage)."""
    m = np.asarray(image) > threshold
    lab, n = ndimage.label(m)
    if n == 0:
        return m
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    m = lab == int(sizes.argmax())
    return ndimage.binary_fill_holes(m)
