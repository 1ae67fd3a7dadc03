//! The cohort report: one self-contained HTML file (inline SVG plots, no scripts, no network)
//! and the same plots as PNG files for papers.
//!
//! Input: the cohort folder's `scores.csv` (one row per method × pair × label; the columns
//! `method, fixed, moving, label, name, dice, hd95_mm, folding, sdlogj, runtime_s` are used,
//! others ignored, empty cells are missing values; `folding` is a share of voxels, shown in %)
//! and, when present, `summary.json` (its first list of records is shown as a table).
//! QC sheets (`qc.png`) are looked up below the cohort folder in a folder whose name contains
//! both subject ids of the pair.
//!
//! Box plots show the median, the quartiles and the whiskers of [`BoxStats`] (whiskers at the
//! farthest values within 1.5 interquartile ranges, Tukey's rule, common practice), with the
//! values beyond drawn as circles.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::sync::Once;

use plotters::coord::Shift;
use plotters::prelude::*;

use crate::canvas::RgbImage;
use crate::QcError;

/// One row of `scores.csv` (the columns the report uses).
#[derive(Clone, Debug, PartialEq)]
pub struct ScoreRow {
    /// Method name.
    pub method: String,
    /// Fixed subject id.
    pub fixed: String,
    /// Moving subject id.
    pub moving: String,
    /// Label value (as written).
    pub label: String,
    /// Label name (may be empty).
    pub name: String,
    /// Dice after registration.
    pub dice: Option<f64>,
    /// HD95 in mm.
    pub hd95_mm: Option<f64>,
    /// Share of voxels with det ≤ 0 (pair-level).
    pub folding: Option<f64>,
    /// SDlogJ (pair-level).
    pub sdlogj: Option<f64>,
    /// Registration time in seconds (pair-level).
    pub runtime_s: Option<f64>,
}

impl ScoreRow {
    /// The label's display name: its name, else its value.
    pub fn label_name(&self) -> &str {
        if self.name.is_empty() {
            &self.label
        } else {
            &self.name
        }
    }
}

/// Reads `scores.csv`; extra columns are ignored, the columns listed in [`ScoreRow`] are
/// required (`runtime_s` may be absent).
pub fn read_scores(path: &Path) -> Result<Vec<ScoreRow>, QcError> {
    let bad = |reason: String| QcError::Table { path: path.to_path_buf(), reason };
    let mut rd = csv::ReaderBuilder::new().flexible(false).from_path(path).map_err(|e| bad(e.to_string()))?;
    let headers = rd.headers().map_err(|e| bad(e.to_string()))?.clone();
    let col = |name: &str| headers.iter().position(|h| h.trim() == name);
    let need = |name: &str| {
        col(name).ok_or_else(|| {
            bad(format!("no column '{name}' (columns: {})", headers.iter().collect::<Vec<_>>().join(", ")))
        })
    };
    let (c_method, c_fixed, c_moving, c_label) = (need("method")?, need("fixed")?, need("moving")?, need("label")?);
    let (c_dice, c_hd, c_fold, c_sd) = (need("dice")?, need("hd95_mm")?, need("folding")?, need("sdlogj")?);
    let (c_name, c_rt) = (col("name"), col("runtime_s"));
    let mut rows = Vec::new();
    for (n, rec) in rd.records().enumerate() {
        let rec = rec.map_err(|e| bad(e.to_string()))?;
        let line = n + 2;
        let text = |c: usize| rec.get(c).unwrap_or("").trim().to_string();
        let num = |c: Option<usize>, what: &str| -> Result<Option<f64>, QcError> {
            let Some(c) = c else { return Ok(None) };
            let t = text(c);
            if t.is_empty() {
                return Ok(None);
            }
            let v: f64 = t.parse().map_err(|_| bad(format!("line {line}: {what} '{t}' is not a number")))?;
            Ok(v.is_finite().then_some(v))
        };
        rows.push(ScoreRow {
            method: text(c_method),
            fixed: text(c_fixed),
            moving: text(c_moving),
            label: text(c_label),
            name: c_name.map(text).unwrap_or_default(),
            dice: num(Some(c_dice), "dice")?,
            hd95_mm: num(Some(c_hd), "hd95_mm")?,
            folding: num(Some(c_fold), "folding")?,
            sdlogj: num(Some(c_sd), "sdlogj")?,
            runtime_s: num(c_rt, "runtime_s")?,
        });
    }
    if rows.is_empty() {
        return Err(bad("no rows".into()));
    }
    Ok(rows)
}

/// One pair of one method with its pair-level figures.
#[derive(Clone, Debug, PartialEq)]
pub struct PairFigures {
    /// Method name.
    pub method: String,
    /// Fixed subject id.
    pub fixed: String,
    /// Moving subject id.
    pub moving: String,
    /// Mean Dice over the pair's labels with a value.
    pub mean_dice: Option<f64>,
    /// Folding share.
    pub folding: Option<f64>,
    /// SDlogJ.
    pub sdlogj: Option<f64>,
    /// The pair's QC sheet, when one was found.
    pub qc_sheet: Option<PathBuf>,
}

/// The cohort's data grouped for plotting.
#[derive(Clone, Debug)]
pub struct Cohort {
    /// Methods in order of first appearance.
    pub methods: Vec<String>,
    /// Labels (display names) in order of first appearance.
    pub labels: Vec<String>,
    /// All rows.
    pub rows: Vec<ScoreRow>,
    /// One entry per method and pair.
    pub pairs: Vec<PairFigures>,
}

fn push_unique(v: &mut Vec<String>, s: &str) {
    if !v.iter().any(|x| x == s) {
        v.push(s.to_string());
    }
}

impl Cohort {
    /// Groups `rows`; QC sheets are looked up below `dir`.
    pub fn new(rows: Vec<ScoreRow>, dir: &Path) -> Cohort {
        let (mut methods, mut labels) = (Vec::new(), Vec::new());
        let mut by_pair: BTreeMap<(usize, String, String), Vec<&ScoreRow>> = BTreeMap::new();
        for r in &rows {
            push_unique(&mut methods, &r.method);
            push_unique(&mut labels, r.label_name());
        }
        for r in &rows {
            let m = methods.iter().position(|x| *x == r.method).expect("listed");
            by_pair.entry((m, r.fixed.clone(), r.moving.clone())).or_default().push(r);
        }
        let sheets = find_files(dir, "qc.png", 5);
        let pairs = by_pair
            .into_iter()
            .map(|((m, fixed, moving), rs)| {
                let dice: Vec<f64> = rs.iter().filter_map(|r| r.dice).collect();
                let qc_sheet = find_sheet(&sheets, dir, &methods[m], &fixed, &moving);
                PairFigures {
                    method: methods[m].clone(),
                    mean_dice: (!dice.is_empty()).then(|| dice.iter().sum::<f64>() / dice.len() as f64),
                    folding: rs[0].folding,
                    sdlogj: rs[0].sdlogj,
                    fixed,
                    moving,
                    qc_sheet,
                }
            })
            .collect();
        Cohort { methods, labels, rows, pairs }
    }

    /// Values of `metric` for `method` and `label`.
    pub fn values(&self, method: &str, label: &str, metric: Metric) -> Vec<f64> {
        self.rows
            .iter()
            .filter(|r| r.method == method && r.label_name() == label)
            .filter_map(|r| match metric {
                Metric::Dice => r.dice,
                Metric::Hd95 => r.hd95_mm,
            })
            .collect()
    }

    /// Worst, median and best pair of `method` by mean Dice (pairs without a mean Dice are
    /// left out): the sorted list's first, `⌊(n−1)/2⌋`-th and last entries.
    pub fn worst_median_best(&self, method: &str) -> Option<[&PairFigures; 3]> {
        let mut ps: Vec<&PairFigures> =
            self.pairs.iter().filter(|p| p.method == method && p.mean_dice.is_some()).collect();
        if ps.is_empty() {
            return None;
        }
        ps.sort_by(|a, b| a.mean_dice.unwrap().total_cmp(&b.mean_dice.unwrap()));
        Some([ps[0], ps[(ps.len() - 1) / 2], ps[ps.len() - 1]])
    }
}

/// Files named `name` below `dir` (at most `depth` folders down), sorted.
fn find_files(dir: &Path, name: &str, depth: usize) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let Ok(rd) = std::fs::read_dir(dir) else { return out };
    let mut entries: Vec<_> = rd.filter_map(Result::ok).map(|e| e.path()).collect();
    entries.sort();
    for p in entries {
        if p.is_dir() && depth > 0 {
            out.extend(find_files(&p, name, depth - 1));
        } else if p.file_name().is_some_and(|n| n == name) {
            out.push(p);
        }
    }
    out
}

/// The sheet in the pair's own folder, named exactly `<fixed>__<moving>` (so that pair
/// `case1__case2` never opens `case10__case2`'s sheet), whose path below `dir` names the
/// method; for the baseline `sinew` (whose `register` writes the sheets) a sheet in a folder
/// without a method name is taken too.
fn find_sheet(sheets: &[PathBuf], dir: &Path, method: &str, fixed: &str, moving: &str) -> Option<PathBuf> {
    let folder = format!("{fixed}__{moving}");
    let matches: Vec<&PathBuf> =
        sheets.iter().filter(|p| p.parent().and_then(|d| d.file_name()).is_some_and(|n| *n == *folder)).collect();
    let named = |p: &PathBuf| p.strip_prefix(dir).unwrap_or(p).components().any(|c| c.as_os_str() == method);
    let fallback = if method == "sinew" { matches.first().copied() } else { None };
    matches.iter().copied().find(|p| named(p)).or(fallback).cloned()
}

/// A per-label metric.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Metric {
    /// Dice overlap.
    Dice,
    /// 95th percentile Hausdorff distance, mm.
    Hd95,
}

impl Metric {
    fn key(self) -> &'static str {
        match self {
            Metric::Dice => "dice",
            Metric::Hd95 => "hd95",
        }
    }

    fn axis(self) -> &'static str {
        match self {
            Metric::Dice => "Dice",
            Metric::Hd95 => "HD95 (mm)",
        }
    }
}

/// Method colours (colour-blind safe set, from memory of the Okabe–Ito palette).
const METHOD_COLOURS: [RGBColor; 7] = [
    RGBColor(0, 114, 178),
    RGBColor(230, 159, 0),
    RGBColor(0, 158, 115),
    RGBColor(204, 121, 167),
    RGBColor(86, 180, 233),
    RGBColor(213, 94, 0),
    RGBColor(100, 100, 100),
];

fn method_colour(i: usize) -> RGBColor {
    METHOD_COLOURS[i % METHOD_COLOURS.len()]
}

/// Registers the embedded font with plotters (once).
fn register_font() {
    static ONCE: Once = Once::new();
    ONCE.call_once(|| {
        // The font is valid (it parses in `canvas::font`), so registration cannot fail.
        let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, dejavu::sans::regular());
    });
}

fn plot_err<E: std::fmt::Debug>(what: &str) -> impl Fn(E) -> QcError + '_ {
    move |e| QcError::Plot { what: what.to_string(), reason: format!("{e:?}") }
}

/// Value range of a metric over all methods and labels, padded; Dice is always 0..1.
fn metric_range(c: &Cohort, metric: Metric) -> Range<f64> {
    match metric {
        Metric::Dice => 0.0..1.0,
        Metric::Hd95 => {
            let hi = c.rows.iter().filter_map(|r| r.hd95_mm).fold(0.0, f64::max);
            0.0..(hi * 1.08).max(1.0)
        }
    }
}

/// Box statistics of a sample: quartiles by linear interpolation between order statistics
/// (`numpy.percentile`'s default "linear" method), whiskers at the farthest values within
/// 1.5 interquartile ranges of the box (Tukey's rule, common practice), and the values beyond.
#[derive(Clone, Debug, PartialEq)]
pub struct BoxStats {
    /// Lower whisker end (a data value).
    pub low: f64,
    /// First quartile.
    pub q1: f64,
    /// Median.
    pub median: f64,
    /// Third quartile.
    pub q3: f64,
    /// Upper whisker end (a data value).
    pub high: f64,
    /// Values outside the whiskers.
    pub outliers: Vec<f64>,
}

impl BoxStats {
    /// Statistics of `v` (non-empty).
    ///
    /// # Panics
    /// When `v` is empty.
    #[track_caller]
    pub fn new(v: &[f64]) -> BoxStats {
        assert!(!v.is_empty(), "box statistics of an empty sample");
        let mut s = v.to_vec();
        s.sort_by(f64::total_cmp);
        // Quartiles by the one percentile definition of `sinew_score::stats`.
        let q = |p: f64| sinew_score::percentile_linear(&s, 100.0 * p);
        let (q1, median, q3) = (q(0.25), q(0.5), q(0.75));
        let (f_lo, f_hi) = (q1 - 1.5 * (q3 - q1), q3 + 1.5 * (q3 - q1));
        let inside: Vec<f64> = s.iter().copied().filter(|x| *x >= f_lo && *x <= f_hi).collect();
        BoxStats {
            low: inside.first().copied().unwrap_or(q1),
            high: inside.last().copied().unwrap_or(q3),
            outliers: s.iter().copied().filter(|x| *x < f_lo || *x > f_hi).collect(),
            q1,
            median,
            q3,
        }
    }
}

/// One box chart: one box per method for `label`.
fn box_chart<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    c: &Cohort,
    label: &str,
    metric: Metric,
    range: Range<f64>,
) -> Result<(), QcError> {
    let what = format!("{} {label}", metric.key());
    let err = plot_err(&what);
    area.fill(&WHITE).map_err(&err)?;
    let n = c.methods.len();
    let mut chart = ChartBuilder::on(area)
        .caption(label, ("sans-serif", 16))
        .margin(8)
        .x_label_area_size(26)
        .y_label_area_size(44)
        .build_cartesian_2d(-0.5..n as f64 - 0.5, range)
        .map_err(&err)?;
    let methods = c.methods.clone();
    chart
        .configure_mesh()
        .disable_x_mesh()
        .x_labels(n + 1)
        .y_desc(metric.axis())
        .x_label_formatter(&move |v: &f64| {
            let i = v.round();
            if (v - i).abs() < 1e-6 && i >= 0.0 {
                methods.get(i as usize).cloned().unwrap_or_default()
            } else {
                String::new()
            }
        })
        .label_style(("sans-serif", 11))
        .axis_desc_style(("sans-serif", 12))
        .draw()
        .map_err(&err)?;
    for (i, m) in c.methods.iter().enumerate() {
        let v = c.values(m, label, metric);
        if v.is_empty() {
            continue;
        }
        let b = BoxStats::new(&v);
        let colour = method_colour(i);
        let x = i as f64;
        let (hw, cap) = (0.22, 0.1);
        let stroke = colour.stroke_width(1);
        let lines = [
            vec![(x, b.low), (x, b.q1)],
            vec![(x, b.q3), (x, b.high)],
            vec![(x - cap, b.low), (x + cap, b.low)],
            vec![(x - cap, b.high), (x + cap, b.high)],
        ];
        chart
            .draw_series(std::iter::once(Rectangle::new([(x - hw, b.q1), (x + hw, b.q3)], colour.mix(0.25).filled())))
            .map_err(&err)?;
        chart.draw_series(std::iter::once(Rectangle::new([(x - hw, b.q1), (x + hw, b.q3)], stroke))).map_err(&err)?;
        chart.draw_series(lines.into_iter().map(|l| PathElement::new(l, stroke))).map_err(&err)?;
        chart
            .draw_series(std::iter::once(PathElement::new(
                vec![(x - hw, b.median), (x + hw, b.median)],
                colour.stroke_width(2),
            )))
            .map_err(&err)?;
        chart.draw_series(b.outliers.iter().map(|&y| Circle::new((x, y), 3, stroke))).map_err(&err)?;
    }
    area.present().map_err(&err)?;
    Ok(())
}

/// Scatter of SDlogJ against folding (%) for one method, one point per pair.
fn jacobian_chart<DB: DrawingBackend>(area: &DrawingArea<DB, Shift>, c: &Cohort, m: usize) -> Result<(), QcError> {
    let method = &c.methods[m];
    let what = format!("jacobian {method}");
    let err = plot_err(&what);
    area.fill(&WHITE).map_err(&err)?;
    let pts: Vec<(f64, f64)> =
        c.pairs.iter().filter(|p| &p.method == method).filter_map(|p| Some((100.0 * p.folding?, p.sdlogj?))).collect();
    let xmax = pts.iter().map(|p| p.0).fold(0.0, f64::max).max(0.01) * 1.15;
    let ymax = pts.iter().map(|p| p.1).fold(0.0, f64::max).max(0.01) * 1.15;
    let mut chart = ChartBuilder::on(area)
        .caption(method, ("sans-serif", 16))
        .margin(8)
        .margin_right(16)
        .x_label_area_size(44)
        .y_label_area_size(62)
        .build_cartesian_2d(0.0..xmax, 0.0..ymax)
        .map_err(&err)?;
    // Few ticks with short labels, so that neighbouring labels and the axis titles never touch.
    let short = |v: &f64| {
        let a = v.abs();
        if a == 0.0 {
            "0".to_string()
        } else if a >= 0.1 {
            format!("{v:.2}")
        } else {
            format!("{v:.0e}")
        }
    };
    chart
        .configure_mesh()
        .x_labels(4)
        .y_labels(5)
        .x_label_formatter(&short)
        .y_label_formatter(&short)
        .x_desc("folding (% voxels, det ≤ 0)")
        .y_desc("SDlogJ")
        .label_style(("sans-serif", 11))
        .axis_desc_style(("sans-serif", 12))
        .draw()
        .map_err(&err)?;
    let colour = method_colour(m);
    chart.draw_series(pts.iter().map(|&p| Circle::new(p, 3, colour.filled()))).map_err(&err)?;
    area.present().map_err(&err)?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn box_statistics_match_numpy_percentiles() {
        // numpy.percentile([1, 2, 3, 4, 100], [25, 50, 75]) = [2, 3, 4] (linear method, from
        // memory); fences 2 − 3 = −1 and 4 + 3 = 7, so 100 is an outlier and the upper
        // whisker ends at 4.
        let b = BoxStats::new(&[4.0, 100.0, 1.0, 3.0, 2.0]);
        assert_eq!((b.low, b.q1, b.median, b.q3, b.high), (1.0, 2.0, 3.0, 4.0, 4.0));
        assert_eq!(b.outliers, vec![100.0]);
        // Even count: percentile([1, 2, 3, 4], 50) = 2.5, 25th = 1.75.
        let b = BoxStats::new(&[1.0, 2.0, 3.0, 4.0]);
        assert_eq!((b.q1, b.median, b.q3), (1.75, 2.5, 3.25));
    }

    #[test]
    fn report_statistics_are_the_summary_definition() {
        // np.std([1, 2, 3, 4], ddof=1) = sqrt(5/3) (sample), not the population sqrt(5/4).
        let (m, sd, med) = mean_sd_median(&[4.0, 1.0, 3.0, 2.0]);
        assert_eq!((m, med), (Some(2.5), Some(2.5)));
        approx::assert_abs_diff_eq!(sd.unwrap(), (5.0f64 / 3.0).sqrt(), epsilon = 1e-15);
        assert_eq!(mean_sd_median(&[0.7]), (Some(0.7), None, Some(0.7)));
    }

    #[test]
    fn qc_sheets_are_matched_by_the_exact_pair_folder() {
        let dir = Path::new("/r");
        let sheets = vec![
            PathBuf::from("/r/pairs/case10__case2/qc.png"),
            PathBuf::from("/r/pairs/case1__case20/qc.png"),
            PathBuf::from("/r/pairs/xcase1__case2/qc.png"),
        ];
        // None of them is case1__case2's, although each contains both ids in order.
        assert_eq!(find_sheet(&sheets, dir, "sinew", "case1", "case2"), None);
        let mut with = sheets.clone();
        with.push(PathBuf::from("/r/pairs/case1__case2/qc.png"));
        with.push(PathBuf::from("/r/methods/net/case1__case2/qc.png"));
        assert_eq!(find_sheet(&with, dir, "sinew", "case1", "case2"), Some(with[3].clone()));
        assert_eq!(find_sheet(&with, dir, "net", "case1", "case2"), Some(with[4].clone()));
        assert_eq!(find_sheet(&with, dir, "net", "case10", "case2"), None);
    }
}

const CHART_W: u32 = 300;
const CHART_H: u32 = 230;

/// One chart as an SVG string.
fn svg_of(draw: impl FnOnce(&DrawingArea<SVGBackend, Shift>) -> Result<(), QcError>) -> Result<String, QcError> {
    register_font();
    let mut s = String::new();
    {
        let area = SVGBackend::with_string(&mut s, (CHART_W, CHART_H)).into_drawing_area();
        draw(&area)?;
    }
    Ok(s)
}

/// Charts drawn side by side (`cols` per row) into one raster, for the PNG files.
fn raster_grid(
    count: usize,
    cols: usize,
    draw: impl Fn(&DrawingArea<BitMapBackend, Shift>, usize) -> Result<(), QcError>,
) -> Result<RgbImage, QcError> {
    register_font();
    let cols = cols.min(count).max(1);
    let rows = count.div_ceil(cols).max(1);
    let (w, h) = (CHART_W * cols as u32, CHART_H * rows as u32);
    let mut buf = vec![255u8; (w * h * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        let areas = root.split_evenly((rows, cols));
        for (n, a) in areas.iter().enumerate().take(count) {
            draw(a, n)?;
        }
        root.present().map_err(plot_err("raster"))?;
    }
    let mut img = RgbImage::new(w, h, [255, 255, 255]);
    for y in 0..h {
        for x in 0..w {
            let o = ((y * w + x) * 3) as usize;
            img.put(x as i64, y as i64, [buf[o], buf[o + 1], buf[o + 2]]);
        }
    }
    Ok(img)
}

/// What [`write_report`] wrote.
#[derive(Clone, Debug)]
pub struct ReportFiles {
    /// The HTML file.
    pub html: PathBuf,
    /// The PNG plots (Dice, HD95, Jacobian).
    pub pngs: Vec<PathBuf>,
    /// The grouped data.
    pub cohort: Cohort,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

/// `target` relative to folder `from` (both made absolute first); `target` itself when no
/// relative path exists.
fn relative(target: &Path, from: &Path) -> String {
    let abs = |p: &Path| p.canonicalize().unwrap_or_else(|_| p.to_path_buf());
    let (t, f) = (abs(target), abs(from));
    let tc: Vec<_> = t.components().collect();
    let fc: Vec<_> = f.components().collect();
    let common = tc.iter().zip(&fc).take_while(|(a, b)| a == b).count();
    if common == 0 {
        return t.display().to_string();
    }
    let mut parts: Vec<String> = vec!["..".into(); fc.len() - common];
    parts.extend(tc[common..].iter().map(|c| c.as_os_str().to_string_lossy().into_owned()));
    parts.join("/")
}

fn fmt_opt(v: Option<f64>, digits: usize) -> String {
    v.map_or("–".into(), |x| format!("{x:.digits$}"))
}

/// Mean, standard deviation and median by the one definition of `sinew_score::stats` (the
/// one summary.json and summary.md use): sample standard deviation (n − 1), undefined for
/// one value; median by linear interpolation.
fn mean_sd_median(v: &[f64]) -> (Option<f64>, Option<f64>, Option<f64>) {
    match sinew_score::Summary::of(v) {
        Some(s) => (Some(s.mean), s.std, Some(s.median)),
        None => (None, None, None),
    }
}

const STYLE: &str = "body{font-family:DejaVu Sans,Helvetica,Arial,sans-serif;margin:24px auto;max-width:1280px;\
color:#222;padding:0 16px}h1{font-size:24px;margin-bottom:4px}h2{font-size:19px;margin-top:30px;\
border-bottom:1px solid #ccc;padding-bottom:4px}.caution{background:#fff4d6;border:1px solid #e0b84f;padding:8px 12px;\
border-radius:4px}.plots{display:flex;flex-wrap:wrap;gap:10px}figure{margin:0;border:1px solid #e2e2e2;\
background:#fff}figure svg{display:block}table{border-collapse:collapse;font-size:13px}td,th{border:1px solid #ddd;\
padding:3px 8px;text-align:right}th{background:#f3f3f3}td.t,th.t{text-align:left}.legend span{display:inline-block;\
margin-right:14px}.sw{display:inline-block;width:12px;height:12px;margin-right:5px;vertical-align:middle}\
.muted{color:#666;font-size:13px}";

/// Reads `dir/scores.csv` (and `dir/summary.json` when present) and writes the HTML report
/// to `out` plus `<stem>_dice.png`, `<stem>_hd95.png` and `<stem>_jacobian.png` beside it.
/// `caution` opens the report.
pub fn write_report(dir: &Path, out: &Path, caution: &str) -> Result<ReportFiles, QcError> {
    let rows = read_scores(&dir.join("scores.csv"))?;
    let cohort = Cohort::new(rows, dir);
    let out_dir = match out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let stem = out.file_stem().map(|s| s.to_string_lossy().into_owned()).unwrap_or_else(|| "report".into());
    let summary = read_summary(&dir.join("summary.json"))?;

    // PNG plots for papers.
    let mut pngs = Vec::new();
    for metric in [Metric::Dice, Metric::Hd95] {
        let range = metric_range(&cohort, metric);
        let img = raster_grid(cohort.labels.len(), 4, |a, n| {
            box_chart(a, &cohort, &cohort.labels[n], metric, range.clone())
        })?;
        let p = out_dir.join(format!("{stem}_{}.png", metric.key()));
        crate::write_png(&p, &img)?;
        pngs.push(p);
    }
    let img = raster_grid(cohort.methods.len(), 4, |a, m| jacobian_chart(a, &cohort, m))?;
    let p = out_dir.join(format!("{stem}_jacobian.png"));
    crate::write_png(&p, &img)?;
    pngs.push(p);

    let mut h = String::new();
    let w = &mut h;
    let _ = write!(
        w,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<title>sinew cohort report</title>\n\
         <style>{STYLE}</style>\n</head>\n<body>\n<p class=\"caution\"><strong>Caution.</strong> {}</p>\n\
         <h1>Cohort report</h1>\n<p class=\"muted\">From {} · {} methods · {} pairs · {} labels · {} rows</p>\n",
        esc(caution),
        esc(&dir.display().to_string()),
        cohort.methods.len(),
        cohort.pairs.iter().map(|p| (&p.fixed, &p.moving)).collect::<std::collections::BTreeSet<_>>().len(),
        cohort.labels.len(),
        cohort.rows.len()
    );
    let _ = write!(w, "<p class=\"legend\">");
    for (i, m) in cohort.methods.iter().enumerate() {
        let c = method_colour(i);
        let _ =
            write!(w, "<span><i class=\"sw\" style=\"background:rgb({},{},{})\"></i>{}</span>", c.0, c.1, c.2, esc(m));
    }
    let _ = writeln!(w, "</p>");
    for metric in [Metric::Dice, Metric::Hd95] {
        let range = metric_range(&cohort, metric);
        let _ = writeln!(w, "<h2>{} per label and method</h2>\n<div class=\"plots\">", metric.axis());
        for label in &cohort.labels {
            let svg = svg_of(|a| box_chart(a, &cohort, label, metric, range.clone()))?;
            let _ = writeln!(
                w,
                "<figure class=\"plot\" data-metric=\"{}\" data-label=\"{}\" data-methods=\"{}\">{}</figure>",
                metric.key(),
                esc(label),
                cohort.methods.len(),
                strip_xml_decl(&svg)
            );
        }
        let _ = writeln!(w, "</div>");
    }
    let _ = writeln!(w, "<h2>Folding and SDlogJ per method</h2>\n<p class=\"muted\">One point per pair. Folding = share of voxels with det J ≤ 0; SDlogJ = standard deviation of ln det J over the voxels with det J &gt; 0.</p>\n<div class=\"plots\">");
    for m in 0..cohort.methods.len() {
        let svg = svg_of(|a| jacobian_chart(a, &cohort, m))?;
        let _ = writeln!(
            w,
            "<figure class=\"plot\" data-metric=\"jacobian\" data-method=\"{}\">{}</figure>",
            esc(&cohort.methods[m]),
            strip_xml_decl(&svg)
        );
    }
    let _ = writeln!(w, "</div>");
    summary_table(w, &cohort);
    if let Some((title, table)) = summary {
        let _ = writeln!(w, "<h2>{}</h2>\n{table}", esc(&title));
    }
    qc_links(w, &cohort, &out_dir);
    let _ = writeln!(w, "<h2>Plots as PNG</h2>\n<ul>");
    for p in &pngs {
        let r = relative(p, &out_dir);
        let _ = writeln!(w, "<li><a href=\"{}\">{}</a></li>", esc(&r), esc(&r));
    }
    let _ = writeln!(w, "</ul>\n</body>\n</html>");
    sinew_io::atomic::write_bytes_atomic(out, h.as_bytes())?;
    Ok(ReportFiles { html: out.to_path_buf(), pngs, cohort })
}

fn strip_xml_decl(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    }
}

fn summary_table(w: &mut String, c: &Cohort) {
    let _ = writeln!(
        w,
        "<h2>Summary per method and label</h2>\n<p class=\"muted\">Computed from scores.csv; sd is the sample \
         standard deviation over pairs (n − 1), as in summary.md.</p>\n<table class=\"summary\">\n<tr><th class=\"t\">method</th><th class=\"t\">label</th>\
         <th>pairs</th><th>Dice mean</th><th>Dice sd</th><th>Dice median</th><th>HD95 mean (mm)</th>\
         <th>HD95 median (mm)</th></tr>"
    );
    for m in &c.methods {
        for l in &c.labels {
            let d = c.values(m, l, Metric::Dice);
            let hd = c.values(m, l, Metric::Hd95);
            if d.is_empty() && hd.is_empty() {
                continue;
            }
            let (dm, ds, dmed) = mean_sd_median(&d);
            let (hm, _, hmed) = mean_sd_median(&hd);
            let _ = writeln!(
                w,
                "<tr><td class=\"t\">{}</td><td class=\"t\">{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                esc(m),
                esc(l),
                d.len(),
                fmt_opt(dm, 3),
                fmt_opt(ds, 3),
                fmt_opt(dmed, 3),
                fmt_opt(hm, 2),
                fmt_opt(hmed, 2)
            );
        }
    }
    let _ = writeln!(w, "</table>");
    let _ = writeln!(
        w,
        "<table class=\"summary\">\n<tr><th class=\"t\">method</th><th>pairs</th><th>mean Dice</th><th>folding mean (%)</th>\
         <th>SDlogJ mean</th><th>runtime mean (s)</th></tr>"
    );
    for m in &c.methods {
        let ps: Vec<&PairFigures> = c.pairs.iter().filter(|p| &p.method == m).collect();
        let mean = |v: Vec<f64>| mean_sd_median(&v).0;
        let rt: Vec<f64> = {
            let mut seen = std::collections::BTreeSet::new();
            c.rows
                .iter()
                .filter(|r| &r.method == m && seen.insert((&r.fixed, &r.moving)))
                .filter_map(|r| r.runtime_s)
                .collect()
        };
        let _ = writeln!(
            w,
            "<tr><td class=\"t\">{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            esc(m),
            ps.len(),
            fmt_opt(mean(ps.iter().filter_map(|p| p.mean_dice).collect()), 3),
            fmt_opt(mean(ps.iter().filter_map(|p| p.folding.map(|f| 100.0 * f)).collect()), 4),
            fmt_opt(mean(ps.iter().filter_map(|p| p.sdlogj).collect()), 3),
            fmt_opt(mean(rt), 2)
        );
    }
    let _ = writeln!(w, "</table>");
}

fn qc_links(w: &mut String, c: &Cohort, out_dir: &Path) {
    let _ = writeln!(
        w,
        "<h2>QC sheets: worst, median and best pairs</h2>\n<p class=\"muted\">Ranked by mean Dice over the labels. \
         Look at the sheets before trusting the numbers.</p>\n<table class=\"qc\">\n<tr><th class=\"t\">method</th>\
         <th class=\"t\">rank</th><th class=\"t\">pair (fixed ← moving)</th><th>mean Dice</th><th class=\"t\">QC sheet</th></tr>"
    );
    for m in &c.methods {
        let Some(picks) = c.worst_median_best(m) else { continue };
        for (rank, p) in ["worst", "median", "best"].iter().zip(picks) {
            let link = match &p.qc_sheet {
                Some(s) => {
                    let r = relative(s, out_dir);
                    format!("<a href=\"{}\">{}</a>", esc(&r), esc(&r))
                }
                None => "no qc.png found".into(),
            };
            let _ = writeln!(
                w,
                "<tr><td class=\"t\">{}</td><td class=\"t\">{rank}</td><td class=\"t\">{} ← {}</td><td>{}</td><td class=\"t\">{link}</td></tr>",
                esc(m),
                esc(&p.fixed),
                esc(&p.moving),
                fmt_opt(p.mean_dice, 3)
            );
        }
    }
    let _ = writeln!(w, "</table>");
}

/// `summary.json` as an HTML table: the first list of records found (top level or one level
/// down), scalar fields only. `None` when the file is absent.
fn read_summary(path: &Path) -> Result<Option<(String, String)>, QcError> {
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(QcError::Table { path: path.to_path_buf(), reason: e.to_string() }),
    };
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| QcError::Table { path: path.to_path_buf(), reason: e.to_string() })?;
    let records = match &v {
        serde_json::Value::Array(a) => Some(a),
        serde_json::Value::Object(o) => {
            o.values().find_map(|x| x.as_array().filter(|a| a.iter().all(|r| r.is_object())))
        }
        _ => None,
    };
    let Some(records) = records.filter(|r| !r.is_empty()) else { return Ok(None) };
    let mut cols: Vec<String> = Vec::new();
    for r in records {
        for (k, x) in r.as_object().expect("filtered to objects") {
            if !x.is_object() && !x.is_array() {
                push_unique(&mut cols, k);
            }
        }
    }
    let mut t = String::from("<table class=\"summary-json\">\n<tr>");
    for c in &cols {
        let _ = write!(t, "<th>{}</th>", esc(c));
    }
    t.push_str("</tr>\n");
    for r in records {
        t.push_str("<tr>");
        for c in &cols {
            let cell = match r.get(c) {
                Some(serde_json::Value::Number(n)) => n.as_f64().map_or(n.to_string(), |f| {
                    if f.fract() == 0.0 && f.abs() < 1e9 {
                        format!("{f:.0}")
                    } else {
                        format!("{f:.4}")
                    }
                }),
                Some(serde_json::Value::String(s)) => s.clone(),
                Some(serde_json::Value::Bool(b)) => b.to_string(),
                _ => "–".into(),
            };
            let _ = write!(t, "<td>{}</td>", esc(&cell));
        }
        t.push_str("</tr>\n");
    }
    t.push_str("</table>");
    Ok(Some(("summary.json".into(), t)))
}
