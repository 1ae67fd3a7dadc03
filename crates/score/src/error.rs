//! Errors of the score crate.

use sinew_grid::GridError;

/// What can go wrong when scoring.
#[derive(Debug, thiserror::Error, PartialEq)]
#[non_exhaustive]
pub enum ScoreError {
    /// The two label maps are not on the same grid.
    #[error("label maps are not on the same grid: {0}")]
    GridMismatch(#[from] GridError),
    /// The fixed and moving landmark lists differ in length or are empty.
    #[error(
        "landmark lists do not pair up: {fixed} fixed and {moving} moving points (need the same number, at least one)"
    )]
    LandmarkCount {
        /// Number of fixed landmarks.
        fixed: usize,
        /// Number of moving landmarks.
        moving: usize,
    },
    /// A fixed landmark lies outside the field's grid.
    #[error(
        "fixed landmark {index} at {point:?} mm lies outside the grid (voxel position {voxel:?}, shape {shape:?})"
    )]
    LandmarkOutside {
        /// Its position in the list (0-based).
        index: usize,
        /// Its world position, mm.
        point: [f64; 3],
        /// Its voxel position on the grid.
        voxel: [f64; 3],
        /// The grid's shape.
        shape: [usize; 3],
    },
    /// A displacement array that no supported convention explains.
    #[error("displacement array: {0}")]
    FieldArray(String),
}
