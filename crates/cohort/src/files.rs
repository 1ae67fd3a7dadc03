//! Scoring the files of one pair and the per-pair score records of a cohort run.

use std::collections::BTreeMap;
use std::io::Read;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use sinew_grid::{resample, Field, Grid, LabelMap, WorldPoint};
use sinew_io::{FieldReadOptions, FieldUnits};
use sinew_score::import::{import_array, ChannelOrder, Conventions, ImportReport, Layout, LowRes, Units, Values};
use sinew_score::{InversionReport, LandmarkErrors, PairScore, Warp};

use crate::manifest::{Pair, Subject};
use crate::table::Row;
use crate::{Context, Result};

/// Fixed-point iterations when inverting a push field.
pub const INVERT_ITERATIONS: usize = 20;

/// How to read another tool's field (see `sinew_score::import` for every convention).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct FieldFormat {
    /// Units of the field's numbers; `None`: what a NIfTI header records, else mm; voxels for
    /// `.npy`/`.npz` arrays.
    pub units: Option<Units>,
    /// Which end of a `.npy`/`.npz` array holds the 3 components.
    pub layout: Layout,
    /// Order of the components in a `.npy`/`.npz` array.
    pub channel_order: ChannelOrder,
    /// What a `.npy`/`.npz` array holds: displacements or sampling positions.
    pub values: Values,
    /// Where the samples of a lower-resolution `.npy`/`.npz` field sit.
    pub low_res: LowRes,
    /// The array to read from a `.npz` archive holding several.
    pub npz_key: Option<String>,
    /// Direction of the field.
    pub direction: Direction,
}

/// Direction of a field.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Direction {
    /// warped(x) = moving(x + u(x)), u on the fixed grid.
    #[default]
    Pull,
    /// u maps moving points forward: y ↦ y + u(y); inverted into a pull field first.
    Push,
}

impl FieldFormat {
    /// The import conventions for .npy/.npz arrays (units: voxels unless given).
    fn conventions(&self) -> Conventions {
        Conventions {
            layout: self.layout,
            channel_order: self.channel_order,
            units: self.units.unwrap_or(Units::Voxel),
            values: self.values,
            low_res: self.low_res,
        }
    }
}

/// How a field file was read, for reports.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FieldNote {
    /// The file.
    pub path: String,
    /// SHA-256 of its bytes.
    pub sha256: String,
    /// "nifti", "npy" or "npz".
    pub format: String,
    /// The units the numbers were read in ("mm", "voxel", "norm-corners", "norm-edges").
    pub units: String,
    /// For .npy/.npz: the stored element type ("float16", "float32", "float64").
    #[serde(default)]
    pub dtype: Option<String>,
    /// For .npz: the archive member read.
    #[serde(default)]
    pub npz_key: Option<String>,
    /// For .npy/.npz: every convention applied or detected (batch axis, layout, component
    /// order, units, positions, resolution).
    #[serde(default)]
    pub import: Option<ImportReport>,
    /// The direction given.
    pub direction: Direction,
    /// With a push field: the fixed-point inversion and its residual.
    pub inverted: Option<InversionReport>,
    /// True when the field's grid differed from the fixed grid and it was resampled onto it.
    pub resampled_to_fixed_grid: bool,
}

/// Reads a field file (NIfTI, `.npy` or `.npz`) as a pull field on `fixed_grid`: arrays
/// through `sinew_score::import` (batch axis, layout, component order, units, positions,
/// resolution), NIfTI from its header (resampled when on another grid); a push field is
/// inverted.
pub fn load_field(path: &Path, fixed_grid: &Grid, fmt: &FieldFormat) -> Result<(Field, FieldNote)> {
    let ext = |e: &str| path.extension().is_some_and(|x| x.eq_ignore_ascii_case(e));
    let (is_npy, is_npz) = (ext("npy"), ext("npz"));
    let mut note = FieldNote {
        path: path.display().to_string(),
        sha256: sha256_file(path)?,
        format: if is_npy {
            "npy"
        } else if is_npz {
            "npz"
        } else {
            "nifti"
        }
        .into(),
        units: String::new(),
        dtype: None,
        npz_key: None,
        import: None,
        direction: fmt.direction,
        inverted: None,
        resampled_to_fixed_grid: false,
    };
    let field = if is_npy || is_npz {
        let max_values = fixed_grid.len() * 3;
        let arr = if is_npy {
            sinew_io::read_npy_array(path, max_values)?
        } else {
            sinew_io::read_npz_array(path, fmt.npz_key.as_deref(), max_values)?
        };
        let conv = fmt.conventions();
        let (field, report) = import_array(&arr.shape, arr.values, fixed_grid, &conv)
            .with_context(|| format!("{}: on a fixed grid of {:?} voxels", path.display(), fixed_grid.shape()))?;
        note.units =
            serde_json::to_value(conv.units).context("serialising the units")?.as_str().unwrap_or_default().to_string();
        note.dtype = Some(arr.dtype.to_string());
        note.npz_key = arr.npz_key;
        note.resampled_to_fixed_grid = report.resolution_factor > 1;
        note.import = Some(report);
        field
    } else {
        let non_default = fmt.channel_order != ChannelOrder::Ijk
            || fmt.values != Values::Displacement
            || matches!(fmt.units, Some(Units::NormCorners | Units::NormEdges))
            || fmt.npz_key.is_some();
        if non_default {
            bail!(
                "{}: --channel-order, --values, --npz-key and normalised --units apply to .npy/.npz arrays; a NIfTI \
                 field is read from its header (mm or voxel)",
                path.display()
            );
        }
        let units = fmt.units.map(|u| match u {
            Units::Voxel => FieldUnits::Voxel,
            _ => FieldUnits::Mm,
        });
        let (field, units) = sinew_io::read_field(path, FieldReadOptions { units, ..Default::default() })?;
        note.units = units.as_str().into();
        field
    };
    if !field.is_finite() {
        bail!("{}: the field holds NaN or infinite vectors", path.display());
    }
    let field = match fmt.direction {
        Direction::Pull => field,
        Direction::Push => {
            let inv = sinew_score::invert_push_field(&field, INVERT_ITERATIONS);
            note.inverted = Some(inv.report);
            inv.field
        }
    };
    let resampled = !field.grid.same_as(fixed_grid, 1e-3);
    note.resampled_to_fixed_grid |= resampled;
    let field = if resampled { resample::resample_field(&field, fixed_grid) } else { field };
    Ok((field, note))
}

/// Reads landmarks from a CSV file (see [`parse_landmarks`]).
pub fn read_landmarks(path: &Path) -> Result<Vec<WorldPoint>> {
    let text = std::fs::read_to_string(path).with_context(|| format!("{}: cannot read", path.display()))?;
    parse_landmarks(&text, path)
}

/// Parses landmarks through the `csv` crate: one point a record, whose last three cells are
/// x, y, z in world mm (earlier cells, e.g. a name, are ignored); cells are trimmed and may be
/// quoted (RFC 4180: a quoted cell may hold commas, quotes and line breaks); blank lines and
/// lines starting with `#` are skipped; a first record that does not parse is taken as a
/// header. `path` only names the file in errors, which give its line.
pub fn parse_landmarks(text: &str, path: &Path) -> Result<Vec<WorldPoint>> {
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(false)
        .comment(Some(b'#'))
        .trim(csv::Trim::All)
        .flexible(true)
        .from_reader(text.as_bytes());
    let mut points = Vec::new();
    let mut first = true;
    for r in rdr.records() {
        let r = r.with_context(|| format!("{}: not a CSV table", path.display()))?;
        let line = crate::manifest::record_line(text.as_bytes(), r.position(), Some(b'#'));
        // Blank lines, and comments indented by white space (the reader's own comment rule
        // needs the `#` in the first column).
        if r.iter().all(str::is_empty) || r.get(0).is_some_and(|c| c.starts_with('#')) {
            continue;
        }
        let parsed: Option<Vec<f64>> = (r.len() >= 3)
            .then(|| r.iter().skip(r.len() - 3).map(|c| c.parse::<f64>().ok().filter(|v| v.is_finite())).collect())
            .flatten();
        match parsed {
            Some(v) => points.push([v[0], v[1], v[2]]),
            None if first => {}
            None => {
                let found = r.iter().collect::<Vec<_>>().join(",");
                bail!("{}:{line}: expected x,y,z in mm, found {found:?}", path.display())
            }
        }
        first = false;
    }
    if points.is_empty() {
        bail!("{}: no landmarks (expected lines of x,y,z in mm)", path.display());
    }
    Ok(points)
}

/// Label value → name from `labels.json` in `dir` (`{"1": "liver", ...}`), empty when absent.
pub fn label_names(dir: &Path) -> Result<BTreeMap<u16, String>> {
    let path = dir.join("labels.json");
    if !path.exists() {
        return Ok(BTreeMap::new());
    }
    label_names_file(&path)
}

/// The label names for a pair's QC sheet: `file` when given (it must exist), else
/// `labels.json` beside `fixed_labels` when there is one, else none.
pub fn label_names_for(file: Option<&Path>, fixed_labels: Option<&Path>) -> Result<BTreeMap<u16, String>> {
    match (file, fixed_labels) {
        (Some(f), _) => label_names_file(f),
        (None, Some(l)) => label_names(l.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."))),
        (None, None) => Ok(BTreeMap::new()),
    }
}

/// Label value → name from a `labels.json`-style file (`{"1": "liver", ...}`).
pub fn label_names_file(path: &Path) -> Result<BTreeMap<u16, String>> {
    let text = std::fs::read_to_string(path).with_context(|| format!("{}: cannot read", path.display()))?;
    let raw: BTreeMap<String, String> = serde_json::from_str(&text)
        .with_context(|| format!("{}: expected {{\"1\": \"name\", ...}}", path.display()))?;
    raw.into_iter()
        .map(|(k, v)| {
            Ok((k.parse::<u16>().with_context(|| format!("{}: label {k:?} is not 0..65535", path.display()))?, v))
        })
        .collect()
}

/// The scores of one pair with how they were obtained.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct PairResult {
    /// Dice, surface distances and Jacobian statistics.
    pub score: PairScore,
    /// Landmark errors (with landmarks and a field).
    pub landmarks: Option<LandmarkErrors>,
    /// How the field was read (with a field).
    pub field: Option<FieldNote>,
}

/// What to score: the files of one pair.
pub struct PairFiles<'a> {
    /// Fixed labels.
    pub fixed_labels: &'a Path,
    /// Moving labels.
    pub moving_labels: &'a Path,
    /// A field, or else warped labels.
    pub field: Option<&'a Path>,
    /// Warped labels (when there is no field).
    pub warped_labels: Option<&'a Path>,
    /// Fixed and moving landmarks.
    pub landmarks: Option<(&'a Path, &'a Path)>,
}

/// Scores one pair (shared by `sinew score` and `sinew cohort`).
pub fn score_files(files: &PairFiles<'_>, fmt: &FieldFormat) -> Result<PairResult> {
    let fixed = sinew_io::read_labels(files.fixed_labels)?;
    let moving = sinew_io::read_labels(files.moving_labels)?;
    let (score, landmarks, note) = if let Some(fp) = files.field {
        let (field, note) = load_field(fp, &fixed.grid, fmt)?;
        let score = sinew_score::score_pair(&fixed, &moving, Warp::Field(&field))
            .with_context(|| format!("scoring {}", fp.display()))?;
        let landmarks = match files.landmarks {
            Some((f, m)) => Some(
                sinew_score::landmark_errors(&field, &read_landmarks(f)?, &read_landmarks(m)?)
                    .with_context(|| format!("landmarks {} and {}", f.display(), m.display()))?,
            ),
            None => None,
        };
        (score, landmarks, Some(note))
    } else {
        let Some(wp) = files.warped_labels else {
            bail!("{}: give a field or warped labels to score", files.moving_labels.display());
        };
        let warped: LabelMap = sinew_io::read_labels(wp)?;
        let score = sinew_score::score_pair(&fixed, &moving, Warp::Warped(&warped))
            .with_context(|| format!("{}: must lie on the fixed labels' grid", wp.display()))?;
        (score, None, None)
    };
    Ok(PairResult { score, landmarks, field: note })
}

/// Formats an optional number for CSV: empty when undefined, else Rust's shortest exact form.
pub fn cell(v: Option<f64>) -> String {
    v.map(|x| x.to_string()).unwrap_or_default()
}

/// SHA-256 of a file, hex.
pub fn sha256_file(path: &Path) -> Result<String> {
    let mut f = std::fs::File::open(path).with_context(|| format!("{}: cannot open", path.display()))?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    loop {
        let n = f.read(&mut buf).with_context(|| format!("{}: cannot read", path.display()))?;
        if n == 0 {
            break;
        }
        h.update(&buf[..n]);
    }
    Ok(h.finalize().iter().map(|b| format!("{b:02x}")).collect())
}

/// Writes pretty JSON atomically.
pub fn write_json<T: Serialize>(path: &Path, value: &T) -> Result<()> {
    let mut bytes = serde_json::to_vec_pretty(value).context("serialising JSON")?;
    bytes.push(b'\n');
    sinew_io::atomic::write_bytes_atomic(path, &bytes)?;
    Ok(())
}

/// The scores of one pair and method as stored in `score.json` / `methods/NAME/<pair>.json`.
#[derive(Serialize, Deserialize)]
pub struct PairRecord {
    /// Method name ([`crate::BASELINE`] for sinew's own registrations).
    pub method: String,
    /// Pair index.
    pub pair: usize,
    /// Fixed subject id.
    pub fixed: String,
    /// Moving subject id.
    pub moving: String,
    /// Registration wall time, s (baseline only).
    pub runtime_s: Option<f64>,
    /// The scores.
    #[serde(flatten)]
    pub result: PairResult,
}

/// The pair's folder and file name: `<fixed>__<moving>`.
pub fn pair_name(f: &Subject, m: &Subject) -> String {
    format!("{}__{}", f.id, m.id)
}

/// The record at `path` when it parses and belongs to `pair` of `f` and `m`.
pub fn read_record(path: &Path, pair: Pair, f: &Subject, m: &Subject) -> Option<PairRecord> {
    let text = std::fs::read_to_string(path).ok()?;
    let r: PairRecord = serde_json::from_str(&text).ok()?;
    (r.pair == pair.index && r.fixed == f.id && r.moving == m.id).then_some(r)
}

/// The wall time recorded in a complete `report.json`, or `None` when the report is missing,
/// does not parse, or lists an output that is not there.
pub fn complete_report(dir: &Path) -> Option<f64> {
    let text = std::fs::read_to_string(dir.join("report.json")).ok()?;
    let v: serde_json::Value = serde_json::from_str(&text).ok()?;
    let outputs = v.get("outputs")?.as_array()?;
    let all_there = outputs
        .iter()
        .all(|o| o.as_str().and_then(|s| Path::new(s).file_name()).is_some_and(|name| dir.join(name).is_file()));
    (all_there && dir.join("field.nii.gz").is_file()).then(|| v["timings"]["register_s"].as_f64()).flatten()
}

/// Removes temporaries left by an interrupted atomic write (`.<name>.tmp-<pid>-<n>`).
pub fn remove_stray_temporaries(dir: &Path) {
    if let Ok(entries) = std::fs::read_dir(dir) {
        for e in entries.flatten() {
            let name = e.file_name();
            let name = name.to_string_lossy();
            if name.starts_with('.') && name.contains(".tmp-") {
                let _ = std::fs::remove_file(e.path());
            }
        }
    }
}

/// Reads a method's runtimes (`sinew cohort --runtimes`): CSV `fixed,moving,runtime_s` (seconds, finite, ≥ 0) of known subjects.
pub fn read_runtimes(path: &Path, subjects: &[Subject]) -> Result<std::collections::BTreeMap<(String, String), f64>> {
    let text = std::fs::read_to_string(path).with_context(|| format!("{}: cannot read", path.display()))?;
    let (cols, records) = crate::manifest::read_table(&text, path)?;
    if cols != ["fixed", "moving", "runtime_s"] {
        bail!("{}: the header must be fixed,moving,runtime_s, found {:?}", path.display(), cols.join(","));
    }
    let mut out = std::collections::BTreeMap::new();
    for (line, c) in records {
        for id in [&c[0], &c[1]] {
            if !subjects.iter().any(|s| &s.id == id) {
                bail!("{}:{line}: subject {id:?} is not in the cohort", path.display());
            }
        }
        let t: f64 =
            c[2].parse().ok().filter(|t: &f64| t.is_finite() && *t >= 0.0).with_context(|| {
                format!("{}:{line}: runtime {:?} is not a number of seconds ≥ 0", path.display(), c[2])
            })?;
        if out.insert((c[0].clone(), c[1].clone()), t).is_some() {
            bail!("{}:{line}: pair {:?} → {:?} is listed twice", path.display(), c[0], c[1]);
        }
    }
    Ok(out)
}

/// Table rows of every method with scores in `out` for `pairs`.
pub fn collect_rows(
    out: &Path,
    subjects: &[Subject],
    pairs: &[Pair],
    names: &std::collections::BTreeMap<u16, String>,
) -> Result<Vec<Row>> {
    let mut sources: Vec<PathBuf> = Vec::new();
    let methods_dir = out.join("methods");
    if methods_dir.is_dir() {
        for e in std::fs::read_dir(&methods_dir).with_context(|| format!("{}: cannot list", methods_dir.display()))? {
            let e = e.with_context(|| format!("{}: cannot list", methods_dir.display()))?;
            if e.path().is_dir() {
                sources.push(e.path());
            }
        }
    }
    sources.sort();
    let mut rows = Vec::new();
    for &pair in pairs {
        let (f, m) = (&subjects[pair.fixed], &subjects[pair.moving]);
        let name = pair_name(f, m);
        let mut records = vec![out.join("pairs").join(&name).join("score.json")];
        records.extend(sources.iter().map(|d| d.join(format!("{name}.json"))));
        for path in records {
            if let Some(r) = read_record(&path, pair, f, m) {
                rows.extend(rows_of(&r, names));
            }
        }
    }
    Ok(rows)
}

/// The table rows of one record, one per label.
pub fn rows_of(r: &PairRecord, names: &std::collections::BTreeMap<u16, String>) -> Vec<Row> {
    let j = r.result.score.jacobian.as_ref();
    r.result
        .score
        .labels
        .iter()
        .map(|l| {
            let s = l.surface.as_ref();
            Row {
                method: r.method.clone(),
                pair: r.pair,
                fixed: r.fixed.clone(),
                moving: r.moving.clone(),
                label: l.label,
                name: names.get(&l.label).cloned().unwrap_or_default(),
                dice_before: l.dice_before,
                dice: l.dice,
                hd95_mm: s.map(|s| s.hd95_mm),
                hd_mm: s.map(|s| s.hd_mm),
                assd_mm: s.map(|s| s.assd_mm),
                folding: j.map(|j| j.folding_fraction),
                sdlogj: j.and_then(|j| j.sd_log_j),
                jac_min: j.and_then(|j| j.min),
                landmark_mm: r.result.landmarks.as_ref().map(|l| l.mean_mm),
                runtime_s: r.runtime_s,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn printed(e: &crate::CohortError) -> String {
        let mut s = e.to_string();
        let mut source = std::error::Error::source(e);
        while let Some(inner) = source {
            s.push_str(": ");
            s.push_str(&inner.to_string());
            source = inner.source();
        }
        s
    }

    #[test]
    fn landmarks_with_a_header_comments_and_quoted_names() {
        // RFC 4180 (the csv crate's reading of it): a quoted cell may hold the delimiter, a
        // doubled quote and a line break; the record still ends after its last cell.
        let text = "name,x,y,z\n# a comment\n\n  # an indented comment\n\"left, \"\"upper\"\"\npole\", 1.5, -2, 3e1\nright,4,5,6\n7,8,9\n";
        let p = parse_landmarks(text, Path::new("marks.csv")).unwrap();
        assert_eq!(p, vec![[1.5, -2.0, 30.0], [4.0, 5.0, 6.0], [7.0, 8.0, 9.0]]);
        // Without a header and with quoted numbers.
        let p = parse_landmarks("\"1\",\"2\",\"3\"\n", Path::new("marks.csv")).unwrap();
        assert_eq!(p, vec![[1.0, 2.0, 3.0]]);
    }

    #[test]
    fn a_bad_landmark_row_is_a_one_line_error_naming_the_file_and_line() {
        // The record of lines 3-4: a quoted name holding a line break, then a cell that is no
        // number; the error gives the line the record starts on.
        let text = "x,y,z\n1,2,3\n\"a\nb\",4,oops,6\n";
        let e = printed(&parse_landmarks(text, Path::new("marks.csv")).unwrap_err());
        assert_eq!(e, r#"marks.csv:3: expected x,y,z in mm, found "a\nb,4,oops,6""#);
        // The line counts the blank and comment lines before the row (the csv crate's own
        // record position does not: see `manifest::record_line`).
        let bad_rows = [
            ("1,2,3\n4,5\n", 2),
            ("1,2,3\n\n4,5,inf\n", 3),
            ("1,2,3\n4,NaN,6\n", 2),
            ("1,2,3\n# note\n\n4,x,6\n", 4),
            ("1,2,3\r\n\r\n4,5,-\r\n", 3),
        ];
        for (bad, line) in bad_rows {
            let e = printed(&parse_landmarks(bad, Path::new("marks.csv")).unwrap_err());
            assert!(e.starts_with(&format!("marks.csv:{line}: expected x,y,z in mm")) && !e.contains('\n'), "{e}");
        }
        for empty in ["", "x,y,z\n", "# only a comment\n"] {
            let e = printed(&parse_landmarks(empty, Path::new("marks.csv")).unwrap_err());
            assert_eq!(e, "marks.csv: no landmarks (expected lines of x,y,z in mm)");
        }
        let e = printed(&read_landmarks(Path::new("/nonexistent/marks.csv")).unwrap_err());
        assert!(e.starts_with("/nonexistent/marks.csv: cannot read") && !e.contains('\n'), "{e}");
    }
}
