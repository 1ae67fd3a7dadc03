//! Preprocessing of scans for scripted pipelines: reorientation, resampling to a spacing or a
//! shape, crop/pad, a body mask, intensity window and scaling; label maps follow the same
//! geometry by nearest neighbour.
//!
//! # Order of operations
//! orient → resample → body mask → crop/pad → window → scale. The body mask is computed on
//! the resampled intensities *before* windowing (so the threshold is in HU whatever the
//! window), and is carried through the crop/pad.
//!
//! # Geometry is exact
//! Each voxel centre keeps its world position apart from the chosen resampling:
//! reorientation and crop/pad move values by whole voxels and update the affine exactly
//! ([`orient`], [`geometry`]); resampling reads the input at the world position of every new
//! voxel centre, trilinearly for images and by nearest neighbour for labels
//! (`sinew_grid::resample`), with the edge value repeated up to half a voxel outside.
//! Outputs therefore overlay their inputs in any viewer.
#![deny(missing_docs)]

mod error;
pub mod geometry;
pub mod intensity;
pub mod mask;
pub mod orient;
mod pipeline;
pub mod recipe;

pub use error::PrepError;
pub use intensity::{Scale, Window};
pub use mask::BodyParams;
pub use orient::AxisCodes;
pub use pipeline::{prepare, Centre, CropPadStep, GridRecord, Prepared, Resample, StepRecord, Steps};
pub use recipe::Recipe;
