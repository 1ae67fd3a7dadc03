//! Errors of the features crate.

/// What can go wrong when setting up a descriptor.
#[derive(Debug, thiserror::Error, PartialEq)]
#[non_exhaustive]
pub enum FeatureError {
    /// The MIND-SSC dilation must be at least one voxel.
    #[error("MIND-SSC dilation must be at least 1 voxel (got {dilation})")]
    ZeroDilation {
        /// The rejected dilation.
        dilation: usize,
    },
}
