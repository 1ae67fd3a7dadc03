"""Reference surface distances (HD95, HD, ASSD) built on scipy.ndimage, independent of sinew.

Definitions (as documented in sinew-score):
- surface of a binary mask: mask & ~binary_erosion(mask, 6-connectivity, border_value=0);
- directed distances: scipy.ndimage.distance_transform_edt(~surface_other, sampling=spacing)
  read at this map's surface voxels;
- symmetric distances: both directions concatenated; HD95 = np.percentile(d, 95) (numpy's
  default linear interpolation), HD = max, ASSD = mean.
"""
import numpy as np
from scipy import ndimage


def surface(mask):
    st = ndimage.generate_binary_structure(3, 1)
    return mask & ~ndimage.binary_erosion(mask, structure=st, border_value=0)


def surface_distances(a, b, label, spacing):
    """(hd95, hd, assd) of `label` between label maps a and b, or None when a surface is empty."""
    sa, sb = surface(a == label), surface(b == label)
    if not sa.any() or not sb.any():
        return None
    to_b = ndimage.distance_transform_edt(~sb, sampling=spacing)
    to_a = ndimage.distance_transform_edt(~sa, sampling=spacing)
    d = np.concatenate([to_b[sa], to_a[sb]])
    return float(np.percentile(d, 95)), float(d.max()), float(d.mean())


def random_labels(rng, shape, n_labels, sigma):
    """Smooth random label map: argmax of gaussian-smoothed noise channels, background where
    the winning channel is weak."""
    noise = rng.standard_normal((n_labels + 1,) + shape)
    sm = np.stack([ndimage.gaussian_filter(noise[c], sigma, mode="nearest") for c in range(n_labels + 1)])
    return np.argmax(sm, axis=0).astype(np.uint16)
