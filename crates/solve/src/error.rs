//! Errors of the solver.

/// What can stop a registration.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum SolveError {
    /// The fixed and moving images are not on the same grid.
    #[error("fixed and moving images must share a grid: {0}")]
    Grid(#[from] sinew_grid::GridError),
    /// A parameter is out of range.
    #[error("invalid parameter {name}: {why}")]
    Parameter {
        /// The parameter's name.
        name: &'static str,
        /// What is wrong with it.
        why: String,
    },
    /// The image holds NaN or infinite voxels.
    #[error("{which} image holds {count} NaN or infinite voxels")]
    NonFinite {
        /// "fixed" or "moving".
        which: &'static str,
        /// How many.
        count: usize,
    },
    /// The optimisation produced a non-finite value.
    #[error("optimisation diverged at level {level} (non-finite energy); try a smaller step size or larger lambda")]
    Diverged {
        /// Pyramid level (0 = finest).
        level: usize,
    },
    /// The L-BFGS backend failed.
    #[error("L-BFGS failed at level {level}: {message}")]
    Lbfgs {
        /// Pyramid level.
        level: usize,
        /// The backend's message.
        message: String,
    },
}
