#!/usr/bin/env python3
"""Independent reference for sinew's MIND-SSC descriptor, written with numpy + scipy.ndimage
straight from the formulas of
  "Towards realtime multimodal fusion for image-guided interventions using self-similarities",
  MICCAI 2013, and
  "MIND: Modality independent neighbourhood descriptor for multi-modal deformable
  registration", Medical Image Analysis 2012.

For each pair (p, q) of six-neighbours (offsets +-d along each axis) at distance sqrt(2)*d:
  D = uniform_filter((I(x+p) - I(x+q))**2, size 2r+1, mode='nearest')
  V = mean over the 12 channels of D, clipped to [0.001*mean(V), 1000*mean(V)]
      (common practice, not in the papers' formulas)
  M = exp(-D / V), divided by its maximum over channels (common practice).
Shifts replicate the edge voxel (clipped indices). Channel order: neighbours
+i, -i, +j, -j, +k, -k numbered 0..5, pairs (a, b), a < b, on different axes, lexicographic.

Usage: feat_mind_ssc.py in.npy out.npy RADIUS DILATION  (float32 in, float64 (nx,ny,nz,12) out)
"""
import sys

import numpy as np
from scipy import ndimage


def six_neighbours(d):
    return [(d, 0, 0), (-d, 0, 0), (0, d, 0), (0, -d, 0), (0, 0, d), (0, 0, -d)]


def pairs(d):
    six = six_neighbours(d)
    out = []
    for a in range(6):
        for b in range(a + 1, 6):
            dist2 = sum((six[a][t] - six[b][t]) ** 2 for t in range(3))
            if dist2 == 2 * d * d:
                out.append((six[a], six[b]))
    assert len(out) == 12
    return out


def shifted(img, off):
    """img(x + off) with edge replication (indices clipped), no wrap-around."""
    idx = [np.clip(np.arange(n) + o, 0, n - 1) for n, o in zip(img.shape, off)]
    return img[np.ix_(*idx)]


def mind_ssc(img, radius, dilation):
    img = np.asarray(img, dtype=np.float64)
    chans = []
    for p, q in pairs(dilation):
        sq = (shifted(img, p) - shifted(img, q)) ** 2
        chans.append(ndimage.uniform_filter(sq, size=2 * radius + 1, mode="nearest"))
    dist = np.stack(chans, axis=-1)
    var = dist.mean(axis=-1)
    mv = var.mean()
    var = np.clip(var, 0.001 * mv, 1000.0 * mv)
    desc = np.exp(-dist / var[..., None])
    return desc / desc.max(axis=-1, keepdims=True)


if __name__ == "__main__":
    if len(sys.argv) != 5:
        sys.exit(__doc__)
    inp = np.load(sys.argv[1])
    np.save(sys.argv[2], mind_ssc(inp, int(sys.argv[3]), int(sys.argv[4])))
