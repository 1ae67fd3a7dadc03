//! `sinew cohort` end to end on tiny demo subjects: tables, resume after SIGKILL, shards and
//! merge, another method's fields, and the summary statistics against numpy.

use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use sinew_testkit::{ok, p, table_without_times, Sinew, QUICK};
use std::time::{Duration, Instant};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

/// A cohort run one pair at a time with the shared quick settings (`QUICK`).
fn cohort(demo: &Path, out: &Path, extra: &[&str]) -> Output {
    let mut args = vec!["cohort", "--all-pairs", p(demo), "--out", p(out), "-q", "--jobs", "1"];
    args.extend(QUICK);
    args.extend(extra);
    SINEW.run(args)
}

/// summary.json without the runtime entries.
fn summary_without_runtime(dir: &Path) -> serde_json::Value {
    let mut v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("summary.json")).unwrap()).unwrap();
    for m in v["methods"].as_array_mut().unwrap() {
        m.as_object_mut().unwrap().remove("runtime_mean_s");
    }
    v
}

fn score_files(out: &Path) -> usize {
    std::fs::read_dir(out.join("pairs"))
        .map(|d| d.flatten().filter(|e| e.path().join("score.json").is_file()).count())
        .unwrap_or(0)
}

fn reports(out: &Path) -> usize {
    std::fs::read_dir(out.join("pairs"))
        .map(|d| d.flatten().filter(|e| e.path().join("report.json").is_file()).count())
        .unwrap_or(0)
}

#[test]
fn shards_cover_every_pair_exactly_once() {
    // Exact counting over the listing of a 6-subject folder (15 pairs), N = 1..=7. The files
    // are only listed here, never read.
    let tmp = sinew_testkit::tempdir();
    let dir = tmp.path().join("c");
    std::fs::create_dir(&dir).unwrap();
    for s in 0..6 {
        for kind in ["image", "labels"] {
            std::fs::write(dir.join(format!("s{s}_{kind}.nii.gz")), b"").unwrap();
        }
    }
    let list = |extra: &[&str]| -> Vec<String> {
        let mut a = vec!["cohort", "--all-pairs", p(&dir), "--out", "unused", "--list"];
        a.extend(extra);
        String::from_utf8(ok(SINEW.run(a)).stdout).unwrap().lines().map(String::from).collect()
    };
    let all = list(&[]);
    assert_eq!(all.len(), 15);
    assert_eq!(all[0], "0\ts0\ts1");
    assert_eq!(all[14], "14\ts4\ts5");
    for n in 1..=7 {
        let mut seen: Vec<String> = (1..=n).flat_map(|k| list(&["--shard", &format!("{k}/{n}")])).collect();
        seen.sort();
        let mut want = all.clone();
        want.sort();
        assert_eq!(seen, want, "N = {n}");
    }
    assert_eq!(
        SINEW.run(["cohort", "--all-pairs", p(&dir), "--out", "x", "--shard", "0/3", "--list"]).status.code(),
        Some(2)
    );
}

#[test]
fn runs_resumes_after_a_kill_shards_merges_and_compares_methods() {
    let started = Instant::now();
    let tmp = sinew_testkit::tempdir();
    let t = tmp.path();
    let demo = t.join("demo");
    SINEW.demo(&demo, 3, &[]);

    // 1. Uninterrupted run: 3 pairs, tables and per-pair outputs.
    let full = t.join("full");
    ok(cohort(&demo, &full, &[]));
    let rows = table_without_times(&full.join("scores.csv"));
    assert_eq!(rows.len(), 1 + 3 * 10, "header + 3 pairs × 10 labels");
    assert_eq!(rows[1][..6], ["sinew", "0", "subject_00", "subject_01", "1", "liver"], "{:?}", rows[1]);
    let md = std::fs::read_to_string(full.join("summary.md")).unwrap();
    assert!(md.starts_with("> **Caution.** Research use only"), "{md}");
    let csv_before = std::fs::read(full.join("scores.csv")).unwrap();

    // 2. A rerun finds every pair complete and rewrites the same tables, byte for byte.
    let out =
        ok(SINEW.cmd().args(["cohort", "--all-pairs", p(&demo), "--out", p(&full)]).args(QUICK).output().unwrap());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("0 done, 3 already done"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(std::fs::read(full.join("scores.csv")).unwrap(), csv_before);

    // 3. Killed mid-run (SIGKILL once the first pair has its report), then resumed: the same tables.
    let killed = t.join("killed");
    let mut child = SINEW
        .cmd()
        .args(["cohort", "--all-pairs", p(&demo), "--out", p(&killed), "-q", "--jobs", "1"])
        .args(QUICK)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let deadline = Instant::now() + Duration::from_secs(120);
    while reports(&killed) == 0 {
        assert!(Instant::now() < deadline, "no pair finished in 120 s");
        assert!(child.try_wait().unwrap().is_none(), "the run ended before it could be killed");
        std::thread::sleep(Duration::from_millis(5));
    }
    child.kill().unwrap(); // SIGKILL on Unix
    let status = child.wait().unwrap();
    assert!(!status.success(), "the run was killed");
    assert!(score_files(&killed) < 3, "killed mid-run: not every pair was scored");
    assert!(!killed.join("scores.csv").exists(), "no table before the run ends");
    ok(cohort(&demo, &killed, &[]));
    assert_eq!(table_without_times(&killed.join("scores.csv")), rows);
    assert_eq!(summary_without_runtime(&killed), summary_without_runtime(&full));
    let leftovers: Vec<PathBuf> = std::fs::read_dir(killed.join("pairs"))
        .unwrap()
        .flatten()
        .flat_map(|e| std::fs::read_dir(e.path()).unwrap().flatten().map(|f| f.path()))
        .filter(|f| f.file_name().unwrap().to_string_lossy().contains(".tmp-"))
        .collect();
    assert!(leftovers.is_empty(), "stray temporaries: {leftovers:?}");

    // 4. Shards 1/2 and 2/2 in separate folders, merged: the unsharded table.
    let (s1, s2, merged) = (t.join("s1"), t.join("s2"), t.join("merged"));
    ok(cohort(&demo, &s1, &["--shard", "1/2"]));
    ok(cohort(&demo, &s2, &["--shard", "2/2"]));
    assert!(s1.join("scores.shard-1-of-2.csv").is_file() && !s1.join("scores.csv").exists());
    assert_eq!(table_without_times(&s1.join("scores.shard-1-of-2.csv")).len(), 1 + 2 * 10); // pairs 0, 2
    ok(SINEW.run(["cohort", "merge", p(&s1), p(&s2), "--out", p(&merged)]));
    assert_eq!(table_without_times(&merged.join("scores.csv")), rows);
    assert_eq!(summary_without_runtime(&merged), summary_without_runtime(&full));

    // 5. Another method's fields for the same pairs (here: sinew's own fields, two as NIfTI in
    //    mm, one as .npy in voxels) score exactly like the baseline; the summary lists both.
    let fields = t.join("fields");
    std::fs::create_dir(&fields).unwrap();
    for (n, pair) in ["subject_00__subject_01", "subject_00__subject_02", "subject_01__subject_02"].iter().enumerate() {
        let src = full.join("pairs").join(pair).join("field.nii.gz");
        if n == 2 {
            let (f, _) = sinew_io::read_field(&src, Default::default()).unwrap();
            sinew_io::write_npy_field(&fields.join(format!("{pair}.npy")), &f).unwrap();
        } else {
            std::fs::copy(&src, fields.join(format!("{pair}.nii.gz"))).unwrap();
        }
    }
    ok(cohort(&demo, &full, &["--method", "other", "--fields", p(&fields)]));
    let table = table_without_times(&full.join("scores.csv"));
    let (mut base, mut other) = (Vec::new(), Vec::new());
    for row in &table[1..] {
        match row[0].as_str() {
            "sinew" => base.push(&row[1..]),
            "other" => other.push(&row[1..]),
            m => panic!("unexpected method {m}"),
        }
    }
    // 3 pairs × 10 labels for each method, counted before the rows are paired off.
    assert_eq!((base.len(), other.len()), (30, 30));
    // The .npy holds the same voxel displacements the baseline reads from the NIfTI file.
    for (b, o) in base.iter().zip(&other) {
        assert_eq!(b, o, "identical fields give identical rows");
    }
    let md = std::fs::read_to_string(full.join("summary.md")).unwrap();
    assert!(md.contains("| sinew | 1 | liver |") && md.contains("| other | 1 | liver |"), "{md}");

    // 6. The summary's statistics against numpy on the table itself: mean, np.std(ddof=1),
    //    np.median, np.percentile(30) (numpy's default linear rule) of Dice per method × label.
    let script = r#"
import sys, csv, json, numpy as np
rows = list(csv.DictReader(open(sys.argv[1] + "/scores.csv")))
summ = json.load(open(sys.argv[1] + "/summary.json"))
checked = 0
for m in summ["methods"]:
    for l in m["labels"]:
        if l["label"] is None:
            continue
        d = np.array([float(r["dice"]) for r in rows if r["method"] == m["method"] and int(r["label"]) == l["label"] and r["dice"]])
        s = l["dice"]
        for got, want in [(s["mean"], d.mean()), (s["std"], d.std(ddof=1)), (s["median"], np.median(d)), (s["robust"], np.percentile(d, s["robust_percentile"]))]:
            assert abs(got - want) < 1e-12, (m["method"], l["label"], got, want)
        h = [float(r["hd95_mm"]) for r in rows if r["method"] == m["method"] and int(r["label"]) == l["label"] and r["hd95_mm"]]
        assert abs(l["hd95_mean_mm"] - np.mean(h)) < 1e-9
        checked += 1
assert checked == 20, checked
"#;
    let out = Command::new("python3")
        .args(["-c", script, p(&full)])
        .output()
        .expect("python3 with numpy is required for this test");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    eprintln!("cohort test took {:.1} s", started.elapsed().as_secs_f64());
}
