//! Reading NIfTI-1 images, label maps and displacement fields (`.nii` or gzip-compressed,
//! detected from the content), without panicking on any input.
//!
//! Every size is checked against the header and [`ReadOptions::max_bytes`] before memory is
//! reserved; gzip streams are decompressed only up to the size the header announces.

use std::fs::File;
use std::io::{BufRead, BufReader, Read};
use std::path::Path;

use flate2::bufread::MultiGzDecoder;
use ndarray::{Array3, Array4, Axis};
use sinew_grid::{Field, Image, LabelMap, Volume};

use crate::header::{parse, DataType, HeaderInfo, HEADER_SIZE};
use crate::write::FieldUnits;
use crate::IoError;

/// Limits applied while reading.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ReadOptions {
    /// Largest amount of voxel data (bytes, as stored) accepted; checked against the header's
    /// claim before anything is allocated. Default 4 GiB.
    pub max_bytes: u64,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions { max_bytes: 4 << 30 }
    }
}

/// How to read a displacement field whose units the file does not record.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct FieldReadOptions {
    /// Units to assume when the header has no sinew `intent_name` ("sinew-mm"/"sinew-vox");
    /// `None` means millimetres. Units recorded by sinew in the file take precedence.
    pub units: Option<FieldUnits>,
    /// Size limits.
    pub read: ReadOptions,
}

impl HeaderInfo {
    /// The field units recorded by sinew in `intent_name`, if any.
    pub fn sinew_field_units(&self) -> Option<FieldUnits> {
        FieldUnits::from_intent_name(&self.intent_name)
    }
}

/// An opened input: the (possibly decompressing) reader, whether it is gzip, and the length
/// in bytes of what is stored.
type Opened<'a> = (Box<dyn Read + 'a>, bool, u64);

/// Wraps `r` in a gzip decoder when its first bytes are the gzip magic `1f 8b`.
fn detect_gzip<'a, R: BufRead + 'a>(path: &Path, mut r: R, len: u64) -> Result<Opened<'a>, IoError> {
    let head = r.fill_buf().map_err(|e| IoError::os(path, "cannot read", e))?;
    let gz = head.len() >= 2 && head[0] == 0x1f && head[1] == 0x8b;
    Ok(if gz { (Box::new(MultiGzDecoder::new(r)), true, len) } else { (Box::new(r), false, len) })
}

/// Opens `path`, detecting gzip by its magic bytes `1f 8b`; returns the reader, whether it is
/// compressed, and the file length in bytes.
fn open(path: &Path) -> Result<Opened<'static>, IoError> {
    let file = File::open(path).map_err(|e| IoError::os(path, "cannot open", e))?;
    let len = file.metadata().map_err(|e| IoError::os(path, "cannot stat", e))?.len();
    detect_gzip(path, BufReader::with_capacity(1 << 16, file), len)
}

/// Where the bytes of a NIfTI-1 file (plain or gzip) come from: a file, or memory.
#[derive(Clone, Copy, Debug)]
pub enum Nifti<'a> {
    /// The file at this path.
    File(&'a Path),
    /// The bytes of a file held in memory; `name` is only used in error messages.
    Bytes {
        /// The name errors give.
        name: &'a Path,
        /// The file's bytes.
        bytes: &'a [u8],
    },
}

impl<'a> Nifti<'a> {
    /// The path errors name.
    fn path(self) -> &'a Path {
        match self {
            Nifti::File(p) => p,
            Nifti::Bytes { name, .. } => name,
        }
    }

    fn open(self) -> Result<Opened<'a>, IoError> {
        match self {
            Nifti::File(path) => open(path),
            Nifti::Bytes { name, bytes } => detect_gzip(name, bytes, bytes.len() as u64),
        }
    }
}

/// Reads until `buf` is full or the stream ends; returns the count read.
fn read_full(path: &Path, r: &mut dyn Read, buf: &mut [u8]) -> Result<usize, IoError> {
    let mut n = 0;
    while n < buf.len() {
        match r.read(&mut buf[n..]) {
            Ok(0) => break,
            Ok(k) => n += k,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof => break,
            Err(e) => return Err(IoError::os(path, "cannot read (corrupt gzip stream?)", e)),
        }
    }
    Ok(n)
}

fn read_header_from(path: &Path, r: &mut dyn Read, gz: bool) -> Result<HeaderInfo, IoError> {
    let mut buf = [0u8; HEADER_SIZE];
    let n = read_full(path, r, &mut buf)?;
    if n >= 4 {
        crate::header::check_sizeof_hdr(path, [buf[0], buf[1], buf[2], buf[3]])?;
    }
    if n < HEADER_SIZE {
        return Err(IoError::NotNifti {
            path: path.to_path_buf(),
            reason: format!("only {n} bytes, shorter than a NIfTI-1 header ({HEADER_SIZE} bytes)"),
        });
    }
    parse(path, &buf, gz)
}

/// Reads and validates the header of a NIfTI-1 file (plain or gzip).
pub fn read_header(path: &Path) -> Result<HeaderInfo, IoError> {
    read_header_of(Nifti::File(path))
}

/// [`read_header`] of a file or of bytes in memory.
pub fn read_header_of(src: Nifti<'_>) -> Result<HeaderInfo, IoError> {
    let (mut r, gz, _) = src.open()?;
    read_header_from(src.path(), &mut r, gz)
}

/// The header and the raw voxel bytes, size-checked before allocation.
fn read_raw(src: Nifti<'_>, opts: &ReadOptions) -> Result<(HeaderInfo, Vec<u8>), IoError> {
    let path = src.path();
    let (mut r, gz, file_len) = src.open()?;
    let info = read_header_from(path, &mut r, gz)?;
    let want = info.data_bytes;
    if want > opts.max_bytes {
        return Err(IoError::TooLarge { path: path.to_path_buf(), bytes: want, max: opts.max_bytes });
    }
    let truncated =
        |found: u64| IoError::Truncated { path: path.to_path_buf(), offset: info.vox_offset, expected: want, found };
    if !gz && file_len < info.vox_offset.saturating_add(want) {
        return Err(truncated(file_len.saturating_sub(info.vox_offset)));
    }
    let skip = info.vox_offset - HEADER_SIZE as u64;
    let skipped = std::io::copy(&mut (&mut r).take(skip), &mut std::io::sink())
        .map_err(|e| IoError::os(path, "cannot read (corrupt gzip stream?)", e))?;
    if skipped < skip {
        return Err(truncated(0));
    }
    // For gzip the claim is not yet backed by data: grow the buffer as bytes arrive.
    let first = if gz { want.min(64 << 20) } else { want };
    let mut data = Vec::with_capacity(first as usize);
    match (&mut r).take(want).read_to_end(&mut data) {
        Ok(_) => {}
        Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof => {}
        Err(e) => return Err(IoError::os(path, "cannot read (corrupt gzip stream?)", e)),
    }
    if (data.len() as u64) < want {
        return Err(truncated(data.len() as u64));
    }
    Ok((info, data))
}

/// Evaluates `$body` with the type alias `$t` naming the Rust type of the voxels of datatype
/// `$dt` (one monomorphised copy of the body per datatype).
macro_rules! for_datatype {
    ($dt:expr, $t:ident => $body:expr) => {
        for_datatype!(@arms $dt, $t, $body; U8 u8, I8 i8, U16 u16, I16 i16, U32 u32, I32 i32, F32 f32, F64 f64)
    };
    (@arms $dt:expr, $t:ident, $body:expr; $($variant:ident $ty:ty),*) => {
        match $dt {
            $(DataType::$variant => {
                type $t = $ty;
                $body
            })*
        }
    };
}

/// A voxel value as f64 (exact for every datatype read here).
fn widen(v: impl Into<f64>) -> f64 {
    v.into()
}

/// Decodes raw bytes to `T` through `f(value as f64)`, in file order.
fn decode<T>(bytes: &[u8], dt: DataType, little: bool, f: impl FnMut(f64) -> T) -> Vec<T> {
    for_datatype!(dt, V => {
        const N: usize = std::mem::size_of::<V>();
        let conv = if little { V::from_le_bytes } else { V::from_be_bytes };
        bytes.chunks_exact(N).map(|c| widen(conv(c.try_into().expect("chunk of N bytes")))).map(f).collect()
    })
}

/// Reorders file-order values (i fastest, then j, k, then volumes) into `(nvol, nx, ny, nz)`
/// standard layout (k fastest).
fn to_memory_order<T: Copy + Default + Send + Sync>(disk: Vec<T>, shape: [usize; 3], nvol: usize) -> Array4<T> {
    let [nx, ny, nz] = shape;
    let out = gather_memory_order(shape, nvol, |n| disk[n]);
    Array4::from_shape_vec((nvol, nx, ny, nz), out).expect("decoded length matches the header")
}

/// Side of the square tiles of [`gather_memory_order`] (values along `i` and along `k`).
const TILE: usize = 16;

/// The `(nvol, nx, ny, nz)` standard-layout array whose value at `(v, i, j, k)` is `get(n)`
/// with `n` the file-order index `((v·nz + k)·ny + j)·nx + i`: a tiled transposition (16 × 16
/// tiles over `i` and `k` for each `j`), parallel over 16-voxel slabs along `i`.
fn gather_memory_order<T: Copy + Default + Send + Sync>(
    shape: [usize; 3],
    nvol: usize,
    get: impl Fn(usize) -> T + Sync,
) -> Vec<T> {
    use rayon::prelude::*;
    let [nx, ny, nz] = shape;
    let slab = ny * nz;
    let mut out = vec![T::default(); nvol * nx * slab];
    for (v, vol) in out.chunks_mut((nx * slab).max(1)).enumerate() {
        vol.par_chunks_mut(TILE * slab).enumerate().for_each(|(b, block)| {
            let i0 = b * TILE;
            let ni = block.len() / slab;
            for j in 0..ny {
                for k0 in (0..nz).step_by(TILE) {
                    let k1 = (k0 + TILE).min(nz);
                    for k in k0..k1 {
                        let row = ((v * nz + k) * ny + j) * nx + i0;
                        for di in 0..ni {
                            block[di * slab + j * nz + k] = get(row + di);
                        }
                    }
                }
            }
        });
    }
    out
}

/// Scaled values `slope·raw + inter` as f32 (no scaling when slope is 0 or not finite).
fn scaled_f32(info: &HeaderInfo, bytes: &[u8]) -> Vec<f32> {
    match info.scaling() {
        Some((s, i)) if (s, i) != (1.0, 0.0) => {
            decode(bytes, info.datatype, info.little_endian, |v| (s * v + i) as f32)
        }
        _ => decode(bytes, info.datatype, info.little_endian, |v| v as f32),
    }
}

/// [`scaled_f32`] of `nvol` volumes, decoded straight into memory order (`(nvol, nx, ny, nz)`,
/// k fastest) without a file-order copy.
fn scaled_f32_memory_order(info: &HeaderInfo, bytes: &[u8], nvol: usize) -> Vec<f32> {
    let shape = info.grid.shape();
    let (s, i) = info.scaling().unwrap_or((1.0, 0.0));
    let scaled = (s, i) != (1.0, 0.0);
    for_datatype!(info.datatype, V => {
        const N: usize = std::mem::size_of::<V>();
        let conv = if info.little_endian { V::from_le_bytes } else { V::from_be_bytes };
        let raw = |n: usize| widen(conv(bytes[n * N..n * N + N].try_into().expect("N bytes")));
        if scaled {
            gather_memory_order(shape, nvol, |n| (s * raw(n) + i) as f32)
        } else {
            gather_memory_order(shape, nvol, |n| raw(n) as f32)
        }
    })
}

fn grid_err(path: &Path) -> impl FnOnce(sinew_grid::GridError) -> IoError + '_ {
    move |cause| IoError::Grid { path: path.to_path_buf(), cause }
}

/// [`read_raw`] of a file that must hold a single 3-D volume.
fn read_volume(src: Nifti<'_>, opts: &ReadOptions) -> Result<(HeaderInfo, Vec<u8>), IoError> {
    let (info, bytes) = read_raw(src, opts)?;
    if info.n_extra() != 1 {
        return Err(IoError::WrongShape {
            path: src.path().to_path_buf(),
            reason: format!("dims {:?} hold {} volumes; expected a single 3-D volume", info.dims, info.n_extra()),
        });
    }
    Ok((info, bytes))
}

/// Every voxel value of a NIfTI-1 file, scaled, in file order (i fastest), with its header;
/// any dimensionality. For summaries that do not need the 3-D layout.
pub fn read_values(path: &Path, opts: &ReadOptions) -> Result<(HeaderInfo, Vec<f32>), IoError> {
    let (info, bytes) = read_raw(Nifti::File(path), opts)?;
    let v = scaled_f32(&info, &bytes);
    Ok((info, v))
}

/// Reads a 3-D scalar image (any supported datatype) as f32, applying `scl_slope`/`scl_inter`
/// when the slope is non-zero and finite. NaN/inf voxels are kept (see
/// [`Image::count_non_finite`]). Default limits.
pub fn read_image(path: &Path) -> Result<Image, IoError> {
    read_image_of(Nifti::File(path), &ReadOptions::default())
}

/// [`read_image`] of a file or of bytes in memory, with explicit limits.
pub fn read_image_of(src: Nifti<'_>, opts: &ReadOptions) -> Result<Image, IoError> {
    let (info, bytes) = read_volume(src, opts)?;
    let arr = Array3::from_shape_vec(info.grid.shape(), scaled_f32_memory_order(&info, &bytes, 1))
        .expect("decoded length matches the header");
    drop(bytes);
    Volume::new(info.grid, arr).map_err(grid_err(src.path()))
}

/// Reads a label map: values (after scaling, if any) must be whole numbers in 0..=65535;
/// a float file whose values are all integral is accepted. Default limits.
pub fn read_labels(path: &Path) -> Result<LabelMap, IoError> {
    read_labels_of(Nifti::File(path), &ReadOptions::default())
}

/// [`read_labels`] of a file or of bytes in memory, with explicit limits.
pub fn read_labels_of(src: Nifti<'_>, opts: &ReadOptions) -> Result<LabelMap, IoError> {
    let (info, bytes) = read_volume(src, opts)?;
    let scale = info.scaling().unwrap_or((1.0, 0.0));
    let mut problem: Option<String> = None;
    let values = decode(&bytes, info.datatype, info.little_endian, |raw| {
        let v = scale.0 * raw + scale.1;
        if problem.is_none() {
            if !v.is_finite() || v.fract() != 0.0 {
                problem = Some(format!("labels are not integers (found value {v})"));
            } else if v < 0.0 {
                problem = Some(format!("negative label {v}"));
            } else if v > 65535.0 {
                problem = Some(format!("label {v} exceeds 65535"));
            }
        }
        v.clamp(0.0, 65535.0) as u16
    });
    if let Some(reason) = problem {
        return Err(IoError::BadLabels { path: src.path().to_path_buf(), reason });
    }
    let arr: Array3<u16> = to_memory_order(values, info.grid.shape(), 1).index_axis_move(Axis(0), 0);
    Volume::new(info.grid, arr).map_err(grid_err(src.path()))
}

/// Reads a displacement field of shape `(nx, ny, nz, 1, 3)` or `(nx, ny, nz, 3)`.
///
/// Units: those recorded by sinew in `intent_name` if present, else `opts.units`, else mm.
/// Returns the field (in voxels along i, j, k, as in memory) and the units that were used.
pub fn read_field(path: &Path, opts: FieldReadOptions) -> Result<(Field, FieldUnits), IoError> {
    read_field_of(Nifti::File(path), opts)
}

/// [`read_field`] of a file or of bytes in memory.
pub fn read_field_of(src: Nifti<'_>, opts: FieldReadOptions) -> Result<(Field, FieldUnits), IoError> {
    let path = src.path();
    let (info, bytes) = read_raw(src, &opts.read)?;
    let d = &info.dims;
    let ok = (d.len() == 5 && d[3] == 1 && d[4] == 3) || (d.len() == 4 && d[3] == 3);
    if !ok {
        return Err(IoError::WrongShape {
            path: path.to_path_buf(),
            reason: format!("dims {d:?} are not a displacement field (expected (nx, ny, nz, 1, 3) or (nx, ny, nz, 3))"),
        });
    }
    let units = info.sinew_field_units().or(opts.units).unwrap_or(FieldUnits::Mm);
    let [nx, ny, nz] = info.grid.shape();
    let comps = Array4::from_shape_vec((3, nx, ny, nz), scaled_f32_memory_order(&info, &bytes, 3))
        .expect("decoded length matches the header"); // (3, nx, ny, nz)
    drop(bytes);
    let field = match units {
        FieldUnits::Voxel => Field::from_voxel_components(info.grid, comps),
        FieldUnits::Mm => Field::from_world_mm(info.grid, &comps.permuted_axes([1, 2, 3, 0])),
    }
    .map_err(grid_err(path))?;
    Ok((field, units))
}
