//! Errors of the Python-facing core.

/// What can go wrong in a call from Python. Every variant is bad input (the Python layer
/// raises `ValueError` with the message); bugs are panics.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ApiError {
    /// An argument is not what the call needs; the message names the argument.
    #[error("{0}")]
    Input(String),
    /// The parameters (preset, parameter table or keyword) are not valid.
    #[error("{0}")]
    Parameter(String),
    /// The registration stopped.
    #[error("registering moving to fixed: {0}")]
    Solve(#[from] sinew_solve::SolveError),
    /// Scoring failed.
    #[error("{0}")]
    Score(#[from] sinew_score::ScoreError),
    /// The worker threads asked for cannot be started.
    #[error("{0}")]
    Threads(#[from] sinew_solve::ThreadsError),
    /// Two grids or shapes do not fit.
    #[error("{0}")]
    Grid(#[from] sinew_grid::GridError),
}

/// Shorthand for an [`ApiError::Input`].
pub(crate) fn input(msg: impl Into<String>) -> ApiError {
    ApiError::Input(msg.into())
}
