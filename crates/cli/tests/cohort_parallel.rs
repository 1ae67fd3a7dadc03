//! `sinew cohort` run in parallel: pairs side by side with `--jobs`, and the Slurm job files
//! the README shows (`scripts/slurm_check.sh` runs those on a real Slurm cluster in CI).

use std::path::Path;
use std::process::{Command, Output};

fn sinew(args: &[&str]) -> Output {
    let out = Command::new(env!("CARGO_BIN_EXE_sinew")).args(args).output().expect("run sinew");
    assert!(out.status.success(), "sinew {args:?}: {}", String::from_utf8_lossy(&out.stderr));
    out
}

fn p(path: &Path) -> &str {
    path.to_str().unwrap()
}

/// scores.csv as rows of cells, without the `runtime_s` column (wall times differ between
/// runs). The demo's label names hold no commas or quotes, so splitting on ',' is exact.
fn table_without_runtime(path: &Path) -> Vec<Vec<String>> {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let mut lines = text.lines().map(|l| l.split(',').map(String::from).collect::<Vec<_>>());
    let header = lines.next().expect("a header line");
    let drop = header.iter().position(|c| c == "runtime_s").expect("a runtime_s column");
    std::iter::once(header)
        .chain(lines)
        .map(|mut r| {
            r.remove(drop);
            r
        })
        .collect()
}

/// The worker threads each pair's registration used, from its report.json, by pair folder.
fn threads_per_pair(out: &Path) -> Vec<(String, u64)> {
    let mut v: Vec<(String, u64)> = std::fs::read_dir(out.join("pairs"))
        .unwrap()
        .flatten()
        .map(|e| {
            let text = std::fs::read_to_string(e.path().join("report.json")).unwrap();
            let report: serde_json::Value = serde_json::from_str(&text).unwrap();
            (e.file_name().to_string_lossy().into_owned(), report["threads"].as_u64().expect("threads in report.json"))
        })
        .collect();
    v.sort();
    v
}

#[test]
fn two_jobs_give_the_table_of_one() {
    // The reference is the same cohort run one pair at a time: each pair's result must not
    // depend on how many pairs run beside it or on its thread count (sums are taken per slab
    // in slab order), so the tables are equal value for value.
    let tmp = tempfile::tempdir().unwrap();
    let t = tmp.path();
    let demo = t.join("demo");
    sinew(&["demo", "--small", "--subjects", "3", "--data-only", "--out", p(&demo), "-q"]);
    let run = |out: &Path, jobs: &str| {
        sinew(&[
            "cohort",
            "--all-pairs",
            p(&demo),
            "--out",
            p(out),
            "--preset",
            "fast",
            "--iterations",
            "10,8,6,4",
            "--threads",
            "2",
            "--jobs",
            jobs,
            "-q",
        ]);
    };
    let (one, two) = (t.join("one"), t.join("two"));
    run(&one, "1");
    run(&two, "2");

    // --jobs 2 took effect: the 2 threads were split between two pairs at a time.
    let pairs = ["subject_00__subject_01", "subject_00__subject_02", "subject_01__subject_02"];
    let with = |n: u64| pairs.iter().map(|p| (p.to_string(), n)).collect::<Vec<_>>();
    assert_eq!(threads_per_pair(&one), with(2));
    assert_eq!(threads_per_pair(&two), with(1));

    let want = table_without_runtime(&one.join("scores.csv"));
    assert_eq!(want.len(), 1 + 3 * 10, "header + 3 pairs × 10 labels");
    assert_eq!(table_without_runtime(&two.join("scores.csv")), want);
}

#[test]
fn readme_shows_the_slurm_job_files_verbatim() {
    // The README's job array example is examples/slurm/*.sh itself (the files CI submits to
    // Slurm in scripts/slurm_check.sh), so the two cannot drift apart.
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
    let readme = std::fs::read_to_string(root.join("README.md")).unwrap();
    for name in ["cohort_array.sh", "cohort_merge.sh"] {
        let text = std::fs::read_to_string(root.join("examples/slurm").join(name)).unwrap();
        assert!(text.starts_with("#!/bin/bash\n#SBATCH"), "{name} is a batch job file");
        assert!(
            readme.contains(&format!("```sh\n{text}```\n")),
            "README.md does not show examples/slurm/{name} verbatim in a ```sh block"
        );
    }
}
