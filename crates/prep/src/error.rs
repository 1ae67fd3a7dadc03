//! Errors of the preprocessing crate.

use std::path::PathBuf;

use sinew_grid::GridError;

/// What can go wrong while preparing a scan.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PrepError {
    /// An orientation code is not three letters naming each world axis once.
    #[error("orientation {code:?}: expected three letters, one of R/L, one of A/P and one of S/I (e.g. RAS, LPS)")]
    BadOrientation {
        /// The code as given.
        code: String,
    },
    /// The voxel axes of a grid do not point along distinct world axes.
    #[error("the voxel axes of the affine do not point along distinct world axes (codes {codes:?})")]
    AmbiguousOrientation {
        /// The axis codes found.
        codes: String,
    },
    /// A requested spacing is not a positive finite number of mm.
    #[error("spacing {spacing:?} mm: every value must be positive and finite")]
    BadSpacing {
        /// The spacing as given.
        spacing: [f64; 3],
    },
    /// A requested shape has a zero extent or is too large.
    #[error("shape {shape:?}: every extent must be between 1 and 32767 voxels")]
    BadShape {
        /// The shape as given.
        shape: [usize; 3],
    },
    /// An intensity window is empty or not finite.
    #[error("window [{lo}, {hi}]: needs finite values with lo < hi")]
    BadWindow {
        /// Lower bound.
        lo: f32,
        /// Upper bound.
        hi: f32,
    },
    /// The body mask holds no voxel, so a step that needs it cannot run.
    #[error("no voxel above the body threshold {threshold} (image range {min} to {max}); lower --body-threshold")]
    EmptyMask {
        /// The threshold used.
        threshold: f32,
        /// Image minimum.
        min: f32,
        /// Image maximum.
        max: f32,
    },
    /// z-scoring is impossible because the values inside the mask are constant.
    #[error("z-score: the {voxels} voxels inside the body mask are all {value}; nothing to scale")]
    ConstantInMask {
        /// Voxels in the mask.
        voxels: usize,
        /// Their common value.
        value: f64,
    },
    /// Unit scaling without a window on a constant image.
    #[error("unit scaling: the image is constant ({value}) and no --window was given")]
    ConstantImage {
        /// The constant value.
        value: f32,
    },
    /// A label map does not lie on its image's grid.
    #[error("label map on grid {labels:?} does not match its image on {image:?}: {what}")]
    LabelGridMismatch {
        /// Label map shape.
        labels: [usize; 3],
        /// Image shape.
        image: [usize; 3],
        /// Which property differs.
        what: String,
    },
    /// A grid could not be built.
    #[error(transparent)]
    Grid(#[from] GridError),
    /// A recipe file could not be read or parsed.
    #[error("{}: {reason}", path.display())]
    Recipe {
        /// The recipe file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
}
