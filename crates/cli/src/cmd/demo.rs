//! `sinew demo`: write the synthetic demo cohort (CT-like abdomens with label maps).
//!
//! Layout of `--out DIR`:
//! - `subject_NN_image.nii.gz` (float32, HU) and `subject_NN_labels.nii.gz` (uint8) per subject;
//! - `labels.json`: label value → structure name;
//! - `cohort.json`: seed, grid, noise, variation and the subject files, written before the
//!   subjects so that a rerun into the same folder with other settings is refused instead of
//!   mixing cohorts.
//!
//! A subject whose two files already exist, read back and sit on the expected grid is
//! skipped, so an interrupted run resumes where it stopped. Every file is written to a
//! temporary file beside it and renamed into place.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context, Result};
use serde::{Deserialize, Serialize};
use sinew_phantom::{generate, PhantomParams, LABELS};

use crate::cmd::cohort::{CohortArgs, SubjectArgs};
use crate::cmd::register::{PresetArgs, ScanArgs};
use crate::cmd::report::ReportArgs;
use crate::cmd::score::FieldFormat;
use crate::ui;

/// Arguments of `sinew demo`.
#[derive(clap::Args, Debug, Clone)]
pub struct DemoArgs {
    /// Folder to write the cohort into (created when missing).
    #[arg(long, short, value_name = "DIR")]
    pub out: PathBuf,

    /// Number of subjects to write (subject_00, subject_01, …).
    #[arg(long, default_value_t = 4, value_name = "N", value_parser = clap::value_parser!(u32).range(1..=100))]
    pub subjects: u32,

    /// Cohort seed: the same seed always gives the same subjects.
    #[arg(long, default_value_t = 7, value_name = "S")]
    pub seed: u64,

    /// 72×56×96 voxels of 4 mm instead of 144×112×192 of 2 mm (same field of view).
    #[arg(long)]
    pub small: bool,

    /// Scale of the differences between subjects (anatomy, position, deformation and tissue
    /// contrast): 1 is the demo cohort, 2 draws subjects that differ twice as much.
    #[arg(long, default_value_t = 1.0, value_name = "V", value_parser = parse_variation)]
    pub variation: f64,

    /// Standard deviation of the added Gaussian noise in HU (default: 12, the demo cohort's).
    #[arg(long, value_name = "HU", value_parser = parse_noise_hu)]
    pub noise_hu: Option<f32>,

    /// Only write the cohort; do not register, score or report.
    #[arg(long)]
    pub data_only: bool,

    /// Registration preset for the pairs (fast, default, accurate).
    #[arg(long, default_value = "default", value_parser = clap::builder::PossibleValuesParser::new(sinew_solve::PRESETS))]
    pub preset: String,

    /// A TOML parameter file for the pairs (e.g. `model = "bspline"`), applied over the
    /// preset, as in `sinew register --config`.
    #[arg(long, value_name = "TOML")]
    pub config: Option<PathBuf>,

    /// Grey window of the pairs' QC sheets: `lo,hi` in HU, or `auto` (as in `sinew register
    /// --qc-window`).
    #[arg(long, value_name = "LO,HI|auto", default_value = "auto", allow_hyphen_values = true, value_parser = crate::cmd::qc::window_arg)]
    pub qc_window: sinew_qc::Window,

    /// No progress bar and no per-subject lines.
    #[arg(long, short)]
    pub quiet: bool,
}

/// The files of one written (or already present) subject.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct SubjectPaths {
    /// Subject identifier, e.g. `subject_00`.
    pub id: String,
    /// The CT-like image (float32 HU).
    pub image: PathBuf,
    /// The label map (values of `labels.json`).
    pub labels: PathBuf,
}

/// What `cohort.json` records: enough to refuse mixing two different cohorts in one folder.
#[derive(Debug, PartialEq, Serialize, Deserialize)]
struct CohortInfo {
    generator: String,
    seed: u64,
    shape: [usize; 3],
    spacing_mm: [f64; 3],
    noise_hu: f32,
    /// Absent in folders written before `--variation` existed: those hold variation 1.
    #[serde(default = "one")]
    variation: f64,
    subjects: Vec<SubjectPaths>,
}

fn one() -> f64 {
    1.0
}

/// `--variation`: a finite number in [0, 10].
fn parse_variation(s: &str) -> Result<f64, String> {
    let v: f64 = s.parse().map_err(|_| format!("'{s}' is not a number"))?;
    if !(0.0..=10.0).contains(&v) {
        return Err(format!("{v} is outside 0..=10"));
    }
    Ok(v)
}

/// `--noise-hu`: a finite number in [0, 1000] HU.
fn parse_noise_hu(s: &str) -> Result<f32, String> {
    let v: f32 = s.parse().map_err(|_| format!("'{s}' is not a number"))?;
    if !(0.0..=1000.0).contains(&v) {
        return Err(format!("{v} HU is outside 0..=1000"));
    }
    Ok(v)
}

impl CohortInfo {
    /// True when `other` describes the same generator settings (the subject count may differ).
    fn same_settings(&self, other: &CohortInfo) -> bool {
        self.generator == other.generator
            && self.seed == other.seed
            && self.shape == other.shape
            && self.spacing_mm == other.spacing_mm
            && self.noise_hu == other.noise_hu
            && self.variation == other.variation
    }
}

/// Runs `sinew demo`: writes the cohort, then (unless `--data-only`) registers and scores
/// every pair with `sinew cohort` into `DIR/results/` and turns the tables into
/// `DIR/results/report.html` with `sinew report`.
pub fn run(args: DemoArgs) -> Result<()> {
    let t = Instant::now();
    write_cohort(&args)?;
    if args.data_only {
        return Ok(());
    }
    let results = args.out.join("results");
    let res = results.display().to_string();
    let report = results.join("report.html");
    // `sinew cohort --all-pairs OUT --out OUT/results` with the demo's parameters, then
    // `sinew report`, called directly.
    let cohort = CohortArgs {
        action: None,
        subjects: SubjectArgs { manifest: None, all_pairs: Some(args.out.clone()), pairs: None },
        out: Some(results.clone()),
        params: PresetArgs { preset: args.preset.clone(), config: args.config.clone(), iterations: None },
        diffeomorphic: false,
        shard: None,
        jobs: 1,
        threads: None,
        method: None,
        fields: None,
        runtimes: None,
        field_format: FieldFormat::default(),
        robust_percentile: sinew_score::ROBUST_PERCENTILE,
        scan: ScanArgs::default(),
        qc_window: args.qc_window,
        list: false,
        quiet: args.quiet,
    };
    crate::cmd::cohort::run(cohort)?;
    crate::cmd::report::run(ReportArgs { cohort: results.clone(), out: report.clone() })?;
    let report = report.display().to_string();
    if !args.quiet {
        // The per-label summary table, as written to summary.md.
        if let Ok(md) = std::fs::read_to_string(results.join("summary.md")) {
            println!();
            md.lines()
                .skip_while(|l| !l.starts_with('|'))
                .take_while(|l| l.starts_with('|'))
                .for_each(|l| println!("{l}"));
            println!();
        }
        println!(
            "demo finished in {:.0} s: tables in {res}/ (scores.csv, summary.md), QC sheets in {res}/pairs/*/qc.png, report {report}",
            t.elapsed().as_secs_f64()
        );
    }
    Ok(())
}

/// The grid, noise and variation used for `args`.
pub fn params(args: &DemoArgs) -> PhantomParams {
    let mut p = if args.small { PhantomParams::small() } else { PhantomParams::default() };
    p.variation = args.variation;
    if let Some(n) = args.noise_hu {
        p.noise_hu = n;
    }
    p
}

/// `labels.json`: `{"1": "liver", …}` in ascending label order.
fn labels_json() -> String {
    let body: Vec<String> = LABELS
        .iter()
        .map(|(v, name)| format!("  \"{v}\": {}", serde_json::to_string(name).expect("plain string")))
        .collect();
    format!("{{\n{}\n}}\n", body.join(",\n"))
}

/// Writes the cohort described by `args` into `args.out` (skipping subjects already there)
/// and returns the files of all `args.subjects` subjects in order.
pub fn write_cohort(args: &DemoArgs) -> Result<Vec<SubjectPaths>> {
    let p = params(args);
    let dir = &args.out;
    std::fs::create_dir_all(dir).with_context(|| format!("{}: cannot create the output folder", dir.display()))?;
    let subjects: Vec<SubjectPaths> = (0..args.subjects as usize)
        .map(|i| {
            let id = format!("subject_{i:02}");
            SubjectPaths {
                image: dir.join(format!("{id}_image.nii.gz")),
                labels: dir.join(format!("{id}_labels.nii.gz")),
                id,
            }
        })
        .collect();
    let info = CohortInfo {
        generator: format!("sinew-phantom {}", env!("CARGO_PKG_VERSION")),
        seed: args.seed,
        shape: p.shape,
        spacing_mm: p.spacing,
        noise_hu: p.noise_hu,
        variation: p.variation,
        subjects: subjects.clone(),
    };
    let info_path = dir.join("cohort.json");
    if info_path.exists() {
        let text =
            std::fs::read_to_string(&info_path).with_context(|| format!("{}: cannot read", info_path.display()))?;
        let old: CohortInfo = serde_json::from_str(&text).with_context(|| {
            format!("{}: not a sinew cohort description; choose another --out", info_path.display())
        })?;
        if !old.same_settings(&info) {
            bail!(
                "{}: holds a cohort of seed {} on a {:?} grid of {:?} mm (noise {} HU, variation {}); refusing to mix it \
                 with seed {} on {:?} of {:?} mm (noise {} HU, variation {}) (choose another --out)",
                dir.display(),
                old.seed,
                old.shape,
                old.spacing_mm,
                old.noise_hu,
                old.variation,
                info.seed,
                info.shape,
                info.spacing_mm,
                info.noise_hu,
                info.variation
            );
        }
    }
    let json = serde_json::to_string_pretty(&info).expect("serialisable") + "\n";
    sinew_io::atomic::write_bytes_atomic(&info_path, json.as_bytes())?;
    sinew_io::atomic::write_bytes_atomic(&dir.join("labels.json"), labels_json().as_bytes())?;

    let grid = p.grid();
    let ml = p.spacing.iter().product::<f64>() / 1000.0;
    let pb = ui::progress(subjects.len() as u64, "writing demo cohort", args.quiet);
    let say = |line: String| {
        if !args.quiet {
            pb.suspend(|| println!("{line}"));
        }
    };
    for (i, s) in subjects.iter().enumerate() {
        pb.set_message(s.id.clone());
        if present(s, &grid) {
            say(format!("{}  exists, skipped", s.id));
            pb.inc(1);
            continue;
        }
        let t = Instant::now();
        let subject = generate(args.seed, i, &p);
        sinew_io::write_image(&s.image, &subject.image)?;
        sinew_io::write_labels(&s.labels, &subject.labels)?;
        let counts = subject.labels.label_counts();
        let volumes: Vec<String> = LABELS
            .iter()
            .map(|(v, name)| {
                let n = counts.iter().find(|c| c.0 == *v).map_or(0, |c| c.1);
                format!("{name} {:.0}", n as f64 * ml)
            })
            .collect();
        let [nx, ny, nz] = p.shape;
        let [sx, sy, sz] = p.spacing;
        say(format!(
            "{}  {nx}x{ny}x{nz} @ {sx}x{sy}x{sz} mm  {:.1} s  ml: {}",
            s.id,
            t.elapsed().as_secs_f64(),
            volumes.join(", ")
        ));
        pb.inc(1);
    }
    pb.finish_and_clear();
    if !args.quiet {
        println!("wrote {} subjects (seed {}) to {}", subjects.len(), args.seed, dir.display());
    }
    Ok(subjects)
}

/// True when both files of `s` exist, read back completely and sit on `grid`.
fn present(s: &SubjectPaths, grid: &sinew_grid::Grid) -> bool {
    let ok = |path: &Path, read: &dyn Fn(&Path) -> Option<sinew_grid::Grid>| {
        path.is_file() && read(path).is_some_and(|g| g.ensure_same(grid).is_ok())
    };
    ok(&s.image, &|p| sinew_io::read_image(p).ok().map(|v| v.grid))
        && ok(&s.labels, &|p| sinew_io::read_labels(p).ok().map(|v| v.grid))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_json_lists_every_label_in_order() {
        let v: serde_json::Value = serde_json::from_str(&labels_json()).unwrap();
        let obj = v.as_object().unwrap();
        assert_eq!(obj.len(), LABELS.len());
        for (val, name) in LABELS {
            assert_eq!(obj[&val.to_string()], *name);
        }
        assert!(labels_json().find("\"2\"").unwrap() < labels_json().find("\"10\"").unwrap());
    }
}
