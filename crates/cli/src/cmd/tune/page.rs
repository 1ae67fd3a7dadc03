//! The trials table (`trials.csv`) and the page (`tune.html`) of `sinew tune`: the held-out
//! comparison, a Dice-versus-folding scatter of every trial with the Pareto front marked,
//! and the table of trials. One self-contained HTML file (inline SVG, no scripts).

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Context;
use serde::Serialize;

use super::search::{pareto_front, Budget, Outcome};
use super::{Evaluation, ResultRecord};

/// One row of `trials.csv`.
#[derive(Serialize)]
struct CsvRow {
    trial: usize,
    round: usize,
    lambda: f32,
    fold_weight: f32,
    curvature: f32,
    mind_dilation: usize,
    step_scale: Option<f64>,
    iter_scale: Option<f64>,
    /// Per level, coarsest first, separated by `;`.
    iterations: String,
    /// Per level, coarsest first, separated by `;`.
    step_size: String,
    pairs: usize,
    dice: f64,
    hd95_mm: Option<f64>,
    folding_pct: f64,
    sdlogj: Option<f64>,
    seconds_per_pair: f64,
    within_budget: bool,
    pareto: bool,
    stopped_early: bool,
}

/// The trials on the Pareto front of (higher mean Dice, lower mean folding), complete
/// trials only.
fn front(evals: &[Evaluation]) -> Vec<usize> {
    let complete: Vec<usize> = (0..evals.len()).filter(|&i| !evals[i].outcome.stopped_early).collect();
    let pts: Vec<(f64, f64)> =
        complete.iter().map(|&i| (evals[i].outcome.dice, evals[i].outcome.folding_pct)).collect();
    pareto_front(&pts).into_iter().map(|k| complete[k]).collect()
}

/// Writes `trials.csv` (atomically) and returns the trials on the Pareto front.
pub fn write_trials_csv(path: &Path, evals: &[Evaluation], budget: Budget) -> anyhow::Result<Vec<usize>> {
    let on_front = front(evals);
    let mut w = csv::Writer::from_writer(Vec::new());
    for (i, e) in evals.iter().enumerate() {
        let join = |v: Vec<String>| v.join(";");
        w.serialize(CsvRow {
            trial: e.trial.unwrap_or(i),
            round: e.round.unwrap_or(0),
            lambda: e.params.lambda,
            fold_weight: e.params.fold_weight,
            curvature: e.params.curvature,
            mind_dilation: e.params.mind_dilation,
            step_scale: e.values.get("step_scale").copied(),
            iter_scale: e.values.get("iter_scale").copied(),
            iterations: join(e.params.iterations.iter().map(|n| n.to_string()).collect()),
            step_size: join(e.params.step_size.iter().map(|s| s.to_string()).collect()),
            pairs: e.pairs.len(),
            dice: e.outcome.dice,
            hd95_mm: e.outcome.hd95_mm,
            folding_pct: e.outcome.folding_pct,
            sdlogj: e.outcome.sdlogj,
            seconds_per_pair: e.outcome.seconds_per_pair,
            within_budget: budget.met(&e.outcome),
            pareto: on_front.contains(&i),
            stopped_early: e.outcome.stopped_early,
        })
        .context("writing trials.csv")?;
    }
    let bytes = w.into_inner().context("writing trials.csv")?;
    sinew_io::atomic::write_bytes_atomic(path, &bytes)?;
    Ok(on_front)
}

/// What the page shows.
pub struct PageInput<'a> {
    /// Every trial, in order.
    pub evals: &'a [Evaluation],
    /// The chosen trial.
    pub best: usize,
    /// Trials on the Pareto front.
    pub front: &'a [usize],
    /// The budgets.
    pub budget: Budget,
    /// The summary.
    pub result: &'a ResultRecord,
    /// Default and tuned parameters on the held-out pairs.
    pub holdout: Option<&'a (Evaluation, Evaluation)>,
    /// The written config's file name.
    pub config_name: &'a str,
    /// The medical caution.
    pub caution: &'a str,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

fn opt(v: Option<f64>, digits: usize) -> String {
    v.map_or("–".into(), |x| format!("{x:.digits$}"))
}

const STYLE: &str = "body{font-family:DejaVu Sans,Helvetica,Arial,sans-serif;margin:24px auto;max-width:1180px;\
color:#222;padding:0 16px}h1{font-size:24px;margin-bottom:4px}h2{font-size:19px;margin-top:28px;border-bottom:1px solid #ccc;\
padding-bottom:4px}.caution{background:#fff4d6;border:1px solid #e0b84f;padding:8px 12px;border-radius:4px}\
table{border-collapse:collapse;font-size:13px}td,th{border:1px solid #ddd;padding:3px 8px;text-align:right}\
th{background:#f3f3f3}td.t,th.t{text-align:left}tr.best td{background:#e6f4e6;font-weight:bold}.muted{color:#666;font-size:13px}\
.verdict{background:#eef3fb;border:1px solid #9db3d8;padding:8px 12px;border-radius:4px}";

/// Nice tick positions for `[lo, hi]` (about five).
fn ticks(lo: f64, hi: f64) -> Vec<f64> {
    let span = (hi - lo).max(1e-12);
    let raw = span / 5.0;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0].iter().map(|m| m * mag).find(|s| span / s <= 7.0).unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() * step;
    (0..).map(|k| first + k as f64 * step).take_while(|v| *v <= hi + 1e-9 * step).collect()
}

fn fmt_tick(v: f64) -> String {
    let s = format!("{v:.4}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" {
        "0".into()
    } else {
        s.to_string()
    }
}

/// The Dice-versus-folding scatter: one point per complete trial (filled green within the
/// budgets, hollow grey outside), the Pareto front as a line through its points, the chosen
/// trial ringed, and the folding budget as a dashed vertical line.
fn scatter(p: &PageInput) -> String {
    let (w, h, ml, mr, mt, mb) = (640.0, 380.0, 64.0, 20.0, 16.0, 48.0);
    let pts: Vec<(usize, f64, f64)> = p
        .evals
        .iter()
        .enumerate()
        .filter(|(_, e)| !e.outcome.stopped_early)
        .map(|(i, e)| (i, e.outcome.folding_pct, e.outcome.dice))
        .collect();
    let xmax = pts.iter().map(|q| q.1).fold(p.budget.max_folding_pct, f64::max).max(1e-3) * 1.08;
    let (ymin0, ymax0) = pts.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), q| (a.min(q.2), b.max(q.2)));
    let (ymin0, ymax0) = if ymin0.is_finite() { (ymin0, ymax0) } else { (0.0, 1.0) };
    let pad = ((ymax0 - ymin0) * 0.08).max(0.002);
    let (ymin, ymax) = (ymin0 - pad, ymax0 + pad);
    let sx = |x: f64| ml + (x / xmax) * (w - ml - mr);
    let sy = |y: f64| mt + (1.0 - (y - ymin) / (ymax - ymin)) * (h - mt - mb);
    let mut s = String::new();
    let _ = write!(
        s,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"{h}\" viewBox=\"0 0 {w} {h}\" font-family=\"sans-serif\" font-size=\"11\">\
         <rect width=\"{w}\" height=\"{h}\" fill=\"white\"/>"
    );
    for t in ticks(0.0, xmax) {
        let x = sx(t);
        let _ = write!(
            s,
            "<line x1=\"{x:.1}\" y1=\"{:.1}\" x2=\"{x:.1}\" y2=\"{:.1}\" stroke=\"#eee\"/><text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{}</text>",
            mt,
            h - mb,
            h - mb + 14.0,
            fmt_tick(t)
        );
    }
    for t in ticks(ymin, ymax) {
        let y = sy(t);
        let _ = write!(
            s,
            "<line x1=\"{ml}\" y1=\"{y:.1}\" x2=\"{:.1}\" y2=\"{y:.1}\" stroke=\"#eee\"/><text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{}</text>",
            w - mr,
            ml - 5.0,
            y + 4.0,
            fmt_tick(t)
        );
    }
    let _ = write!(
        s,
        "<rect x=\"{ml}\" y=\"{mt}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"none\" stroke=\"#888\"/>\
         <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"12\">mean folding over tuning pairs (% voxels, det J ≤ 0)</text>\
         <text transform=\"translate(14,{:.1}) rotate(-90)\" text-anchor=\"middle\" font-size=\"12\">mean Dice over tuning pairs</text>",
        w - ml - mr,
        h - mt - mb,
        (ml + w - mr) / 2.0,
        h - 8.0,
        (mt + h - mb) / 2.0
    );
    let bx = sx(p.budget.max_folding_pct);
    let _ = write!(
        s,
        "<line class=\"budget\" x1=\"{bx:.1}\" y1=\"{mt}\" x2=\"{bx:.1}\" y2=\"{:.1}\" stroke=\"#c33\" stroke-dasharray=\"5,4\"/>\
         <text x=\"{:.1}\" y=\"{:.1}\" fill=\"#c33\">budget</text>",
        h - mb,
        bx + 4.0,
        mt + 12.0
    );
    let mut front: Vec<(f64, f64)> =
        p.front.iter().map(|&i| (p.evals[i].outcome.folding_pct, p.evals[i].outcome.dice)).collect();
    front.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    if front.len() > 1 {
        let path: Vec<String> = front.iter().map(|&(x, y)| format!("{:.1},{:.1}", sx(x), sy(y))).collect();
        let _ = write!(
            s,
            "<polyline class=\"pareto\" points=\"{}\" fill=\"none\" stroke=\"#1f5fbf\" stroke-width=\"1.5\"/>",
            path.join(" ")
        );
    }
    for &(i, x, y) in &pts {
        let met = p.budget.met(&p.evals[i].outcome);
        let on_front = p.front.contains(&i);
        let (fill, stroke) = if met { ("#2e9e4f", "#1d6b34") } else { ("none", "#888") };
        let _ = write!(
            s,
            "<circle class=\"trial{}\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"{}\" fill=\"{fill}\" stroke=\"{}\"><title>trial {i}: Dice {:.4}, folding {:.4} %</title></circle>",
            if on_front { " front" } else { "" },
            sx(x),
            sy(y),
            if on_front { 4.5 } else { 3.5 },
            if on_front { "#1f5fbf" } else { stroke },
            y,
            x
        );
        if i == p.best {
            let _ = write!(
                s,
                "<circle class=\"best\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"9\" fill=\"none\" stroke=\"#d98c00\" stroke-width=\"2\"/>",
                sx(x),
                sy(y)
            );
        }
    }
    s.push_str("</svg>");
    s
}

fn outcome_cells(o: &Outcome) -> String {
    format!(
        "<td>{:.4}</td><td>{}</td><td>{:.4}</td><td>{}</td><td>{:.2}</td>",
        o.dice,
        opt(o.hd95_mm, 2),
        o.folding_pct,
        opt(o.sdlogj, 3),
        o.seconds_per_pair
    )
}

/// The page.
pub fn html(p: &PageInput) -> String {
    let r = p.result;
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<title>sinew tune</title>\n<style>{STYLE}</style>\n</head>\n<body>\n\
         <p class=\"caution\"><strong>Caution.</strong> {}</p>\n<h1>Parameter search</h1>\n\
         <p class=\"muted\">{} tuning pairs · {} held-out pairs ({}) · budgets: mean folding ≤ {} %{} · {} trials · {}</p>\n",
        esc(p.caution),
        r.tuning_pairs,
        r.holdout_pairs,
        esc(&r.holdout_rule),
        p.budget.max_folding_pct,
        p.budget.time_per_pair_s.map_or(String::new(), |t| format!(", ≤ {t} s per pair")),
        r.trials,
        esc(&r.search_end)
    );
    let _ = writeln!(h, "<h2>Result on the held-out pairs</h2>\n<p class=\"verdict\">{}</p>", esc(&r.verdict));
    if let Some((d, t)) = p.holdout {
        let _ = writeln!(
            h,
            "<p class=\"muted\">Figures on the held-out pairs only: the search never saw them. Means over {} pairs.</p>\n\
             <table class=\"holdout\">\n<tr><th class=\"t\">parameters</th><th>mean Dice</th><th>HD95 (mm)</th><th>folding (%)</th><th>SDlogJ</th><th>s per pair</th></tr>\n\
             <tr><td class=\"t\">default (starting)</td>{}</tr>\n<tr class=\"best\"><td class=\"t\">tuned ({})</td>{}</tr>\n</table>",
            d.pairs.len(),
            outcome_cells(&d.outcome),
            esc(p.config_name),
            outcome_cells(&t.outcome)
        );
    }
    let _ = writeln!(
        h,
        "<h2>Mean Dice against folding, every trial</h2>\n<p class=\"muted\">On the tuning pairs. Filled: within the budgets; hollow: outside. \
         Blue line and rings: the Pareto front (no other trial has more Dice at less folding). Orange ring: the chosen trial ({}). \
         Dashed: the folding budget.</p>\n<figure class=\"plot\">{}</figure>",
        p.best,
        scatter(p)
    );
    let _ = writeln!(
        h,
        "<h2>Trials</h2>\n<p class=\"muted\">Means over the tuning pairs; seconds = registration wall time per pair. Also in trials.csv.</p>\n\
         <table class=\"trials\">\n<tr><th>trial</th><th>round</th><th>λ</th><th>fold weight</th><th>curvature (mm²)</th><th>MIND dilation</th><th>step ×</th>\
         <th>iterations ×</th><th>mean Dice</th><th>HD95 (mm)</th><th>folding (%)</th><th>SDlogJ</th><th>s per pair</th><th class=\"t\">budget</th><th class=\"t\">front</th></tr>"
    );
    for (i, e) in p.evals.iter().enumerate() {
        let o = &e.outcome;
        let _ = writeln!(
            h,
            "<tr{}><td>{i}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td>{}<td class=\"t\">{}</td><td class=\"t\">{}</td></tr>",
            if i == p.best { " class=\"best\"" } else { "" },
            e.round.unwrap_or(0),
            e.params.lambda,
            e.params.fold_weight,
            e.params.curvature,
            e.params.mind_dilation,
            opt(e.values.get("step_scale").copied(), 3),
            opt(e.values.get("iter_scale").copied(), 3),
            outcome_cells(o),
            if p.budget.met(o) {
                "within"
            } else if o.stopped_early {
                "over (stopped)"
            } else {
                "over"
            },
            if p.front.contains(&i) { "yes" } else { "" }
        );
    }
    let _ = writeln!(h, "</table>\n</body>\n</html>");
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_and_inside() {
        let t = ticks(0.0, 1.0);
        assert_eq!(t.len(), 6);
        for (k, &v) in t.iter().enumerate() {
            approx::assert_abs_diff_eq!(v, 0.2 * k as f64, epsilon = 1e-12);
        }
        let t = ticks(0.61, 0.74);
        assert!(t.len() >= 3 && t.iter().all(|v| (0.61..=0.74).contains(v)));
    }
}
