//! `sinew tune`: search the registration parameters that trade overlap, smoothness and time
//! on labelled training pairs, under a folding budget and a time budget, and report the
//! result on held-out pairs only.
//!
//! Layout of `--out OUT`:
//! - `tune.json`: the settings of the run (pairs of each split, budgets, seed, starting
//!   parameters, the search grid), written first; a rerun with other settings is refused;
//! - `trials/trial-NNNN.json`: one file per trial (parameters, figures per pair and their
//!   means), each written atomically: a killed run leaves only complete files, and a rerun of
//!   the same command replays them and continues with the same trials;
//! - `holdout/default.json`, `holdout/tuned.json`: the starting and the tuned parameters on
//!   the held-out pairs;
//! - `trials.csv` (every trial), `tuned.toml` (or `closest.toml` when no setting meets the
//!   budgets), `result.json` and `tune.html` (the trial table, a Dice-versus-folding plot with
//!   the Pareto front, and the held-out comparison).
//!
//! Sharding: `--shard K/N` runs the trials whose number satisfies `trial mod N = K − 1`; all
//! shards write into the same `--out` folder and, at the end of every round, wait for the
//! trials of the others (so the N jobs of an array run at the same time). Shard 1 evaluates
//! the held-out pairs and writes the final files.

mod page;
pub mod search;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{bail, Context};
use clap::Args;
use serde::{Deserialize, Serialize};
use sinew_solve::RegParams;

use crate::cmd::cohort::manifest::{self, NamedPair};
use crate::cmd::cohort::{Pair, Shard, Subject, SubjectArgs};
use crate::cmd::common;
use crate::cmd::register::{ParamArgs, PresetArgs, ScanArgs};
use crate::ui;
use search::{Budget, Outcome, Planned, Search};

/// Arguments of `sinew tune`.
#[derive(Args, Debug, Clone)]
#[command(after_long_help = TUNE_HELP)]
pub struct TuneArgs {
    /// Labelled subjects and pairs (as for `sinew cohort`).
    #[command(flatten)]
    pub subjects: SubjectArgs,
    /// Share of the pairs held out (never tuned on; the final figures are theirs), drawn at
    /// random with --seed; at least one pair on each side.
    #[arg(long, value_name = "FRACTION", default_value_t = 0.3, value_parser = fraction, conflicts_with = "holdout_pairs")]
    pub holdout: f64,
    /// The held-out pairs instead: CSV `fixed,moving` (subject ids); the other pairs are tuned on.
    #[arg(long, value_name = "CSV")]
    pub holdout_pairs: Option<PathBuf>,
    /// Folding budget: the largest mean share of voxels with det J <= 0 over the tuning pairs,
    /// in percent (0.1 = one voxel in a thousand).
    #[arg(long, value_name = "PCT", default_value_t = 0.1, value_parser = folding_budget)]
    pub max_folding: f64,
    /// Time budget: the largest mean registration time per pair, in seconds (default: none).
    /// A trial is stopped when one pair takes more than twice the budget.
    #[arg(long, value_name = "SECONDS", value_parser = seconds)]
    pub time_budget: Option<f64>,
    /// Largest number of trials (settings tried on the tuning pairs), the starting one included.
    #[arg(long, value_name = "N", default_value_t = 30, value_parser = clap::value_parser!(u32).range(1..=10000))]
    pub trials: u32,
    /// Seed of the held-out split.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Run only the trials with number mod N = K − 1 (job arrays; every shard uses the same
    /// --out and waits at the end of each round for the others).
    #[arg(long, value_name = "K/N")]
    pub shard: Option<Shard>,
    /// Output folder (created if needed; rerunning the same command into it resumes).
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: PathBuf,
    /// The starting parameters (and the default the result is compared with): preset, config
    /// file and iterations.
    #[command(flatten)]
    pub params: PresetArgs,
    /// Working grid, initial alignment, anti-aliasing and NaN voxels of every pair (as in
    /// `sinew register`).
    #[command(flatten)]
    pub scan: ScanArgs,
    /// Worker threads (default: all cores).
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
    /// No progress bar and no per-trial lines.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

const TUNE_HELP: &str = "Examples:
  sinew demo --out demo --small --subjects 6 --data-only
  sinew tune --all-pairs demo --out runs/tune --max-folding 0.1 --time-budget 2
  sinew tune --manifest cohort.toml --pairs train_pairs.csv --holdout-pairs val_pairs.csv \\
      --out runs/tune --max-folding 0.05 --trials 40
  sinew tune --all-pairs demo --out runs/tune --shard 2/4      # one job of an array of 4
  sinew register -f a.nii.gz -m b.nii.gz -o out --config runs/tune/tuned.toml

Search: compass search on a log grid (\"Optimization by Direct Search: New Perspectives on
Some Classical and Modern Methods\", SIAM Review 2003) over lambda, fold_weight,
curvature, mind_dilation, a factor on every level's step size and a factor on every level's
iterations, starting from --preset/--config. Each round tries one grid step down and up in
each parameter from the best setting so far; without a gain the steps are halved; it ends
when the finest steps bring nothing or --trials are spent. Invalid parameters are never tried.
Objective: the highest mean Dice over the tuning pairs among the settings whose mean folding
is within --max-folding and whose mean registration time per pair is within --time-budget.
When none is, the run writes closest.toml and ends with an error naming the closest setting.
Held-out rule: the pairs of --holdout (a seeded random share) or --holdout-pairs are never
used by the search; the final comparison of the starting and the tuned parameters is on
them only (result.json, tune.html).
Outputs in DIR: tuned.toml (for register/cohort/demo --config), trials.csv, tune.html,
result.json, trials/*.json. Rerunning the same command resumes.";

fn fraction(s: &str) -> Result<f64, String> {
    s.parse::<f64>()
        .ok()
        .filter(|f| f.is_finite() && *f > 0.0 && *f < 1.0)
        .ok_or_else(|| format!("{s:?}: expected a fraction between 0 and 1 (exclusive)"))
}

fn folding_budget(s: &str) -> Result<f64, String> {
    s.parse::<f64>()
        .ok()
        .filter(|f| f.is_finite() && (0.0..=100.0).contains(f))
        .ok_or_else(|| format!("{s:?}: expected a percentage of voxels from 0 to 100"))
}

fn seconds(s: &str) -> Result<f64, String> {
    s.parse::<f64>()
        .ok()
        .filter(|f| f.is_finite() && *f > 0.0)
        .ok_or_else(|| format!("{s:?}: expected a positive number of seconds"))
}

/// What `tune.json` records: a rerun must match it.
#[derive(Serialize)]
struct Settings<'a> {
    tool: &'static str,
    /// Tuning pairs as (fixed id, moving id).
    tuning_pairs: Vec<(String, String)>,
    /// Held-out pairs.
    holdout_pairs: Vec<(String, String)>,
    /// How the held-out pairs were chosen.
    holdout_rule: String,
    budget: Budget,
    max_trials: usize,
    starting_params: &'a RegParams,
    scan: String,
    /// The searched grid: name → values.
    grid: BTreeMap<&'static str, Vec<f64>>,
}

/// The figures of one pair under one setting.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PairFigures {
    /// Fixed subject id.
    pub fixed: String,
    /// Moving subject id.
    pub moving: String,
    /// Mean Dice over labels.
    pub dice: Option<f64>,
    /// Mean HD95 over labels, mm.
    pub hd95_mm: Option<f64>,
    /// Share of voxels with det J ≤ 0, percent.
    pub folding_pct: Option<f64>,
    /// SDlogJ.
    pub sdlogj: Option<f64>,
    /// Registration wall time (inputs in memory to field), s.
    pub seconds: f64,
}

/// One evaluated setting: `trials/trial-NNNN.json` and `holdout/*.json`.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Evaluation {
    /// Trial number (none for the held-out evaluations).
    pub trial: Option<usize>,
    /// Search round.
    pub round: Option<usize>,
    /// Grid indices of the searched parameters.
    pub point: Vec<usize>,
    /// The searched parameters' values.
    pub values: BTreeMap<String, f64>,
    /// The full parameters.
    pub params: RegParams,
    /// Per pair.
    pub pairs: Vec<PairFigures>,
    /// Means over the pairs.
    pub outcome: Outcome,
}

/// Scans (fixed + moving voxels) kept in memory between trials, at most.
const CACHE_VOXELS: usize = 64 << 20;

/// The pair sets and inputs of a run.
struct Ctx<'a> {
    subjects: &'a [Subject],
    scan: &'a ScanArgs,
    budget: Budget,
    /// Inputs read once and reused by later trials (fixed, moving subject positions), up to
    /// [`CACHE_VOXELS`].
    cache: std::sync::Mutex<BTreeMap<(usize, usize), std::sync::Arc<common::Inputs>>>,
}

impl Ctx<'_> {
    /// The inputs of `pair`, read once and kept while the cache has room.
    fn inputs(&self, pair: &Pair) -> anyhow::Result<std::sync::Arc<common::Inputs>> {
        let key = (pair.fixed, pair.moving);
        if let Some(i) = self.cache.lock().expect("no panic while caching").get(&key) {
            return Ok(i.clone());
        }
        let (f, m) = (&self.subjects[pair.fixed], &self.subjects[pair.moving]);
        let inputs = std::sync::Arc::new(common::Inputs::load(
            &f.image,
            &m.image,
            Some(&f.labels),
            Some(&m.labels),
            f.mask.as_deref(),
            self.scan.nan_policy()?,
        )?);
        let mut cache = self.cache.lock().expect("no panic while caching");
        let size = |i: &common::Inputs| i.scans.fixed.grid.len() + i.scans.moving.grid.len();
        let used: usize = cache.values().map(|i| size(i)).sum();
        if used + size(&inputs) <= CACHE_VOXELS {
            cache.insert(key, inputs.clone());
        }
        Ok(inputs)
    }

    fn ids(&self, p: &Pair) -> (String, String) {
        (self.subjects[p.fixed].id.clone(), self.subjects[p.moving].id.clone())
    }

    /// Registers and scores every pair of `pairs` with `params`; `tick` is called before each
    /// pair with its position.
    fn evaluate(
        &self,
        params: &RegParams,
        pairs: &[Pair],
        stop_over_budget: bool,
        tick: &dyn Fn(usize),
    ) -> anyhow::Result<(Vec<PairFigures>, Outcome)> {
        let opts = self.scan.options()?;
        let mut figures = Vec::with_capacity(pairs.len());
        let mut stopped_early = false;
        for (n, pair) in pairs.iter().enumerate() {
            tick(n);
            let (f, m) = (&self.subjects[pair.fixed], &self.subjects[pair.moving]);
            let inputs = self.inputs(pair)?;
            let t = Instant::now();
            let reg = sinew_solve::register_scans(
                &inputs.scans.fixed,
                &inputs.scans.moving,
                inputs.scans.mask.as_ref(),
                params,
                &opts,
                &mut |_| {},
            )
            .with_context(|| format!("registering {} to {}", m.image.display(), f.image.display()))?;
            let seconds = t.elapsed().as_secs_f64();
            let (fl, ml) = (inputs.scans.fixed_labels.as_ref(), inputs.scans.moving_labels.as_ref());
            let score = sinew_score::score_pair(
                fl.expect("labels were loaded"),
                ml.expect("labels were loaded"),
                sinew_score::Warp::Field(&reg.field.to_field()),
            )
            .with_context(|| format!("scoring {}__{}", f.id, m.id))?;
            let j = score.jacobian.as_ref();
            figures.push(PairFigures {
                fixed: f.id.clone(),
                moving: m.id.clone(),
                dice: score.mean_dice,
                hd95_mm: score.mean_hd95_mm,
                folding_pct: j.map(|j| 100.0 * j.folding_fraction),
                sdlogj: j.and_then(|j| j.sd_log_j),
                seconds,
            });
            if stop_over_budget && n + 1 < pairs.len() && self.budget.time_per_pair_s.is_some_and(|b| seconds > 2.0 * b)
            {
                stopped_early = true;
                break;
            }
        }
        let outcome = summarise(&figures, stopped_early);
        Ok((figures, outcome))
    }
}

/// Means over pairs (a figure missing for a pair is left out of its mean; Dice missing
/// everywhere counts as 0).
fn summarise(f: &[PairFigures], stopped_early: bool) -> Outcome {
    let mean = |v: Vec<f64>| sinew_score::mean(&v);
    Outcome {
        dice: mean(f.iter().filter_map(|p| p.dice).collect()).unwrap_or(0.0),
        hd95_mm: mean(f.iter().filter_map(|p| p.hd95_mm).collect()),
        folding_pct: mean(f.iter().filter_map(|p| p.folding_pct).collect()).unwrap_or(0.0),
        sdlogj: mean(f.iter().filter_map(|p| p.sdlogj).collect()),
        seconds_per_pair: mean(f.iter().map(|p| p.seconds).collect()).unwrap_or(0.0),
        stopped_early,
    }
}

/// The held-out positions among `n` pairs: `round(fraction·n)` of them (at least 1 and at
/// most n − 1), drawn by a Fisher–Yates shuffle from SplitMix64 (`sinew_phantom::splitmix64`, a
/// value-stable generator, so the held-out split of a seed never changes) seeded with `seed`,
/// returned ascending.
pub fn holdout_split(n: usize, fraction: f64, seed: u64) -> Vec<usize> {
    let k = ((fraction * n as f64).round() as usize).clamp(1, n.saturating_sub(1).max(1));
    let mut order: Vec<usize> = (0..n).collect();
    let mut state = seed;
    for i in (1..n).rev() {
        let j = (sinew_phantom::splitmix64(&mut state) % (i as u64 + 1)) as usize;
        order.swap(i, j);
    }
    let mut held: Vec<usize> = order[..k].to_vec();
    held.sort_unstable();
    held
}

/// The base parameters: preset, config file, `--iterations`.
pub(crate) fn base_params(args: &TuneArgs) -> anyhow::Result<RegParams> {
    ParamArgs::base(&args.params, false).params()
}

/// Runs `sinew tune`.
pub fn run(args: TuneArgs) -> anyhow::Result<()> {
    let base = base_params(&args)?;
    args.scan.options()?;
    args.scan.nan_policy()?;
    let cohort = args.subjects.source().load()?;
    let (subjects, every) = (cohort.subjects, cohort.pairs);
    let (tuning, held, rule) = split(&args, &every, &subjects)?;
    let budget = Budget { max_folding_pct: args.max_folding, time_per_pair_s: args.time_budget };
    let ctx = Ctx { subjects: &subjects, scan: &args.scan, budget, cache: Default::default() };
    let mut search = Search::new(&base, budget, args.trials as usize);

    let out = &args.out;
    for d in [out.clone(), out.join("trials"), out.join("holdout")] {
        std::fs::create_dir_all(&d).with_context(|| format!("{}: cannot create", d.display()))?;
    }
    let settings = Settings {
        tool: concat!("sinew tune ", env!("CARGO_PKG_VERSION")),
        tuning_pairs: tuning.iter().map(|p| ctx.ids(p)).collect(),
        holdout_pairs: held.iter().map(|p| ctx.ids(p)).collect(),
        holdout_rule: rule.clone(),
        budget,
        max_trials: args.trials as usize,
        starting_params: &base,
        scan: format!("{:?}", args.scan),
        grid: search.dims.iter().map(|d| (d.name, d.values.clone())).collect(),
    };
    check_settings(&out.join("tune.json"), &settings)?;
    // Temporaries of interrupted atomic writes: with shards running side by side only this
    // process's own could be removed safely, so shards leave them.
    if args.shard.is_none() {
        for d in [out.clone(), out.join("trials"), out.join("holdout")] {
            sinew_cohort::files::remove_stray_temporaries(&d);
        }
    }
    let threads = args.threads;
    if threads == Some(0) {
        bail!("--threads must be at least 1");
    }
    let mine = |trial: usize| args.shard.map_or(true, |s| s.contains(trial));
    let say = |pb: &indicatif::ProgressBar, line: String| {
        if !args.quiet {
            pb.suspend(|| eprintln!("{line}"));
        }
    };
    if !args.quiet {
        eprintln!(
            "tuning on {} pairs, {} held out ({rule}); budgets: folding <= {} %, {} per pair; up to {} trials",
            tuning.len(),
            held.len(),
            args.max_folding,
            args.time_budget.map_or("no time limit".to_string(), |t| format!("<= {t} s")),
            args.trials
        );
    }

    let pb = ui::progress(args.trials as u64, "tune", args.quiet);
    let t_run = Instant::now();
    let mut ran = 0usize;
    common::with_threads(threads, || -> anyhow::Result<()> {
        loop {
            let round = search.round();
            if round.is_empty() {
                break;
            }
            let mut results: Vec<Option<Evaluation>> = Vec::with_capacity(round.len());
            for p in &round {
                results.push(read_trial(out, p, &search.params(&p.point), &tuning, &ctx)?);
            }
            for (i, p) in round.iter().enumerate() {
                if results[i].is_some() || !mine(p.trial) {
                    continue;
                }
                let params = search.params(&p.point);
                let t = Instant::now();
                let done_before = search.tried.len() + results.iter().filter(|r| r.is_some()).count();
                pb.set_position(done_before as u64);
                let tick = |n: usize| pb.set_message(format!("trial {} pair {}/{}", p.trial, n + 1, tuning.len()));
                let (pairs, outcome) = ctx.evaluate(&params, &tuning, true, &tick)?;
                let eval = Evaluation {
                    trial: Some(p.trial),
                    round: Some(p.round),
                    point: p.point.clone(),
                    values: values_of(&search, &p.point),
                    params,
                    pairs,
                    outcome,
                };
                common::write_json(&trial_path(out, p.trial), &eval)?;
                ran += 1;
                say(&pb, trial_line(&search, &eval, budget, t.elapsed().as_secs_f64()));
                results[i] = Some(eval);
            }
            // Other shards' trials of this round.
            let mut waited = false;
            while results.iter().any(Option::is_none) {
                if !waited {
                    pb.set_message("waiting for other shards");
                    waited = true;
                }
                std::thread::sleep(Duration::from_secs(2));
                for (i, p) in round.iter().enumerate() {
                    if results[i].is_none() {
                        results[i] = read_trial(out, p, &search.params(&p.point), &tuning, &ctx)?;
                    }
                }
            }
            let done: Vec<(Planned, Outcome)> =
                round.into_iter().zip(results).map(|(p, r)| (p, r.expect("all present").outcome)).collect();
            search.advance(done);
            pb.set_position(search.tried.len() as u64);
        }
        Ok(())
    })?;
    pb.finish_and_clear();
    let finished = search.finished.clone().unwrap_or_default();
    if !args.quiet {
        eprintln!(
            "search ended after {} trials ({} run now, {:.0} s): {finished}",
            search.tried.len(),
            ran,
            t_run.elapsed().as_secs_f64()
        );
    }
    if args.shard.is_some_and(|s| s.k != 1) {
        if !args.quiet {
            eprintln!("shard 1 evaluates the held-out pairs and writes the results");
        }
        return Ok(());
    }

    // The results.
    let evals: Vec<Evaluation> = (0..search.tried.len())
        .map(|t| {
            let path = trial_path(out, t);
            let text = std::fs::read_to_string(&path).with_context(|| format!("{}: cannot read", path.display()))?;
            serde_json::from_str(&text).with_context(|| format!("{}: not a trial record", path.display()))
        })
        .collect::<anyhow::Result<_>>()?;
    let best = search.best().context("no trial ran")?;
    let feasible = budget.met(&evals[best].outcome);
    let tuned_params = evals[best].params.clone();
    let config_name = if feasible { "tuned.toml" } else { "closest.toml" };
    let stale = if feasible { "closest.toml" } else { "tuned.toml" };
    let _ = std::fs::remove_file(out.join(stale));

    let holdout = if feasible {
        let pbh = ui::progress(if best == 0 { 1 } else { 2 }, "held-out pairs", args.quiet);
        let get = |name: &str, params: &RegParams| -> anyhow::Result<Evaluation> {
            let path = out.join("holdout").join(format!("{name}.json"));
            if let Some(e) = read_eval(&path, params, &held, &ctx) {
                pbh.inc(1);
                return Ok(e);
            }
            let tick = |n: usize| pbh.set_message(format!("{name} pair {}/{}", n + 1, held.len()));
            let (pairs, outcome) = common::with_threads(threads, || ctx.evaluate(params, &held, false, &tick))?;
            let e = Evaluation {
                trial: None,
                round: None,
                point: Vec::new(),
                values: BTreeMap::new(),
                params: params.clone(),
                pairs,
                outcome,
            };
            common::write_json(&path, &e)?;
            pbh.inc(1);
            Ok(e)
        };
        let default = get("default", &evals[0].params)?;
        let tuned = if best == 0 { default.clone() } else { get("tuned", &tuned_params)? };
        pbh.finish_and_clear();
        Some((default, tuned))
    } else {
        None
    };

    let verdict = verdict(&evals, best, feasible, holdout.as_ref(), budget);
    let header = format!(
        "# sinew tune: trial {best} of {}, {}.\n# Tuning pairs: mean Dice {:.4}, folding {:.4} %, {:.2} s per pair.\n{}",
        evals.len(),
        if feasible { "the best setting within the budgets" } else { "NO setting met the budgets; the closest one" },
        evals[best].outcome.dice,
        evals[best].outcome.folding_pct,
        evals[best].outcome.seconds_per_pair,
        verdict.lines().map(|l| format!("# {l}\n")).collect::<String>()
    );
    let toml_text = config_toml(&tuned_params, &header)?;
    sinew_io::atomic::write_bytes_atomic(&out.join(config_name), toml_text.as_bytes())?;
    let front = page::write_trials_csv(&out.join("trials.csv"), &evals, budget)?;
    let result = ResultRecord {
        caution: common::CAUTION,
        tuning_pairs: tuning.len(),
        holdout_pairs: held.len(),
        holdout_rule: rule.clone(),
        budget,
        trials: evals.len(),
        search_end: finished.clone(),
        best_trial: best,
        within_budget: feasible,
        config: out.join(config_name).display().to_string(),
        tuning: TuningFigures { default: evals[0].outcome.clone(), best: evals[best].outcome.clone() },
        holdout: holdout.as_ref().map(|(d, t)| HoldoutFigures { default: d.outcome.clone(), tuned: t.outcome.clone() }),
        verdict: verdict.clone(),
    };
    common::write_json(&out.join("result.json"), &result)?;
    let page = page::html(&page::PageInput {
        evals: &evals,
        best,
        front: &front,
        budget,
        result: &result,
        holdout: holdout.as_ref(),
        config_name,
        caution: common::CAUTION,
    });
    sinew_io::atomic::write_bytes_atomic(&out.join("tune.html"), page.as_bytes())?;
    if !feasible {
        let o = &evals[best].outcome;
        bail!(
            "no setting met the budgets (mean folding <= {} %{}) in {} trials; the closest is trial {best} \
             (folding {:.4} %, {:.2} s per pair, Dice {:.4}), written to {}",
            budget.max_folding_pct,
            budget.time_per_pair_s.map_or(String::new(), |t| format!(", <= {t} s per pair")),
            evals.len(),
            o.folding_pct,
            o.seconds_per_pair,
            o.dice,
            out.join(config_name).display()
        );
    }
    if !args.quiet {
        println!("{verdict}");
        println!(
            "config {} · trials {} · report {}",
            out.join(config_name).display(),
            out.join("trials.csv").display(),
            out.join("tune.html").display()
        );
    }
    Ok(())
}

/// `result.json`.
#[derive(Serialize)]
pub struct ResultRecord {
    /// How to use (and not use) the result.
    pub caution: &'static str,
    /// Number of tuning pairs.
    pub tuning_pairs: usize,
    /// Number of held-out pairs.
    pub holdout_pairs: usize,
    /// How the held-out pairs were chosen.
    pub holdout_rule: String,
    /// The budgets.
    pub budget: Budget,
    /// Trials run.
    pub trials: usize,
    /// Why the search ended.
    pub search_end: String,
    /// The chosen trial.
    pub best_trial: usize,
    /// Whether it meets the budgets.
    pub within_budget: bool,
    /// The written config.
    pub config: String,
    /// Figures on the tuning pairs (used for the choice; not an estimate of accuracy).
    pub tuning: TuningFigures,
    /// Figures on the held-out pairs: the ones to report.
    pub holdout: Option<HoldoutFigures>,
    /// One paragraph: what the held-out pairs say.
    pub verdict: String,
}

/// Means over the tuning pairs.
#[derive(Serialize)]
pub struct TuningFigures {
    /// The starting parameters (trial 0).
    pub default: Outcome,
    /// The chosen trial.
    pub best: Outcome,
}

/// Means over the held-out pairs.
#[derive(Serialize)]
pub struct HoldoutFigures {
    /// The starting parameters.
    pub default: Outcome,
    /// The tuned parameters.
    pub tuned: Outcome,
}

fn verdict(
    evals: &[Evaluation],
    best: usize,
    feasible: bool,
    holdout: Option<&(Evaluation, Evaluation)>,
    budget: Budget,
) -> String {
    let Some((d, t)) = holdout else {
        return "No setting met the budgets, so nothing was evaluated on the held-out pairs.".into();
    };
    let (d, t) = (&d.outcome, &t.outcome);
    let mut s = format!(
        "Held-out pairs only: default mean Dice {:.4} (folding {:.4} %, {:.2} s per pair), tuned {:.4} (folding {:.4} %, {:.2} s per pair).",
        d.dice, d.folding_pct, d.seconds_per_pair, t.dice, t.folding_pct, t.seconds_per_pair
    );
    if best == 0 {
        s.push_str(" The search found no setting better than the starting one on the tuning pairs");
        if !budget.met(&evals[0].outcome) || !feasible {
            s.push_str(" within the budgets");
        }
        s.push_str(", so the tuned config is the default.");
    } else if t.dice > d.dice {
        s.push_str(&format!(
            " The tuned config beats the default by {:+.4} Dice on the held-out pairs.",
            t.dice - d.dice
        ));
    } else {
        let gain = evals[best].outcome.dice - evals[0].outcome.dice;
        s.push_str(&format!(
            " The tuned config does NOT beat the default on the held-out pairs ({:+.4} Dice), although it gained {:+.4} on the tuning pairs: the gain did not carry over (too few pairs, or the default was already near the best within the budget).",
            t.dice - d.dice,
            gain
        ));
        if !budget.met(&evals[0].outcome) {
            s.push_str(" Note that the default itself is outside the budgets on the tuning pairs.");
        }
    }
    if t.folding_pct > budget.max_folding_pct {
        s.push_str(&format!(
            " On the held-out pairs the tuned config folds {:.4} %, above the {} % budget met on the tuning pairs.",
            t.folding_pct, budget.max_folding_pct
        ));
    }
    s
}

/// Splits the pairs into tuning and held-out pairs.
fn split(args: &TuneArgs, every: &[Pair], subjects: &[Subject]) -> anyhow::Result<(Vec<Pair>, Vec<Pair>, String)> {
    if every.len() < 2 {
        bail!("{} pair(s): tuning needs at least 2 (one to tune on, one held out)", every.len());
    }
    match &args.holdout_pairs {
        Some(path) => {
            let named: Vec<NamedPair> = manifest::read_pair_list(path)?;
            let held = manifest::resolve_pairs(&named, subjects, path)?;
            let is_held = |p: &Pair| held.iter().any(|h| h.fixed == p.fixed && h.moving == p.moving);
            let tuning: Vec<Pair> = every.iter().copied().filter(|p| !is_held(p)).collect();
            if tuning.is_empty() {
                bail!("{}: holds every pair; nothing is left to tune on", path.display());
            }
            Ok((tuning, held, format!("the pairs listed in {}", path.display())))
        }
        None => {
            let h = holdout_split(every.len(), args.holdout, args.seed);
            let held: Vec<Pair> = h.iter().map(|&i| every[i]).collect();
            let tuning: Vec<Pair> = (0..every.len()).filter(|i| !h.contains(i)).map(|i| every[i]).collect();
            Ok((
                tuning,
                held,
                format!(
                    "{} of {} pairs drawn at random with seed {} (--holdout {})",
                    h.len(),
                    every.len(),
                    args.seed,
                    args.holdout
                ),
            ))
        }
    }
}

fn trial_path(out: &Path, trial: usize) -> PathBuf {
    out.join("trials").join(format!("trial-{trial:04}.json"))
}

/// The searched parameters' values at `point`.
fn values_of(search: &Search, point: &[usize]) -> BTreeMap<String, f64> {
    search.dims.iter().zip(point).map(|(d, &i)| (d.name.to_string(), d.values[i])).collect()
}

/// A recorded evaluation of `params` on `pairs`, when `path` holds one (`None` when the file
/// is absent or does not parse: it is redone).
fn read_eval(path: &Path, params: &RegParams, pairs: &[Pair], ctx: &Ctx) -> Option<Evaluation> {
    let text = std::fs::read_to_string(path).ok()?;
    let e: Evaluation = serde_json::from_str(&text).ok()?;
    let same_pairs = e.pairs.len() <= pairs.len()
        && e.pairs.iter().zip(pairs).all(|(f, p)| (f.fixed.clone(), f.moving.clone()) == ctx.ids(p));
    (e.params == *params && same_pairs).then_some(e)
}

/// The record of planned trial `p`, when present; a record of other parameters is an error
/// (the folder holds another search).
fn read_trial(
    out: &Path,
    p: &Planned,
    params: &RegParams,
    pairs: &[Pair],
    ctx: &Ctx,
) -> anyhow::Result<Option<Evaluation>> {
    let path = trial_path(out, p.trial);
    if !path.exists() {
        return Ok(None);
    }
    match read_eval(&path, params, pairs, ctx) {
        Some(e) => Ok(Some(e)),
        None => {
            let text = std::fs::read_to_string(&path).unwrap_or_default();
            if serde_json::from_str::<Evaluation>(&text).is_ok() {
                bail!(
                    "{}: holds another setting than this search's trial {} (the folder holds another run; choose another --out)",
                    path.display(),
                    p.trial
                );
            }
            Ok(None)
        }
    }
}

/// Writes `tune.json` on the first run; later runs must describe the same run.
fn check_settings(path: &Path, settings: &Settings) -> anyhow::Result<()> {
    // Through the text form, as the file holds it (f32 values are written in their shortest form).
    let new: serde_json::Value =
        serde_json::from_str(&serde_json::to_string(settings).context("serialising the settings")?)
            .context("serialising the settings")?;
    if let Ok(text) = std::fs::read_to_string(path) {
        let old: serde_json::Value =
            serde_json::from_str(&text).with_context(|| format!("{}: not a sinew tune record", path.display()))?;
        if old != new {
            let differs: Vec<String> = new
                .as_object()
                .into_iter()
                .flatten()
                .filter(|(k, v)| old.get(k.as_str()) != Some(v))
                .map(|(k, _)| k.clone())
                .collect();
            bail!(
                "{}: holds a tune run with other settings ({}); rerun with the same ones or choose another --out",
                path.display(),
                differs.join(", ")
            );
        }
        return Ok(());
    }
    Ok(common::write_json(path, settings)?)
}

fn trial_line(search: &Search, e: &Evaluation, budget: Budget, secs: f64) -> String {
    let v: Vec<String> = search
        .dims
        .iter()
        .map(|d| format!("{} {}", d.name, e.values.get(d.name).map_or("?".into(), |v| format!("{v}"))))
        .collect();
    let o = &e.outcome;
    format!(
        "trial {:>3} (round {}): {} -> Dice {:.4}, folding {:.4} %, {:.2} s/pair, {:.1} s/trial{}{}",
        e.trial.unwrap_or(0),
        e.round.unwrap_or(0),
        v.join(", "),
        o.dice,
        o.folding_pct,
        o.seconds_per_pair,
        secs,
        if budget.met(o) { "" } else { " [over budget]" },
        if o.stopped_early { " [stopped early]" } else { "" }
    )
}

/// The TOML text of `p` (every field, so that it does not depend on the preset it is applied
/// over), floats written in their shortest form; checked to read back to exactly `p`.
pub fn config_toml(p: &RegParams, header: &str) -> anyhow::Result<String> {
    fn tidy(v: &mut toml::Value) {
        match v {
            toml::Value::Float(x) => {
                // f32 fields widen to f64 with a long tail (0.0707 → 0.07069999724626541).
                let short = (*x as f32).to_string().parse::<f64>().unwrap_or(*x);
                if (short as f32) == (*x as f32) && ((*x as f32) as f64) == *x {
                    *x = short;
                }
            }
            toml::Value::Array(a) => a.iter_mut().for_each(tidy),
            toml::Value::Table(t) => t.iter_mut().for_each(|(_, v)| tidy(v)),
            _ => {}
        }
    }
    let mut v = toml::Value::try_from(p).context("serialising the parameters")?;
    tidy(&mut v);
    let mut body = toml::to_string(&v).context("serialising the parameters")?;
    if toml::from_str::<RegParams>(&body).ok().as_ref() != Some(p) {
        body = toml::to_string(p).context("serialising the parameters")?;
    }
    Ok(format!("{header}{body}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn holdout_split_is_seeded_sized_and_sorted() {
        let a = holdout_split(10, 0.3, 7);
        assert_eq!(a.len(), 3);
        assert!(a.windows(2).all(|w| w[0] < w[1]) && a.iter().all(|&i| i < 10));
        assert_eq!(a, holdout_split(10, 0.3, 7));
        assert_ne!(a, holdout_split(10, 0.3, 8));
        // At least one pair on each side.
        assert_eq!(holdout_split(2, 0.01, 1).len(), 1);
        assert_eq!(holdout_split(2, 0.99, 1).len(), 1);
    }

    #[test]
    fn config_round_trips_with_short_floats() {
        let p = RegParams { lambda: 0.0707, step_size: vec![1.414, 1.131, 0.7072, 0.4243], ..RegParams::default() };
        let text = config_toml(&p, "# test\n").unwrap();
        assert!(text.contains("lambda = 0.0707\n"), "{text}");
        let back: RegParams = toml::from_str(&text).unwrap();
        assert_eq!(back, p);
    }
}
