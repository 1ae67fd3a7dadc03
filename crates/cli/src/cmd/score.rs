//! `sinew score`: Dice, HD95, Jacobian statistics and landmark error of one registered pair,
//! from a displacement field (sinew's or another method's) or from already-warped labels.
//!
//! Definitions of every figure: see the `sinew_score` crate documentation.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Context;
use clap::{Args, ValueEnum};
use serde::{Deserialize, Serialize};
use sinew_cohort::files::cell;
use sinew_cohort::{label_names, score_files, Direction, PairFiles, PairResult};
use sinew_score::import::{ChannelOrder, Layout, LowRes, Units, Values};

use crate::cmd::common;

/// Arguments of `sinew score`.
#[derive(Args, Debug, Clone)]
#[command(after_long_help = SCORE_HELP)]
pub struct ScoreArgs {
    /// Label map of the fixed scan (NIfTI): the grid everything is scored on.
    #[arg(long, value_name = "NII")]
    pub fixed_labels: PathBuf,
    /// Label map of the moving scan (NIfTI, any grid).
    #[arg(long, value_name = "NII")]
    pub moving_labels: PathBuf,
    /// Displacement field (NIfTI or .npy) on the fixed grid; the moving labels are warped
    /// through it by nearest neighbour.
    #[arg(long, value_name = "FILE", required_unless_present = "warped_labels", conflicts_with = "warped_labels")]
    pub field: Option<PathBuf>,
    /// Moving labels already warped onto the fixed grid (no Jacobian, no landmarks then).
    #[arg(long, value_name = "NII")]
    pub warped_labels: Option<PathBuf>,
    /// Fixed landmarks: CSV of x,y,z in world mm (one point a line; a header line and a
    /// leading name column are allowed).
    #[arg(long, value_name = "CSV", requires = "moving_landmarks", requires = "field")]
    pub fixed_landmarks: Option<PathBuf>,
    /// Moving landmarks, same format and order as the fixed ones.
    #[arg(long, value_name = "CSV", requires = "fixed_landmarks")]
    pub moving_landmarks: Option<PathBuf>,
    #[command(flatten)]
    pub field_format: FieldFormat,
    /// Write CSV (one row per label) instead of JSON.
    #[arg(long)]
    pub csv: bool,
    /// Output file (written atomically); default: standard output.
    #[arg(long, short = 'o', value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Worker threads (default: all cores).
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
}

const SCORE_HELP: &str = "Examples:
  sinew score --fixed-labels f.nii.gz --moving-labels m.nii.gz --field out/field.nii.gz
  sinew score --fixed-labels f.nii.gz --moving-labels m.nii.gz --field net.npy \\
      --layout channel-first
  sinew score --fixed-labels f.nii.gz --moving-labels m.nii.gz --field flow.npz \\
      --npz-key flow --channel-order kji --units norm-edges --values positions
  sinew score --fixed-labels f.nii.gz --moving-labels m.nii.gz --field fwd.nii.gz \\
      --direction push --csv

Fields: sinew's convention is a pull field on the fixed grid, warped(x) = moving(x + u(x)).
NIfTI fields are read in the units their header records (sinew writes it), else --units
(default mm along the world axes), and resampled when they lie on another grid.
.npy and .npz arrays (float16, float32 or float64) have no grid; read with --units (default
voxel). Detected, and recorded under field.import in the report: a leading batch axis of
length 1 (dropped), the end of length 3 holding the components (--layout overrides), and a
field at a whole fraction 1/f of the fixed grid's resolution (upsampled trilinearly, samples
placed by --low-res). Given, since no file shows them: --channel-order kji, normalised
--units, --values positions. A .npz with several arrays needs --npz-key.
A push field (moving → fixed) is inverted first by fixed-point iteration v(x) = -u(x + v(x))
(20 iterations); the report gives the residual |v(x) + u(x + v(x))| in mm.

Figures: Dice per label; HD95 = 95th percentile (numpy's linear rule) of the pooled symmetric
distances in mm between the 6-connected label surfaces (exact Euclidean distance transform);
folding = share of voxels with det J <= 0; SDlogJ = population standard deviation of ln det J
over voxels with det J > 0 (the others excluded and counted); landmark error = |x + u(x) - y| in mm.";

/// How to read another tool's field (see `sinew_score::import` for every convention).
#[derive(Args, Debug, Clone, Default)]
pub struct FieldFormat {
    /// Units of the field's numbers: mm along the world axes, voxels along i, j, k, or
    /// normalised [-1, 1] coordinates with -1/+1 at the corner voxels' centres (norm-corners,
    /// `align_corners=True`) or outer edges (norm-edges, `align_corners=False`).
    /// Default: what a NIfTI header records, else mm; voxel for .npy/.npz.
    #[arg(long, value_enum)]
    pub units: Option<FieldUnitsArg>,
    /// Which end of a .npy/.npz array holds the 3 components; auto: the end of length 3.
    #[arg(long, value_enum, default_value_t = LayoutArg::Auto)]
    pub layout: LayoutArg,
    /// Order of the components in a .npy/.npz array: ijk (along axes i, j, k) or kji
    /// (reversed: x = last axis, as PyTorch's grid_sample takes them).
    #[arg(long, value_enum, default_value_t = ChannelOrderArg::Ijk)]
    pub channel_order: ChannelOrderArg,
    /// What a .npy/.npz array holds: displacements, or absolute sampling positions
    /// (a sampling grid; the identity is subtracted).
    #[arg(long, value_enum, default_value_t = ValuesArg::Displacement)]
    pub values: ValuesArg,
    /// Where the samples of a lower-resolution .npy/.npz field sit: blocks (each at the centre
    /// of its f voxels: pooling, strided convolutions) or corners (first and last samples on
    /// the first and last voxels: `interpolate(align_corners=True)`).
    #[arg(long, value_enum, default_value_t = LowResArg::Blocks)]
    pub low_res: LowResArg,
    /// The array to read from a .npz archive holding several.
    #[arg(long, value_name = "NAME")]
    pub npz_key: Option<String>,
    /// Direction of the field: pull (fixed → moving, sinew's) or push (moving → fixed,
    /// inverted first).
    #[arg(long, value_enum, default_value_t = DirectionArg::Pull)]
    pub direction: DirectionArg,
}

/// `--units` values for fields.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FieldUnitsArg {
    /// Millimetres along the world axes.
    Mm,
    /// Voxels along the array axes i, j, k.
    Voxel,
    /// Normalised [-1, 1], -1/+1 at the centres of the corner voxels.
    NormCorners,
    /// Normalised [-1, 1], -1/+1 at the outer edges of the corner voxels.
    NormEdges,
}

/// `--layout` values.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, ValueEnum, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum LayoutArg {
    /// The end of length 3.
    #[default]
    Auto,
    /// (nx, ny, nz, 3).
    ChannelLast,
    /// (3, nx, ny, nz).
    ChannelFirst,
}

/// `--channel-order` values.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, ValueEnum)]
pub enum ChannelOrderArg {
    /// Components along i, j, k.
    #[default]
    Ijk,
    /// Components along k, j, i.
    Kji,
}

/// `--values` values.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, ValueEnum)]
pub enum ValuesArg {
    /// Displacements u(x).
    #[default]
    Displacement,
    /// Sampling positions x + u(x).
    Positions,
}

/// `--low-res` values.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, ValueEnum)]
pub enum LowResArg {
    /// Samples at block centres.
    #[default]
    Blocks,
    /// Samples on the corner voxels.
    Corners,
}

/// `--direction` values.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, ValueEnum, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum DirectionArg {
    /// warped(x) = moving(x + u(x)), u on the fixed grid.
    #[default]
    Pull,
    /// u maps moving points forward: y ↦ y + u(y); inverted into a pull field first.
    Push,
}

impl FieldFormat {
    /// How to read the field, as the library takes it.
    pub fn format(&self) -> sinew_cohort::FieldFormat {
        sinew_cohort::FieldFormat {
            layout: match self.layout {
                LayoutArg::Auto => Layout::Auto,
                LayoutArg::ChannelFirst => Layout::ChannelFirst,
                LayoutArg::ChannelLast => Layout::ChannelLast,
            },
            channel_order: match self.channel_order {
                ChannelOrderArg::Ijk => ChannelOrder::Ijk,
                ChannelOrderArg::Kji => ChannelOrder::Kji,
            },
            units: self.units.map(|u| match u {
                FieldUnitsArg::Voxel => Units::Voxel,
                FieldUnitsArg::Mm => Units::Mm,
                FieldUnitsArg::NormCorners => Units::NormCorners,
                FieldUnitsArg::NormEdges => Units::NormEdges,
            }),
            values: match self.values {
                ValuesArg::Displacement => Values::Displacement,
                ValuesArg::Positions => Values::Positions,
            },
            low_res: match self.low_res {
                LowResArg::Blocks => LowRes::Blocks,
                LowResArg::Corners => LowRes::Corners,
            },
            npz_key: self.npz_key.clone(),
            direction: match self.direction {
                DirectionArg::Pull => Direction::Pull,
                DirectionArg::Push => Direction::Push,
            },
        }
    }
}

/// The JSON report of `sinew score`.
#[derive(Serialize)]
struct ScoreReport<'a> {
    caution: &'static str,
    sinew_version: &'static str,
    inputs: Vec<common::InputRecord>,
    label_names: &'a BTreeMap<u16, String>,
    #[serde(flatten)]
    result: &'a PairResult,
}

/// Runs `sinew score`.
pub fn run(args: ScoreArgs) -> anyhow::Result<()> {
    common::with_threads(args.threads, || {
        let mut inputs = vec![("fixed_labels", &args.fixed_labels), ("moving_labels", &args.moving_labels)];
        for (role, p) in [
            ("field", &args.field),
            ("warped_labels", &args.warped_labels),
            ("fixed_landmarks", &args.fixed_landmarks),
            ("moving_landmarks", &args.moving_landmarks),
        ] {
            if let Some(p) = p {
                inputs.push((role, p));
            }
        }
        if let Some(out) = &args.out {
            sinew_io::atomic::ensure_not_input(out, &inputs.iter().map(|(_, p)| p.as_path()).collect::<Vec<_>>())?;
        }
        let files = PairFiles {
            fixed_labels: &args.fixed_labels,
            moving_labels: &args.moving_labels,
            field: args.field.as_deref(),
            warped_labels: args.warped_labels.as_deref(),
            landmarks: args.fixed_landmarks.as_deref().zip(args.moving_landmarks.as_deref()),
        };
        let result = score_files(&files, &args.field_format.format())?;
        let names = label_names(args.fixed_labels.parent().unwrap_or(Path::new(".")))?;
        let bytes = if args.csv {
            csv_rows(&result, &names).into_bytes()
        } else {
            let records = inputs
                .iter()
                .map(|(role, p)| {
                    Ok(common::InputRecord { role, path: p.display().to_string(), sha256: common::sha256_file(p)? })
                })
                .collect::<anyhow::Result<Vec<_>>>()?;
            let report = ScoreReport {
                caution: common::CAUTION,
                sinew_version: env!("CARGO_PKG_VERSION"),
                inputs: records,
                label_names: &names,
                result: &result,
            };
            let mut b = serde_json::to_vec_pretty(&report).context("serialising the report")?;
            b.push(b'\n');
            b
        };
        match &args.out {
            Some(out) => sinew_io::atomic::write_bytes_atomic(out, &bytes)?,
            None => {
                use std::io::Write;
                std::io::stdout().write_all(&bytes).context("writing to standard output")?;
            }
        }
        Ok(())
    })
}

/// The header of `sinew score --csv`.
pub const SCORE_CSV_HEADER: &str =
    "label,name,dice_before,dice,hd95_mm,hd_mm,assd_mm,folding,sdlogj,jac_min,jac_max,landmark_mean_mm";

/// One CSV row per label; the pair-level figures (Jacobian, landmarks) repeat on each row.
/// Written by the `csv` crate (a label name holding a comma, quote or line break is quoted).
fn csv_rows(r: &PairResult, names: &BTreeMap<u16, String>) -> String {
    let j = r.score.jacobian.as_ref();
    let mut w = csv::WriterBuilder::new().terminator(csv::Terminator::Any(b'\n')).from_writer(Vec::new());
    w.write_record(SCORE_CSV_HEADER.split(',')).expect("writing to memory");
    for l in &r.score.labels {
        let surf = l.surface.as_ref();
        let cells = [
            l.label.to_string(),
            names.get(&l.label).cloned().unwrap_or_default(),
            cell(l.dice_before),
            cell(l.dice),
            cell(surf.map(|x| x.hd95_mm)),
            cell(surf.map(|x| x.hd_mm)),
            cell(surf.map(|x| x.assd_mm)),
            cell(j.map(|j| j.folding_fraction)),
            cell(j.and_then(|j| j.sd_log_j)),
            cell(j.and_then(|j| j.min)),
            cell(j.and_then(|j| j.max)),
            cell(r.landmarks.as_ref().map(|l| l.mean_mm)),
        ];
        w.write_record(&cells).expect("writing to memory");
    }
    String::from_utf8(w.into_inner().expect("writing to memory")).expect("cells are UTF-8")
}
