//! Time and memory of `sinew register` on scans at a scanner's native resolution:
//! `cargo run --release --example native [-- --threads 2 --out /tmp/sinew-native --runs 3
//! --only thin --uncompressed]`.
//!
//! Each run is the whole command from the files (reading both scans and label maps, the
//! registration, writing the field, warped scan, warped labels, Jacobian and QC sheet on the
//! fixed scan's native grid); the table gives the median of `--runs` runs (wall clock and the
//! report's peak resident memory `VmHWM`) and the load average before the first run.
//! `--uncompressed` writes `.nii` instead of `.nii.gz` (`--out-format nii`).
//!
//! Three cases, each a real chest CT and a copy of it pulled through a smooth known field of
//! at most 10 mm (so the printed endpoint error says the result is still right):
//! - **thin**: the scan upsampled to 512×512×400 voxels and labelled 0.8×0.8×1 mm (a body
//!   of the size of a large patient; 105 M voxels, a typical thin-slice CT);
//! - **thick**: the scan at 256×256×48 voxels of 1.14×1.14×5 mm (3.1 M voxels);
//! - **iso2**: the same field of view on a 2 mm grid (146×146×120), the cost the thick-slice
//!   case should not exceed.
//!
//! The scan is `chest_ct_a.nii.gz` of the shared real-CT folder (open data from the
//! pyradiomics 3.1.0 source distribution, BSD-3-Clause), read in place; `SINEW_REAL_CT` names
//! another folder. Inputs are written once into `--out` and reused. Figures come from each
//! run's `report.json` (stage timings, peak resident memory `VmHWM`) and the wall clock.

use std::path::{Path, PathBuf};
use std::process::Command;

use sinew_grid::{resample, Affine, Border, Grid, Image};
use sinew_testkit::{endpoint_errors_where, load_average, mean, median, release_binary, timed, KnownWarp};

/// The scan resampled to `shape` over its own field of view, then labelled with `spacing`
/// (directions kept): a body scaled to that spacing.
fn scan_as(native: &Image, shape: [usize; 3], spacing: [f64; 3]) -> Image {
    let g = native.grid.with_shape(shape).unwrap();
    let mut img = resample::resample_image_antialiased(native, &g, Border::Nearest);
    let lin = g.affine().linear();
    let sp = g.spacing();
    let scaled: [[f64; 3]; 3] = std::array::from_fn(|r| std::array::from_fn(|c| lin[r][c] / sp[c] * spacing[c]));
    img.grid = Grid::new(shape, Affine::from_parts(scaled, g.affine().translation())).unwrap();
    img
}

/// Labels of a CT by thresholds: 1 = body (above −500 HU), 2 = dense tissue and bone (above
/// 150 HU), 0 = air.
fn threshold_labels(img: &Image) -> sinew_grid::LabelMap {
    let data = img.data.mapv(|v| u16::from(v > -500.0) + u16::from(v > 150.0));
    sinew_grid::Volume::new(img.grid.clone(), data).unwrap()
}

fn write_pair(dir: &Path, name: &str, native: &Image, shape: [usize; 3], spacing: [f64; 3]) -> [PathBuf; 4] {
    let f = dir.join(format!("{name}_fixed.nii.gz"));
    let m = dir.join(format!("{name}_moving.nii.gz"));
    let fl = dir.join(format!("{name}_fixed_labels.nii.gz"));
    let ml = dir.join(format!("{name}_moving_labels.nii.gz"));
    if !f.exists() || !m.exists() {
        let case = KnownWarp::new(scan_as(native, shape, spacing), 10.0, 0.0);
        sinew_io::write_image(&m, &case.moving).unwrap();
        sinew_io::write_image(&f, &case.fixed).unwrap();
        let truth = dir.join(format!("{name}_truth.nii.gz"));
        sinew_io::write_field(&truth, &case.truth, sinew_io::FieldUnits::Voxel).unwrap();
    }
    for (img, lab) in [(&f, &fl), (&m, &ml)] {
        if !lab.exists() {
            sinew_io::write_labels(lab, &threshold_labels(&sinew_io::read_image(img).unwrap())).unwrap();
        }
    }
    [f, m, fl, ml]
}

/// Mean endpoint error (mm) over every 4th voxel of the body (> −500 HU in the fixed scan)
/// whose true endpoint stays inside the slices.
fn epe(dir: &Path, name: &str, out: &Path) -> f64 {
    let opts = sinew_io::FieldReadOptions::default();
    let (truth, _) = sinew_io::read_field(&dir.join(format!("{name}_truth.nii.gz")), opts).unwrap();
    let field = ["field.nii.gz", "field.nii"].map(|n| out.join(n)).into_iter().find(|p| p.exists()).unwrap();
    let (u, _) = sinew_io::read_field(&field, opts).unwrap();
    let fixed = sinew_io::read_image(&dir.join(format!("{name}_fixed.nii.gz"))).unwrap();
    let lin = u.grid.affine().linear();
    let nz = u.grid.shape()[2];
    let errs = endpoint_errors_where(&u.grid, |idx, x| {
        let tk = x[2] + truth.component(2)[idx] as f64;
        if idx % 4 != 0 || fixed.as_slice()[idx] <= -500.0 || tk < 0.5 || tk > nz as f64 - 1.5 {
            return None;
        }
        let d: [f64; 3] = std::array::from_fn(|c| (u.component(c)[idx] - truth.component(c)[idx]) as f64);
        Some(std::array::from_fn(|r| (0..3).map(|c| lin[r][c] * d[c]).sum()))
    });
    mean(&errs)
}

fn main() {
    let mut threads = "2".to_string();
    let mut out = PathBuf::from("/tmp/sinew-native");
    let mut only: Option<String> = None;
    let mut runs = 3usize;
    let mut format = "nii.gz";
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        match a.as_str() {
            "--threads" => threads = args.next().expect("--threads N"),
            "--out" => out = PathBuf::from(args.next().expect("--out DIR")),
            "--only" => only = args.next(),
            "--runs" => runs = args.next().expect("--runs N").parse().expect("a count"),
            "--uncompressed" => format = "nii",
            _ => panic!("unknown argument {a}"),
        }
    }
    std::fs::create_dir_all(&out).unwrap();
    let bin = release_binary();
    let dir = std::env::var("SINEW_REAL_CT").unwrap_or_else(|_| "/work/shared/data/real-ct".into());
    let native = sinew_io::read_image(&Path::new(&dir).join("chest_ct_a.nii.gz")).expect("the real CT");
    let cases: [(&str, [usize; 3], [f64; 3]); 3] = [
        ("thin", [512, 512, 400], [0.8, 0.8, 1.0]),
        ("thick", [256, 256, 48], [1.14, 1.14, 5.0]),
        ("iso2", [146, 146, 120], [2.0, 2.0, 2.0]),
    ];
    println!("load average before the runs: {}", load_average());
    println!(
        "case   shape            spacing (mm)       voxels   wall_s  register_s  write_s  peak_MB  EPE_mm  (median of {runs})"
    );
    for (name, shape, spacing) in cases {
        if only.as_deref().is_some_and(|o| o != name) {
            continue;
        }
        let [f, m, fl, ml] = write_pair(&out, name, &native, shape, spacing);
        let run_dir = out.join(format!("{name}_out"));
        let (mut wall, mut reg, mut write, mut peak, mut e) = (vec![], vec![], vec![], vec![], 0.0);
        for run in 0..runs {
            let _ = std::fs::remove_dir_all(&run_dir);
            let (st, w) = timed(|| {
                Command::new(&bin)
                    .args(["register", "-q", "-j", &threads, "--out-format", format, "-f"])
                    .arg(&f)
                    .arg("-m")
                    .arg(&m)
                    .arg("--fixed-labels")
                    .arg(&fl)
                    .arg("--moving-labels")
                    .arg(&ml)
                    .arg("-o")
                    .arg(&run_dir)
                    .status()
                    .expect("sinew runs")
            });
            assert!(st.success(), "sinew register failed on {name}");
            let report: serde_json::Value =
                serde_json::from_slice(&std::fs::read(run_dir.join("report.json")).unwrap()).unwrap();
            let tm = &report["timings"];
            println!(
                "{}",
                serde_json::json!({ "case": name, "run": run, "wall_s": w, "timings": tm, "load": load_average() })
            );
            wall.push(w);
            reg.push(tm["register_s"].as_f64().unwrap_or(f64::NAN));
            write.push(tm["write_s"].as_f64().unwrap_or(f64::NAN));
            peak.push(tm["peak_rss_mb"].as_f64().unwrap_or(f64::NAN));
            if run == 0 {
                e = epe(&out, name, &run_dir);
            }
        }
        println!(
            "{name:<6} {:<16} {:<18} {:>7.1}M {:>7.2} {:>11.2} {:>8.2} {:>8.0} {e:>7.3}",
            format!("{shape:?}"),
            format!("{spacing:?}"),
            shape.iter().product::<usize>() as f64 / 1e6,
            median(&mut wall),
            median(&mut reg),
            median(&mut write),
            median(&mut peak),
        );
    }
    println!("load average after the runs: {}", load_average());
}
