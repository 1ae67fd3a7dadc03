#!/usr/bin/env python3
"""Independent reference for `sinew prep`, built on nibabel 5.3 and scipy.ndimage 1.14.
Prints one JSON document on stdout. Used by crates/prep/tests/reference.rs and
crates/cli/tests/prep.rs.

usage:
  prep_reference.py orient IN CODE...
      nibabel.orientations: io_orientation(affine) -> ornt_transform(start, axcodes2ornt(CODE))
      -> apply_orientation(array) and affine @ inv_ornt_aff(transform, shape), for each CODE:
      {"CODE": {"shape", "affine" (4x4), "data" (C order)}}
  prep_reference.py check IN OUT (image|labels) [LO HI]
      Reads OUT's grid and computes what it should hold from IN with
      scipy.ndimage.affine_transform(IN, inv(A_in) @ A_out): order 1 with mode "nearest" for
      images (then, with LO HI, the window clip and unit scaling (v - LO)/(HI - LO)), order 0
      with mode "nearest" for labels (mode "constant" would zero positions a rounding error past the last voxel). Compares on the interior: output voxels whose
      source position lies inside [0, n-1] on every axis; for labels, positions within 1e-3
      of a rounding tie (x.5) are left out (order-0 ties may round either way). Also reports
      the world corners of both fields of view (voxel corners -0.5 and n-0.5, through
      nibabel.affines.apply_affine) and nibabel's axis codes of OUT.
  prep_reference.py mask IN AXIS THRESHOLD:FILL...
      Body mask with scipy.ndimage: IN > THRESHOLD, label() with the 6-connected structure
      generate_binary_structure(3, 1), largest component, then (FILL = 1) binary_fill_holes
      on each 2-D slice across AXIS. {"THRESHOLD:FILL": "0110..." (C order)}
"""
import json
import sys

import nibabel as nib
import numpy as np
from nibabel.affines import apply_affine
from nibabel.orientations import apply_orientation, axcodes2ornt, inv_ornt_aff, io_orientation, ornt_transform
from scipy import ndimage


def load(path):
    img = nib.load(path)
    return np.asanyarray(img.dataobj), np.asarray(img.affine, dtype=np.float64)


def orient(path, codes):
    arr, aff = load(path)
    out = {}
    for code in codes:
        t = ornt_transform(io_orientation(aff), axcodes2ornt(tuple(code)))
        data = apply_orientation(arr, t)
        new_aff = aff @ inv_ornt_aff(t, arr.shape)
        out[code] = {
            "shape": [int(n) for n in data.shape],
            "affine": new_aff.tolist(),
            "data": [float(v) for v in np.ascontiguousarray(data).ravel(order="C")],
        }
    return out


def fov_corners(shape, aff):
    idx = np.array([[(-0.5 if (c >> d) & 1 == 0 else shape[d] - 0.5) for d in range(3)] for c in range(8)])
    return apply_affine(aff, idx).tolist()


def check(in_path, out_path, kind, window):
    src, a_in = load(in_path)
    out, a_out = load(out_path)
    m = np.linalg.inv(a_in) @ a_out
    shape = out.shape
    # Source position of every output voxel centre (for the interior and tie masks).
    q = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), axis=-1).reshape(-1, 3)
    pos = apply_affine(m, q)
    inside = np.all((pos >= -1e-6) & (pos <= np.array(src.shape) - 1 + 1e-6), axis=1)
    res = {
        "axcodes": "".join(nib.aff2axcodes(a_out)),
        "shape": [int(n) for n in shape],
        "spacing": [float(v) for v in np.sqrt((a_out[:3, :3] ** 2).sum(axis=0))],
        "corners_in": fov_corners(src.shape, a_in),
        "corners_out": fov_corners(shape, a_out),
        "n_interior": int(inside.sum()),
    }
    if kind == "image":
        want = ndimage.affine_transform(
            src.astype(np.float64), m[:3, :3], offset=m[:3, 3], output_shape=shape, order=1, mode="nearest"
        )
        if window is not None:
            lo, hi = window
            want = (np.clip(want, lo, hi) - lo) / (hi - lo)
        diff = np.abs(want.reshape(-1) - out.astype(np.float64).reshape(-1))[inside]
        res["max_abs_diff"] = float(diff.max()) if diff.size else None
        res["range_out"] = [float(out.min()), float(out.max())]
    else:
        want = ndimage.affine_transform(
            src.astype(np.float64), m[:3, :3], offset=m[:3, 3], output_shape=shape, order=0, mode="nearest"
        )
        frac = np.abs(pos - np.floor(pos) - 0.5)
        tie = np.any(frac < 1e-3, axis=1)
        keep = inside & ~tie
        got = out.reshape(-1).astype(np.int64)[keep]
        exp = np.rint(want.reshape(-1)).astype(np.int64)[keep]
        res["n_compared"] = int(keep.sum())
        res["n_ties"] = int((inside & tie).sum())
        res["n_mismatch"] = int((got != exp).sum())
    return res


def mask(path, threshold, fill, axis):
    arr, _ = load(path)
    fg = arr > threshold
    lab, n = ndimage.label(fg, structure=ndimage.generate_binary_structure(3, 1))
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    body = lab == int(np.argmax(sizes))
    if fill:
        body = np.moveaxis(body, axis, 0).copy()
        for s in range(body.shape[0]):
            body[s] = ndimage.binary_fill_holes(body[s])
        body = np.moveaxis(body, 0, axis)
    return "".join("1" if v else "0" for v in body.ravel(order="C"))


def main(argv):
    cmd = argv[1]
    if cmd == "orient":
        res = orient(argv[2], argv[3:])
    elif cmd == "check":
        window = (float(argv[5]), float(argv[6])) if len(argv) > 6 else None
        res = check(argv[2], argv[3], argv[4], window)
    elif cmd == "mask":
        res = {}
        for case in argv[4:]:
            thr, fill = case.split(":")
            res[case] = mask(argv[2], float(thr), fill == "1", int(argv[3]))
    else:
        raise SystemExit(f"unknown command {cmd}")
    json.dump(res, sys.stdout)


if __name__ == "__main__":
    main(sys.argv)
