//! Errors of the QC crate.

use std::path::PathBuf;

use sinew_io::IoError;

/// What can go wrong when rendering a QC sheet or a cohort report.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum QcError {
    /// Two inputs of a sheet are not on the same grid.
    #[error("{what} is not on the fixed grid: shape {found:?} vs {expected:?} (or a different affine)")]
    GridMismatch {
        /// Which input.
        what: &'static str,
        /// The fixed grid's shape.
        expected: [usize; 3],
        /// The input's shape.
        found: [usize; 3],
    },
    /// The chosen point lies outside the fixed grid.
    #[error("point {point:?} lies outside the fixed grid of shape {shape:?}")]
    PointOutside {
        /// The requested voxel index.
        point: [usize; 3],
        /// The fixed grid's shape.
        shape: [usize; 3],
    },
    /// A bad option value (window, panel size, grid spacing).
    #[error("bad option: {0}")]
    BadOption(String),
    /// Reading or writing a file failed.
    #[error(transparent)]
    Io(#[from] IoError),
    /// PNG encoding failed.
    #[error("{path}: cannot encode PNG: {reason}")]
    Png {
        /// The output file.
        path: PathBuf,
        /// The encoder's message.
        reason: String,
    },
    /// A cohort table is missing or malformed.
    #[error("{path}: {reason}")]
    Table {
        /// The table file.
        path: PathBuf,
        /// What is wrong (row and column where known).
        reason: String,
    },
    /// Drawing a plot failed.
    #[error("plot {what}: {reason}")]
    Plot {
        /// Which plot.
        what: String,
        /// The plotting library's message.
        reason: String,
    },
}
