//! Errors of the cohort crate: every one names the file (and where useful the line) and the
//! problem, in one line when printed with its sources joined by ": ".

use std::fmt::Display;

/// What can go wrong reading or writing a cohort's files.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CohortError {
    /// Bad input: the message names the file and the problem.
    #[error("{0}")]
    Invalid(String),
    /// A file or folder could not be read, listed, created or written.
    #[error("{context}")]
    Io {
        /// The file and what was being done.
        context: String,
        /// The system's error.
        #[source]
        source: std::io::Error,
    },
    /// A CSV table that does not parse.
    #[error("{context}")]
    Csv {
        /// The file (and line).
        context: String,
        /// The parser's error.
        #[source]
        source: csv::Error,
    },
    /// A JSON file that does not parse or a value that cannot be written as JSON.
    #[error("{context}")]
    Json {
        /// The file and what was expected.
        context: String,
        /// The parser's error.
        #[source]
        source: serde_json::Error,
    },
    /// A whole number that does not parse.
    #[error("{context}")]
    Number {
        /// The file, line and cell.
        context: String,
        /// The parser's error.
        #[source]
        source: std::num::ParseIntError,
    },
    /// Reading or writing a NIfTI, `.npy` or `.npz` file failed.
    #[error(transparent)]
    File(#[from] sinew_io::IoError),
    /// Reading a NIfTI, `.npy` or `.npz` file failed (with what was being read).
    #[error("{context}")]
    FileAt {
        /// What was being read.
        context: String,
        /// The reader's error.
        #[source]
        source: sinew_io::IoError,
    },
    /// Scoring failed (label maps on different grids, landmarks that do not pair up, a field
    /// array no convention explains).
    #[error("{context}")]
    Score {
        /// The files scored.
        context: String,
        /// The scorer's error.
        #[source]
        source: sinew_score::ScoreError,
    },
}

/// Results of this crate.
pub type Result<T, E = CohortError> = std::result::Result<T, E>;

/// An error that can carry a description of the file and what was being done.
pub trait Wrap {
    /// The error with `context` in front of it.
    fn wrap(self, context: String) -> CohortError;
}

impl Wrap for std::io::Error {
    fn wrap(self, context: String) -> CohortError {
        CohortError::Io { context, source: self }
    }
}

impl Wrap for csv::Error {
    fn wrap(self, context: String) -> CohortError {
        CohortError::Csv { context, source: self }
    }
}

impl Wrap for serde_json::Error {
    fn wrap(self, context: String) -> CohortError {
        CohortError::Json { context, source: self }
    }
}

impl Wrap for std::num::ParseIntError {
    fn wrap(self, context: String) -> CohortError {
        CohortError::Number { context, source: self }
    }
}

impl Wrap for sinew_io::IoError {
    fn wrap(self, context: String) -> CohortError {
        CohortError::FileAt { context, source: self }
    }
}

impl Wrap for sinew_score::ScoreError {
    fn wrap(self, context: String) -> CohortError {
        CohortError::Score { context, source: self }
    }
}

/// Adds the file and what was being done to an error (or turns a missing value into
/// [`CohortError::Invalid`]).
pub trait Context<T> {
    /// The error described by `f()`.
    fn with_context<C: Display, F: FnOnce() -> C>(self, f: F) -> Result<T>;
    /// The error described by `c`.
    fn context<C: Display>(self, c: C) -> Result<T>;
}

impl<T, E: Wrap> Context<T> for std::result::Result<T, E> {
    fn with_context<C: Display, F: FnOnce() -> C>(self, f: F) -> Result<T> {
        self.map_err(|e| e.wrap(f().to_string()))
    }
    fn context<C: Display>(self, c: C) -> Result<T> {
        self.map_err(|e| e.wrap(c.to_string()))
    }
}

impl<T> Context<T> for Option<T> {
    fn with_context<C: Display, F: FnOnce() -> C>(self, f: F) -> Result<T> {
        self.ok_or_else(|| CohortError::Invalid(f().to_string()))
    }
    fn context<C: Display>(self, c: C) -> Result<T> {
        self.ok_or_else(|| CohortError::Invalid(c.to_string()))
    }
}
