//! File input and output for sinew: NIfTI-1 images, label maps and displacement fields,
//! `.npy` fields, and atomic writes.
//!
//! Conventions (see `sinew_grid`):
//! - in memory, arrays have shape `(nx, ny, nz)` in standard layout (`k` fastest); on disk
//!   NIfTI stores `i` fastest — readers and writers convert;
//! - the voxel-to-world affine comes from the sform if `sform_code > 0`, else the qform if
//!   `qform_code > 0`, else `diag(pixdim)` (NIfTI-1 methods 3, 2, 1);
//! - written files carry the affine in both sform (exact) and qform (nearest rigid), codes 1,
//!   `pixdim` = spacing, units mm, `vox_offset` 352, `scl_slope` 1, `scl_inter` 0;
//! - displacement fields are written as `(nx, ny, nz, 1, 3)` float32 with intent code 1006,
//!   in mm along the world axes or in voxels along `i, j, k`, recorded in `intent_name`
//!   (`"sinew-mm"` / `"sinew-vox"`); `.npy` fields are `(nx, ny, nz, 3)` float32, voxels;
//! - every output goes to a temporary file in the same folder, then is renamed into place.
//!
//! # Example
//! ```
//! use sinew_grid::{Grid, Volume};
//! use sinew_io::{read_header, read_image, write_image, AffineSource};
//!
//! let dir = tempfile::tempdir().unwrap();
//! let img = Volume::filled(Grid::axis_aligned([4, 3, 2], [2.0, 2.0, 3.0], [-4.0, 0.0, 9.0]), 1.5f32);
//! let path = dir.path().join("scan.nii.gz"); // gzip because the name ends in .gz
//! write_image(&path, &img)?;
//! assert_eq!(read_image(&path)?.data, img.data);
//! assert_eq!(read_header(&path)?.affine_source, AffineSource::Sform);
//! # Ok::<(), sinew_io::IoError>(())
//! ```
#![deny(missing_docs)]

pub mod atomic;
mod error;
mod header;
mod npy;
mod read;
mod write;

pub use atomic::{ensure_not_input, AtomicFile};
pub use error::IoError;
pub use header::{affine_to_qform, qform_affine, AffineSource, DataType, HeaderInfo, INTENT_DISPVECT};
pub use npy::{f16_to_f32, read_npy_array, read_npy_field, read_npz_array, write_npy_field, NpyArray, NpyLayout};
pub use read::{
    read_field, read_field_of, read_header, read_header_of, read_image, read_image_of, read_labels, read_labels_of,
    read_values, FieldReadOptions, Nifti, ReadOptions,
};
pub use write::{
    field_plane_writer, image_plane_writer, labels_plane_writer, write_field, write_image, write_labels, FieldUnits,
    PlaneWriter,
};
