#!/usr/bin/env python3
"""Accuracy benchmark: sinew and the reference implementation side by side, one table.

Every figure is computed by this script's own scorer (``scripts/accuracy_scorer.py``, numpy
and scipy), never by sinew's: the label maps are warped with each tool's field
(``warped(x) = moving(x + u(x))``, voxel units) and scored here.

Cases (see docs/accuracy.md):

A. inter-subject pairs of generated cohorts (``sinew demo --data-only``), all i < j of N
   subjects, moving j onto fixed i, mean Dice and folding:
   (i) the demo generator (variation 1), tuning split seed 7, held-out split seed 1001;
   (ii) a second cohort the defaults were never tuned on (variation 2, noise 20 HU),
        tuning split seed 7, held-out split seed 2002;
   (iii) the held-out demo-generator pairs at 4 mm (``--small``, seed 1001).
B. known smooth warps of real scans (fixed = source pulled through u*, moving = source), mean
   and 95th-percentile endpoint error in mm inside a brain/body mask:
   (1) the MNI ICBM152 2009a symmetric T1 template shipped inside the nilearn package,
       block-averaged to 2 mm, 12 mm warp;
   (2) the same with the moving scan's contrast inverted by a non-linear monotone map;
   (3) the real chest CT ``../shared/data/real-ct/chest_ct_a.nii.gz`` (pyradiomics test data,
       BSD-3), in-plane block-averaged by 2 to 256x256x48, 10 mm warp smooth in mm;
   (4) demo-generator subject_00 (seed 7), 15 mm warp.
C. Dice versus folding: sinew over ``lambda`` and the reference over its ``--lambda`` (its
   per-level default list scaled by factors), on the held-out pairs of cohort (ii).

Registrations are cached under ``--work`` keyed by (tool, tool file hash, input file hashes,
parameters), so a rerun only scores. The reference runs only when ``import jax`` works.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import accuracy_scorer as S  # noqa: E402  (the script's own scorer, beside this file)

ROOT = Path(__file__).resolve().parent.parent
# Bump when the way the known-warp inputs are built changes (invalidates their cache).
GEN_VERSION = 1
# The reference's default per-level λ list (levels 8,4,2,1; `jax_register.py --help`), scaled
# by the factors of case C. The 4 mm cohort uses the list of the reference's README.
REF_LAMBDA_2MM = [0.01, 0.01, 0.03, 0.04]
REF_4MM = {"levels": "4,2,1", "iters": "150,100,75", "lambda": [0.01, 0.01, 0.07], "lr": "1,1,2"}

NILEARN_T1 = "mni_icbm152_t1_tal_nlin_sym_09a_converted.nii.gz"
NILEARN_GM = "mni_icbm152_gm_tal_nlin_sym_09a_converted.nii.gz"
NILEARN_WM = "mni_icbm152_wm_tal_nlin_sym_09a_converted.nii.gz"


def shared_dir() -> Path:
    """``../shared`` beside the repository root; from a git worktree elsewhere, beside the
    main checkout (found through ``git rev-parse --git-common-dir``)."""
    first = ROOT.parent / "shared"
    if first.is_dir():
        return first
    try:
        common = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--path-format=absolute", "--git-common-dir"],
                                capture_output=True, text=True, check=True).stdout.strip()
        alt = Path(common).parent.parent / "shared"
        if alt.is_dir():
            return alt
    except (OSError, subprocess.CalledProcessError):
        pass
    return first


class BenchError(Exception):
    """A problem with the benchmark's inputs or tools (one line, exit code 2)."""


def log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


# --------------------------------------------------------------------------------------------
# hashing and files


_hash_memo: dict[tuple, str] = {}


def file_hash(path: Path) -> str:
    """SHA-256 of a file's bytes (memoised on path, size and mtime)."""
    st = path.stat()
    key = (str(path), st.st_size, st.st_mtime_ns)
    if key not in _hash_memo:
        h = hashlib.sha256()
        with open(path, "rb") as f:
            for chunk in iter(lambda: f.read(1 << 20), b""):
                h.update(chunk)
        _hash_memo[key] = h.hexdigest()
    return _hash_memo[key]


def save_nifti(path: Path, data: np.ndarray, affine: np.ndarray) -> None:
    """float32 NIfTI (uint8 for integer label maps), written to a temp file then renamed."""
    arr = np.asarray(data)
    arr = arr.astype(np.uint8) if arr.dtype.kind in "iub" else arr.astype(np.float32)
    img = nib.Nifti1Image(arr, affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    tmp = path.with_name(path.name + ".tmp.nii.gz")
    nib.save(img, tmp)
    os.replace(tmp, path)


def load(path: Path) -> tuple[np.ndarray, np.ndarray]:
    img = nib.load(str(path))
    return np.asarray(img.dataobj), img.affine


def write_json(path: Path, obj) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(obj, indent=1, default=float) + "\n")
    os.replace(tmp, path)


# --------------------------------------------------------------------------------------------
# tools


def toml_value(text: str) -> str:
    """A `--sinew` VALUE as TOML: verbatim when it is a TOML value (number, bool, array,
    quoted string), otherwise quoted as a string (`model=bspline` → `model = "bspline"`)."""
    try:
        tomllib.loads(f"v = {text}")
        return text
    except tomllib.TOMLDecodeError:
        return json.dumps(text)


class Sinew:
    """`sinew register -f F -m M -o OUT --field-units voxel --no-qc -q [--config TOML]`."""

    name = "sinew"

    def __init__(self, binary: Path, extra: dict[str, str]):
        if not binary.is_file():
            raise BenchError(f"{binary}: sinew binary not found (build it: cargo build --release -p sinew-cli)")
        self.binary = binary
        self.extra = extra  # KEY -> TOML value text, applied to every run
        self.tool_hash = file_hash(binary)

    def params(self, overrides: dict[str, str] | None = None) -> dict[str, str]:
        p = dict(self.extra)
        p.update(overrides or {})
        return p

    def command(self, fixed: Path, moving: Path, out: Path, params: dict[str, str]) -> list[str]:
        cmd = [str(self.binary), "register", "-f", str(fixed), "-m", str(moving), "-o", str(out)]
        cmd += ["--field-units", "voxel", "--no-qc", "--quiet"]
        if params:
            cfg = out / "params.toml"
            cfg.write_text("".join(f"{k} = {v}\n" for k, v in sorted(params.items())))
            cmd += ["--config", str(cfg)]
        return cmd

    @staticmethod
    def read_field(out: Path) -> np.ndarray:
        img = nib.load(str(out / "field.nii.gz"))
        units = img.header["intent_name"].tobytes().split(b"\0")[0].decode()
        if units != "sinew-vox":
            raise BenchError(f"{out}/field.nii.gz: expected a voxel-unit field (intent_name sinew-vox), found {units!r}")
        u = np.asarray(img.dataobj, dtype=np.float32)
        return u.reshape(u.shape[:3] + (3,))


class Reference:
    """`python3 jax_register.py --fixed F --moving M --out DIR [options]` (run, never copied)."""

    name = "reference"

    def __init__(self, script: Path):
        self.script = script
        self.tool_hash = file_hash(script)

    @staticmethod
    def params(base: dict | None = None, lambda_list: list[float] | None = None) -> dict[str, str]:
        p = {k: (",".join(f"{x:g}" for x in v) if isinstance(v, list) else v) for k, v in (base or {}).items()}
        if lambda_list is not None:
            p["lambda"] = ",".join(f"{x:g}" for x in lambda_list)
        return p

    def command(self, fixed: Path, moving: Path, out: Path, params: dict[str, str]) -> list[str]:
        cmd = [sys.executable, str(self.script), "--fixed", str(fixed), "--moving", str(moving), "--out", str(out)]
        for k in sorted(params):
            cmd += [f"--{k}", params[k]]
        return cmd

    @staticmethod
    def read_field(out: Path) -> np.ndarray:
        return np.load(out / "field.npy")


def reference_status(args) -> tuple[Reference | None, str]:
    """The reference tool, or None and why it is not run."""
    if args.no_reference:
        return None, "not run (--no-reference)"
    script = Path(args.reference or os.environ.get("SINEW_REFERENCE") or shared_dir() / "reference" / "jax_register.py")
    if not script.is_file():
        return None, f"not run (no reference script at {script})"
    probe = subprocess.run([sys.executable, "-c", "import jax"], capture_output=True, text=True)
    if probe.returncode != 0:
        return None, "not run (jax cannot be imported)"
    return Reference(script.resolve()), "run"


def register(tool, fixed: Path, moving: Path, params: dict[str, str], work: Path) -> dict:
    """Runs (or finds in the cache) one registration; returns its record (dir, wall time)."""
    key_src = json.dumps(
        {"tool": tool.name, "tool_hash": tool.tool_hash, "fixed": file_hash(fixed), "moving": file_hash(moving),
         "params": params}, sort_keys=True)
    key = hashlib.sha256(key_src.encode()).hexdigest()[:20]
    final = work / "runs" / tool.name / key
    meta_path = final / "meta.json"
    if meta_path.is_file():
        meta = json.loads(meta_path.read_text())
        meta["cached"] = True
        return meta
    tmp = final.with_name(f"{key}.tmp-{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    cmd = tool.command(fixed, moving, tmp, params)
    log(f"  {tool.name}: {moving.name} -> {fixed.name} {params or ''}")
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    (tmp / "stdout.txt").write_text(proc.stdout)
    (tmp / "stderr.txt").write_text(proc.stderr)
    if proc.returncode != 0:
        tail = (proc.stderr.strip().splitlines() or ["(no output)"])[-1]
        log(f"    FAILED (exit {proc.returncode}): {tail}")
        return {"dir": str(tmp), "failed": f"exit {proc.returncode}: {tail}", "wall_s": wall, "cached": False}
    meta = {"dir": str(final), "tool": tool.name, "command": [str(c).replace(str(tmp), str(final)) for c in cmd],
            "fixed": str(fixed), "moving": str(moving), "params": params, "wall_s": wall,
            "when": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "load_avg_1min": os.getloadavg()[0]}
    write_json(tmp / "meta.json", meta)
    shutil.rmtree(final, ignore_errors=True)
    os.replace(tmp, final)
    log(f"    {wall:.1f} s")
    meta["cached"] = False
    return meta


def read_field(tool, run: dict) -> np.ndarray:
    return tool.read_field(Path(run["dir"]))


# --------------------------------------------------------------------------------------------
# data


def cohort(sinew: Sinew, work: Path, seed: int, n: int, small: bool = False, variation: float = 1.0,
           noise_hu: float | None = None) -> Path:
    """`sinew demo --data-only` into a folder named after the settings (resumable)."""
    name = f"{'small' if small else 'full'}_v{variation:g}_n{'demo' if noise_hu is None else f'{noise_hu:g}'}_s{seed}"
    out = work / "data" / "cohorts" / name
    cmd = [str(sinew.binary), "demo", "--data-only", "--quiet", "--out", str(out), "--seed", str(seed),
           "--subjects", str(n), "--variation", f"{variation:g}"]
    if small:
        cmd.append("--small")
    if noise_hu is not None:
        cmd += ["--noise-hu", f"{noise_hu:g}"]
    need = [out / f"subject_{i:02d}_{k}.nii.gz" for i in range(n) for k in ("image", "labels")]
    if not all(p.is_file() for p in need):
        log(f"generating cohort {name} ({n} subjects)")
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode != 0:
            raise BenchError(f"{out}: sinew demo failed: {proc.stderr.strip()}")
    return out


def nilearn_data_dir() -> Path:
    try:
        import nilearn  # noqa: F401  (only its package folder is used)
    except ImportError as e:
        raise BenchError("nilearn is not installed (python3 -m pip install -r scripts/requirements.txt)") from e
    d = Path(nilearn.__file__).resolve().parent / "datasets" / "data"
    if not (d / NILEARN_T1).is_file():
        raise BenchError(f"{d / NILEARN_T1}: the MNI template is not shipped in this nilearn install")
    return d


def known_warp_case(work: Path, name: str, build) -> dict:
    """Builds (once) fixed.nii.gz, moving.nii.gz, truth_vox.npy, mask.npy of a known-warp case.

    ``build()`` returns (source, moving, affine, u*_mm_along_axes, source_mask_or_None,
    mask_threshold_on_fixed). fixed = source pulled through u* (cubic spline), moving as given.
    """
    d = work / "data" / "known" / f"{name}_g{GEN_VERSION}"
    done = d / "done.json"
    if not done.is_file():
        log(f"building known-warp case {name}")
        d.mkdir(parents=True, exist_ok=True)
        source, moving, affine, u_mm, source_mask, threshold = build()
        u_vox = S.mm_along_axes_to_vox(u_mm, affine)
        det = S.jacobian_det(u_vox, affine)
        if det.min() <= 0.2:
            raise BenchError(f"{name}: the known field folds (min det J {det.min():.3f} ≤ 0.2)")
        fixed = S.pull(source.astype(np.float64), u_vox, order=3)
        if source_mask is not None:
            mask = S.pull(source_mask.astype(np.float64), u_vox, order=1) > 0.5
        else:
            mask = S.body_mask(fixed, threshold)
        save_nifti(d / "fixed.nii.gz", fixed, affine)
        save_nifti(d / "moving.nii.gz", moving, affine)
        np.save(d / "truth_vox.npy", u_vox.astype(np.float32))
        np.save(d / "mask.npy", mask)
        write_json(done, {"max_mm": float(np.linalg.norm(u_mm, axis=-1).max()), "det_min": float(det.min()),
                          "det_max": float(det.max()), "mask_voxels": int(mask.sum()), "shape": list(fixed.shape)})
    info = json.loads(done.read_text())
    return {"dir": d, "fixed": d / "fixed.nii.gz", "moving": d / "moving.nii.gz", "info": info}


def build_mni(remap: bool, seed: int, max_mm: float):
    def build():
        d = nilearn_data_dir()
        t1, aff = load(d / NILEARN_T1)
        gm, _ = load(d / NILEARN_GM)
        wm, _ = load(d / NILEARN_WM)
        src, aff2 = S.block_mean(t1.astype(np.float64), aff, (2, 2, 2))  # 1 mm -> 2 mm
        brain, _ = S.block_mean((gm.astype(np.float64) + wm.astype(np.float64)) / 255.0, aff, (2, 2, 2))
        u = S.sine_field_mm(src.shape, max_mm, seed)
        moving = src
        if remap:
            # Non-linear, monotone, inverting contrast: t in [0, 1] -> 255 (1 - sqrt(t)).
            t = np.clip(src / src.max(), 0.0, 1.0)
            moving = 255.0 * (1.0 - np.sqrt(t))
        return src, moving, aff2, u, brain > 0.5, None
    return build


def build_ct(path: Path, seed: int, max_mm: float):
    def build():
        if not path.is_file():
            raise BenchError(f"{path}: real chest CT not found")
        ct, aff = load(path)
        src, aff2 = S.block_mean(ct.astype(np.float64), aff, (2, 2, 1))  # 512x512x48 -> 256x256x48
        u = S.sine_field_mm(src.shape, max_mm, seed)
        return src, src, aff2, u, None, -500.0
    return build


def build_demo_subject(cohort_dir: Path, seed: int, max_mm: float):
    def build():
        img, aff = load(cohort_dir / "subject_00_image.nii.gz")
        lab, _ = load(cohort_dir / "subject_00_labels.nii.gz")
        u = S.sine_field_mm(img.shape, max_mm, seed)
        return img.astype(np.float64), img.astype(np.float64), aff, u, lab > 0, None
    return build


# --------------------------------------------------------------------------------------------
# scoring


def score_pair(tool, run: dict, fixed_labels: Path, moving_labels: Path) -> dict:
    if run.get("failed"):
        return {"failed": run["failed"], "wall_s": run["wall_s"]}
    u = read_field(tool, run)
    fl, aff = load(fixed_labels)
    ml, _ = load(moving_labels)
    warped = S.pull(ml, u, order=0)
    per = S.dice_per_label(fl, warped)
    det = S.jacobian_det(u, aff)
    out = {"dice": float(np.mean(list(per.values()))), "dice_per_label": per, **S.folding_stats(det),
           "wall_s": run["wall_s"], "cached": run["cached"], "run_dir": run["dir"]}
    return out


def score_known(tool, run: dict, case: dict) -> dict:
    if run.get("failed"):
        return {"failed": run["failed"], "wall_s": run["wall_s"]}
    u = read_field(tool, run)
    _, aff = load(case["fixed"])
    truth = np.load(case["dir"] / "truth_vox.npy")
    mask = np.load(case["dir"] / "mask.npy")
    det = S.jacobian_det(u, aff)
    return {**S.endpoint_error(u, truth, aff, mask), **S.folding_stats(det), "wall_s": run["wall_s"],
            "cached": run["cached"], "run_dir": run["dir"]}


def baseline_pair(fixed_labels: Path, moving_labels: Path) -> dict:
    fl, _ = load(fixed_labels)
    ml, _ = load(moving_labels)
    return {"dice": S.mean_dice(fl, ml)}


def baseline_known(case: dict) -> dict:
    _, aff = load(case["fixed"])
    truth = np.load(case["dir"] / "truth_vox.npy")
    mask = np.load(case["dir"] / "mask.npy")
    return S.endpoint_error(np.zeros_like(truth), truth, aff, mask)


# --------------------------------------------------------------------------------------------
# the benchmark


def pairs_of(n: int) -> list[tuple[int, int]]:
    return [(i, j) for i in range(n) for j in range(i + 1, n)]


def aggregate(items: list[dict]) -> dict:
    ok = [r for r in items if r and not r.get("failed")]
    agg: dict = {"n": len(items), "failed": len(items) - len(ok)}
    if not ok:
        return agg
    for k in ("dice", "folding_pct", "sdlogj", "epe_mean_mm", "epe_p95_mm", "wall_s"):
        vals = [r[k] for r in ok if k in r]
        if vals:
            agg[k] = float(np.mean(vals))
    if all("folding_pct" in r for r in ok):
        agg["folding_pct_max"] = float(max(r["folding_pct"] for r in ok))
    if all("wall_s" in r for r in ok):
        agg["wall_s_sum"] = float(sum(r["wall_s"] for r in ok))
    return agg


def run_pairs_case(case_id, desc, source, split, cdir, n, tools, work, ref_params, sinew_params):
    """One inter-subject split: every tool on every pair i<j (moving j onto fixed i)."""
    log(f"case {case_id}: {desc} [{split}]")
    pairs = []
    for i, j in pairs_of(n):
        f_img, m_img = cdir / f"subject_{i:02d}_image.nii.gz", cdir / f"subject_{j:02d}_image.nii.gz"
        f_lab, m_lab = cdir / f"subject_{i:02d}_labels.nii.gz", cdir / f"subject_{j:02d}_labels.nii.gz"
        rec = {"fixed": str(f_img), "moving": str(m_img), "before": baseline_pair(f_lab, m_lab)}
        for tool in tools:
            params = sinew_params if tool.name == "sinew" else ref_params
            run = register(tool, f_img, m_img, params, work)
            rec[tool.name] = score_pair(tool, run, f_lab, m_lab)
            rec[tool.name]["params"] = params
        pairs.append(rec)
    return {"case": case_id, "kind": "pairs", "desc": desc, "source": source, "split": split, "items": pairs}


def run_known_case(case_id, desc, source, case, tools, work, ref_params, sinew_params):
    log(f"case {case_id}: {desc}")
    rec = {"fixed": str(case["fixed"]), "moving": str(case["moving"]), "before": baseline_known(case),
           "truth": case["info"]}
    for tool in tools:
        params = sinew_params if tool.name == "sinew" else ref_params
        run = register(tool, case["fixed"], case["moving"], params, work)
        rec[tool.name] = score_known(tool, run, case)
        rec[tool.name]["params"] = params
    return {"case": case_id, "kind": "known", "desc": desc, "source": source, "split": "—", "items": [rec]}


def fmt(x, spec=".3f", none="—"):
    return none if x is None or (isinstance(x, float) and np.isnan(x)) else format(x, spec)


def table(results: list[dict], ref_note: str) -> str:
    head = ["case", "data", "split", "n", "before", "sinew Dice", "sinew EPE mm mean / p95",
            "sinew fold % mean (max)", "sinew SDlogJ", "sinew s/run", "ref Dice", "ref EPE mm mean / p95",
            "ref fold % mean (max)", "ref SDlogJ", "ref s/run", "time ref/sinew", "sinew Dice > ref"]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for res in results:
        tools_here = [t for t in ("sinew", "reference") if any(t in it for it in res["items"])]
        aggs = {t: aggregate([it.get(t) for it in res["items"]]) for t in ("sinew", "reference")}
        before = aggregate([it["before"] for it in res["items"]])
        b = fmt(before.get("dice")) if res["kind"] == "pairs" else f"EPE {fmt(before.get('epe_mean_mm'), '.2f')}"
        cells = [res["case"], res["desc"], res["split"], str(len(res["items"])), b]
        for t in ("sinew", "reference"):
            a = aggs[t]
            if t not in tools_here:
                note = ref_note if t == "reference" and not res.get("curve") else "—"
                cells += [note] + ["—"] * 4
                continue
            if a.get("failed") == a["n"]:
                cells += ["failed"] + ["—"] * 4
                continue
            fail = f" ({a['failed']} failed)" if a.get("failed") else ""
            cells += [fmt(a.get("dice")) + fail,
                      f"{fmt(a.get('epe_mean_mm'), '.2f')} / {fmt(a.get('epe_p95_mm'), '.2f')}" if "epe_mean_mm" in a else "—",
                      f"{fmt(a.get('folding_pct'), '.3f')} ({fmt(a.get('folding_pct_max'), '.3f')})",
                      fmt(a.get("sdlogj"), ".3f"), fmt(a.get("wall_s"), ".1f")]
        ratio, better = "—", "—"
        if all(t in tools_here for t in ("sinew", "reference")) and aggs["sinew"].get("wall_s_sum") \
                and aggs["reference"].get("wall_s_sum"):
            ratio = f"{aggs['reference']['wall_s_sum'] / aggs['sinew']['wall_s_sum']:.1f}×"
            if res["kind"] == "pairs":
                both = [it for it in res["items"] if "dice" in it.get("sinew", {}) and "dice" in it.get("reference", {})]
                better = f"{sum(it['sinew']['dice'] > it['reference']['dice'] for it in both)} of {len(both)}"
        lines.append("| " + " | ".join(cells + [ratio, better]) + " |")
    return "\n".join(lines)


def details_md(results: list[dict], work: Path) -> str:
    out = []
    for res in results:
        out.append(f"### {res['case']}: {res['desc']} ({res['split']})\n\nSource: {res['source']}\n")
        out.append("| fixed | moving | before | tool | Dice | EPE mean / p95 mm | fold % | SDlogJ | det min | s | cached | run folder |")
        out.append("|---|---|---|---|---|---|---|---|---|---|---|---|")
        for it in res["items"]:
            before = it["before"]
            b = fmt(before.get("dice")) if "dice" in before else f"EPE {fmt(before.get('epe_mean_mm'), '.2f')}"
            for t in ("sinew", "reference"):
                r = it.get(t)
                if r is None:
                    continue
                rel = lambda p: os.path.relpath(p, work)  # noqa: E731
                if r.get("failed"):
                    out.append(f"| {rel(it['fixed'])} | {rel(it['moving'])} | {b} | {t} | failed: {r['failed']} "
                               "| | | | | | | |")
                    continue
                epe = f"{fmt(r.get('epe_mean_mm'), '.2f')} / {fmt(r.get('epe_p95_mm'), '.2f')}" if "epe_mean_mm" in r else "—"
                out.append(f"| {rel(it['fixed'])} | {rel(it['moving'])} | {b} | {t} {r['params'] or ''} | "
                           f"{fmt(r.get('dice'))} | {epe} | {fmt(r['folding_pct'], '.3f')} | {fmt(r['sdlogj'])} | "
                           f"{fmt(r['det_min'])} | {r['wall_s']:.1f} | {'yes' if r['cached'] else 'no'} | "
                           f"{rel(r['run_dir'])} |")
        out.append("")
    return "\n".join(out)


def parse_args(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter, epilog=__doc__.split("\n", 2)[2])
    ap.add_argument("--sinew-bin", type=Path, default=ROOT / "target" / "release" / "sinew")
    ap.add_argument("--reference", help="path of jax_register.py (default: $SINEW_REFERENCE, else "
                    "../shared/reference/jax_register.py beside the repo)")
    ap.add_argument("--no-reference", action="store_true", help="run sinew only")
    ap.add_argument("--cases", default="A,B,C", help="comma list of A, B, C (default all)")
    ap.add_argument("--quick", action="store_true",
                    help="2 subjects per split (1 pair), held-out splits only, a 3-point λ curve")
    ap.add_argument("--subjects", type=int, default=None, help="subjects per split (default 4 → 6 pairs; quick 2)")
    ap.add_argument("--work", type=Path, default=ROOT / "target" / "accuracy-bench",
                    help="cache of cohorts, known-warp inputs and registrations")
    ap.add_argument("--out", type=Path, help="write the table and the per-pair data as markdown")
    ap.add_argument("--json", type=Path, help="write the raw numbers as JSON")
    ap.add_argument("--sinew", action="append", default=[], metavar="KEY=VALUE",
                    help="a RegParams key for every sinew run (repeatable; written to a --config TOML)")
    ap.add_argument("--lambdas", default=None, help="sinew λ values of the curve (default 0.025,0.05,0.1,0.2,0.4; "
                    "quick 0.05,0.1,0.2)")
    ap.add_argument("--ref-lambda-factors", default=None,
                    help="factors on the reference's per-level λ list (default 0.5,1,2,4; quick 1,2)")
    ap.add_argument("--curve-cohort", default="ii", choices=["i", "ii", "iii"],
                    help="held-out pairs of which cohort case C runs on (default ii)")
    ap.add_argument("--real-ct", type=Path, default=None,
                    help="the real chest CT of case B(3) (default ../shared/data/real-ct/chest_ct_a.nii.gz)")
    return ap.parse_args(argv)


def main(argv=None) -> int:
    args = parse_args(argv)
    t_start = time.perf_counter()
    cases = {c.strip().upper() for c in args.cases.split(",") if c.strip()}
    if not cases <= {"A", "B", "C"}:
        raise BenchError(f"--cases {args.cases}: expected a comma list of A, B, C")
    n = args.subjects or (2 if args.quick else 4)
    if n < 2:
        raise BenchError(f"--subjects {n}: need at least 2 subjects for a pair")
    extra = {}
    for kv in args.sinew:
        if "=" not in kv:
            raise BenchError(f"--sinew {kv}: expected KEY=VALUE")
        k, v = kv.split("=", 1)
        extra[k.strip()] = toml_value(v.strip())
    sinew = Sinew(args.sinew_bin.resolve(), extra)
    ref, ref_note = reference_status(args)
    tools = [sinew] + ([ref] if ref else [])
    if args.real_ct is None:
        args.real_ct = shared_dir() / "data" / "real-ct" / "chest_ct_a.nii.gz"
    work = args.work.resolve()
    work.mkdir(parents=True, exist_ok=True)
    log(f"sinew {sinew.binary}; reference: {ref_note}; work dir {work}")

    # Cohorts: name -> (split, seed, settings).
    cohorts = {
        "i": {"desc": "demo generator (variation 1, noise 12 HU), 144×112×192 at 2 mm",
              "tuning": 7, "heldout": 1001, "kw": {}},
        "ii": {"desc": "second cohort (variation 2, noise 20 HU), 144×112×192 at 2 mm",
               "tuning": 7, "heldout": 2002, "kw": {"variation": 2.0, "noise_hu": 20.0}},
        "iii": {"desc": "demo generator at 4 mm (--small), 72×56×96",
                "heldout": 1001, "kw": {"small": True}},
    }
    ref_base = {"i": None, "ii": None, "iii": REF_4MM}
    ref_lambda_base = {"i": REF_LAMBDA_2MM, "ii": REF_LAMBDA_2MM, "iii": REF_4MM["lambda"]}
    results = []

    if "A" in cases:
        for cid in ("i", "ii", "iii"):
            c = cohorts[cid]
            for split in ("tuning", "heldout"):
                if split not in c or (args.quick and split == "tuning"):
                    continue
                seed = c[split]
                cdir = cohort(sinew, work, seed, n, **c["kw"])
                src = (f"`sinew demo --data-only --seed {seed} --subjects {n}"
                       + "".join(f" --{k.replace('_', '-')} {v:g}" if not isinstance(v, bool) else f" --{k}"
                                 for k, v in c["kw"].items()) + "`; pairs i<j, moving j onto fixed i")
                results.append(run_pairs_case(f"A({cid})", c["desc"], src, f"{split} (seed {seed})", cdir, n, tools,
                                              work, Reference.params(ref_base[cid]), sinew.params()))

    if "B" in cases:
        demo7 = cohort(sinew, work, 7, 1)
        known = [
            ("B(1)", "MNI T1 template (nilearn), 2 mm, known 12 mm warp",
             f"nilearn package `datasets/data/{NILEARN_T1}` (MNI ICBM152 2009a symmetric), block-averaged 1→2 mm; "
             "brain mask = (GM + WM probability maps shipped beside it) > 0.5",
             "mni_12mm", build_mni(False, 11, 12.0)),
            ("B(2)", "MNI T1 template, moving contrast inverted 255(1−√t), known 12 mm warp",
             f"as B(1); moving = 255·(1 − √(t/max)) of the template", "mni_12mm_remap", build_mni(True, 11, 12.0)),
            ("B(3)", "real chest CT a, 256×256×48 at 1.14×1.14×5 mm, known 10 mm warp",
             f"`{args.real_ct}` (pyradiomics 3.1.0 test data lung1, BSD-3), in-plane 2×2 block mean; "
             "body mask = largest component of fixed > −500 HU, holes filled", "ct_a_10mm",
             build_ct(args.real_ct, 13, 10.0)),
            ("B(4)", "demo subject_00 (seed 7), known 15 mm warp",
             "`sinew demo --data-only --seed 7` subject_00; mask = its labels > 0 pulled through u*", "demo_s7_15mm",
             build_demo_subject(demo7, 17, 15.0)),
        ]
        for cid, desc, src, name, build in known:
            case = known_warp_case(work, name, build)
            src += (f"; u* = sine modes, max {case['info']['max_mm']:.1f} mm, det J of x+u* in "
                    f"[{case['info']['det_min']:.2f}, {case['info']['det_max']:.2f}]")
            results.append(run_known_case(cid, desc, src, case, tools, work, Reference.params(), sinew.params()))

    if "C" in cases:
        cid = args.curve_cohort
        c = cohorts[cid]
        seed = c["heldout"]
        cdir = cohort(sinew, work, seed, n, **c["kw"])
        lambdas = [float(x) for x in (args.lambdas or ("0.05,0.1,0.2" if args.quick else "0.025,0.05,0.1,0.2,0.4")).split(",")]
        factors = [float(x) for x in (args.ref_lambda_factors or ("1,2" if args.quick else "0.5,1,2,4")).split(",")]
        for lam in lambdas:
            res = run_pairs_case(f"C sinew λ={lam:g}", c["desc"], f"held-out pairs of cohort ({cid}), seed {seed}",
                                 f"heldout (seed {seed})", cdir, n, [sinew], work, {},
                                 sinew.params({"lambda": f"{lam:g}"}))
            res["curve"] = True
            results.append(res)
        if ref:
            for fac in factors:
                lam_list = None if fac == 1.0 else [fac * x for x in ref_lambda_base[cid]]
                res = run_pairs_case(
                    f"C reference λ×{fac:g}", c["desc"], f"held-out pairs of cohort ({cid}), seed {seed}; --lambda "
                    + ",".join(f"{fac * x:g}" for x in ref_lambda_base[cid]), f"heldout (seed {seed})", cdir, n, [ref],
                    work, Reference.params(ref_base[cid], lam_list), {})
                res["curve"] = True
                results.append(res)

    elapsed = time.perf_counter() - t_start
    tab = table(results, ref_note)
    load = os.getloadavg()
    footer = (f"\nsinew: {sinew.binary} (sha256 {sinew.tool_hash[:12]}); reference: {ref_note}"
              + (f" ({ref.script}, sha256 {ref.tool_hash[:12]})" if ref else "")
              + f"\nbenchmark wall time {elapsed:.0f} s; load average now {load[0]:.1f} on {os.cpu_count()} cores;"
              f" 'before' = no registration (Dice of the raw pair, or EPE of u = 0); folding over the whole grid;"
              f" tuning split = seed 7 (the defaults may be chosen there), held-out splits are never tuned on.")
    print(tab)
    print(footer)
    if args.out:
        md = (f"# Accuracy benchmark\n\nCommand: `{' '.join(sys.argv)}`\n\n{tab}\n{footer}\n\n## Per pair\n\n"
              f"Paths relative to the work folder `{work}`.\n\n{details_md(results, work)}")
        tmp = args.out.with_name(args.out.name + ".tmp")
        tmp.write_text(md)
        os.replace(tmp, args.out)
    if args.json:
        payload = {"command": sys.argv, "reference": ref_note, "sinew_bin": str(sinew.binary),
                   "sinew_sha256": sinew.tool_hash, "elapsed_s": elapsed, "load_avg": load, "results": results}
        tmp = args.json.with_name(args.json.name + ".tmp")
        tmp.write_text(json.dumps(payload, indent=1, default=str) + "\n")
        os.replace(tmp, args.json)
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except BenchError as e:
        print(f"accuracy_bench: {e}", file=sys.stderr)
        sys.exit(2)
