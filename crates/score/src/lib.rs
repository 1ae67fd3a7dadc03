//! Scoring a registration: label overlap (Dice), surface distances (HD95, HD, ASSD), landmark
//! error, Jacobian statistics of the field, and the summary statistics of cohort tables.
//!
//! # Definitions (every reported figure)
//! - **Dice** of label `l`: `2·|A_l ∩ B_l| / (|A_l| + |B_l|)` on the fixed grid ([`dice_per_label`]).
//! - **HD95 / HD / ASSD** (mm): 95th percentile (linear interpolation) / maximum / mean of the
//!   pooled symmetric distances between the 6-connected surfaces of the label in both maps,
//!   by an exact Euclidean distance transform on the grid spacing ([`surface_distances`],
//!   [`squared_distance_transform`]).
//! - **Landmark error** (mm): `|x + u(x) − y|` per landmark pair ([`landmark_errors`]).
//! - **Folding**: share of voxels with Jacobian determinant `det ≤ 0`; **SDlogJ**: population
//!   standard deviation of `ln det` over the voxels with `det > 0` — voxels with `det ≤ 0` are
//!   excluded and their count reported (`sinew_transform::jacobian_stats`).
//! - **Summary** over a cohort: mean, sample standard deviation (`n − 1`), median and a
//!   robustness percentile (default the 30th) with numpy's default linear interpolation
//!   ([`Summary`]); the one definition used by summary.json, summary.md and the HTML report.
//!
//! Fields saved the way training code saves them (batch axis, reversed components,
//! normalised coordinates, low resolution) are read by [`import::import_array`].
//!
//! Push (forward) fields from other tools are turned into pull fields by
//! [`invert_push_field`].
#![deny(missing_docs)]

mod dice;
mod edt;
mod error;
pub mod import;
pub mod invert;
pub mod landmarks;
pub mod pair;
pub mod stats;
pub mod surface;

pub use dice::{dice_per_label, dice_report, mean_dice, DiceReport};
pub use edt::squared_distance_transform;
pub use error::ScoreError;
pub use invert::{invert_push_field, Inversion, InversionReport};
pub use landmarks::{landmark_errors, LandmarkErrors};
pub use pair::{score_pair, JacobianScore, LabelScore, PairScore, Warp};
pub use stats::{mean, percentile_linear, Summary, ROBUST_PERCENTILE};
pub use surface::{surface_distances, SurfaceDistances};

/// The caution every report and summary carries.
pub const CAUTION: &str = "Research use only; not for diagnosis or treatment. Check every registration visually \
(a qualified person) before using it; local regulations and clinical practice govern any clinical use.";
