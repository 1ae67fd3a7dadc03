//! `sinew tune` end to end on a tiny demo cohort: outputs, the held-out rule, the written
//! config read back by `sinew register --config`, resume after SIGKILL, shards, the time
//! budget, and bad input.

use sinew_testkit::{ok, p, Sinew};
use std::path::{Path, PathBuf};
use std::process::{Output, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

/// Four small demo subjects (6 pairs), written once for all tests of this file.
fn demo() -> &'static Path {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("sinew-tune-demo-{}", std::process::id()));
        SINEW.demo(&dir, 4, &["--data-only"]);
        dir
    })
}

/// The settings every run shares: a cheap starting point, few trials, a fixed thread count
/// (same thread count, same fields).
const TUNE: [&str; 12] = [
    "--preset",
    "fast",
    "--iterations",
    "8,6,4,3",
    "--trials",
    "4",
    "--threads",
    "2",
    "--max-folding",
    "5",
    "-q",
    "--seed",
];

fn tune_args<'a>(out: &'a Path, extra: &[&'a str]) -> Vec<&'a str> {
    let mut a = vec!["tune", "--all-pairs", p(demo()), "--out", p(out)];
    a.extend(TUNE);
    a.push("3");
    a.extend(extra);
    a
}

fn tune(out: &Path, extra: &[&str]) -> Output {
    SINEW.run(tune_args(out, extra))
}

/// trials.csv without the wall-time column (wall times differ between runs).
fn trials_without_time(dir: &Path) -> Vec<Vec<String>> {
    let mut r = csv::Reader::from_path(dir.join("trials.csv")).unwrap();
    let head = r.headers().unwrap().clone();
    let t = head.iter().position(|h| h == "seconds_per_pair").unwrap();
    let mut rows = vec![head.iter().filter(|h| *h != "seconds_per_pair").map(String::from).collect()];
    for rec in r.records() {
        let rec = rec.unwrap();
        rows.push(rec.iter().enumerate().filter(|(i, _)| *i != t).map(|(_, v)| v.to_string()).collect());
    }
    rows
}

/// A config file without its comment lines (they quote wall times).
fn config_body(path: &Path) -> String {
    std::fs::read_to_string(path).unwrap().lines().filter(|l| !l.starts_with('#')).collect::<Vec<_>>().join("\n")
}

fn json(path: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))).unwrap()
}

/// An uninterrupted run, shared by the tests that compare with it.
fn reference_run() -> &'static Path {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = sinew_testkit::tempdir().keep();
        ok(tune(&dir, &[]));
        dir
    })
}

#[test]
fn tune_runs_end_to_end_and_reports_on_held_out_pairs_only() {
    let out = reference_run();
    for f in ["tune.json", "tuned.toml", "trials.csv", "result.json", "tune.html", "holdout/default.json"] {
        assert!(out.join(f).is_file(), "{f} missing");
    }
    let result = json(&out.join("result.json"));
    assert_eq!(result["trials"], 4);
    assert_eq!((result["tuning_pairs"].as_u64(), result["holdout_pairs"].as_u64()), (Some(4), Some(2)));
    assert!(result["verdict"].as_str().unwrap().starts_with("Held-out pairs only"));
    // The held-out rule: no trial saw a held-out pair, and the two sets cover the 6 pairs.
    let settings = json(&out.join("tune.json"));
    let pair = |v: &serde_json::Value| (v[0].as_str().unwrap().to_string(), v[1].as_str().unwrap().to_string());
    let tuning: Vec<_> = settings["tuning_pairs"].as_array().unwrap().iter().map(pair).collect();
    let held: Vec<_> = settings["holdout_pairs"].as_array().unwrap().iter().map(pair).collect();
    assert!(tuning.iter().all(|t| !held.contains(t)));
    assert_eq!(tuning.len() + held.len(), 6);
    // The (fixed, moving) pairs a trial or hold-out record ran.
    let pairs_of = |rec: &serde_json::Value| -> Vec<_> {
        let pair = |p: &serde_json::Value| {
            (p["fixed"].as_str().unwrap().to_string(), p["moving"].as_str().unwrap().to_string())
        };
        rec["pairs"].as_array().unwrap().iter().map(pair).collect()
    };
    for t in 0..4 {
        let rec = json(&out.join(format!("trials/trial-{t:04}.json")));
        assert_eq!(pairs_of(&rec), tuning, "trial {t} must use exactly the tuning pairs");
    }
    let hd = json(&out.join("holdout/default.json"));
    assert_eq!(pairs_of(&hd), held);

    // The Pareto column against the definition of Pareto dominance (more Dice, less folding):
    // a trial is on the front when no other trial is at least as good in both and better in one.
    let mut r = csv::Reader::from_path(out.join("trials.csv")).unwrap();
    let head = r.headers().unwrap().clone();
    let col = |n: &str| head.iter().position(|h| h == n).unwrap();
    let rows: Vec<csv::StringRecord> = r.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), 4);
    let pts: Vec<(f64, f64)> =
        rows.iter().map(|r| (r[col("dice")].parse().unwrap(), r[col("folding_pct")].parse().unwrap())).collect();
    for (i, r) in rows.iter().enumerate() {
        let dominated = pts.iter().any(|&(d, f)| d >= pts[i].0 && f <= pts[i].1 && (d > pts[i].0 || f < pts[i].1));
        assert_eq!(&r[col("pareto")], if dominated { "false" } else { "true" }, "trial {i}");
        let s: f64 = r[col("seconds_per_pair")].parse().unwrap();
        assert!(s > 0.0, "time per trial recorded");
    }
    let html = std::fs::read_to_string(out.join("tune.html")).unwrap();
    let on_front = rows.iter().filter(|r| &r[col("pareto")] == "true").count();
    assert!(html.contains("<svg"));
    assert_eq!(html.matches("class=\"trial front\"").count(), on_front);
    assert_eq!(html.contains("class=\"pareto\""), on_front > 1);
    assert!(html.contains("Held-out pairs only"));
}

#[test]
fn written_config_round_trips_through_register() {
    let out = reference_run();
    let result = json(&out.join("result.json"));
    let best = result["best_trial"].as_u64().unwrap();
    let rec = json(&out.join(format!("trials/trial-{best:04}.json")));
    let reg = sinew_testkit::tempdir();
    let d = demo();
    let f = |n: &str| d.join(n).to_str().unwrap().to_string();
    ok(SINEW.run([
        "register",
        "-f",
        &f("subject_00_image.nii.gz"),
        "-m",
        &f("subject_01_image.nii.gz"),
        "-o",
        p(reg.path()),
        "--config",
        p(&out.join("tuned.toml")),
        "--no-qc",
        "-q",
        "--threads",
        "2",
    ]));
    let report = json(&reg.path().join("report.json"));
    // Every parameter equal, compared as JSON values (exact for f32 values written in their
    // shortest form).
    assert_eq!(report["params"], rec["params"]);
    // The cohort and demo commands accept it too (parse and validate only: --list stops there).
    ok(SINEW.run([
        "cohort",
        "--all-pairs",
        p(d),
        "--out",
        p(&reg.path().join("c")),
        "--config",
        p(&out.join("tuned.toml")),
        "--list",
    ]));
}

#[test]
fn killed_search_resumes_with_the_same_trials_and_result() {
    let reference = reference_run();
    let dir = sinew_testkit::tempdir();
    let out = dir.path().join("t");
    let mut child = SINEW.cmd().args(tune_args(&out, &[])).stdout(Stdio::null()).stderr(Stdio::null()).spawn().unwrap();
    // Kill while the second trial runs: after the first trial's record appears.
    let t0 = Instant::now();
    while !out.join("trials/trial-0000.json").exists() {
        assert!(t0.elapsed() < Duration::from_secs(300), "no trial record after 300 s");
        if child.try_wait().unwrap().is_some() {
            break;
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    std::thread::sleep(Duration::from_millis(150));
    let _ = child.kill(); // SIGKILL on Unix
    child.wait().unwrap();
    assert!(!out.join("result.json").exists(), "the run was meant to be interrupted before the end");
    ok(tune(&out, &[]));
    assert_eq!(trials_without_time(&out), trials_without_time(reference));
    assert_eq!(config_body(&out.join("tuned.toml")), config_body(&reference.join("tuned.toml")));
    let (a, b) = (json(&out.join("result.json")), json(&reference.join("result.json")));
    assert_eq!(a["best_trial"], b["best_trial"]);
    assert_eq!(a["holdout"]["tuned"]["dice"], b["holdout"]["tuned"]["dice"]);
    assert_eq!(a["holdout"]["default"]["dice"], b["holdout"]["default"]["dice"]);
    // No temporary left behind.
    for sub in ["", "trials", "holdout"] {
        for e in std::fs::read_dir(out.join(sub)).unwrap().flatten() {
            assert!(!e.file_name().to_string_lossy().contains(".tmp-"), "{:?} left", e.path());
        }
    }
}

#[test]
fn shards_running_side_by_side_give_the_unsharded_trials() {
    let reference = reference_run();
    let dir = sinew_testkit::tempdir();
    let out = dir.path().join("t");
    let spawn = |k: &str| {
        SINEW.cmd().args(tune_args(&out, &["--shard", k])).stdout(Stdio::null()).stderr(Stdio::piped()).spawn().unwrap()
    };
    let (a, b) = (spawn("1/2"), spawn("2/2"));
    for c in [a, b] {
        ok(c.wait_with_output().unwrap());
    }
    assert_eq!(trials_without_time(&out), trials_without_time(reference));
    assert_eq!(config_body(&out.join("tuned.toml")), config_body(&reference.join("tuned.toml")));
}

#[test]
fn a_time_budget_no_setting_meets_ends_with_the_closest_setting() {
    let dir = sinew_testkit::tempdir();
    let out = dir.path().join("t");
    let o = tune(&out, &["--time-budget", "0.000001"]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    let lines: Vec<&str> = err.lines().filter(|l| !l.trim().is_empty()).collect();
    assert_eq!(lines.len(), 1, "{err}");
    assert!(lines[0].contains("no setting met the budgets") && lines[0].contains("closest.toml"), "{err}");
    assert!(out.join("closest.toml").is_file() && !out.join("tuned.toml").exists());
    // Every trial is over budget and was stopped after its first pair (> 2 × the budget).
    let mut r = csv::Reader::from_path(out.join("trials.csv")).unwrap();
    let head = r.headers().unwrap().clone();
    let col = |n: &str| head.iter().position(|h| h == n).unwrap();
    for rec in r.records() {
        let rec = rec.unwrap();
        assert_eq!(&rec[col("within_budget")], "false");
        assert_eq!(&rec[col("stopped_early")], "true");
        assert_eq!(&rec[col("pairs")], "1");
    }
    // Nothing is claimed for the held-out pairs.
    assert!(json(&out.join("result.json"))["holdout"].is_null());
}

#[test]
fn bad_input_is_one_line_and_exit_2() {
    let dir = sinew_testkit::tempdir();
    let out = dir.path().join("t");
    let d = demo();
    let first_line = |o: &Output| {
        String::from_utf8_lossy(&o.stderr).lines().find(|l| !l.trim().is_empty()).unwrap_or_default().to_string()
    };
    for (args, needle) in [
        (vec!["--max-folding=-1"], "--max-folding"),
        (vec!["--max-folding", "nan"], "--max-folding"),
        (vec!["--time-budget", "0"], "--time-budget"),
        (vec!["--holdout", "1"], "--holdout"),
        (vec!["--trials", "0"], "--trials"),
    ] {
        let mut a = vec!["tune", "--all-pairs", p(d), "--out", p(&out)];
        a.extend(args.iter().copied());
        let o = SINEW.run(a);
        assert_eq!(o.status.code(), Some(2), "{args:?}");
        assert!(first_line(&o).contains(needle), "{args:?}: {}", first_line(&o));
    }
    // An empty pair list names the file.
    let empty = dir.path().join("pairs.csv");
    std::fs::write(&empty, "fixed,moving\n").unwrap();
    let o = SINEW.run(["tune", "--all-pairs", p(d), "--pairs", p(&empty), "--out", p(&out)]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(err.contains("pairs.csv") && err.contains("empty"), "{err}");
    // A single pair cannot be split.
    let one = dir.path().join("one.csv");
    std::fs::write(&one, "fixed,moving\nsubject_00,subject_01\n").unwrap();
    let o = SINEW.run(["tune", "--all-pairs", p(d), "--pairs", p(&one), "--out", p(&out)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("at least 2"));
    // No output folder was made by any of them.
    assert!(!out.exists());
}
