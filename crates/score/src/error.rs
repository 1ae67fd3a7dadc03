//! Errors of the score crate.

use sinew_grid::GridError;

/// What can go wrong when scoring.
#[derive(Debug, thiserror::Error, PartialEq)]
#[non_exhaustive]
pub enum ScoreError {
    /// The two label maps are not on the same grid.
    #[error("label maps are not on the same grid: {0}")]
    GridMismatch(#[from] GridError),
}
