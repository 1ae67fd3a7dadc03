"""A stand-in for a registration network, for the README walkthrough "score your network's
fields against sinew's on a pair list".

For each pair of a pair list (CSV `fixed,moving`) it "predicts" one constant displacement: the
shift between the centres of the two label maps, in voxels, and saves it the way a training
script saves a network's output: `(1, 3, nx, ny, nz)` float16 `.npy`, named
`<fixed>__<moving>.npy`. It also writes `runtimes.csv` (`fixed,moving,runtime_s`) with the time
each prediction took. Replace `predict` with your network's inference.

usage: python3 examples/stand_in_network.py DATA_DIR PAIRS_CSV OUT_DIR
DATA_DIR holds `<id>_image.nii.gz` and `<id>_labels.nii.gz` (the layout of `sinew demo`).
"""

import csv
import os
import sys
import time

import nibabel as nib
import numpy as np


def predict(fixed_labels: np.ndarray, moving_labels: np.ndarray) -> np.ndarray:
    """Displacement (3, nx, ny, nz) in voxels, pulling: warped(x) = moving(x + u(x))."""
    shift = np.argwhere(moving_labels > 0).mean(axis=0) - np.argwhere(fixed_labels > 0).mean(axis=0)
    return np.broadcast_to(shift[:, None, None, None], (3,) + fixed_labels.shape)


def main(data_dir: str, pairs_csv: str, out_dir: str) -> None:
    os.makedirs(out_dir, exist_ok=True)
    load = lambda sid: np.asanyarray(nib.load(os.path.join(data_dir, f"{sid}_labels.nii.gz")).dataobj)
    times = []
    with open(pairs_csv, newline="") as f:
        for row in csv.DictReader(f):
            fixed, moving = row["fixed"], row["moving"]
            t = time.perf_counter()
            flow = predict(load(fixed), load(moving))[None].astype(np.float16)  # (1, 3, nx, ny, nz)
            seconds = time.perf_counter() - t
            np.save(os.path.join(out_dir, f"{fixed}__{moving}.npy"), flow)
            times.append((fixed, moving, seconds))
    with open(os.path.join(out_dir, "runtimes.csv"), "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["fixed", "moving", "runtime_s"])
        w.writerows((a, b, f"{s:.4f}") for a, b, s in times)
    print(f"wrote {len(times)} fields to {out_dir}")


if __name__ == "__main__":
    if len(sys.argv) != 4:
        sys.exit(__doc__)
    main(*sys.argv[1:])
