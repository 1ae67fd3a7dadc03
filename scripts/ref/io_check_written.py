#!/usr/bin/env python3
"""Reads NIfTI / .npy files with nibabel 5.3 / numpy and prints, as one JSON document, what
they say about each: shape, dtype, affine (img.affine), sform/qform (and codes), intent code
and name, description, pixdim, xyzt_units, vox_offset, scl_slope/inter, and the stored values
flattened in C order of the array axes (i, j, k, ...). Used by the io crate's round-trip tests.

usage: io_check_written.py FILE...
"""
import json
import sys

import nibabel as nib
import numpy as np


def describe(path):
    if path.endswith(".npy"):
        arr = np.load(path)
        return {
            "shape": list(arr.shape),
            "dtype": arr.dtype.str,
            "fortran_order": bool(np.isfortran(arr)),
            "data": [float(v) for v in arr.ravel(order="C")],
        }
    img = nib.load(path)
    hdr = img.header
    sform, scode = img.get_sform(coded=True)
    qform, qcode = img.get_qform(coded=True)
    data = np.asanyarray(img.dataobj)
    # the loaded header copy resets scl_slope/scl_inter; the data proxy keeps the file's
    slope, inter = img.dataobj.slope, img.dataobj.inter
    return {
        "shape": [int(n) for n in img.shape],
        "dtype": str(img.get_data_dtype()),
        "affine": np.asarray(img.affine, dtype=float).tolist(),
        "sform": None if sform is None else np.asarray(sform, dtype=float).tolist(),
        "qform": None if qform is None else np.asarray(qform, dtype=float).tolist(),
        "sform_code": int(scode),
        "qform_code": int(qcode),
        "intent_code": int(hdr["intent_code"]),
        "intent_name": hdr["intent_name"].item().decode("ascii", "replace"),
        "descrip": hdr["descrip"].item().decode("ascii", "replace"),
        "pixdim": [float(v) for v in hdr["pixdim"]],
        "xyzt_units": int(hdr["xyzt_units"]),
        "vox_offset": float(img.dataobj.offset),  # the loaded header copy resets vox_offset
        "slope_inter": [None if slope is None else float(slope), None if inter is None else float(inter)],
        "data": [float(v) for v in data.ravel(order="C")],
    }


def main():
    out = {p: describe(p) for p in sys.argv[1:]}
    json.dump(out, sys.stdout)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
