//! `sinew field`: compose, invert and convert displacement fields.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use clap::{Args, Subcommand, ValueEnum};
use sinew_grid::Field;
use sinew_io::{FieldReadOptions, FieldUnits};

use crate::cmd::register::UnitsArg;

/// Arguments of `sinew field`.
#[derive(Args, Debug)]
pub struct FieldArgs {
    #[command(subcommand)]
    command: FieldCommand,
}

#[derive(Subcommand, Debug)]
enum FieldCommand {
    /// C(x) = FIRST(x) + SECOND(x + FIRST(x)): warping by C equals warping by SECOND, then
    /// warping that result by FIRST. C lives on FIRST's grid; SECOND may be on another grid.
    Compose {
        /// Applied first to the points of its grid.
        first: PathBuf,
        /// Applied second.
        second: PathBuf,
        /// Output field (.nii or .nii.gz).
        #[arg(long, short = 'o')]
        out: PathBuf,
        /// Units of the written vectors.
        #[arg(long, value_enum, default_value_t = UnitsArg::Mm)]
        units: UnitsArg,
    },
    /// The inverse by fixed-point iteration v(x) = −u(x + v(x)); prints the residual.
    Invert {
        /// The field to invert.
        field: PathBuf,
        /// Output field (.nii or .nii.gz), on the same grid.
        #[arg(long, short = 'o')]
        out: PathBuf,
        /// Fixed-point iterations.
        #[arg(long, default_value_t = 30)]
        iterations: usize,
        /// Units of the written vectors.
        #[arg(long, value_enum, default_value_t = UnitsArg::Mm)]
        units: UnitsArg,
    },
    /// Rewrite a field in other units, or as an absolute-coordinate map (.npy, (nx, ny, nz, 3)
    /// float32: the point x + u(x) in voxels i, j, k or in world mm).
    Convert {
        /// The field (NIfTI).
        field: PathBuf,
        /// Output: .nii/.nii.gz for mm/voxel, .npy for the absolute maps.
        #[arg(long, short = 'o')]
        out: PathBuf,
        /// What to write.
        #[arg(long, value_enum)]
        to: ConvertTo,
    },
}

/// Targets of `sinew field convert`.
#[derive(Clone, Copy, Debug, ValueEnum)]
enum ConvertTo {
    /// Displacement in mm along world x, y, z (NIfTI).
    Mm,
    /// Displacement in voxels along i, j, k (NIfTI).
    Voxel,
    /// Absolute world position of x + u(x) in mm (.npy).
    AbsoluteMm,
    /// Absolute voxel position x + u(x) along i, j, k (.npy).
    AbsoluteVoxel,
}

fn read(path: &Path) -> anyhow::Result<Field> {
    let (f, _) = sinew_io::read_field(path, FieldReadOptions::default())?;
    if !f.is_finite() {
        bail!("{}: the field holds NaN or infinite vectors", path.display());
    }
    Ok(f)
}

/// Runs `sinew field`.
pub fn run(args: FieldArgs) -> anyhow::Result<()> {
    match args.command {
        FieldCommand::Compose { first, second, out, units } => {
            sinew_io::atomic::ensure_not_input(&out, &[&first, &second])?;
            let c = sinew_transform::compose(&read(&first)?, &read(&second)?);
            sinew_io::write_field(&out, &c, FieldUnits::from(units))?;
            eprintln!("wrote {}", out.display());
        }
        FieldCommand::Invert { field, out, iterations, units } => {
            sinew_io::atomic::ensure_not_input(&out, &[&field])?;
            let (v, r) = sinew_transform::invert(&read(&field)?, iterations);
            sinew_io::write_field(&out, &v, FieldUnits::from(units))?;
            eprintln!(
                "wrote {} ({} iterations; residual mean {:.4} voxels, max {:.4} voxels)",
                out.display(),
                r.iterations,
                r.mean_residual_vox,
                r.max_residual_vox
            );
        }
        FieldCommand::Convert { field, out, to } => {
            sinew_io::atomic::ensure_not_input(&out, &[&field])?;
            let f = read(&field)?;
            let npy = out.extension().is_some_and(|e| e == "npy");
            match to {
                ConvertTo::Mm | ConvertTo::Voxel => {
                    if npy {
                        bail!("{}: displacement fields are written as NIfTI (.nii/.nii.gz)", out.display());
                    }
                    let units = if matches!(to, ConvertTo::Mm) { FieldUnits::Mm } else { FieldUnits::Voxel };
                    sinew_io::write_field(&out, &f, units)?;
                }
                ConvertTo::AbsoluteMm | ConvertTo::AbsoluteVoxel => {
                    if !npy {
                        bail!("{}: absolute-coordinate maps are written as .npy", out.display());
                    }
                    let abs = absolute(&f, matches!(to, ConvertTo::AbsoluteMm));
                    sinew_io::write_npy_field(&out, &abs).context("writing the absolute map")?;
                }
            }
            eprintln!("wrote {}", out.display());
        }
    }
    Ok(())
}

/// The map x ↦ x + u(x) in voxels, or in world mm (`G·(x + u(x))`), stored in a `Field`'s
/// buffers (so it can be written as `(nx, ny, nz, 3)` .npy).
fn absolute(f: &Field, mm: bool) -> Field {
    let g = &f.grid;
    let [_, ny, nz] = g.shape();
    let mut out = Field::zeros(g.clone());
    for n in 0..g.len() {
        let x = [(n / (ny * nz)) as f64, ((n / nz) % ny) as f64, (n % nz) as f64];
        let p: [f64; 3] = std::array::from_fn(|d| x[d] + f.component(d)[n] as f64);
        let q = if mm { g.voxel_to_world(p) } else { p };
        for (d, &v) in q.iter().enumerate() {
            out.data[[d, x[0] as usize, x[1] as usize, x[2] as usize]] = v as f32;
        }
    }
    out
}
