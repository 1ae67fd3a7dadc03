//! Shared by the libFuzzer targets (`fuzz_targets/nifti_read.rs`, `fuzz_targets/text_read.rs`)
//! and the stable seeded-mutation test of sinew-io (`crates/io/tests/mutations.rs`, which
//! includes `check.rs` by path).
#![deny(missing_docs)]

#[path = "check.rs"]
mod check;
pub use check::*;

mod text;
pub use text::check_text;
