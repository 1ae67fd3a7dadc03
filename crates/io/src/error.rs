//! Errors of the I/O crate: every variant names the file and the problem in one line.

use std::path::PathBuf;

/// What can go wrong when reading or writing a NIfTI or `.npy` file.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum IoError {
    /// The operating system refused a read, write, rename or open.
    #[error("{}: {action}: {cause}", path.display())]
    Os {
        /// The file concerned.
        path: PathBuf,
        /// What was being done ("cannot open", "cannot write", ...).
        action: &'static str,
        /// The underlying error (in the message, not chained, so a report stays one line
        /// without repetition).
        cause: std::io::Error,
    },
    /// The file is not a (single-file) NIfTI-1 file.
    #[error("{}: not a NIfTI-1 file: {reason}", path.display())]
    NotNifti {
        /// The file concerned.
        path: PathBuf,
        /// Why (wrong magic, wrong header size, ...).
        reason: String,
    },
    /// The file is NIfTI-2, which this reader does not handle.
    #[error("{}: NIfTI-2 not supported (save it as NIfTI-1)", path.display())]
    Nifti2 {
        /// The file concerned.
        path: PathBuf,
    },
    /// A header field is invalid or inconsistent.
    #[error("{}: bad header: {reason}", path.display())]
    BadHeader {
        /// The file concerned.
        path: PathBuf,
        /// Which field and why.
        reason: String,
    },
    /// The datatype code is not one of the supported ones.
    #[error("{}: unsupported datatype code {code} (supported: uint8, int8, uint16, int16, uint32, int32, float32, float64)", path.display())]
    UnsupportedDatatype {
        /// The file concerned.
        path: PathBuf,
        /// The NIfTI datatype code.
        code: i16,
    },
    /// The header claims more data than the configured limit.
    #[error("{}: header claims {bytes} bytes of voxel data, more than the limit of {max} bytes", path.display())]
    TooLarge {
        /// The file concerned.
        path: PathBuf,
        /// Bytes claimed by the header (saturated at `u64::MAX`).
        bytes: u64,
        /// The limit in force.
        max: u64,
    },
    /// The file ends before the voxel data the header announces.
    #[error("{}: truncated: expected {expected} bytes of voxel data from offset {offset}, found {found}", path.display())]
    Truncated {
        /// The file concerned.
        path: PathBuf,
        /// Byte offset of the voxel data.
        offset: u64,
        /// Bytes announced.
        expected: u64,
        /// Bytes present.
        found: u64,
    },
    /// The voxel-to-world map is unusable (singular, non-finite).
    #[error("{}: bad voxel-to-world affine ({source_name}): {reason}", path.display())]
    BadAffine {
        /// The file concerned.
        path: PathBuf,
        /// Which header fields it came from ("sform", "qform", "pixdim").
        source_name: &'static str,
        /// Why it is unusable.
        reason: String,
    },
    /// The array has the wrong dimensionality for what was asked (image, field).
    #[error("{}: {reason}", path.display())]
    WrongShape {
        /// The file concerned.
        path: PathBuf,
        /// What was expected and what was found.
        reason: String,
    },
    /// A label map holds values that are not labels.
    #[error("{}: {reason}", path.display())]
    BadLabels {
        /// The file concerned.
        path: PathBuf,
        /// "labels are not integers", "negative label", ...
        reason: String,
    },
    /// A `.npy` file is malformed or of an unsupported kind.
    #[error("{}: bad .npy file: {reason}", path.display())]
    BadNpy {
        /// The file concerned.
        path: PathBuf,
        /// Why.
        reason: String,
    },
    /// An output path is one of the command's inputs.
    #[error("{}: refusing to overwrite an input file", path.display())]
    OutputIsInput {
        /// The output path.
        path: PathBuf,
    },
    /// A geometry check failed (shape mismatch, ...).
    #[error("{}: {cause}", path.display())]
    Grid {
        /// The file concerned.
        path: PathBuf,
        /// The geometry error (in the message, not chained).
        cause: sinew_grid::GridError,
    },
}

impl IoError {
    /// The file the error is about.
    pub fn path(&self) -> &std::path::Path {
        match self {
            IoError::Os { path, .. }
            | IoError::NotNifti { path, .. }
            | IoError::Nifti2 { path }
            | IoError::BadHeader { path, .. }
            | IoError::UnsupportedDatatype { path, .. }
            | IoError::TooLarge { path, .. }
            | IoError::Truncated { path, .. }
            | IoError::BadAffine { path, .. }
            | IoError::WrongShape { path, .. }
            | IoError::BadLabels { path, .. }
            | IoError::BadNpy { path, .. }
            | IoError::OutputIsInput { path }
            | IoError::Grid { path, .. } => path,
        }
    }

    pub(crate) fn os(path: &std::path::Path, action: &'static str, cause: std::io::Error) -> IoError {
        IoError::Os { path: path.to_path_buf(), action, cause }
    }
}
