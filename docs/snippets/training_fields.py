#!/usr/bin/env python3
"""Displacement fields saved the way training code saves them, one snippet per convention
`sinew score` / `sinew cohort --method` accept (README: "Fields from training code").

Run: python3 docs/snippets/training_fields.py OUT_DIR
The end-to-end test crates/cli/tests/conventions.rs runs this file and scores every field it
writes; each must give back the known displacement `u` below.
"""
import os
import sys

import numpy as np

out = sys.argv[1]
shape = (16, 12, 10)                 # the fixed scan's voxel grid (nx, ny, nz), as nibabel loads it
u = np.array([2.0, -1.0, 3.0])       # a known pull displacement in voxels along i, j, k


def save(name, array):
    np.save(os.path.join(out, name), array)


# A network's output tensor: batch axis of 1, channel-first, float32.
# sinew detects both: no flag.
flow = np.broadcast_to(u[:, None, None, None], (3,) + shape)[None].astype(np.float32)  # (1, 3, nx, ny, nz)
save("batch_channel_first.npy", flow)

# The same in half precision (mixed-precision training). No flag.
save("float16.npy", flow.astype(np.float16))

# Channel-last (nx, ny, nz, 3) in an .npz with other arrays beside it: --npz-key flow.
np.savez_compressed(os.path.join(out, "flow.npz"), flow=np.moveaxis(flow[0], 0, -1), loss=np.array([0.1]))

# Components in reversed order (x = last axis, as torch's grid_sample takes them):
# --channel-order kji
save("reversed.npy", flow[:, ::-1])

# The sampling grid handed to torch.nn.functional.grid_sample(..., align_corners=True):
# positions in [-1, 1], -1/+1 at the centres of the corner voxels, (x, y, z) = (k, j, i),
# channel-last. --units norm-corners --values positions --channel-order kji
axes = [np.linspace(-1.0, 1.0, n) for n in shape]
identity = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)          # (nx, ny, nz, 3), order i, j, k
scale = np.array([2.0 / (n - 1) for n in shape])                          # voxels -> normalised
grid = (identity + u * scale)[..., ::-1][None].astype(np.float32)        # (1, nx, ny, nz, 3), order k, j, i
save("grid_align_corners_true.npy", grid)

# The same with align_corners=False: -1/+1 at the outer edges of the corner voxels.
# --units norm-edges --values positions --channel-order kji
axes = [(2.0 * np.arange(n) + 1.0) / n - 1.0 for n in shape]
identity = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)
scale = np.array([2.0 / n for n in shape])
grid = (identity + u * scale)[..., ::-1][None].astype(np.float32)
save("grid_align_corners_false.npy", grid)

# A field predicted at half resolution (8, 6, 5), in voxels of that coarser grid.
# sinew detects the factor 2 and upsamples; samples sit at block centres (--low-res blocks,
# the default) or on the corner voxels (--low-res corners).
half = tuple((n + 1) // 2 for n in shape)
save("half_resolution.npy", np.broadcast_to((u / 2)[:, None, None, None], (3,) + half).astype(np.float32))
