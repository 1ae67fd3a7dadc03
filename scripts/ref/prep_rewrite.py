#!/usr/bin/env python3
"""Rewrites two demo subjects as if they came from other scanners, with nibabel 5.3 and
scipy.ndimage 1.14 (independent of sinew), for the `sinew prep` end-to-end test.

usage: prep_rewrite.py DEMO_DIR OUT_DIR

- scan_a_{image,labels}.nii.gz: subject_00 reoriented to PIL with nibabel.orientations
  (io_orientation / ornt_transform / apply_orientation, affine @ inv_ornt_aff): same voxels,
  same world positions, 4 mm.
- scan_b_{image,labels}.nii.gz: subject_01 reoriented to ILA the same way, then resampled to
  3.5 x 5.0 x 4.5 mm over the same field of view (n' = round(n * 4 / s'), centred) with
  scipy.ndimage.affine_transform, order 1 for the image and order 0 for the labels (mode
  "nearest").
"""
import os
import sys

import nibabel as nib
import numpy as np
from nibabel.orientations import apply_orientation, axcodes2ornt, inv_ornt_aff, io_orientation, ornt_transform
from scipy import ndimage


def reorient(arr, aff, code):
    t = ornt_transform(io_orientation(aff), axcodes2ornt(tuple(code)))
    return apply_orientation(arr, t), aff @ inv_ornt_aff(t, arr.shape)


def save(arr, aff, path, dtype):
    img = nib.Nifti1Image(np.ascontiguousarray(arr).astype(dtype), aff)
    img.set_sform(aff, code=1)
    img.set_qform(aff, code=1)
    nib.save(img, path)


def main(demo, out):
    os.makedirs(out, exist_ok=True)
    for subject, name, code, spacing in [(0, "scan_a", "PIL", None), (1, "scan_b", "ILA", (3.5, 5.0, 4.5))]:
        img = nib.load(os.path.join(demo, f"subject_{subject:02d}_image.nii.gz"))
        lab = nib.load(os.path.join(demo, f"subject_{subject:02d}_labels.nii.gz"))
        a, aff = reorient(np.asanyarray(img.dataobj), img.affine, code)
        l, _ = reorient(np.asanyarray(lab.dataobj), lab.affine, code)
        if spacing is not None:
            old = np.sqrt((aff[:3, :3] ** 2).sum(axis=0))
            n = np.array(a.shape)
            n2 = np.maximum(1, np.rint(n * old / np.array(spacing))).astype(int)
            r = np.array(spacing) / old
            off = (n - 1) / 2.0 - r * (n2 - 1) / 2.0
            m = np.diag(r)
            a = ndimage.affine_transform(a.astype(np.float64), m, offset=off, output_shape=tuple(n2), order=1, mode="nearest")
            l = ndimage.affine_transform(l, m, offset=off, output_shape=tuple(n2), order=0, mode="nearest")
            step = np.eye(4)
            step[:3, :3] = m
            step[:3, 3] = off
            aff = aff @ step
        save(a, aff, os.path.join(out, f"{name}_image.nii.gz"), np.float32)
        save(l, aff, os.path.join(out, f"{name}_labels.nii.gz"), np.uint8)
        print(name, "".join(nib.aff2axcodes(aff)), a.shape)


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])
