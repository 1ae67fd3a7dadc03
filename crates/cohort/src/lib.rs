//! Cohorts on disk, with a typed API used by `sinew cohort`, `sinew score`, `sinew tune` and
//! `sinew demo`:
//! - [`manifest`]: the subjects of a cohort (a TOML or CSV manifest, or a folder in the
//!   layout `sinew demo` writes), pair lists, all pairs `i < j`, shards `K/N`;
//! - [`files`]: scoring the files of one pair (label maps, a field in any supported form,
//!   landmarks) and the per-pair score records (`score.json`, `methods/NAME/<pair>.json`);
//! - [`table`]: `scores.csv` (written and read through the `csv` crate), joining shards'
//!   tables, and `summary.json` / `summary.md`.
//!
//! Every error is a [`CohortError`] naming the file and the problem in one line.
#![deny(missing_docs)]

/// Returns early with [`CohortError::Invalid`] and a formatted message.
macro_rules! bail {
    ($($t:tt)*) => {
        return Err($crate::CohortError::Invalid(format!($($t)*)))
    };
}

mod error;
pub mod files;
pub mod manifest;
pub mod table;

pub use error::{CohortError, Context, Result, Wrap};
pub use files::{
    label_names, label_names_file, label_names_for, load_field, parse_landmarks, read_landmarks, score_files,
    sha256_file, write_json, Direction, FieldFormat, FieldNote, PairFiles, PairRecord, PairResult,
};
pub use manifest::{all_pairs, Cohort, NamedPair, Pair, Shard, Source, Subject};
pub use table::{Row, BASELINE};

pub use sinew_score::CAUTION;
