//! Interrupted runs: `sinew prep` and `sinew cohort` killed with SIGKILL at seeded random
//! moments, then rerun, end with exactly the outputs of an uninterrupted run (files compared
//! byte for byte; JSON and CSV tables compared without their wall-time fields), and no output
//! is ever half-written: after every kill each visible NIfTI file reads, each JSON file
//! parses, and after the final run no temporary or staging file is left anywhere.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use sinew_testkit::{listing, run_ok, table_without_times, Sinew, SplitMix64};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

/// Every file under `dir`, relative path → full path.
fn files(dir: &Path) -> BTreeMap<PathBuf, PathBuf> {
    listing(dir)
        .into_iter()
        .map(|rel| (dir.join(&rel), rel))
        .filter(|(p, _)| !p.is_dir())
        .map(|(p, rel)| (rel, p))
        .collect()
}

fn hidden(rel: &Path) -> bool {
    rel.components().any(|c| c.as_os_str().to_string_lossy().starts_with('.'))
}

/// After a kill: every visible output is complete (temporaries and staging folders are
/// hidden, and are allowed until the rerun removes them).
fn assert_no_half_written(dir: &Path) {
    if !dir.exists() {
        return;
    }
    for (rel, p) in files(dir) {
        if hidden(&rel) {
            continue;
        }
        let name = rel.to_string_lossy();
        if name.ends_with(".nii.gz") || name.ends_with(".nii") {
            sinew_io::read_values(&p, &Default::default())
                .unwrap_or_else(|e| panic!("half-written output after a kill: {e}"));
        } else if name.ends_with(".json") {
            let text = std::fs::read_to_string(&p).unwrap();
            serde_json::from_str::<serde_json::Value>(&text)
                .unwrap_or_else(|e| panic!("{name}: half-written JSON after a kill: {e}"));
        } else if name.ends_with(".png") {
            let b = std::fs::read(&p).unwrap();
            assert!(b.ends_with(&[0xAE, 0x42, 0x60, 0x82]), "{name}: PNG without its IEND chunk after a kill");
        }
    }
}

/// Runs `cmd` repeatedly, killing it (SIGKILL) at seeded random points: when the output folder
/// first holds a seeded number of files (drawn below `total`, the file count of a complete run;
/// temporaries count, so kills land inside writes too), after a further seeded 0–40 ms. Points
/// are defined by progress rather than by wall time so that they spread over the whole run
/// whatever the machine's load. Checks the folder after each kill, then lets the command
/// finish. Returns how many runs were killed before completing.
fn kill_repeatedly(mut make: impl FnMut() -> Command, out: &Path, total: usize, seed: u64, kills: usize) -> usize {
    let mut rng = SplitMix64(seed);
    let mut killed = 0;
    for _ in 0..kills {
        let target = (rng.next_f64() * total as f64) as usize;
        let jitter = Duration::from_secs_f64(0.04 * rng.next_f64());
        let mut child = make().stdout(Stdio::null()).stderr(Stdio::null()).spawn().unwrap();
        let t = Instant::now();
        while child.try_wait().unwrap().is_none()
            && (!out.exists() || files(out).len() < target)
            && t.elapsed() < Duration::from_secs(120)
        {
            std::thread::sleep(Duration::from_millis(2));
        }
        std::thread::sleep(jitter);
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap(); // SIGKILL on Unix
            killed += 1;
        }
        child.wait().unwrap();
        assert_no_half_written(out);
    }
    run_ok(&mut make());
    killed
}

/// JSON with wall times removed and `from` (an output folder) replaced by a placeholder in
/// every string, so two runs into different folders compare equal.
fn normalised_json(p: &Path, from: &Path) -> serde_json::Value {
    fn walk(v: &mut serde_json::Value, from: &str) {
        match v {
            serde_json::Value::Object(m) => {
                m.retain(|k, _| !(k == "timings" || k == "seconds" || k.ends_with("_s")));
                m.values_mut().for_each(|x| walk(x, from));
            }
            serde_json::Value::Array(a) => a.iter_mut().for_each(|x| walk(x, from)),
            serde_json::Value::String(s) => *s = s.replace(from, "<OUT>"),
            _ => {}
        }
    }
    let mut v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap();
    walk(&mut v, &from.display().to_string());
    v
}

/// Asserts that the interrupted folder `b` holds exactly the files of the reference `a`, with
/// equal contents (JSON/CSV without wall times, Markdown summaries without the runtime table),
/// and no leftovers.
fn assert_same_outputs(a: &Path, b: &Path) {
    let (fa, fb) = (files(a), files(b));
    let leftovers: Vec<_> = fb.keys().filter(|r| hidden(r)).collect();
    assert!(leftovers.is_empty(), "temporary or staging files left after the resumed run: {leftovers:?}");
    assert_eq!(fa.keys().collect::<Vec<_>>(), fb.keys().collect::<Vec<_>>(), "different sets of output files");
    for (rel, pa) in &fa {
        let pb = &fb[rel];
        let name = rel.to_string_lossy();
        if name.ends_with(".json") {
            assert_eq!(normalised_json(pa, a), normalised_json(pb, b), "{name} differs");
        } else if name.ends_with(".csv") {
            assert_eq!(table_without_times(pa), table_without_times(pb), "{name} differs");
        } else if name.ends_with(".md") || name.ends_with(".html") {
            // Only the runtime figures may differ.
            let strip = |p: &Path| -> Vec<String> {
                std::fs::read_to_string(p)
                    .unwrap()
                    .lines()
                    .filter(|l| !l.contains("runtime"))
                    .map(str::to_string)
                    .collect()
            };
            let (sa, sb) = (strip(pa), strip(pb));
            let differing = sa.iter().zip(&sb).filter(|(x, y)| x != y).count();
            assert!(sa.len() == sb.len() && differing <= 2, "{name} differs beyond the runtime table");
        } else {
            assert!(std::fs::read(pa).unwrap() == std::fs::read(pb).unwrap(), "{name} differs");
        }
    }
}

/// `sinew ARGS DEMO -o OUT` on a 3-subject demo cohort, run into `a` uninterrupted, then into
/// `b` six times killed at seeded points ([`kill_repeatedly`], seed `seed`) and once to the
/// end: at least four of the six runs must be interrupted, and `b` must end as `a`
/// ([`assert_same_outputs`]).
fn killed_repeatedly_ends_like_an_uninterrupted_run(args: &[&str], seed: u64) {
    let tmp = sinew_testkit::tempdir();
    let data = tmp.path().join("demo");
    SINEW.demo(&data, 3, &[]);
    let command = |out: &Path| {
        let mut c = SINEW.cmd();
        c.args(args).arg(&data).arg("-o").arg(out);
        c
    };
    let (a, b) = (tmp.path().join("a"), tmp.path().join("b"));
    run_ok(&mut command(&a));
    let killed = kill_repeatedly(|| command(&b), &b, files(&a).len(), seed, 6);
    assert!(killed >= 4, "only {killed} of 6 runs were interrupted");
    assert_same_outputs(&a, &b);
}

#[test]
fn prep_killed_repeatedly_ends_like_an_uninterrupted_run() {
    let args = ["prep", "-q", "--spacing", "3,3,3", "--window=-200,300", "--scale", "unit", "--mask-out", "-j", "2"];
    killed_repeatedly_ends_like_an_uninterrupted_run(&args, 0x92E9);
}

#[test]
fn cohort_killed_repeatedly_ends_like_an_uninterrupted_run() {
    let args = ["cohort", "-q", "--preset", "fast", "--iterations", "5,5,5,5", "-j", "2", "--all-pairs"];
    killed_repeatedly_ends_like_an_uninterrupted_run(&args, 0x00C0_4027);
}

/// A pid with no process (for planting leftovers of a "killed" run).
fn dead_pid() -> u32 {
    (4_000_000..).find(|p| !Path::new("/proc").join(p.to_string()).exists()).unwrap()
}

#[test]
fn leftovers_of_a_killed_run_are_removed_by_the_rerun() {
    // Deterministic companion of the random kills: plant what a SIGKILL during each kind of
    // write leaves behind, rerun, and expect none of it.
    let tmp = sinew_testkit::tempdir();
    let data = tmp.path().join("demo");
    SINEW.demo(&data, 2, &[]);
    let pid = dead_pid();

    let out = tmp.path().join("cohort");
    let cohort = || {
        let mut c = SINEW.cmd();
        c.args(["cohort", "-q", "--preset", "fast", "--iterations", "3,3,3,3", "--all-pairs"])
            .arg(&data)
            .arg("-o")
            .arg(&out);
        c
    };
    run_ok(&mut cohort());
    let pair = out.join("pairs/subject_00__subject_01");
    std::fs::remove_file(pair.join("report.json")).unwrap(); // killed before the report: redo
    for planted in [
        out.join(format!(".scores.csv.tmp-{pid}-0")),
        out.join(format!(".summary.md.tmp-{pid}-1")),
        pair.join(format!(".field.nii.gz.tmp-{pid}-2")),
    ] {
        std::fs::write(&planted, b"half").unwrap();
    }
    run_ok(&mut cohort());
    let left: Vec<_> = files(&out).into_keys().filter(|r| hidden(r)).collect();
    assert!(left.is_empty(), "cohort rerun left {left:?}");

    let prepped = tmp.path().join("prepped");
    let prep = || {
        let mut c = SINEW.cmd();
        c.args(["prep", "-q", "--spacing", "6,6,6"]).arg(&data).arg("-o").arg(&prepped);
        c
    };
    run_ok(&mut prep());
    let staging = prepped.join(format!(".sinew-prep-{pid}"));
    std::fs::create_dir(&staging).unwrap();
    std::fs::write(staging.join(format!(".subject_00_image.nii.gz.tmp-{pid}-0")), b"half").unwrap();
    std::fs::write(prepped.join(format!(".prep_log.json.tmp-{pid}-1")), b"{").unwrap();
    run_ok(&mut prep());
    let left: Vec<_> = files(&prepped).into_keys().filter(|r| hidden(r)).collect();
    assert!(left.is_empty() && !staging.exists(), "prep rerun left {left:?}");
}
