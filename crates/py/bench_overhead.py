#!/usr/bin/env python3
"""What calling sinew from Python costs over the command line's compute time.

Writes two demo subjects (144x112x192 voxels of 2 mm, `sinew demo --data-only`), then
alternates, `--repeats` times each:
- `sinew register` (no QC sheet): its report's compute time = loading-to-field minus loading,
  plus warping and the Jacobian (the work sinew.register does too; file reading and
  writing are left out);
- `sinew.register` on the arrays nibabel read (outside the timing): the wall time of the call,
  argument checks, conversions and copies included.
Prints the medians and the overhead in percent. Usage:

    python3 crates/py/bench_overhead.py [--threads N] [--repeats R] [--preset NAME] [--small]
"""

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib

import sinew

REPO = Path(__file__).resolve().parents[2]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--threads", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--preset", default="default")
    ap.add_argument("--small", action="store_true", help="72x56x96 voxels of 4 mm")
    ap.add_argument("--sinew", default=os.environ.get("SINEW_BIN", str(REPO / "target" / "release" / "sinew")))
    a = ap.parse_args()
    if not Path(a.sinew).exists():
        subprocess.run(["cargo", "build", "--release", "-p", "sinew-cli"], cwd=REPO, check=True)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        subprocess.run([a.sinew, "demo", "--data-only", "-q", "--subjects", "2", "-o", str(tmp / "data")]
                       + (["--small"] if a.small else []), check=True)  # fmt: skip
        fixed, moving = (tmp / "data" / f"subject_0{n}_image.nii.gz" for n in (0, 1))
        fi, mi = nib.load(fixed), nib.load(moving)
        f_arr, m_arr = fi.get_fdata(dtype="float32"), mi.get_fdata(dtype="float32")
        cli_s, py_s, py_inner_s = [], [], []
        for r in range(a.repeats):
            out = tmp / f"out{r}"
            subprocess.run([a.sinew, "register", "-f", str(fixed), "-m", str(moving), "-o", str(out), "--no-qc", "-q",
                            "-j", str(a.threads), "--preset", a.preset], check=True)  # fmt: skip
            t = json.loads((out / "report.json").read_text())["timings"]
            cli_s.append(t["register_s"] - t["load_s"] + t["warp_s"] + t["jacobian_s"])
            t0 = time.perf_counter()
            reg = sinew.register(f_arr, m_arr, affine=(fi.affine, mi.affine), preset=a.preset, threads=a.threads)
            py_s.append(time.perf_counter() - t0)
            py_inner_s.append(reg.report["timings"]["total_s"])
        cli, py, inner = (statistics.median(v) for v in (cli_s, py_s, py_inner_s))
        shape = "x".join(map(str, f_arr.shape))
        print(f"pair {shape}, preset {a.preset}, {a.threads} threads, {a.repeats} runs each (medians)")
        print(f"  CLI compute (load-to-field minus load, + warp + Jacobian): {cli:.3f} s  {['%.3f' % v for v in cli_s]}")
        print(f"  sinew.register wall time from Python:                      {py:.3f} s  {['%.3f' % v for v in py_s]}")
        print(f"  of which inside Rust (report total_s):                     {inner:.3f} s")
        print(f"  overhead over the CLI's compute: {100 * (py / cli - 1):+.1f} %"
              f"  (call itself: {1000 * (py - inner):.1f} ms)")  # fmt: skip
        load = os.getloadavg()[0]
        print(f"  load average during the run: {load:.1f} on {os.cpu_count()} cores")
    return 0


if __name__ == "__main__":
    sys.exit(main())
