//! Cohort tables: `scores.csv` (one row per method × pair × label), `summary.json` and
//! `summary.md` (one entry per method × label), and reading tables back for `merge`.

use std::collections::BTreeMap;
use std::path::Path;

use serde::Serialize;
use sinew_score::Summary;

use crate::files::{cell, write_json};
use crate::{Context, Result, CAUTION};

/// The baseline's method name in the tables.
pub const BASELINE: &str = "sinew";

/// The header of `scores.csv`.
pub const HEADER: &str = "method,pair,fixed,moving,label,name,dice_before,dice,hd95_mm,hd_mm,assd_mm,\
folding,sdlogj,jac_min,landmark_mm,runtime_s";

/// One row of `scores.csv`: one label of one pair scored for one method. The pair-level
/// figures (Jacobian, landmarks, runtime) repeat on each of the pair's rows.
#[derive(Clone, Debug, PartialEq)]
pub struct Row {
    /// Method name (`sinew` for the baseline).
    pub method: String,
    /// Pair index (position among all i<j pairs of the cohort).
    pub pair: usize,
    /// Fixed subject id.
    pub fixed: String,
    /// Moving subject id.
    pub moving: String,
    /// Label value.
    pub label: u16,
    /// Label name (from labels.json), may be empty.
    pub name: String,
    /// Dice before registration.
    pub dice_before: Option<f64>,
    /// Dice after.
    pub dice: Option<f64>,
    /// HD95, mm.
    pub hd95_mm: Option<f64>,
    /// Hausdorff distance, mm.
    pub hd_mm: Option<f64>,
    /// ASSD, mm.
    pub assd_mm: Option<f64>,
    /// Share of voxels with det J ≤ 0.
    pub folding: Option<f64>,
    /// SDlogJ over voxels with det J > 0.
    pub sdlogj: Option<f64>,
    /// Smallest det J.
    pub jac_min: Option<f64>,
    /// Mean landmark error, mm.
    pub landmark_mm: Option<f64>,
    /// Registration wall time of the pair, s (sinew only).
    pub runtime_s: Option<f64>,
}

impl Row {
    fn numbers(&self) -> [Option<f64>; 10] {
        [
            self.dice_before,
            self.dice,
            self.hd95_mm,
            self.hd_mm,
            self.assd_mm,
            self.folding,
            self.sdlogj,
            self.jac_min,
            self.landmark_mm,
            self.runtime_s,
        ]
    }

    /// The row's cells in [`HEADER`] order: numbers in Rust's shortest exact form, empty when
    /// undefined.
    fn cells(&self) -> Vec<String> {
        let mut cells = vec![
            self.method.clone(),
            self.pair.to_string(),
            self.fixed.clone(),
            self.moving.clone(),
            self.label.to_string(),
            self.name.clone(),
        ];
        // A non-finite figure is undefined: an empty cell, as the reader requires.
        cells.extend(self.numbers().iter().map(|&v| cell(v.filter(|x| x.is_finite()))));
        cells
    }

    /// The key a row is unique by.
    fn key(&self) -> (usize, usize, String, u16) {
        (self.pair, method_rank(&self.method), self.method.clone(), self.label)
    }
}

/// Sort rank of a method: the baseline first, then the others by name.
fn method_rank(m: &str) -> usize {
    usize::from(m != BASELINE)
}

/// Sorts rows canonically: by pair index, method (baseline first, then by name), label.
pub fn sort_rows(rows: &mut [Row]) {
    rows.sort_by_key(|r| r.key());
}

/// The whole `scores.csv` text of `rows` (sorted canonically first), written by the `csv`
/// crate (RFC 4180: cells holding a comma, quote or line break are quoted).
pub fn to_csv(rows: &[Row]) -> String {
    let mut rows = rows.to_vec();
    sort_rows(&mut rows);
    let mut w = csv::WriterBuilder::new().terminator(csv::Terminator::Any(b'\n')).from_writer(Vec::new());
    w.write_record(HEADER.split(',')).expect("writing to memory");
    for r in &rows {
        w.write_record(r.cells()).expect("writing to memory");
    }
    String::from_utf8(w.into_inner().expect("writing to memory")).expect("cells are UTF-8")
}

/// Reads a `scores.csv` written by [`to_csv`]. A number cell that does not parse, or is NaN or
/// infinite, is an error naming the file, the line and the column.
pub fn read_csv(path: &Path) -> Result<Vec<Row>> {
    let bytes = std::fs::read(path).with_context(|| format!("{}: cannot read", path.display()))?;
    parse_csv(path, &bytes)
}

/// [`read_csv`] of a table held in memory; `path` names it in errors.
pub fn parse_csv(path: &Path, bytes: &[u8]) -> Result<Vec<Row>> {
    let mut rdr = csv::ReaderBuilder::new().has_headers(false).from_reader(bytes);
    let mut records = rdr.records();
    let header = records.next().transpose().with_context(|| format!("{}: not a CSV table", path.display()))?;
    if header.as_ref().map(|h| h.iter().collect::<Vec<_>>().join(",")) != Some(HEADER.to_string()) {
        bail!("{}: not a sinew scores table (the header differs from {HEADER:?})", path.display());
    }
    let columns: Vec<&str> = HEADER.split(',').collect();
    let mut rows = Vec::new();
    for rec in records {
        let c = rec.with_context(|| format!("{}: not a CSV table", path.display()))?;
        let line = crate::manifest::record_line(bytes, c.position(), None);
        let at = || format!("{}:{line}", path.display());
        if c.len() != columns.len() {
            bail!("{}: {} cells, expected {}", at(), c.len(), columns.len());
        }
        let num = |i: usize| -> Result<Option<f64>> {
            if c[i].is_empty() {
                return Ok(None);
            }
            match c[i].parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(Some(v)),
                _ => bail!(
                    "{}: {} {:?} is not a finite number (leave the cell empty when undefined)",
                    at(),
                    columns[i],
                    &c[i]
                ),
            }
        };
        rows.push(Row {
            method: c[0].to_string(),
            pair: c[1].parse().with_context(|| format!("{}: bad pair index {:?}", at(), &c[1]))?,
            fixed: c[2].to_string(),
            moving: c[3].to_string(),
            label: c[4].parse().with_context(|| format!("{}: bad label {:?}", at(), &c[4]))?,
            name: c[5].to_string(),
            dice_before: num(6)?,
            dice: num(7)?,
            hd95_mm: num(8)?,
            hd_mm: num(9)?,
            assd_mm: num(10)?,
            folding: num(11)?,
            sdlogj: num(12)?,
            jac_min: num(13)?,
            landmark_mm: num(14)?,
            runtime_s: num(15)?,
        });
    }
    Ok(rows)
}

/// Joins tables: identical rows collapse (a pair scored by two shards that shared an output
/// folder); two different rows for the same method, pair and label are an error.
pub fn merge_rows(tables: Vec<(String, Vec<Row>)>) -> Result<Vec<Row>> {
    let mut by_key: BTreeMap<(usize, usize, String, u16), (Row, String)> = BTreeMap::new();
    for (origin, rows) in tables {
        for r in rows {
            match by_key.get(&r.key()) {
                Some((old, _)) if *old == r => {}
                Some((_, first)) => bail!(
                    "{origin} and {first} disagree on method {} pair {} (fixed {}, moving {}) label {}",
                    r.method,
                    r.pair,
                    r.fixed,
                    r.moving,
                    r.label
                ),
                None => {
                    by_key.insert(r.key(), (r, origin.clone()));
                }
            }
        }
    }
    Ok(by_key.into_values().map(|(r, _)| r).collect())
}

/// The summary of one method and label over the pairs.
#[derive(Serialize, Debug, PartialEq)]
pub struct LabelSummary {
    /// Label value, or `None` for the per-pair mean over labels.
    pub label: Option<u16>,
    /// Label name (or "mean over labels").
    pub name: String,
    /// Pairs with a defined Dice.
    pub pairs: usize,
    /// Dice after registration: mean, sample std, median, robustness percentile.
    pub dice: Option<Summary>,
    /// Mean Dice before registration.
    pub dice_before_mean: Option<f64>,
    /// Mean HD95 over pairs with a defined HD95, mm.
    pub hd95_mean_mm: Option<f64>,
    /// Mean folding share over the pairs.
    pub folding_mean: Option<f64>,
    /// Mean SDlogJ over the pairs.
    pub sdlogj_mean: Option<f64>,
}

/// The summary of one method.
#[derive(Serialize, Debug, PartialEq)]
pub struct MethodSummary {
    /// Method name.
    pub method: String,
    /// Pairs scored.
    pub pairs: usize,
    /// Mean registration wall time per pair, s (when known).
    pub runtime_mean_s: Option<f64>,
    /// Per label, then the per-pair mean over labels (`label: null`).
    pub labels: Vec<LabelSummary>,
}

fn mean_of(v: impl Iterator<Item = Option<f64>>) -> Option<f64> {
    sinew_score::mean(&v.flatten().collect::<Vec<_>>())
}

/// One entry per method × label, and one per method for the per-pair mean Dice over labels.
pub fn summarise(rows: &[Row], robust_percentile: f64) -> Vec<MethodSummary> {
    let mut methods: Vec<&str> = rows.iter().map(|r| r.method.as_str()).collect();
    methods.sort_by_key(|m| (method_rank(m), m.to_string()));
    methods.dedup();
    methods
        .into_iter()
        .map(|m| {
            let mine: Vec<&Row> = rows.iter().filter(|r| r.method == m).collect();
            // per pair: first row carries the pair-level figures
            let mut pairs: BTreeMap<usize, Vec<&Row>> = BTreeMap::new();
            mine.iter().for_each(|r| pairs.entry(r.pair).or_default().push(r));
            let mut labels: Vec<u16> = mine.iter().map(|r| r.label).collect();
            labels.sort_unstable();
            labels.dedup();
            let mut out: Vec<LabelSummary> = labels
                .iter()
                .map(|&l| {
                    let rs: Vec<&&Row> = mine.iter().filter(|r| r.label == l).collect();
                    let dice: Vec<f64> = rs.iter().filter_map(|r| r.dice).collect();
                    LabelSummary {
                        label: Some(l),
                        name: rs.iter().map(|r| r.name.clone()).find(|n| !n.is_empty()).unwrap_or_default(),
                        pairs: dice.len(),
                        dice: Summary::with_percentile(&dice, robust_percentile),
                        dice_before_mean: mean_of(rs.iter().map(|r| r.dice_before)),
                        hd95_mean_mm: mean_of(rs.iter().map(|r| r.hd95_mm)),
                        folding_mean: mean_of(rs.iter().map(|r| r.folding)),
                        sdlogj_mean: mean_of(rs.iter().map(|r| r.sdlogj)),
                    }
                })
                .collect();
            let per_pair = |f: fn(&Row) -> Option<f64>| -> Vec<Option<f64>> {
                pairs.values().map(|rs| mean_of(rs.iter().map(|r| f(r)))).collect()
            };
            let pair_dice: Vec<f64> = per_pair(|r| r.dice).into_iter().flatten().collect();
            out.push(LabelSummary {
                label: None,
                name: "mean over labels".into(),
                pairs: pair_dice.len(),
                dice: Summary::with_percentile(&pair_dice, robust_percentile),
                dice_before_mean: mean_of(per_pair(|r| r.dice_before).into_iter()),
                hd95_mean_mm: mean_of(per_pair(|r| r.hd95_mm).into_iter()),
                folding_mean: mean_of(pairs.values().map(|rs| rs[0].folding)),
                sdlogj_mean: mean_of(pairs.values().map(|rs| rs[0].sdlogj)),
            });
            MethodSummary {
                method: m.to_string(),
                pairs: pairs.len(),
                runtime_mean_s: mean_of(pairs.values().map(|rs| rs[0].runtime_s)),
                labels: out,
            }
        })
        .collect()
}

/// What every summary states about its figures.
pub const DEFINITIONS: &str = "Dice per label on the fixed grid, 2|A∩B|/(|A|+|B|); before = moving labels \
resampled onto the fixed grid (identity map). Summaries over pairs: mean, sample standard deviation (n−1), \
median and the robustness percentile P_q (default q = 30, set by --robust-percentile) with numpy's default \
linear interpolation: P_q is the Dice that the worst q % of the pairs fall below and the other pairs reach, so a \
method that fails on a few pairs shows it there while its mean barely moves. HD95 = 95th percentile (same rule) of \
the pooled symmetric distances in mm between the 6-connected surfaces of the label in both maps (exact Euclidean \
distance transform on the voxel spacing); pairs where a label is missing from a map have no HD95 and are left out \
of its mean. Folding = share of voxels with Jacobian determinant ≤ 0; SDlogJ = population standard deviation of \
ln(det) over the voxels with det > 0 (voxels with det ≤ 0 excluded; their count is the folding count). \
\"mean over labels\" summarises each pair's mean Dice over its labels.";

/// Writes `summary.json` and `summary.md` into `dir`.
pub fn write_summaries(dir: &Path, rows: &[Row], robust_percentile: f64) -> Result<()> {
    let methods = summarise(rows, robust_percentile);
    #[derive(Serialize)]
    struct Doc<'a> {
        caution: &'static str,
        definitions: &'static str,
        methods: &'a [MethodSummary],
    }
    write_json(&dir.join("summary.json"), &Doc { caution: CAUTION, definitions: DEFINITIONS, methods: &methods })?;
    sinew_io::atomic::write_bytes_atomic(&dir.join("summary.md"), markdown(&methods).as_bytes())?;
    Ok(())
}

fn f(v: Option<f64>, digits: usize) -> String {
    v.map(|x| format!("{x:.digits$}")).unwrap_or_else(|| "–".into())
}

/// The Markdown summary: the caution, one table row per method × label, the definitions.
pub fn markdown(methods: &[MethodSummary]) -> String {
    let mut s = format!("> **Caution.** {}\n\n# Registration summary\n\n", CAUTION);
    let q = methods.iter().flat_map(|m| &m.labels).find_map(|l| l.dice.as_ref()).map_or(30.0, |d| d.robust_percentile);
    s.push_str(&format!("| method | label | name | pairs | Dice mean | Dice std | Dice median | Dice P{q} (robustness) | Dice before | HD95 mean (mm) | folding (%) | SDlogJ |\n"));
    s.push_str("|---|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|\n");
    for m in methods {
        for l in &m.labels {
            let d = l.dice.as_ref();
            s.push_str(&format!(
                "| {} | {} | {} | {} | {} | {} | {} | {} | {} | {} | {} | {} |\n",
                m.method,
                l.label.map_or("all".into(), |v| v.to_string()),
                l.name.replace('|', "\\|"),
                l.pairs,
                f(d.map(|d| d.mean), 3),
                f(d.and_then(|d| d.std), 3),
                f(d.map(|d| d.median), 3),
                f(d.map(|d| d.robust), 3),
                f(l.dice_before_mean, 3),
                f(l.hd95_mean_mm, 2),
                f(l.folding_mean.map(|x| 100.0 * x), 4),
                f(l.sdlogj_mean, 3),
            ));
        }
    }
    s.push_str("\n| method | pairs | mean runtime per pair (s) |\n|---|---:|---:|\n");
    for m in methods {
        s.push_str(&format!("| {} | {} | {} |\n", m.method, m.pairs, f(m.runtime_mean_s, 2)));
    }
    s.push_str(&format!("\n**Definitions.** {DEFINITIONS}\n"));
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(method: &str, pair: usize, label: u16, dice: Option<f64>) -> Row {
        Row {
            method: method.into(),
            pair,
            fixed: format!("s{pair}"),
            moving: "m,\"x\"".into(),
            label,
            name: "liver".into(),
            dice_before: Some(0.5),
            dice,
            hd95_mm: Some(1.25),
            hd_mm: None,
            assd_mm: Some(0.1),
            folding: Some(0.0),
            sdlogj: Some(0.05),
            jac_min: Some(0.9),
            landmark_mm: None,
            runtime_s: Some(1.5),
        }
    }

    #[test]
    fn csv_round_trips_and_merge_checks_conflicts() {
        let rows = vec![row("net", 1, 2, Some(0.7)), row("sinew", 1, 2, Some(0.8)), row("sinew", 0, 3, None)];
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("scores.csv");
        std::fs::write(&p, to_csv(&rows)).unwrap();
        let back = read_csv(&p).unwrap();
        assert_eq!(back.len(), 3);
        assert_eq!(back[0], rows[2]); // sorted: pair 0 first, then sinew before net
        assert_eq!(back[1], rows[1]);
        assert_eq!(back[2], rows[0]);
        let merged = merge_rows(vec![("a".into(), back.clone()), ("b".into(), back.clone())]).unwrap();
        assert_eq!(merged, back);
        let mut other = back.clone();
        other[0].dice = Some(0.1);
        assert!(merge_rows(vec![("a".into(), back), ("b".into(), other)]).is_err());
    }

    #[test]
    fn summary_uses_the_documented_statistics() {
        // Dice 0.2, 0.4, 0.9 over three pairs: mean 0.5, sample std sqrt(((0.3)²+(0.1)²+(0.4)²)/2)
        // = sqrt(0.13), median 0.4, p30 = 0.2 + 0.6·(0.4 − 0.2) = 0.32 (numpy's linear rule).
        let rows: Vec<Row> = [0.2, 0.4, 0.9].iter().enumerate().map(|(p, &d)| row("sinew", p, 1, Some(d))).collect();
        let s = summarise(&rows, 30.0);
        let d = s[0].labels[0].dice.clone().unwrap();
        approx::assert_abs_diff_eq!(d.mean, 0.5, epsilon = 1e-12);
        approx::assert_abs_diff_eq!(d.median, 0.4, epsilon = 1e-12);
        approx::assert_abs_diff_eq!(d.robust, 0.32, epsilon = 1e-12);
        approx::assert_abs_diff_eq!(d.std.unwrap(), 0.13f64.sqrt(), epsilon = 1e-12);
        assert_eq!(s[0].labels.len(), 2);
        assert!(markdown(&s).starts_with("> **Caution.**"));
    }

    #[test]
    fn any_text_and_number_round_trips() {
        // A property test over 300 random rows (fixed seed): names with commas, quotes, line
        // breaks (\n, \r\n), spaces at the ends and non-ASCII text, and numbers over many
        // magnitudes, written and read back equal (`f64` shortest form is exact).
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(15);
        let pieces = ["a", ",", "\"", "\n", "\r\n", " ", "é", "liver", "x,y", "\"\"", "#", "|"];
        let text = |rng: &mut rand_chacha::ChaCha8Rng| -> String {
            (0..rng.gen_range(0..6)).map(|_| pieces[rng.gen_range(0..pieces.len())]).collect()
        };
        let num = |rng: &mut rand_chacha::ChaCha8Rng| -> Option<f64> {
            rng.gen_bool(0.8).then(|| rng.gen_range(-1.0..1.0) * 10f64.powi(rng.gen_range(-12..12)))
        };
        let rows: Vec<Row> = (0..300)
            .map(|i| Row {
                method: text(&mut rng),
                pair: i,
                fixed: text(&mut rng),
                moving: text(&mut rng),
                label: rng.gen(),
                name: text(&mut rng),
                dice_before: num(&mut rng),
                dice: num(&mut rng),
                hd95_mm: num(&mut rng),
                hd_mm: num(&mut rng),
                assd_mm: num(&mut rng),
                folding: num(&mut rng),
                sdlogj: num(&mut rng),
                jac_min: num(&mut rng),
                landmark_mm: num(&mut rng),
                runtime_s: num(&mut rng),
            })
            .collect();
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("scores.csv");
        std::fs::write(&p, to_csv(&rows)).unwrap();
        let mut want = rows.clone();
        sort_rows(&mut want);
        assert_eq!(read_csv(&p).unwrap(), want);
    }

    #[test]
    fn a_nan_cell_is_an_error_naming_the_place() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("scores.csv");
        let mut text = to_csv(&[row("sinew", 0, 1, Some(0.5))]);
        text = text.replace(",0.5,", ",NaN,");
        std::fs::write(&p, &text).unwrap();
        let e = read_csv(&p).unwrap_err().to_string();
        assert!(e.contains("scores.csv:2") && e.contains("dice") && e.contains("NaN"), "{e}");
    }
}
