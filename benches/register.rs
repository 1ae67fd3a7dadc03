//! The registration benchmark: `cargo bench --bench register` (add `-- --quick` for one run
//! per configuration, `-- --sizes 72,144` to choose sizes).
//!
//! For demo pairs at 72×56×96, 144×112×192 and 288×224×384 (2 mm spacing scaled to keep the
//! same field of view), runs `sinew register` (the release binary, default preset) with 1
//! and 2 threads, 3 times each, and prints one table of the median stage timings plus one
//! JSON line per run. Timings come from the `report.json` each run writes; peak memory is
//! the process's `VmHWM`.

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;
use sinew_phantom::{generate, PhantomParams};
use sinew_testkit::{median, release_binary};

const STAGES: &[&str] = &[
    "load_s",
    "resample_s",
    "pyramid_s",
    "descriptors_s",
    "optimise_s",
    "level_jacobian_s",
    "upsample_s",
    "register_s",
    "warp_s",
    "jacobian_s",
    "write_s",
    "total_s",
    "peak_rss_mb",
];

fn write_pair(dir: &Path, shape: [usize; 3]) -> (PathBuf, PathBuf) {
    let spacing = 288.0 / shape[0] as f64 * 1.0;
    let params = PhantomParams { shape, spacing: [spacing; 3], ..PhantomParams::default() };
    let f = dir.join(format!("fixed_{}.nii.gz", shape[0]));
    let m = dir.join(format!("moving_{}.nii.gz", shape[0]));
    if !f.exists() || !m.exists() {
        let a = generate(3, 0, &params);
        let b = generate(3, 1, &params);
        sinew_io::write_image(&f, &a.image).unwrap();
        sinew_io::write_image(&m, &b.image).unwrap();
    }
    (f, m)
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let quick = args.iter().any(|a| a == "--quick");
    let sizes: Vec<usize> = args
        .iter()
        .position(|a| a == "--sizes")
        .and_then(|i| args.get(i + 1))
        .map(|s| s.split(',').map(|x| x.parse().expect("sizes are numbers")).collect())
        .unwrap_or_else(|| vec![72, 144, 288]);
    let runs = if quick { 1 } else { 3 };
    let sinew = release_binary();
    let work = std::env::temp_dir().join("sinew-bench");
    std::fs::create_dir_all(&work).unwrap();
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|s| {
            s.lines().find(|l| l.starts_with("model name")).map(|l| l.split(':').nth(1).unwrap().trim().to_string())
        })
        .unwrap_or_else(|| "unknown CPU".into());
    println!("machine: {cpu}, {} logical cores", std::thread::available_parallelism().map_or(0, |n| n.get()));
    let mut rows = Vec::new();
    for &nx in &sizes {
        let shape = [nx, nx * 112 / 144, nx * 192 / 144];
        let (f, m) = write_pair(&work, shape);
        for threads in [1usize, 2] {
            let mut per_stage: Vec<Vec<f64>> = vec![Vec::new(); STAGES.len()];
            for run in 0..runs {
                let out = work.join(format!("out_{nx}_{threads}"));
                let status = Command::new(&sinew)
                    .args(["register", "-q", "-j", &threads.to_string(), "-f"])
                    .arg(&f)
                    .arg("-m")
                    .arg(&m)
                    .arg("-o")
                    .arg(&out)
                    .status()
                    .expect("sinew runs");
                assert!(status.success(), "sinew register failed");
                let report: Value =
                    serde_json::from_str(&std::fs::read_to_string(out.join("report.json")).unwrap()).unwrap();
                let t = &report["timings"];
                for (s, name) in STAGES.iter().enumerate() {
                    per_stage[s].push(t[name].as_f64().unwrap_or(f64::NAN));
                }
                println!(
                    "{}",
                    serde_json::json!({"shape": shape, "threads": threads, "run": run, "timings": t, "levels": report["levels"].as_array().map(|l| l.iter().map(|x| serde_json::json!({"level": x["level"], "shape": x["shape"], "iterations": x["iterations"], "descriptors_s": x["descriptors_s"], "optimise_s": x["optimise_s"]})).collect::<Vec<_>>())})
                );
            }
            rows.push((shape, threads, per_stage.iter_mut().map(|v| median(v)).collect::<Vec<f64>>()));
        }
    }
    println!("\nmedian of {runs} run(s), seconds (peak_rss_mb in MB):");
    print!("{:<14} {:>3}", "shape", "thr");
    for s in STAGES {
        print!(" {:>9}", s.trim_end_matches("_s").trim_end_matches("_mb"));
    }
    println!();
    for (shape, threads, vals) in &rows {
        print!("{:<14} {:>3}", format!("{}x{}x{}", shape[0], shape[1], shape[2]), threads);
        for v in vals {
            print!(" {:>9.3}", v);
        }
        println!();
    }
}
