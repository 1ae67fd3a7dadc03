//! `sinew cohort` run in parallel: pairs side by side with `--jobs`, and the Slurm job files
//! the README shows (`scripts/slurm_check.sh` runs those on a real Slurm cluster in CI).

use std::path::Path;

use sinew_testkit::{p, table_without_times, Sinew, QUICK};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

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
    let tmp = sinew_testkit::tempdir();
    let t = tmp.path();
    let demo = t.join("demo");
    SINEW.demo(&demo, 3, &["--data-only"]);
    let run = |out: &Path, jobs: &str| {
        SINEW.ok(["cohort", "--all-pairs", p(&demo), "--out", p(out), "--jobs", jobs, "-q"].iter().chain(&QUICK));
    };
    let (one, two) = (t.join("one"), t.join("two"));
    run(&one, "1");
    run(&two, "2");

    // --jobs 2 took effect: the 2 threads were split between two pairs at a time.
    let pairs = ["subject_00__subject_01", "subject_00__subject_02", "subject_01__subject_02"];
    let with = |n: u64| pairs.iter().map(|p| (p.to_string(), n)).collect::<Vec<_>>();
    assert_eq!(threads_per_pair(&one), with(2));
    assert_eq!(threads_per_pair(&two), with(1));

    let header = std::fs::read_to_string(one.join("scores.csv")).unwrap().lines().next().unwrap_or("").to_string();
    assert!(header.split(',').any(|c| c == "runtime_s"), "no runtime_s column: {header}");
    let want = table_without_times(&one.join("scores.csv"));
    assert_eq!(want.len(), 1 + 3 * 10, "header + 3 pairs × 10 labels");
    assert_eq!(table_without_times(&two.join("scores.csv")), want);
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
