//! `sinew cohort`: register and score every pair of a cohort, resumably and in shards, score
//! other methods' fields for the same pairs, and write the tables.
//!
//! Layout of `--out OUT`:
//! - `pairs/<fixed>__<moving>/`: `sinew register`'s outputs (`field.nii.gz`, `warped.nii.gz`,
//!   `warped_labels.nii.gz`, `jacdet.nii.gz`, `report.json` written last) and `score.json`;
//! - `methods/<NAME>/<fixed>__<moving>.json`: the scores of another method's field;
//! - `scores.csv`, `summary.json`, `summary.md` (a sharded run writes
//!   `scores.shard-K-of-N.csv` instead; `sinew cohort merge` joins them).
//!
//! A pair counts as done when its `report.json` parses, the files it lists exist, and its
//! `score.json` parses; anything else is redone (every file is written atomically, so a
//! killed run leaves only complete files and stray temporaries, which are removed).

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use anyhow::{bail, Context};
use clap::{Args, Subcommand};

use sinew_cohort::files::{
    collect_rows, complete_report, pair_name, read_record, read_runtimes, remove_stray_temporaries, PairRecord,
};
pub use sinew_cohort::{manifest, table, Pair, Shard, Subject};

use crate::cmd::common;
use crate::cmd::register::{PairRequest, ParamArgs, PresetArgs, UnitsArg};
use crate::cmd::score::FieldFormat;
use crate::ui;
use sinew_cohort::{FieldFormat as Format, PairFiles};

/// Arguments of `sinew cohort`.
#[derive(Args, Debug, Clone)]
#[command(args_conflicts_with_subcommands = true, subcommand_negates_reqs = true, after_long_help = COHORT_HELP)]
pub struct CohortArgs {
    /// `merge`: join the tables of shards.
    #[command(subcommand)]
    pub action: Option<CohortAction>,
    /// Subjects and pairs.
    #[command(flatten)]
    pub subjects: SubjectArgs,
    /// Output folder (created if needed; rerunning into it resumes).
    #[arg(long, short = 'o', value_name = "DIR", required = true)]
    pub out: Option<PathBuf>,
    /// Preset, config file and iterations of the registrations.
    #[command(flatten)]
    pub params: PresetArgs,
    /// Diffeomorphic registration (scaling and squaring of a velocity field).
    #[arg(long)]
    pub diffeomorphic: bool,
    /// Run only share K of N: the pairs whose index (0-based, in pair-list order, else in the
    /// order (0,1), (0,2), …, (1,2), …) satisfies index mod N = K − 1. For batch job arrays;
    /// join with `merge`.
    #[arg(long, value_name = "K/N")]
    pub shard: Option<Shard>,
    /// Pairs registered side by side, each with threads/J worker threads.
    #[arg(long, default_value_t = 1, value_parser = clap::value_parser!(u32).range(1..))]
    pub jobs: u32,
    /// Worker threads in all (default: all cores).
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
    /// Score another method's fields (from --fields) under this name instead of registering.
    #[arg(long, value_name = "NAME", requires = "fields")]
    pub method: Option<String>,
    /// Folder of the method's fields, one per pair: `<fixed>__<moving>.nii.gz` (or `.nii`,
    /// or `.npy`), each a field on the fixed subject's grid.
    #[arg(long, value_name = "DIR", requires = "method")]
    pub fields: Option<PathBuf>,
    /// The method's registration time per pair: CSV with the header `fixed,moving,runtime_s`
    /// (seconds, as measured by whoever ran it); fills the runtime_s column of its rows.
    #[arg(long, value_name = "CSV", requires = "method")]
    pub runtimes: Option<PathBuf>,
    #[command(flatten)]
    pub field_format: FieldFormat,
    /// The robustness column of the summaries: the Q-th percentile of Dice over the pairs
    /// (the Dice the worst Q % of pairs fall below).
    #[arg(long, value_name = "Q", default_value_t = sinew_score::ROBUST_PERCENTILE, value_parser = percent)]
    pub robust_percentile: f64,
    /// Working grid, initial alignment, anti-aliasing and NaN voxels of every pair (as in
    /// `sinew register`).
    #[command(flatten)]
    pub scan: crate::cmd::register::ScanArgs,
    /// Grey window of every pair's qc.png: `lo,hi` in the scans' units, or `auto` (as in
    /// `sinew register --qc-window`).
    #[arg(long, value_name = "LO,HI|auto", default_value = "auto", allow_hyphen_values = true, value_parser = crate::cmd::qc::window_arg)]
    pub qc_window: sinew_qc::Window,
    /// Print the pairs of this run (index, fixed, moving) and stop.
    #[arg(long)]
    pub list: bool,
    /// No progress bar and no summary line.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Where the subjects and pairs come from; shared by `sinew cohort` and `sinew tune`.
#[derive(Args, Debug, Clone, Default)]
pub struct SubjectArgs {
    /// Manifest of subjects: TOML (`[[subject]]` with id, image, labels, optional mask and
    /// landmarks) or CSV (header `id,image,labels[,mask][,landmarks]`); paths relative to it.
    #[arg(long, value_name = "FILE", conflicts_with = "all_pairs", required_unless_present = "all_pairs")]
    pub manifest: Option<PathBuf>,
    /// A folder of `<id>_image.nii.gz` + `<id>_labels.nii.gz` files (the layout of `sinew demo`);
    /// every pair i<j of the ids in sorted order.
    #[arg(long, value_name = "DIR")]
    pub all_pairs: Option<PathBuf>,
    /// Pair list: CSV with the header `fixed,moving` (subject ids), one pair a line, in either
    /// direction; default: the manifest's `[[pair]]` tables, else every pair i<j.
    #[arg(long, value_name = "CSV")]
    pub pairs: Option<PathBuf>,
}

impl SubjectArgs {
    /// The subjects and pairs, as the library takes them.
    pub fn source(&self) -> sinew_cohort::Source {
        sinew_cohort::Source {
            manifest: self.manifest.clone(),
            all_pairs: self.all_pairs.clone(),
            pairs: self.pairs.clone(),
        }
    }
}

/// Subcommands of `sinew cohort`.
#[derive(Subcommand, Debug, Clone)]
pub enum CohortAction {
    /// Join the tables of shards (folders or CSV files) into scores.csv, summary.json and summary.md.
    Merge(MergeArgs),
}

/// Arguments of `sinew cohort merge`.
#[derive(Args, Debug, Clone)]
pub struct MergeArgs {
    /// Output folders of the shards (their `scores.shard-*.csv`, else `scores.csv`) or table files.
    #[arg(required = true, value_name = "OUT")]
    pub inputs: Vec<PathBuf>,
    /// Where to write the joined tables (default: the first input folder).
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// The robustness column of the summaries: the Q-th percentile of Dice over the pairs.
    #[arg(long, value_name = "Q", default_value_t = sinew_score::ROBUST_PERCENTILE, value_parser = percent)]
    pub robust_percentile: f64,
}

/// Parses a percentile 0..=100.
fn percent(s: &str) -> Result<f64, String> {
    s.parse::<f64>()
        .ok()
        .filter(|q| (0.0..=100.0).contains(q))
        .ok_or_else(|| format!("{s:?}: expected a percentile from 0 to 100"))
}

const COHORT_HELP: &str = "Examples:
  sinew demo --out demo --small --subjects 5
  sinew cohort --all-pairs demo --out runs/demo --preset fast
  sinew cohort --manifest cohort.toml --out runs/c --jobs 2
  sinew cohort --manifest cohort.toml --pairs test_pairs.csv --out runs/c
  sinew cohort --all-pairs demo --out runs/demo --method mynet --fields mynet_fields \\
      --units voxel --runtimes mynet_times.csv
  sinew cohort --all-pairs demo --out runs/s3 --shard 3/8      # one job of an array of 8
  sinew cohort merge runs/s1 runs/s2 runs/s3 --out runs/all

Pairs: those of --pairs (CSV fixed,moving of subject ids) or of the manifest's [[pair]] tables,
indexed 0, 1, … in list order; else every i<j of the subjects (fixed = i, moving = j) in the
order (0,1), (0,2), …, (1,2), …. --shard K/N takes the pairs with index mod N = K - 1.
Fields of another method: DIR/<fixed>__<moving>.nii.gz (or .nii or .npy), read with --units,
--layout and --direction as in `sinew score`; the baseline's rows are named 'sinew'.
Rerunning the same command resumes: finished pairs are skipped, unfinished ones redone.";

/// Runs `sinew cohort`.
pub fn run(args: CohortArgs) -> anyhow::Result<()> {
    if let Some(CohortAction::Merge(m)) = &args.action {
        return merge(m);
    }
    let out = args.out.clone().context("--out is required")?;
    let cohort = args.subjects.source().load()?;
    let names = sinew_cohort::label_names(&cohort.dir)?;
    let (subjects, every) = (cohort.subjects, cohort.pairs);
    let pairs: Vec<Pair> = every.into_iter().filter(|p| args.shard.map_or(true, |s| s.contains(p.index))).collect();
    let runtimes = match &args.runtimes {
        Some(p) => read_runtimes(p, &subjects)?,
        None => Default::default(),
    };
    if args.list {
        for p in &pairs {
            println!("{}\t{}\t{}", p.index, subjects[p.fixed].id, subjects[p.moving].id);
        }
        return Ok(());
    }
    if let Some(m) = &args.method {
        if m == table::BASELINE || m.is_empty() || !m.chars().all(|c| c.is_ascii_alphanumeric() || "-_.".contains(c)) {
            bail!(
                "--method {m:?}: use letters, digits, '-', '_', '.', and not {:?} (the baseline's name)",
                table::BASELINE
            );
        }
    }
    std::fs::create_dir_all(out.join("pairs")).with_context(|| format!("{}: cannot create", out.display()))?;
    let total_threads = args.threads.unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()));
    if total_threads == 0 {
        bail!("--threads must be at least 1");
    }
    let jobs = (args.jobs as usize).min(pairs.len().max(1));
    let per_job = (total_threads / jobs).max(1);
    let ctx = Ctx { args: &args, out: &out, subjects: &subjects, runtimes: &runtimes, params: register_params(&args)? };

    let pb = ui::progress(pairs.len() as u64, "cohort", args.quiet);
    let next = AtomicUsize::new(0);
    let outcomes: Mutex<Vec<(Pair, anyhow::Result<Outcome>)>> = Mutex::new(Vec::new());
    std::thread::scope(|scope| {
        for _ in 0..jobs {
            scope.spawn(|| loop {
                let n = next.fetch_add(1, Ordering::SeqCst);
                let Some(&pair) = pairs.get(n) else { break };
                let r = common::with_threads(Some(per_job), || ctx.do_pair(pair));
                pb.set_message(format!("{}__{}", subjects[pair.fixed].id, subjects[pair.moving].id));
                pb.inc(1);
                outcomes.lock().expect("no worker panicked").push((pair, r));
            });
        }
    });
    pb.finish_and_clear();
    let outcomes = outcomes.into_inner().expect("no worker panicked");

    let rows = collect_rows(&out, &subjects, &pairs, &names)?;
    let table_path = match args.shard {
        Some(s) => out.join(format!("scores.shard-{}-of-{}.csv", s.k, s.n)),
        None => out.join("scores.csv"),
    };
    // Temporaries of these tables left by a killed run (the pair folders are cleaned per pair).
    let table_name = table_path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let mut ours = vec![table_name];
    if args.shard.is_none() {
        ours.extend(["summary.json".to_string(), "summary.md".to_string()]);
    }
    if let Ok(entries) = std::fs::read_dir(&out) {
        for e in entries.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if ours.iter().any(|t| name.starts_with(&format!(".{t}.tmp-"))) {
                let _ = std::fs::remove_file(e.path());
            }
        }
    }
    sinew_io::atomic::write_bytes_atomic(&table_path, table::to_csv(&rows).as_bytes())?;
    if args.shard.is_none() {
        table::write_summaries(&out, &rows, args.robust_percentile)?;
    }
    let done = outcomes.iter().filter(|(_, r)| matches!(r, Ok(Outcome::Done))).count();
    let skipped = outcomes.iter().filter(|(_, r)| matches!(r, Ok(Outcome::Skipped))).count();
    let failed: Vec<String> = outcomes
        .iter()
        .filter_map(|(p, r)| {
            r.as_ref().err().map(|e| format!("{}__{}: {e:#}", subjects[p.fixed].id, subjects[p.moving].id))
        })
        .collect();
    if !args.quiet {
        eprintln!(
            "{} pairs: {done} done, {skipped} already done, {} failed; table {}",
            pairs.len(),
            failed.len(),
            table_path.display()
        );
    }
    if !failed.is_empty() {
        bail!("{} of {} pairs failed (rerun to retry them):\n  {}", failed.len(), pairs.len(), failed.join("\n  "));
    }
    Ok(())
}

/// What happened to a pair.
enum Outcome {
    /// Registered and/or scored now.
    Done,
    /// Found complete.
    Skipped,
}

struct Ctx<'a> {
    args: &'a CohortArgs,
    out: &'a Path,
    subjects: &'a [Subject],
    /// An imported method's runtime per (fixed, moving) id pair, s.
    runtimes: &'a std::collections::BTreeMap<(String, String), f64>,
    params: Option<sinew_solve::RegParams>,
}

/// The registration parameters (none when scoring another method).
pub(crate) fn register_params(args: &CohortArgs) -> anyhow::Result<Option<sinew_solve::RegParams>> {
    if args.method.is_some() {
        return Ok(None);
    }
    ParamArgs::base(&args.params, args.diffeomorphic).params().map(Some)
}

/// The registration request for pair `f` → `m` into `dir`.
fn pair_request(args: &CohortArgs, f: &Subject, m: &Subject, dir: &Path) -> anyhow::Result<PairRequest> {
    Ok(PairRequest {
        fixed: f.image.clone(),
        moving: m.image.clone(),
        out: dir.to_path_buf(),
        fixed_labels: Some(f.labels.clone()),
        moving_labels: Some(m.labels.clone()),
        mask: f.mask.clone(),
        field_units: UnitsArg::Mm,
        npy: false,
        out_format: crate::cmd::register::OutFormat::NiiGz,
        scan: args.scan.options()?,
        nan: args.scan.nan_policy()?,
        qc: true,
        qc_window: args.qc_window,
        label_names: names_file(args),
        quiet: true,
    })
}

/// The cohort's `labels.json` (beside the manifest, or in the --all-pairs folder) when there
/// is one: the pairs' QC sheets name their labels from it.
fn names_file(args: &CohortArgs) -> Option<PathBuf> {
    let dir = match (&args.subjects.manifest, &args.subjects.all_pairs) {
        (Some(m), _) => m.parent().unwrap_or(Path::new(".")).to_path_buf(),
        (None, Some(d)) => d.clone(),
        (None, None) => return None,
    };
    Some(dir.join("labels.json")).filter(|p| p.is_file())
}

impl Ctx<'_> {
    fn do_pair(&self, pair: Pair) -> anyhow::Result<Outcome> {
        let (f, m) = (&self.subjects[pair.fixed], &self.subjects[pair.moving]);
        match (&self.args.method, &self.args.fields) {
            (Some(method), Some(fields)) => {
                let dir = self.out.join("methods").join(method);
                std::fs::create_dir_all(&dir).with_context(|| format!("{}: cannot create", dir.display()))?;
                let name = pair_name(f, m);
                let field = ["nii.gz", "nii", "npy"]
                    .iter()
                    .map(|ext| fields.join(format!("{name}.{ext}")))
                    .find(|p| p.is_file())
                    .with_context(|| {
                        format!("{}: no field {name}.nii.gz, {name}.nii or {name}.npy", fields.display())
                    })?;
                let record_path = dir.join(format!("{name}.json"));
                let runtime = self.runtimes.get(&(f.id.clone(), m.id.clone())).copied();
                if let Some(r) = read_record(&record_path, pair, f, m) {
                    if r.result.field.as_ref().map(|n| &n.sha256) == Some(&sinew_cohort::sha256_file(&field)?)
                        && r.runtime_s == runtime
                    {
                        return Ok(Outcome::Skipped);
                    }
                }
                remove_stray_temporaries(&dir);
                self.score_into(pair, method, &field, &self.args.field_format.format(), runtime, &record_path)?;
                Ok(Outcome::Done)
            }
            _ => {
                let dir = self.out.join("pairs").join(pair_name(f, m));
                let score_path = dir.join("score.json");
                let mut outcome = Outcome::Skipped;
                let runtime = match complete_report(&dir) {
                    Some(t) => t,
                    None => {
                        // Any score belongs to an earlier registration: drop it first.
                        let _ = std::fs::remove_file(&score_path);
                        remove_stray_temporaries(&dir);
                        let params = self.params.as_ref().expect("parameters when registering");
                        let report = crate::cmd::register::run_pair(&pair_request(self.args, f, m, &dir)?, params)?;
                        outcome = Outcome::Done;
                        report.timings.register_s
                    }
                };
                if read_record(&score_path, pair, f, m).is_some() {
                    return Ok(outcome);
                }
                let field = dir.join("field.nii.gz");
                self.score_into(pair, table::BASELINE, &field, &Format::default(), Some(runtime), &score_path)?;
                Ok(Outcome::Done)
            }
        }
    }

    /// Scores `pair` through `field` and writes the record to `record_path` (atomically).
    fn score_into(
        &self,
        pair: Pair,
        method: &str,
        field: &Path,
        fmt: &Format,
        runtime_s: Option<f64>,
        record_path: &Path,
    ) -> anyhow::Result<()> {
        let (f, m) = (&self.subjects[pair.fixed], &self.subjects[pair.moving]);
        let files = PairFiles {
            fixed_labels: &f.labels,
            moving_labels: &m.labels,
            field: Some(field),
            warped_labels: None,
            landmarks: f.landmarks.as_deref().zip(m.landmarks.as_deref()),
        };
        let result = sinew_cohort::score_files(&files, fmt)?;
        let rec = PairRecord {
            method: method.into(),
            pair: pair.index,
            fixed: f.id.clone(),
            moving: m.id.clone(),
            runtime_s,
            result,
        };
        Ok(sinew_cohort::write_json(record_path, &rec)?)
    }
}

/// `sinew cohort merge`.
fn merge(m: &MergeArgs) -> anyhow::Result<()> {
    let mut files: Vec<PathBuf> = Vec::new();
    for input in &m.inputs {
        if input.is_dir() {
            let mut shards: Vec<PathBuf> = std::fs::read_dir(input)
                .with_context(|| format!("{}: cannot list", input.display()))?
                .flatten()
                .map(|e| e.path())
                .filter(|p| {
                    p.file_name()
                        .and_then(|n| n.to_str())
                        .is_some_and(|n| n.starts_with("scores.shard-") && n.ends_with(".csv"))
                })
                .collect();
            shards.sort();
            if shards.is_empty() {
                let whole = input.join("scores.csv");
                if !whole.is_file() {
                    bail!("{}: no scores.shard-*.csv and no scores.csv", input.display());
                }
                shards.push(whole);
            }
            files.extend(shards);
        } else {
            files.push(input.clone());
        }
    }
    let tables =
        files.iter().map(|p| Ok((p.display().to_string(), table::read_csv(p)?))).collect::<anyhow::Result<Vec<_>>>()?;
    let rows = table::merge_rows(tables)?;
    let out = match &m.out {
        Some(o) => o.clone(),
        None if m.inputs[0].is_dir() => m.inputs[0].clone(),
        None => m.inputs[0].parent().unwrap_or(Path::new(".")).to_path_buf(),
    };
    std::fs::create_dir_all(&out).with_context(|| format!("{}: cannot create", out.display()))?;
    for name in ["scores.csv", "summary.json", "summary.md"] {
        sinew_io::atomic::ensure_not_input(&out.join(name), &files)?;
    }
    sinew_io::atomic::write_bytes_atomic(&out.join("scores.csv"), table::to_csv(&rows).as_bytes())?;
    table::write_summaries(&out, &rows, m.robust_percentile)?;
    eprintln!("merged {} tables, {} rows into {}", files.len(), rows.len(), out.join("scores.csv").display());
    Ok(())
}
