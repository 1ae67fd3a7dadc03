"""Fixture makers: each `make_<name>(out_dir)` writes deterministic files into out_dir."""


def _ref(name):
    """Imports scripts/ref/<name>.py (the independent reference implementations)."""
    import importlib.util
    import os

    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "ref", name + ".py")
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def make_feat_mind(out_dir):
    """MIND-SSC of a seeded random 11x9x10 volume (scripts/ref/feat_mind_ssc.py, numpy+scipy).
    Files: feat_mind_input.npy (float32) and feat_mind_r{R}_d{D}.npy (float64, (11,9,10,12))."""
    import os

    import numpy as np

    ref = _ref("feat_mind_ssc")
    rng = np.random.default_rng(20130922)
    img = (rng.random((11, 9, 10)) * 100.0 - 20.0).astype(np.float32)
    np.save(os.path.join(out_dir, "feat_mind_input.npy"), img)
    for radius, dilation in [(1, 2), (0, 1), (2, 3)]:
        desc = ref.mind_ssc(img, radius, dilation)
        np.save(os.path.join(out_dir, f"feat_mind_r{radius}_d{dilation}.npy"), desc)
    # Two noise levels 1000x apart (variances 1e6 apart): the lower clamp 0.001*mean(V) is
    # active in the quiet half. Files feat_mind_twolevel_{input,r1_d2}.npy.
    quiet = rng.random((12, 8, 9))
    quiet[:6] *= 1000.0
    quiet = quiet.astype(np.float32)
    np.save(os.path.join(out_dir, "feat_mind_twolevel_input.npy"), quiet)
    np.save(os.path.join(out_dir, "feat_mind_twolevel_r1_d2.npy"), ref.mind_ssc(quiet, 1, 2))
    # A thin volume, smaller than the dilation and the patch along two axes.
    thin = (rng.random((2, 1, 5)) * 3.0).astype(np.float32)
    np.save(os.path.join(out_dir, "feat_mind_thin_input.npy"), thin)
    np.save(os.path.join(out_dir, "feat_mind_thin_r2_d3.npy"), ref.mind_ssc(thin, 2, 3))


def _io_affines():
    """Affines for the io fixtures: axis-aligned, oblique rotation with a mirrored k axis
    (qfac -1), and oblique with shear (sform only)."""
    import numpy as np

    def rot(axis, deg):
        c, s = np.cos(np.radians(deg)), np.sin(np.radians(deg))
        p, q = (axis + 1) % 3, (axis + 2) % 3
        r = np.eye(3)
        r[p, p] = r[q, q] = c
        r[p, q], r[q, p] = -s, s
        return r

    aligned = np.diag([1.5, 2.0, 3.0, 1.0])
    aligned[:3, 3] = [-4.0, 10.0, 2.5]
    oblique = np.eye(4)
    oblique[:3, :3] = rot(2, 25.0) @ rot(0, -10.0) @ np.diag([0.9, 1.2, -2.0])
    oblique[:3, 3] = [12.5, -30.0, 8.0]
    sheared = np.eye(4)
    sheared[:3, :3] = rot(1, 15.0) @ np.array([[1.0, 0.25, 0.0], [0.0, 1.1, 0.1], [0.0, 0.0, 2.5]])
    sheared[:3, 3] = [-100.0, 50.0, -20.0]
    return aligned, oblique, sheared


def _io_save(out_dir, name, img, sidecar):
    """Saves img (gzip mtime 0 by nibabel for .gz) and records what nibabel reads back."""
    import os

    import nibabel as nib
    import numpy as np

    path = os.path.join(out_dir, name)
    nib.save(img, path)
    back = nib.load(path)
    hdr = back.header
    sidecar[name] = {
        "shape": [int(n) for n in back.shape],
        "dtype": str(back.get_data_dtype().newbyteorder("=")),
        "affine": np.asarray(back.affine, dtype=float)[:3].tolist(),
        "axcodes": "".join(nib.aff2axcodes(back.affine)),
        "best_affine": np.asarray(hdr.get_best_affine(), dtype=float)[:3].tolist(),
        "sform_code": int(hdr["sform_code"]),
        "qform_code": int(hdr["qform_code"]),
        "pixdim": [float(v) for v in hdr["pixdim"]],
        "intent_code": int(hdr["intent_code"]),
        "little_endian": hdr.endianness == "<",
        # scaled values, flattened in C order of (i, j, k[, ...])
        "data": [float(v) for v in back.get_fdata(dtype=np.float64).ravel(order="C")],
    }


def make_io_nifti(out_dir):
    """NIfTI-1 files written by nibabel 5.3 for the io crate, plus io_nibabel.json: what
    nibabel reads back from each (affine, codes, dtype, scaled data in C order of (i, j, k)).
    Covers every supported datatype, scl_slope/inter, sform only, qform only (oblique,
    qfac -1), pixdim only, big-endian, .nii and .nii.gz, and a 5-D displacement field."""
    import json
    import os

    import nibabel as nib
    import numpy as np

    rng = np.random.default_rng(5302)
    aligned, oblique, sheared = _io_affines()
    shape = (5, 4, 3)
    sidecar = {}

    ranges = {
        "uint8": (0, 255), "int8": (-128, 127), "uint16": (0, 65535), "int16": (-32768, 32767),
        "uint32": (0, 2**32 - 1), "int32": (-2**31, 2**31 - 1),
    }
    for dt in ["uint8", "int8", "uint16", "int16", "uint32", "int32", "float32", "float64"]:
        if dt in ranges:
            lo, hi = ranges[dt]
            data = rng.integers(lo, hi, size=shape, endpoint=True, dtype=np.int64).astype(dt)
            data.flat[0], data.flat[1] = lo, hi
        else:
            data = (rng.standard_normal(shape) * 1000.0).astype(dt)
        img = nib.Nifti1Image(data, aligned)
        img.header.set_data_dtype(dt)
        img.header.set_slope_inter(1.0, 0.0)
        for ext in ["nii", "nii.gz"] if dt in ("int16", "float32") else ["nii"]:
            _io_save(out_dir, f"io_dtype_{dt}.{ext}", img, sidecar)

    # scl_slope / scl_inter on int16
    data = rng.integers(-500, 500, size=shape, endpoint=True).astype(np.int16)
    img = nib.Nifti1Image(data, aligned)
    img.header.set_data_dtype(np.int16)
    img.header.set_slope_inter(0.25, -10.0)
    _io_save(out_dir, "io_scaled_int16.nii", img, sidecar)

    # sform only (oblique with shear), qform code 0
    data = rng.standard_normal(shape).astype(np.float32)
    img = nib.Nifti1Image(data, None)
    img.set_sform(sheared, code=2)
    img.set_qform(None, code=0)
    _io_save(out_dir, "io_sform_only.nii.gz", img, sidecar)

    # qform only (oblique rotation, mirrored third axis: qfac -1), sform code 0
    img = nib.Nifti1Image(data, None)
    img.set_qform(oblique, code=1)
    img.set_sform(None, code=0)
    _io_save(out_dir, "io_qform_only.nii", img, sidecar)

    # neither: pixdim only (NIfTI method 1)
    img = nib.Nifti1Image(data, None)
    img.header.set_zooms((1.5, 2.0, 3.0))
    img.set_qform(None, code=0)
    img.set_sform(None, code=0)
    _io_save(out_dir, "io_pixdim_only.nii", img, sidecar)

    # big-endian int16
    data16 = rng.integers(-1000, 1000, size=shape, endpoint=True).astype(">i2")
    hdr = nib.Nifti1Header(endianness=">")
    img = nib.Nifti1Image(data16, aligned, header=hdr)
    img.header.set_data_dtype(">i2")
    img.header.set_slope_inter(1.0, 0.0)
    _io_save(out_dir, "io_bigendian_int16.nii", img, sidecar)

    # label maps: float32 with integral values (accepted) and with a fraction (rejected)
    labels = rng.integers(0, 4, size=shape).astype(np.float32)
    labels.flat[7] = 300.0
    _io_save(out_dir, "io_labels_float.nii", nib.Nifti1Image(labels, aligned), sidecar)
    bad = labels.copy()
    bad.flat[5] = 2.5
    _io_save(out_dir, "io_labels_fraction.nii", nib.Nifti1Image(bad, aligned), sidecar)
    neg = labels.copy()
    neg.flat[3] = -1.0
    _io_save(out_dir, "io_labels_negative.nii", nib.Nifti1Image(neg, aligned), sidecar)

    # 5-D displacement field (nx, ny, nz, 1, 3), intent 1006, no sinew intent_name
    field = (rng.standard_normal(shape + (1, 3)) * 2.0).astype(np.float32)
    img = nib.Nifti1Image(field, oblique)
    img.header.set_intent(1006)
    _io_save(out_dir, "io_field5d.nii.gz", img, sidecar)
    # The same vectors in voxels along (i, j, k): the file's mm vectors m solved against the
    # linear part L of nibabel's affine (m = L v), component-first in C order of (c, i, j, k).
    back = nib.load(os.path.join(out_dir, "io_field5d.nii.gz"))
    lin = np.asarray(back.affine, dtype=np.float64)[:3, :3]
    mm = back.get_fdata(dtype=np.float64)[:, :, :, 0, :]
    vox = np.linalg.solve(lin, mm.reshape(-1, 3).T).reshape((3,) + mm.shape[:3])
    sidecar["io_field5d.nii.gz"]["voxels_cijk"] = [float(v) for v in vox.ravel(order="C")]

    with open(os.path.join(out_dir, "io_nibabel.json"), "w") as f:
        json.dump({"source": "nibabel " + nib.__version__, "files": sidecar}, f, indent=1, sort_keys=True)
        f.write("\n")


def make_feat_warp(out_dir):
    """Trilinear warps of a seeded random 9x8x7 volume by a random field (up to 2.5 voxels)
    with scipy.ndimage.map_coordinates(order=1), modes 'nearest' and 'grid-constant'
    (cval=-7.5), on the same grid and from another grid (scripts/ref/feat_warp_jac.py)."""
    import os

    import numpy as np

    ref = _ref("feat_warp_jac")
    rng = np.random.default_rng(4242)
    shape = (9, 8, 7)
    moving = (rng.random(shape) * 10.0).astype(np.float32)
    field = (rng.random((3,) + shape) * 5.0 - 2.5).astype(np.float32)
    aff_fixed = np.array([[1.5, 0, 0, -3.0], [0, 2.0, 0, 1.0], [0, 0, 2.5, 4.0], [0, 0, 0, 1]])
    # moving grid: rotated about k, other spacing and origin, other shape
    c, s = np.cos(0.3), np.sin(0.3)
    aff_moving = np.array([[1.2 * c, -1.8 * s, 0, -2.0], [1.2 * s, 1.8 * c, 0, -1.5], [0, 0, 2.0, 3.0], [0, 0, 0, 1]])
    moving_other = (rng.random((11, 10, 9)) * 10.0).astype(np.float32)
    files = {
        "feat_warp_moving.npy": moving,
        "feat_warp_field.npy": field,
        "feat_warp_nearest.npy": ref.warp(moving, field, "nearest"),
        "feat_warp_constant.npy": ref.warp(moving, field, "grid-constant", -7.5),
        "feat_warp_aff_fixed.npy": aff_fixed,
        "feat_warp_aff_moving.npy": aff_moving,
        "feat_warp_moving_other.npy": moving_other,
        "feat_warp_from_constant.npy": ref.warp_from(moving_other, aff_moving, field, aff_fixed, "grid-constant", -7.5),
    }
    for name, arr in files.items():
        np.save(os.path.join(out_dir, name), arr)


def make_feat_jacobian(out_dir):
    """det(I + grad u) of seeded random smooth fields (scipy.ndimage.gaussian_filter of noise),
    grad by numpy.gradient(edge_order=1) (scripts/ref/feat_warp_jac.py). Shapes 10x9x8 and
    7x2x5 (an axis with two voxels: one-sided differences only)."""
    import os

    import numpy as np
    from scipy import ndimage

    ref = _ref("feat_warp_jac")
    rng = np.random.default_rng(777)
    for tag, shape, amp in [("a", (10, 9, 8), 6.0), ("b", (7, 2, 5), 3.0)]:
        noise = rng.standard_normal((3,) + shape)
        field = np.stack([ndimage.gaussian_filter(noise[c], 1.5, mode="nearest") for c in range(3)])
        field = (field * amp).astype(np.float32)
        np.save(os.path.join(out_dir, f"feat_jac_field_{tag}.npy"), field)
        np.save(os.path.join(out_dir, f"feat_jac_det_{tag}.npy"), ref.jacobian_det(field))


def make_score_hd95(out_dir):
    """Surface distances (HD95, HD, ASSD per label) of seeded random smooth label maps with
    anisotropic spacing, by scipy.ndimage.distance_transform_edt(sampling=spacing) and
    np.percentile (scripts/ref/score_surface.py). One JSON file, score_hd95.json: per case
    the shape, spacing, both maps (flat, C order) and the reference values."""
    import json
    import os

    import numpy as np

    ref = _ref("score_surface")
    rng = np.random.default_rng(95)
    cases = []
    for shape, spacing, n_labels, sigma in [
        ((20, 16, 12), (1.0, 1.0, 1.0), 3, 2.0),
        ((24, 18, 14), (0.8, 1.7, 2.5), 4, 1.5),
        ((15, 22, 19), (3.0, 0.6, 1.2), 5, 1.0),
    ]:
        a = ref.random_labels(rng, shape, n_labels, sigma)
        # the second map: the first one's noise field perturbed (a different, related segmentation)
        b = ref.random_labels(rng, shape, n_labels, sigma)
        b = np.where(rng.random(shape) < 0.7, a, b).astype(np.uint16)
        b = np.roll(b, (1, -2, 0), axis=(0, 1, 2))  # a shift spreads the distances out
        b[b == n_labels] = 0  # the last label absent from b: its distances are undefined
        labels = list(range(1, n_labels + 1))
        results = {}
        for label in labels:
            r = ref.surface_distances(a, b, label, spacing)
            results[str(label)] = None if r is None else {"hd95": r[0], "hd": r[1], "assd": r[2]}
        cases.append({
            "shape": list(shape),
            "spacing": list(spacing),
            "a": a.ravel().tolist(),
            "b": b.ravel().tolist(),
            "labels": labels,
            "expected": results,
        })
    with open(os.path.join(out_dir, "score_hd95.json"), "w") as f:
        json.dump({"source": "scipy.ndimage.distance_transform_edt + np.percentile (scripts/ref/score_surface.py)",
                   "cases": cases}, f, sort_keys=True)
        f.write("\n")


def make_bspline_eval(out_dir):
    """Cubic B-spline evaluation of seeded random control values on a 13x9x11 lattice with
    control spacing (3, 2.5, 4) voxels, by scipy.interpolate.BSpline (scripts/ref/bspline_eval.py)."""
    import os

    import numpy as np

    ref = _ref("bspline_eval")
    rng = np.random.default_rng(2024)
    shape, spacing = (13, 9, 11), (3.0, 2.5, 4.0)
    n_c = [int(np.floor((n - 1) / s)) + 4 for n, s in zip(shape, spacing)]
    phi = (rng.random([3] + n_c) * 4.0 - 2.0).astype(np.float32)
    np.save(os.path.join(out_dir, "bspline_eval_phi.npy"), phi)
    np.save(os.path.join(out_dir, "bspline_eval_dense.npy"), ref.evaluate(phi, shape, spacing))
