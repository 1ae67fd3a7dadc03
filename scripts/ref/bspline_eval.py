#!/usr/bin/env python3
"""Independent reference for sinew's cubic B-spline evaluation (scipy.interpolate.BSpline).

Control point c of an axis sits at lattice position (c - 1) * s, so the uniform knot vector
of degree 3 is t_j = (j - 3) * s, j = 0 .. n_c + 3 (basis function c is centred on knot
t_{c+2} = (c - 1) * s). Each axis' n x n_c matrix comes from scipy's BSpline evaluated at
the lattice points 0 .. n-1; the dense field is their tensor product applied to the control
values (3, n_cx, n_cy, n_cz).
"""
import numpy as np
from scipy.interpolate import BSpline


def axis_matrix(n, s):
    n_c = int(np.floor((n - 1) / s)) + 4
    knots = (np.arange(n_c + 4, dtype=np.float64) - 3.0) * s
    x = np.arange(n, dtype=np.float64)
    mat = np.zeros((n, n_c))
    for c in range(n_c):
        coef = np.zeros(n_c)
        coef[c] = 1.0
        mat[:, c] = BSpline(knots, coef, 3, extrapolate=False)(x)
    return np.nan_to_num(mat)


def evaluate(phi, shape, spacing):
    mats = [axis_matrix(n, s) for n, s in zip(shape, spacing)]
    return np.einsum("ia,jb,kc,dabc->dijk", mats[0], mats[1], mats[2], phi.astype(np.float64))
