//! The solver of sinew: objective, optimisers and the multi-resolution driver.
//!
//! Per level, coarse to fine: MIND-SSC descriptors of both images, then the dense
//! displacement field `u` minimises `D(u) + λ·R(u)` (see [`kernel`]), then the Jacobian
//! determinant of `x + u(x)` is checked, and the field is carried to the next level.
#![deny(missing_docs)]

pub mod adam;
pub mod affine;
pub mod bspline;
pub mod curvature;
mod driver;
mod error;
pub mod fold;
pub mod frames;
pub mod kernel;
pub mod lbfgs;
pub mod nan;
pub mod native;
pub mod param;
mod params;
pub mod scans;
mod simd;
pub mod svf;
#[cfg(test)]
mod testing;

pub use driver::{register, EnergyReport, LevelReport, Progress, Registration, Stage};
pub use error::SolveError;
pub use frames::InitialMode;
pub use native::{native_outputs, NativeField, NativeOutputs};
pub use params::{AffineMode, Model, Optimiser, RegParams, Similarity, PRESETS};
pub use scans::{register_scans, with_threads, PairScans, ScanOptions, ScanRegistration, ThreadsError, Timings};
