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
