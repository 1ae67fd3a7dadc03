//! One module per subcommand.
pub mod cohort;
pub mod common;
pub mod demo;
pub mod field;
pub mod info;
pub mod prep;
pub mod qc;
pub mod register;
pub mod report;
pub mod score;
pub mod tune;
pub mod warp;
