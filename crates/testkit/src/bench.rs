//! What the benchmark and the timing examples share: the release binary, medians, the load.

use std::path::{Path, PathBuf};
use std::process::Command;

/// Builds the release `sinew` binary (`cargo build --release -p sinew-cli`) and returns its
/// path (below `CARGO_TARGET_DIR` when set, else the workspace's `target`).
pub fn release_binary() -> PathBuf {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
    let status = Command::new("cargo")
        .args(["build", "--release", "-q", "-p", "sinew-cli"])
        .current_dir(&root)
        .status()
        .expect("cargo runs");
    assert!(status.success(), "building sinew failed");
    let target = std::env::var("CARGO_TARGET_DIR").map(PathBuf::from).unwrap_or_else(|_| root.join("target"));
    target.join("release").join("sinew")
}

/// The median of `v` (the upper one of the two middle values for an even count), sorting
/// it in place by `f64::total_cmp` (a NaN, a missing figure, sorts last).
pub fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// The 1-, 5- and 15-minute load averages (`/proc/loadavg`), or `?` where there is none.
pub fn load_average() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map_or_else(|_| "?".into(), |s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
}

/// Runs `f` once: its result and its wall time in seconds.
pub fn timed<R>(f: impl FnOnce() -> R) -> (R, f64) {
    let t = std::time::Instant::now();
    let r = f();
    (r, t.elapsed().as_secs_f64())
}

/// Times `runs` calls of `f` after one untimed warm-up call: the median in seconds (`median`)
/// and every run's seconds in the order they ran.
pub fn time_runs(runs: usize, mut f: impl FnMut()) -> (f64, Vec<f64>) {
    f();
    let times: Vec<f64> = (0..runs).map(|_| timed(&mut f).1).collect();
    (median(&mut times.clone()), times)
}

/// The thread pool of a timing example: as many threads as its first command-line argument
/// says (`THREADS`; none or 0: rayon's default).
pub fn thread_pool_from_args() -> rayon::ThreadPool {
    let threads: usize = std::env::args().nth(1).map(|s| s.parse().expect("THREADS must be a number")).unwrap_or(0);
    rayon::ThreadPoolBuilder::new().num_threads(threads).build().expect("thread pool")
}
