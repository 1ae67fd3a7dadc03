//! `sinew warp`: apply a displacement field (sinew's or another method's) to a scan or labels.

use std::path::PathBuf;

use anyhow::bail;
use clap::Args;
use sinew_grid::Border;
use sinew_io::{FieldReadOptions, FieldUnits};

use crate::cmd::common;
use crate::cmd::register::UnitsArg;

/// Arguments of `sinew warp`.
#[derive(Args, Debug)]
#[command(after_long_help = "Examples:
  sinew warp -m moving.nii.gz --field out/field.nii.gz -o warped.nii.gz
  sinew warp -m moving_labels.nii.gz --field out/field.nii.gz -o warped_labels.nii.gz --labels
  sinew warp -m moving.nii.gz --field net_field.nii.gz --units voxel -o warped.nii.gz

The field must follow sinew's conventions: it lives on the FIXED grid and pulls,
warped(x) = moving(x + u(x)). The output is on the field's grid.")]
pub struct WarpArgs {
    /// The scan (or label map, with --labels) to warp; it may be on any grid.
    #[arg(long, short = 'm', value_name = "NII")]
    pub moving: PathBuf,
    /// The displacement field (NIfTI (nx, ny, nz, 1, 3) or (nx, ny, nz, 3)).
    #[arg(long, value_name = "NII")]
    pub field: PathBuf,
    /// The output file (.nii or .nii.gz).
    #[arg(long, short = 'o', value_name = "NII")]
    pub out: PathBuf,
    /// The input is a label map: nearest-neighbour, label 0 outside.
    #[arg(long)]
    pub labels: bool,
    /// Units of the field's vectors when the file does not say (files written by sinew do).
    #[arg(long, value_enum)]
    pub units: Option<UnitsArg>,
    /// Value outside the moving scan (default: its minimum).
    #[arg(long)]
    pub pad: Option<f32>,
    /// Worker threads (default: all cores).
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
}

/// Runs `sinew warp`.
pub fn run(args: WarpArgs) -> anyhow::Result<()> {
    common::with_threads(args.threads, || {
        sinew_io::atomic::ensure_not_input(&args.out, &[&args.moving, &args.field])?;
        let opts = FieldReadOptions { units: args.units.map(FieldUnits::from), ..Default::default() };
        let (field, units) = sinew_io::read_field(&args.field, opts)?;
        if !field.is_finite() {
            bail!("{}: the field holds NaN or infinite vectors", args.field.display());
        }
        if args.labels {
            let labels = sinew_io::read_labels(&args.moving)?;
            let w = sinew_transform::warp_labels_from(&labels, &field);
            sinew_io::write_labels(&args.out, &w)?;
        } else {
            let img = common::read_finite_image(&args.moving)?;
            let pad = args.pad.unwrap_or_else(|| img.finite_range().map_or(0.0, |r| r.0));
            let w = sinew_transform::warp_image_from(&img, &field, Border::Constant(pad));
            sinew_io::write_image(&args.out, &w)?;
        }
        eprintln!("wrote {} (field read as {:?} units)", args.out.display(), units);
        Ok(())
    })
}
