//! Errors of the transform crate.

use sinew_grid::GridError;

/// What can go wrong when applying a field.
#[derive(Debug, thiserror::Error, PartialEq)]
#[non_exhaustive]
pub enum TransformError {
    /// A volume that must share the field's grid does not.
    #[error("{what} is not on the field's grid: {source}")]
    NotOnFieldGrid {
        /// Which volume ("moving image", "output image", ...).
        what: &'static str,
        /// The difference found.
        source: GridError,
    },
}

/// Checks that `other` is the field grid `field`, naming `what` in the error.
pub(crate) fn ensure_on_field_grid(
    field: &sinew_grid::Grid,
    other: &sinew_grid::Grid,
    what: &'static str,
) -> Result<(), TransformError> {
    field.ensure_same(other).map_err(|source| TransformError::NotOnFieldGrid { what, source })
}
