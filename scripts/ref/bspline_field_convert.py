#!/usr/bin/env python3
"""Checks an absolute-mm map written by `sinew field convert --to absolute-mm` against
nibabel.affines.apply_affine on the world coordinates of x + u(x).

usage: bspline_field_convert.py FIELD_MM.nii.gz ABSOLUTE_MM.npy
The field file holds displacements in mm along world axes, shape (nx, ny, nz, 1, 3); the
voxel displacement is M^-1 u_mm (M the affine's linear part). Prints the largest difference
in mm and exits 1 when it exceeds 1e-3 mm.
"""
import sys

import nibabel as nib
import numpy as np
from nibabel.affines import apply_affine


def main(field_path, abs_path):
    img = nib.load(field_path)
    aff = img.affine
    u_mm = np.asarray(img.dataobj, dtype=np.float64)[:, :, :, 0, :]
    u_vox = u_mm @ np.linalg.inv(aff[:3, :3]).T
    idx = np.stack(np.meshgrid(*[np.arange(n) for n in u_mm.shape[:3]], indexing="ij"), axis=-1)
    want = apply_affine(aff, idx + u_vox)
    got = np.load(abs_path).astype(np.float64)
    diff = float(np.max(np.abs(got - want)))
    print(f"max difference {diff:.6f} mm")
    return 0 if diff <= 1e-3 else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1], sys.argv[2]))
