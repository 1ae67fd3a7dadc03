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
