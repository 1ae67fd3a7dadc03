//! Scoring a registration: label overlap (Dice).
#![deny(missing_docs)]

mod dice;
mod error;

pub use dice::{dice_per_label, mean_dice};
pub use error::ScoreError;
