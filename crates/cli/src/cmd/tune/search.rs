//! The search of `sinew tune`: a compass (coordinate pattern) search over a log grid of the
//! parameters that trade overlap, smoothness and time.
//!
//! Method: "Optimization by Direct Search: New Perspectives on Some Classical and Modern
//! Methods", SIAM Review, 2003 (compass search, its Algorithm 3.1). Every parameter is an
//! index into a fixed list of values (a log grid); the incumbent `x` is the best point so far.
//! One round tries, for each parameter `c` in a fixed order, the points `x − s_c·e_c` and
//! `x + s_c·e_c` (the grid indices moved by the step `s_c`). When the best point of the round
//! beats the incumbent, it becomes the incumbent and the steps stay; otherwise every step
//! larger than 1 is halved (the refinement), and when all steps are already 1 the search has
//! converged. The search also ends when the trial budget is spent.
//!
//! Everything here is a pure function of the results of earlier trials, so replaying the
//! recorded results reproduces the same sequence of trials (what makes a killed run resume
//! exactly and shards agree on the next round).
//!
//! The parameters (all relative to the starting configuration `base`):
//! - `lambda`: λ = λ_base·2^(k/2), k = −8…8 (λ_base/16 … 16·λ_base); with λ_base = 0 the grid is
//!   0 followed by 0.05·2^(k/2);
//! - `fold_weight`: μ on the same kind of grid around μ_base (20 when μ_base = 0, with 0 first);
//!   not searched in the diffeomorphic mode (its map cannot fold);
//! - `curvature`: κ (mm²) on the same kind of grid around κ_base (1 when κ_base = 0, with 0
//!   first); not searched in the diffeomorphic mode (which runs without it);
//! - `mind_dilation`: 1, 2, 3, 4 (MIND-SSC only);
//! - `step_scale`: every level's Adam step size times 2^(k/2), k = −4…4;
//! - `iter_scale`: every level's iteration count times 2^(k/2), k = −4…2 (rounded, at least 1).
//!
//! Candidates whose parameters fail [`RegParams::validate`] are never tried, and a point
//! already tried is not tried again (its recorded result is reused).

use serde::{Deserialize, Serialize};
use sinew_solve::{RegParams, Similarity};

/// The improvement of mean Dice a move must bring to replace the incumbent (guards against
/// chasing differences below the noise of the last digits).
pub const MIN_GAIN: f64 = 1e-4;

/// One searched parameter: a name and its grid of values (ascending).
#[derive(Clone, Debug, PartialEq)]
pub struct Dim {
    /// The parameter's name (a column of trials.csv).
    pub name: &'static str,
    /// The grid of values, ascending.
    pub values: Vec<f64>,
    /// Index of the starting configuration's value.
    pub start: usize,
    /// The first step, in grid indices.
    pub step: usize,
}

/// The grid `reference·2^(k/2)` for `k` in `lo..=hi`, rounded to 4 significant digits.
fn log_grid(reference: f64, lo: i32, hi: i32) -> Vec<f64> {
    (lo..=hi).map(|k| round_sig(reference * 2f64.powf(k as f64 / 2.0), 4)).collect()
}

/// `v` rounded to `digits` significant digits.
pub fn round_sig(v: f64, digits: i32) -> f64 {
    if v == 0.0 || !v.is_finite() {
        return v;
    }
    let e = v.abs().log10().floor() as i32;
    let f = 10f64.powi(digits - 1 - e);
    (v * f).round() / f
}

/// A weight's grid around `base` (`fallback` when `base` is 0, with 0 as the lowest value).
fn weight_dim(name: &'static str, base: f32, fallback: f64) -> Dim {
    // The f32 in its shortest decimal form (0.05, not 0.05000000074505806).
    let base: f64 = base.to_string().parse().unwrap_or(base as f64);
    if base > 0.0 {
        let mut values = log_grid(base, -8, 8);
        values[8] = base; // exactly the starting value
        Dim { name, values, start: 8, step: 2 }
    } else {
        let mut values = vec![0.0];
        values.extend(log_grid(fallback, -8, 8));
        Dim { name, values, start: 0, step: 2 }
    }
}

/// The searched parameters for a starting configuration.
pub fn space(base: &RegParams) -> Vec<Dim> {
    let mut dims = vec![weight_dim("lambda", base.lambda, 0.05)];
    if !base.diffeomorphic {
        dims.push(weight_dim("fold_weight", base.fold_weight, 20.0));
        dims.push(weight_dim("curvature", base.curvature, 1.0));
    }
    if base.similarity == Similarity::MindSsc {
        let top = base.mind_dilation.max(4);
        let values: Vec<f64> = (1..=top).map(|d| d as f64).collect();
        dims.push(Dim { name: "mind_dilation", values, start: base.mind_dilation - 1, step: 1 });
    }
    let mut step = log_grid(1.0, -4, 4);
    step[4] = 1.0;
    dims.push(Dim { name: "step_scale", values: step, start: 4, step: 2 });
    let mut iters = log_grid(1.0, -4, 2);
    iters[4] = 1.0;
    dims.push(Dim { name: "iter_scale", values: iters, start: 4, step: 2 });
    dims
}

/// The registration parameters of grid point `point` (indices into each dimension's values).
pub fn params_at(base: &RegParams, dims: &[Dim], point: &[usize]) -> RegParams {
    let mut p = base.clone();
    for (d, &i) in dims.iter().zip(point) {
        let v = d.values[i];
        match d.name {
            "lambda" => p.lambda = v as f32,
            "fold_weight" => p.fold_weight = v as f32,
            "curvature" => p.curvature = v as f32,
            "mind_dilation" => p.mind_dilation = v as usize,
            "step_scale" => p.step_size = base.step_size.iter().map(|s| (*s as f64 * v) as f32).collect(),
            "iter_scale" => {
                p.iterations = base.iterations.iter().map(|&n| ((n as f64 * v).round() as usize).max(1)).collect()
            }
            other => unreachable!("unknown dimension {other}"),
        }
    }
    p
}

/// What one trial measured on the tuning pairs (means over the pairs).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Outcome {
    /// Mean over pairs of the mean Dice over labels.
    pub dice: f64,
    /// Mean over pairs of the mean HD95 over labels, mm.
    pub hd95_mm: Option<f64>,
    /// Mean over pairs of the share of voxels with det J ≤ 0, in percent.
    pub folding_pct: f64,
    /// Mean over pairs of SDlogJ.
    pub sdlogj: Option<f64>,
    /// Mean registration wall time per pair, s.
    pub seconds_per_pair: f64,
    /// The trial was stopped before its last pair because one pair took more than twice the
    /// time budget (its figures cover the pairs done).
    pub stopped_early: bool,
}

/// The budgets a setting must meet.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Budget {
    /// Largest mean folding, percent of voxels with det J ≤ 0.
    pub max_folding_pct: f64,
    /// Largest mean registration time per pair, s (none = no limit).
    pub time_per_pair_s: Option<f64>,
}

impl Budget {
    /// True when `o` meets both budgets (and ran every pair).
    pub fn met(&self, o: &Outcome) -> bool {
        !o.stopped_early
            && o.folding_pct <= self.max_folding_pct
            && self.time_per_pair_s.map_or(true, |t| o.seconds_per_pair <= t)
    }

    /// How far `o` lies outside the budgets: the sum of the relative excesses
    /// `max(0, folding/max − 1) + max(0, seconds/limit − 1)` (with a folding budget of 0 the
    /// folding term is the folding percentage itself). 0 when the budgets are met.
    pub fn excess(&self, o: &Outcome) -> f64 {
        let fold = if self.max_folding_pct > 0.0 {
            (o.folding_pct / self.max_folding_pct - 1.0).max(0.0)
        } else {
            o.folding_pct.max(0.0)
        };
        let time =
            self.time_per_pair_s.map_or(0.0, |t| if t > 0.0 { (o.seconds_per_pair / t - 1.0).max(0.0) } else { 0.0 });
        let stopped = if o.stopped_early { 1.0 } else { 0.0 };
        fold + time + stopped
    }

    /// True when `a` is a better setting than `b`: a setting within the budgets beats one
    /// outside; two within are ranked by mean Dice (`a` must gain at least `gain`); two outside
    /// by their excess (then by Dice).
    pub fn better(&self, a: &Outcome, b: &Outcome, gain: f64) -> bool {
        match (self.met(a), self.met(b)) {
            (true, false) => true,
            (false, true) => false,
            (true, true) => a.dice > b.dice + gain,
            (false, false) => {
                let (ea, eb) = (self.excess(a), self.excess(b));
                ea < eb || (ea == eb && a.dice > b.dice + gain)
            }
        }
    }
}

/// A trial the search asks for: its number (0, 1, … in the order of the search), its round
/// and grid point.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Planned {
    /// Trial number.
    pub trial: usize,
    /// Round (0 = the starting configuration alone).
    pub round: usize,
    /// Grid indices.
    pub point: Vec<usize>,
}

/// The state of the search, advanced round by round with the results of each round.
#[derive(Clone, Debug)]
pub struct Search {
    /// The searched parameters.
    pub dims: Vec<Dim>,
    base: RegParams,
    budget: Budget,
    max_trials: usize,
    /// Every trial so far: point and outcome, in trial order.
    pub tried: Vec<(Vec<usize>, Outcome)>,
    incumbent: Option<usize>,
    steps: Vec<usize>,
    round: usize,
    /// Why the search ended, once it has.
    pub finished: Option<String>,
}

impl Search {
    /// A search from `base` under `budget`, with at most `max_trials` trials (≥ 1).
    pub fn new(base: &RegParams, budget: Budget, max_trials: usize) -> Search {
        let dims = space(base);
        let steps = dims.iter().map(|d| d.step).collect();
        Search {
            dims,
            base: base.clone(),
            budget,
            max_trials: max_trials.max(1),
            tried: Vec::new(),
            incumbent: None,
            steps,
            round: 0,
            finished: None,
        }
    }

    /// The starting configuration's grid point.
    pub fn start(&self) -> Vec<usize> {
        self.dims.iter().map(|d| d.start).collect()
    }

    /// The parameters of a grid point.
    pub fn params(&self, point: &[usize]) -> RegParams {
        params_at(&self.base, &self.dims, point)
    }

    /// The trials of the current round (empty once the search has finished). Points already
    /// tried, points off the grid and invalid parameters are left out; the list is cut at the
    /// trial budget.
    pub fn round(&self) -> Vec<Planned> {
        if self.finished.is_some() {
            return Vec::new();
        }
        let mut out: Vec<Planned> = Vec::new();
        let push = |point: Vec<usize>, out: &mut Vec<Planned>| {
            let seen = self.tried.iter().any(|(p, _)| *p == point) || out.iter().any(|p| p.point == point);
            if seen || self.params(&point).validate().is_err() {
                return;
            }
            if self.tried.len() + out.len() < self.max_trials {
                out.push(Planned { trial: self.tried.len() + out.len(), round: self.round, point });
            }
        };
        match self.incumbent {
            None => push(self.start(), &mut out),
            Some(inc) => {
                let x = &self.tried[inc].0;
                for (c, d) in self.dims.iter().enumerate() {
                    let s = self.steps[c];
                    if x[c] >= s {
                        let mut p = x.clone();
                        p[c] -= s;
                        push(p, &mut out);
                    }
                    if x[c] + s < d.values.len() {
                        let mut p = x.clone();
                        p[c] += s;
                        push(p, &mut out);
                    }
                }
            }
        }
        out
    }

    /// Records the outcomes of the current round (in the order of [`Search::round`]) and
    /// moves to the next round.
    pub fn advance(&mut self, results: Vec<(Planned, Outcome)>) {
        let planned = self.round();
        assert_eq!(planned.len(), results.len(), "one outcome per planned trial");
        let first_new = self.tried.len();
        for (p, o) in results {
            self.tried.push((p.point, o));
        }
        // The best of the round (earliest on ties).
        let mut best: Option<usize> = None;
        for i in first_new..self.tried.len() {
            if best.map_or(true, |b| self.budget.better(&self.tried[i].1, &self.tried[b].1, 0.0)) {
                best = Some(i);
            }
        }
        let moved = match (self.incumbent, best) {
            (None, Some(b)) => {
                self.incumbent = Some(b);
                true
            }
            (Some(inc), Some(b)) if self.budget.better(&self.tried[b].1, &self.tried[inc].1, MIN_GAIN) => {
                self.incumbent = Some(b);
                true
            }
            _ => false,
        };
        self.round += 1;
        if self.tried.is_empty() {
            self.finished = Some("the starting configuration is not valid".into());
            return;
        }
        if self.tried.len() >= self.max_trials {
            self.finished = Some(format!("the trial budget ({}) is spent", self.max_trials));
            return;
        }
        if !moved && self.round > 1 {
            if self.steps.iter().any(|&s| s > 1) {
                self.steps.iter_mut().for_each(|s| *s = (*s / 2).max(1));
            } else {
                self.finished =
                    Some("converged: no neighbour on the finest grid step improves the best setting".into());
                return;
            }
        }
        if self.round().is_empty() {
            // Every neighbour was tried already or is off the grid: refine, or stop.
            if self.steps.iter().any(|&s| s > 1) {
                self.steps.iter_mut().for_each(|s| *s = (*s / 2).max(1));
                if self.round().is_empty() {
                    self.finished = Some("converged: every neighbour has been tried".into());
                }
            } else {
                self.finished = Some("converged: every neighbour has been tried".into());
            }
        }
    }

    /// The best trial so far (within the budgets if any is; earliest on ties).
    pub fn best(&self) -> Option<usize> {
        let mut best: Option<usize> = None;
        for i in 0..self.tried.len() {
            if best.map_or(true, |b| self.budget.better(&self.tried[i].1, &self.tried[b].1, 0.0)) {
                best = Some(i);
            }
        }
        best
    }
}

/// Indices of the trials on the Pareto front of (higher Dice, lower folding): no other
/// trial has at least the Dice and at most the folding, one of them strictly.
pub fn pareto_front(points: &[(f64, f64)]) -> Vec<usize> {
    (0..points.len())
        .filter(|&i| {
            let (di, fi) = points[i];
            !points.iter().any(|&(d, f)| d >= di && f <= fi && (d > di || f < fi))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn outcome(dice: f64, folding_pct: f64, s: f64) -> Outcome {
        Outcome { dice, hd95_mm: None, folding_pct, sdlogj: None, seconds_per_pair: s, stopped_early: false }
    }

    #[test]
    fn grid_is_log_spaced_around_the_start() {
        // A fixed starting λ, so that the check does not move with the preset's defaults.
        let base = RegParams { lambda: 0.05, ..RegParams::default() };
        let d = space(&base);
        let lambda = &d[0];
        assert_eq!(lambda.values[lambda.start], 0.05);
        // Exact: 2^(±1/2) steps; 0.05·2 = 0.1 two steps up, 0.05/16 at the bottom.
        assert_eq!(lambda.values[lambda.start + 2], 0.1);
        assert_eq!(lambda.values[0], 0.003125);
        assert!(lambda.values.windows(2).all(|w| w[0] < w[1]));
        let p = params_at(&base, &d, &d.iter().map(|d| d.start).collect::<Vec<_>>());
        assert_eq!(p, base);
    }

    #[test]
    fn budget_ranks_feasible_first_then_dice_then_excess() {
        let b = Budget { max_folding_pct: 0.1, time_per_pair_s: Some(2.0) };
        assert!(b.better(&outcome(0.6, 0.05, 1.0), &outcome(0.8, 0.5, 1.0), 0.0));
        assert!(b.better(&outcome(0.7, 0.05, 1.0), &outcome(0.6, 0.01, 1.0), 0.0));
        // Both outside: 0.2 % is 1.0 over, 3 s is 0.5 over.
        assert!(b.better(&outcome(0.5, 0.05, 3.0), &outcome(0.9, 0.2, 1.0), 0.0));
        assert_eq!(b.excess(&outcome(0.5, 0.2, 3.0)), 1.5);
    }

    /// A made-up smooth objective of the grid point: Dice peaks at λ index 5, folding grows
    /// as λ falls.
    fn fake(p: &[usize]) -> Outcome {
        let l = p[0] as f64;
        outcome(0.8 - 0.01 * (l - 5.0).powi(2) - 0.001 * p[3] as f64, (8.0 - l).max(0.0) * 0.05, 1.0)
    }

    fn run(budget: Budget, max_trials: usize) -> Search {
        let mut s = Search::new(&RegParams::default(), budget, max_trials);
        while s.finished.is_none() {
            let r = s.round();
            let res = r.iter().map(|p| (p.clone(), fake(&p.point))).collect();
            s.advance(res);
        }
        s
    }

    #[test]
    fn search_finds_the_best_feasible_point_and_is_deterministic() {
        let budget = Budget { max_folding_pct: 0.1, time_per_pair_s: None };
        let s = run(budget, 200);
        let best = s.best().unwrap();
        // Folding ≤ 0.1 % needs λ index ≥ 6; Dice falls away from 5, so 6 is the optimum.
        assert_eq!(s.tried[best].0[0], 6);
        let again = run(budget, 200);
        assert_eq!(s.tried, again.tried);
        assert!(s.finished.as_deref().unwrap().starts_with("converged"));
        // No point twice, every trial valid.
        for (i, (p, _)) in s.tried.iter().enumerate() {
            assert!(s.tried[..i].iter().all(|(q, _)| q != p));
            s.params(p).validate().unwrap();
        }
    }

    #[test]
    fn search_respects_the_trial_budget() {
        let s = run(Budget { max_folding_pct: 0.1, time_per_pair_s: None }, 7);
        assert_eq!(s.tried.len(), 7);
        assert!(s.finished.as_deref().unwrap().contains("budget"));
    }

    #[test]
    fn pareto_front_keeps_only_undominated_points() {
        // (dice, folding): (0.7, 0.1) dominates (0.6, 0.2); (0.8, 0.5) and (0.5, 0.0) trade off.
        let pts = [(0.7, 0.1), (0.6, 0.2), (0.8, 0.5), (0.5, 0.0), (0.7, 0.1)];
        assert_eq!(pareto_front(&pts), vec![0, 2, 3, 4]);
    }
}
