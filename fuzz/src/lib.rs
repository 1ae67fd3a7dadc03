//! Shared by the libFuzzer target (`fuzz_targets/nifti_read.rs`) and the stable seeded-mutation
//! test of sinew-io (`crates/io/tests/mutations.rs`, which includes `check.rs` by path).
#![deny(missing_docs)]

#[path = "check.rs"]
mod check;
pub use check::*;
