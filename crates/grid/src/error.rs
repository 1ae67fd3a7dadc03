//! Errors of the geometry crate.

/// What can go wrong when building or combining grids and volumes.
#[derive(Debug, thiserror::Error, PartialEq)]
#[non_exhaustive]
pub enum GridError {
    /// A shape has a zero extent.
    #[error("empty shape {shape:?}: every extent must be at least 1")]
    EmptyShape {
        /// The offending shape.
        shape: [usize; 3],
    },
    /// The voxel-to-world affine is singular or holds NaN/infinite values.
    #[error("singular or non-finite voxel-to-world affine (determinant {det})")]
    SingularAffine {
        /// Determinant of its linear part.
        det: f64,
    },
    /// A data array does not match the grid's shape.
    #[error("array shape {found:?} does not match the grid shape {expected:?}")]
    ShapeMismatch {
        /// The grid's shape.
        expected: Vec<usize>,
        /// The array's shape.
        found: Vec<usize>,
    },
    /// Two volumes that must share a grid do not.
    #[error("grids differ: {what}")]
    GridMismatch {
        /// Which property differs.
        what: String,
    },
}
