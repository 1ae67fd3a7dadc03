//! sinew from Python: the engine behind the `sinew` extension module.
//!
//! The crate has two layers:
//! - this pure-Rust core ([`core`]): parameters from a preset, a parameter table and keyword
//!   overrides; one registration from arrays in memory, done exactly as `sinew register`
//!   does it after reading its files; scoring, warping and Jacobians of arrays. It is tested by
//!   `cargo test` without Python.
//! - the PyO3 bindings (module `python`, feature `python`), which only move numpy arrays in
//!   and out, release the GIL around the work, and turn [`ApiError`] into `ValueError`.
//!
//! Conventions are the command line's: arrays are indexed `(i, j, k)` with shape
//! `(nx, ny, nz)`; fields live on the FIXED grid and pull, `warped(x) = moving(x + u(x))`,
//! channel-last `(nx, ny, nz, 3)` in voxels along `(i, j, k)` or in mm along the world axes.
#![deny(missing_docs)]

pub mod core;
mod error;
#[cfg(feature = "python")]
mod python;

pub use error::ApiError;
