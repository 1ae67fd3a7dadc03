#!/usr/bin/env python3
"""Independent references for sinew's warper and Jacobian determinant (numpy + scipy.ndimage).

warp:      warped(x) = moving(x + u(x)), u in voxels, component-first (3, nx, ny, nz):
           scipy.ndimage.map_coordinates(moving, x + u, order=1, mode=...)
warp_from: the moving image on another grid: positions A_m^-1 A_f (x + u(x)).
jacobian:  det(I + grad u) with grad u from numpy.gradient(u[a], axis=b, edge_order=1)
           (central differences inside, first-order one-sided at the edges).
"""
import numpy as np
from scipy import ndimage


def identity_coords(shape):
    return np.stack(np.meshgrid(*[np.arange(n, dtype=np.float64) for n in shape], indexing="ij"))


def warp(moving, field, mode, cval=0.0):
    coords = identity_coords(moving.shape) + field.astype(np.float64)
    return ndimage.map_coordinates(moving.astype(np.float64), coords, order=1, mode=mode, cval=cval)


def warp_from(moving, aff_moving, field, aff_fixed, mode, cval=0.0):
    pos = identity_coords(field.shape[1:]) + field.astype(np.float64)
    m = np.linalg.inv(aff_moving) @ aff_fixed
    coords = np.einsum("ab,b...->a...", m[:3, :3], pos) + m[:3, 3].reshape(3, 1, 1, 1)
    return ndimage.map_coordinates(moving.astype(np.float64), coords, order=1, mode=mode, cval=cval)


def jacobian_det(field):
    u = field.astype(np.float64)
    jac = np.zeros(u.shape[1:] + (3, 3))
    for a in range(3):
        for b in range(3):
            jac[..., a, b] = np.gradient(u[a], axis=b, edge_order=1) + (1.0 if a == b else 0.0)
    # numpy.linalg.det goes through LAPACK, whose last bits depend on the CPU's kernels
    # (seen: 8.9e-16 between two x86-64 machines), so CI's drift check would fail on another
    # machine. Stored rounded to float32 (the Rust test's tolerance is 1e-4), kept as float64.
    return np.linalg.det(jac).astype(np.float32).astype(np.float64)
