//! Applying displacement fields: warping images and label maps, and checking a field's
//! Jacobian determinant (folding, SDlogJ).
//!
//! Fields follow the pull convention of [`sinew_grid::Field`]: they live on the FIXED grid and
//! `warped(x) = moving(x + u(x))`, with `u` in voxels along the array axes `(i, j, k)`.
#![deny(missing_docs)]

pub mod bspline;
pub mod compose;
mod error;
pub mod invert;
pub mod jacobian;
pub mod warp;

pub use compose::compose;
pub use error::TransformError;
pub use invert::{invert, invert_from, Inverse, InvertReport, InvertStart};
pub use jacobian::{jacobian_determinant, jacobian_stats, JacobianStats};
pub use warp::{warp_image, warp_image_from, warp_image_into, warp_labels, warp_labels_from};
