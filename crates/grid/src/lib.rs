//! Geometry of sinew: grids, volumes, displacement fields, sampling, smoothing, pyramids.
//!
//! Conventions (they make fields exchangeable with other code):
//! - array axes follow the NIfTI voxel index order `(i, j, k)`; in-memory shape `(nx, ny, nz)`,
//!   standard (row-major) layout, so `k` varies fastest;
//! - world coordinates are NIfTI's (sform, else qform), in millimetres;
//! - a displacement [`Field`] lives on the FIXED grid and pulls:
//!   `warped(x) = moving(x + u(x))`; in memory it is in voxels along `(i, j, k)`.
#![deny(missing_docs)]

mod affine;
mod error;
mod grid;
pub mod interp;
pub mod pyramid;
pub mod resample;
pub mod simd;
pub mod smooth;
mod volume;

pub use affine::{det3, Affine};
pub use error::GridError;
pub use grid::{Grid, VoxelPoint, WorldPoint};
pub use interp::Border;
pub use volume::{par_component_slabs_collect, par_component_slabs_mut, Field, Image, LabelMap, Volume};
