//! `sinew info`: describe NIfTI files (shape, spacing, orientation, datatype, affine source,
//! value range, NaN/inf count, and label values with voxel counts for integer files).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;
use serde::Serialize;
use sinew_io::{read_values, ReadOptions, INTENT_DISPVECT};

/// At most this many distinct values are listed as labels; more means "not a label map".
const MAX_LABELS: usize = 256;
/// At most this many labels are printed in text output (JSON lists all).
const LABELS_SHOWN: usize = 24;

/// Arguments of `sinew info`.
#[derive(clap::Args, Debug)]
pub struct InfoArgs {
    /// NIfTI-1 files to describe (.nii or .nii.gz).
    #[arg(required = true, value_name = "FILE")]
    pub files: Vec<PathBuf>,

    /// Print one JSON document (an array with one object per file) instead of text.
    #[arg(long, help = "Print one JSON array (one object per file) instead of text")]
    pub json: bool,
}

/// One label value and its voxel count.
#[derive(Serialize, Debug)]
struct LabelCount {
    label: u16,
    voxels: usize,
}

/// What `sinew info` reports about one file (the JSON object, field for field).
#[derive(Serialize, Debug)]
struct FileInfo {
    /// The path as given.
    path: String,
    /// All extents, `dim[1..=dim[0]]` (e.g. `[nx, ny, nz]`, or `[nx, ny, nz, 1, 3]` for a field).
    shape: Vec<usize>,
    /// Voxel spacing along i, j, k in mm (column norms of the affine).
    spacing_mm: [f64; 3],
    /// Orientation codes of the voxel axes, e.g. "RAS".
    orientation: String,
    /// Voxel datatype, e.g. "int16".
    datatype: &'static str,
    /// "sform", "qform" or "pixdim".
    affine_source: &'static str,
    /// Voxel-to-world affine, 3 rows of `[M | t]`, mm.
    affine: [[f64; 4]; 3],
    /// `[slope, inter]` applied to stored values, or null when none.
    scaling: Option<[f64; 2]>,
    /// gzip-compressed.
    gzip: bool,
    /// NIfTI intent code (1006 = displacement vectors).
    intent_code: i16,
    /// Units of a sinew displacement field ("mm" or "voxel"), when recorded in the file.
    field_units: Option<&'static str>,
    /// Header description text.
    descrip: String,
    /// Smallest finite value (after scaling), null when none is finite.
    min: Option<f32>,
    /// Largest finite value (after scaling).
    max: Option<f32>,
    /// Number of NaN or infinite voxel values.
    non_finite: usize,
    /// For integer datatypes with non-negative values and at most 256 distinct ones: each
    /// value with its voxel count; otherwise null.
    labels: Option<Vec<LabelCount>>,
}

fn describe(path: &Path) -> Result<FileInfo> {
    let (h, values) = read_values(path, &ReadOptions::default())?;
    let mut min = f32::INFINITY;
    let mut max = f32::NEG_INFINITY;
    let mut non_finite = 0;
    for &v in &values {
        if v.is_finite() {
            min = min.min(v);
            max = max.max(v);
        } else {
            non_finite += 1;
        }
    }
    let scaling = h.scaling().filter(|&s| s != (1.0, 0.0)).map(|(s, i)| [s, i]);
    let labels = if h.datatype.is_integer() && scaling.is_none() { label_counts(&values) } else { None };
    Ok(FileInfo {
        path: path.display().to_string(),
        shape: h.dims.clone(),
        spacing_mm: h.grid.spacing(),
        orientation: h.grid.orientation(),
        datatype: h.datatype.name(),
        affine_source: h.affine_source.as_str(),
        affine: h.grid.affine().m,
        scaling,
        gzip: h.gzip,
        intent_code: h.intent_code,
        field_units: h.sinew_field_units().map(|u| u.as_str()),
        descrip: h.descrip.clone(),
        min: (min <= max).then_some(min),
        max: (min <= max).then_some(max),
        non_finite,
        labels,
    })
}

/// Value counts when every value is a whole number in 0..=65535 and there are at most
/// [`MAX_LABELS`] distinct values.
fn label_counts(values: &[f32]) -> Option<Vec<LabelCount>> {
    let mut counts: BTreeMap<u16, usize> = BTreeMap::new();
    for &v in values {
        if !(0.0..=65535.0).contains(&v) || v.fract() != 0.0 {
            return None;
        }
        *counts.entry(v as u16).or_insert(0) += 1;
        if counts.len() > MAX_LABELS {
            return None;
        }
    }
    Some(counts.into_iter().map(|(label, voxels)| LabelCount { label, voxels }).collect())
}

/// A number with at most 4 decimals, trailing zeros removed.
fn num(v: f64) -> String {
    let s = format!("{v:.4}");
    let s = if s.contains('.') { s.trim_end_matches('0').trim_end_matches('.') } else { &s };
    if s == "-0" {
        "0".into()
    } else {
        s.to_string()
    }
}

fn print_human(f: &FileInfo) {
    let shape = f.shape.iter().map(|n| n.to_string()).collect::<Vec<_>>().join(" × ");
    println!("{}", f.path);
    println!("  shape        {shape}  ({}{})", f.datatype, if f.gzip { ", gzip" } else { "" });
    println!("  spacing      {} mm", f.spacing_mm.map(num).join(" × "));
    println!("  orientation  {}  (affine from {})", f.orientation, f.affine_source);
    if let Some([s, i]) = f.scaling {
        let sign = if i < 0.0 { '-' } else { '+' };
        println!("  scaling      value = {} · stored {sign} {}", num(s), num(i.abs()));
    }
    let range = match (f.min, f.max) {
        (Some(lo), Some(hi)) => format!("{} .. {}", num(lo as f64), num(hi as f64)),
        _ => "no finite values".into(),
    };
    println!("  values       {range}  ({} NaN/inf)", f.non_finite);
    if f.intent_code == INTENT_DISPVECT {
        let units = f.field_units.unwrap_or("units not recorded (mm assumed)");
        println!("  field        displacement vectors, {units}");
    }
    if let Some(labels) = &f.labels {
        let shown = labels.iter().take(LABELS_SHOWN).map(|l| format!("{}:{}", l.label, l.voxels));
        let mut list = shown.collect::<Vec<_>>().join("  ");
        if labels.len() > LABELS_SHOWN {
            list.push_str(&format!("  … (+{} more; --json lists all)", labels.len() - LABELS_SHOWN));
        }
        println!("  labels       {} values (value:voxels)  {list}", labels.len());
    }
}

/// Runs `sinew info`: describes each file; fails on the first unreadable one, naming it.
pub fn run(args: InfoArgs) -> Result<()> {
    let mut infos = Vec::with_capacity(args.files.len());
    for p in &args.files {
        infos.push(describe(p)?);
    }
    if args.json {
        println!("{}", serde_json::to_string_pretty(&infos)?);
    } else {
        for f in &infos {
            print_human(f);
        }
    }
    Ok(())
}
