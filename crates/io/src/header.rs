//! NIfTI-1 headers: validation of what we read, the voxel-to-world map, and the bytes we write.
//!
//! Parsing of the 348 header bytes (including byte-order detection) is done by the `nifti`
//! crate; the checks, the affine and the serialisation are ours. Field offsets and meanings
//! follow the NIfTI-1 standard header `nifti1.h` (NIfTI Data Format Working Group, 2004).

use std::path::Path;

use sinew_grid::{det3, Affine, Grid};

use crate::IoError;

/// Size of a NIfTI-1 header in bytes.
pub const HEADER_SIZE: usize = 348;
/// Offset of the voxel data in the files we write: header plus the 4-byte extension flag.
pub const WRITE_VOX_OFFSET: usize = 352;
/// NIfTI intent code of a displacement vector field (`NIFTI_INTENT_DISPVECT`).
pub const INTENT_DISPVECT: i16 = 1006;

/// Voxel datatypes sinew reads (NIfTI-1 `datatype` codes in brackets).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum DataType {
    /// Unsigned 8-bit integer (2).
    U8,
    /// Signed 8-bit integer (256).
    I8,
    /// Unsigned 16-bit integer (512).
    U16,
    /// Signed 16-bit integer (4).
    I16,
    /// Unsigned 32-bit integer (768).
    U32,
    /// Signed 32-bit integer (8).
    I32,
    /// 32-bit float (16).
    F32,
    /// 64-bit float (64).
    F64,
}

impl DataType {
    /// The datatype of a NIfTI-1 `datatype` code, if supported.
    pub fn from_code(code: i16) -> Option<DataType> {
        Some(match code {
            2 => DataType::U8,
            256 => DataType::I8,
            512 => DataType::U16,
            4 => DataType::I16,
            768 => DataType::U32,
            8 => DataType::I32,
            16 => DataType::F32,
            64 => DataType::F64,
            _ => return None,
        })
    }

    /// The NIfTI-1 `datatype` code.
    pub fn code(self) -> i16 {
        match self {
            DataType::U8 => 2,
            DataType::I8 => 256,
            DataType::U16 => 512,
            DataType::I16 => 4,
            DataType::U32 => 768,
            DataType::I32 => 8,
            DataType::F32 => 16,
            DataType::F64 => 64,
        }
    }

    /// Bits per voxel (the header's `bitpix`).
    pub fn bits(self) -> u16 {
        match self {
            DataType::U8 | DataType::I8 => 8,
            DataType::U16 | DataType::I16 => 16,
            DataType::U32 | DataType::I32 | DataType::F32 => 32,
            DataType::F64 => 64,
        }
    }

    /// Bytes per voxel.
    pub fn bytes(self) -> usize {
        self.bits() as usize / 8
    }

    /// The numpy-style name, e.g. `"int16"`, `"float32"`.
    pub fn name(self) -> &'static str {
        match self {
            DataType::U8 => "uint8",
            DataType::I8 => "int8",
            DataType::U16 => "uint16",
            DataType::I16 => "int16",
            DataType::U32 => "uint32",
            DataType::I32 => "int32",
            DataType::F32 => "float32",
            DataType::F64 => "float64",
        }
    }

    /// True for the integer datatypes.
    pub fn is_integer(self) -> bool {
        !matches!(self, DataType::F32 | DataType::F64)
    }
}

/// Which header fields the voxel-to-world affine was taken from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum AffineSource {
    /// `srow_x/y/z` (used when `sform_code > 0`).
    Sform,
    /// The quaternion, offsets, `pixdim` and `qfac` (used when `qform_code > 0` and no sform).
    Qform,
    /// `diag(pixdim[1..=3])` with zero origin (NIfTI "method 1", when neither code is set).
    Pixdim,
}

impl AffineSource {
    /// `"sform"`, `"qform"` or `"pixdim"`.
    pub fn as_str(self) -> &'static str {
        match self {
            AffineSource::Sform => "sform",
            AffineSource::Qform => "qform",
            AffineSource::Pixdim => "pixdim",
        }
    }
}

/// What a NIfTI-1 header says, validated.
#[derive(Clone, Debug)]
pub struct HeaderInfo {
    /// `dim[1..=dim[0]]`: the array extents, i fastest on disk.
    pub dims: Vec<usize>,
    /// The voxel datatype.
    pub datatype: DataType,
    /// Bits per voxel.
    pub bitpix: u16,
    /// Raw `pixdim[0..8]` (`pixdim[0]` is `qfac`).
    pub pixdim: [f32; 8],
    /// The spatial grid (the first three extents, missing ones taken as 1) with its affine.
    pub grid: Grid,
    /// Which fields the affine came from.
    pub affine_source: AffineSource,
    /// `sform_code` (0 = unset).
    pub sform_code: i16,
    /// `qform_code` (0 = unset).
    pub qform_code: i16,
    /// `scl_slope` (applied when non-zero and finite: `value = slope·raw + inter`).
    pub scl_slope: f32,
    /// `scl_inter`.
    pub scl_inter: f32,
    /// `intent_code` (1006 = displacement vectors).
    pub intent_code: i16,
    /// `intent_name` up to its first NUL.
    pub intent_name: String,
    /// `descrip` up to its first NUL.
    pub descrip: String,
    /// Byte offset of the voxel data.
    pub vox_offset: u64,
    /// Bytes of voxel data the header announces.
    pub data_bytes: u64,
    /// True when the file is gzip-compressed.
    pub gzip: bool,
    /// True when the file is little-endian.
    pub little_endian: bool,
}

impl HeaderInfo {
    /// Number of voxels in the spatial grid.
    pub fn n_spatial(&self) -> usize {
        self.grid.len()
    }

    /// Product of the extents beyond the third (volumes, vector components); 1 for 3-D files.
    pub fn n_extra(&self) -> usize {
        self.dims.iter().skip(3).product()
    }

    /// Scaling `(slope, inter)` to apply to raw values, or `None` when `scl_slope` is 0 or not
    /// finite (NIfTI-1: no scaling then).
    pub fn scaling(&self) -> Option<(f64, f64)> {
        let s = self.scl_slope as f64;
        let i = self.scl_inter as f64;
        (s != 0.0 && s.is_finite()).then_some((s, if i.is_finite() { i } else { 0.0 }))
    }
}

fn bad(path: &Path, reason: impl Into<String>) -> IoError {
    IoError::BadHeader { path: path.to_path_buf(), reason: reason.into() }
}

fn c_string(bytes: &[u8]) -> String {
    let end = bytes.iter().position(|&b| b == 0).unwrap_or(bytes.len());
    String::from_utf8_lossy(&bytes[..end]).trim_end().to_string()
}

/// Checks the first four bytes (`sizeof_hdr`) in both byte orders.
pub(crate) fn check_sizeof_hdr(path: &Path, first4: [u8; 4]) -> Result<(), IoError> {
    let le = i32::from_le_bytes(first4);
    let be = i32::from_be_bytes(first4);
    if le == 348 || be == 348 {
        Ok(())
    } else if le == 540 || be == 540 {
        Err(IoError::Nifti2 { path: path.to_path_buf() })
    } else {
        Err(IoError::NotNifti { path: path.to_path_buf(), reason: format!("sizeof_hdr is {le}, expected 348") })
    }
}

/// Parses and validates a 348-byte NIfTI-1 header.
pub(crate) fn parse(path: &Path, bytes: &[u8; HEADER_SIZE], gzip: bool) -> Result<HeaderInfo, IoError> {
    check_sizeof_hdr(path, [bytes[0], bytes[1], bytes[2], bytes[3]])?;
    let magic = &bytes[344..348];
    if magic == b"ni1\0" {
        return Err(IoError::NotNifti {
            path: path.to_path_buf(),
            reason: "header-only file (magic \"ni1\"): separate .hdr/.img pairs are not supported".into(),
        });
    }
    // The byte order is the one in which sizeof_hdr reads 348; check dim[0] in that order
    // first (the parser guesses the order from dim[0] itself, which misreads a bad dim[0]).
    let little = i32::from_le_bytes([bytes[0], bytes[1], bytes[2], bytes[3]]) == HEADER_SIZE as i32;
    let dim0 =
        if little { i16::from_le_bytes([bytes[40], bytes[41]]) } else { i16::from_be_bytes([bytes[40], bytes[41]]) };
    if !(1..=7).contains(&dim0) {
        return Err(bad(path, format!("dim[0] = {dim0} is not in 1..=7")));
    }
    let h = nifti::NiftiHeader::from_reader(&bytes[..]).map_err(|_| IoError::NotNifti {
        path: path.to_path_buf(),
        reason: format!("wrong magic {:?}, expected \"n+1\\0\"", String::from_utf8_lossy(magic)),
    })?;
    // dim[] is int16 on disk; the parser keeps it as u16, so reinterpret the bits.
    let dim: [i16; 8] = h.dim.map(|d| d as i16);
    if !(1..=7).contains(&dim[0]) {
        return Err(bad(path, format!("dim[0] = {} is not in 1..=7", dim[0])));
    }
    let nd = dim[0] as usize;
    let mut dims = Vec::with_capacity(nd);
    for (d, &v) in dim[1..=nd].iter().enumerate() {
        if v < 1 {
            return Err(bad(path, format!("dim[{}] = {v} must be at least 1", d + 1)));
        }
        dims.push(v as usize);
    }
    let datatype = DataType::from_code(h.datatype)
        .ok_or(IoError::UnsupportedDatatype { path: path.to_path_buf(), code: h.datatype })?;
    if h.bitpix != datatype.bits() as i16 {
        return Err(bad(
            path,
            format!("bitpix = {} disagrees with datatype {} ({} bits)", h.bitpix, datatype.name(), datatype.bits()),
        ));
    }
    let vo = h.vox_offset;
    if !vo.is_finite() || vo < WRITE_VOX_OFFSET as f32 || vo.fract() != 0.0 {
        return Err(bad(path, format!("vox_offset = {vo} must be a whole number of at least {WRITE_VOX_OFFSET}")));
    }
    let vox_offset = vo as u64;
    let n_values = dims.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d as u64));
    let data_bytes = n_values.and_then(|n| n.checked_mul(datatype.bytes() as u64)).unwrap_or(u64::MAX);

    let shape = [0, 1, 2].map(|d| dims.get(d).copied().unwrap_or(1));
    let (affine, affine_source) = best_affine(path, &h, nd)?;
    let grid = Grid::new(shape, affine).map_err(|e| IoError::BadAffine {
        path: path.to_path_buf(),
        source_name: affine_source.as_str(),
        reason: e.to_string(),
    })?;
    Ok(HeaderInfo {
        dims,
        datatype,
        bitpix: datatype.bits(),
        pixdim: h.pixdim,
        grid,
        affine_source,
        sform_code: h.sform_code,
        qform_code: h.qform_code,
        scl_slope: h.scl_slope,
        scl_inter: h.scl_inter,
        intent_code: h.intent_code,
        intent_name: c_string(&h.intent_name),
        descrip: c_string(&h.descrip),
        vox_offset,
        data_bytes,
        gzip,
        little_endian: h.endianness == nifti::Endianness::Little,
    })
}

/// The spatial `pixdim[1..=3]`, checked finite and non-zero; axes beyond `dim[0]` may be 0
/// (taken as 1 mm).
fn spatial_pixdim(path: &Path, h: &nifti::NiftiHeader, nd: usize, what: &str) -> Result<[f64; 3], IoError> {
    let mut s = [1.0; 3];
    for (d, sd) in s.iter_mut().enumerate() {
        let v = h.pixdim[d + 1] as f64;
        if d >= nd && (v == 0.0 || !v.is_finite()) {
            continue;
        }
        if v == 0.0 || !v.is_finite() {
            return Err(bad(
                path,
                format!("pixdim[{}] = {v} is zero or not finite but is needed for the {what}", d + 1),
            ));
        }
        *sd = v;
    }
    Ok(s)
}

/// The voxel-to-world map: sform if `sform_code > 0`, else qform if `qform_code > 0`, else
/// `diag(pixdim)` (NIfTI-1 methods 3, 2 and 1).
fn best_affine(path: &Path, h: &nifti::NiftiHeader, nd: usize) -> Result<(Affine, AffineSource), IoError> {
    if h.sform_code > 0 {
        let r = |row: &[f32; 4]| row.map(|v| v as f64);
        return Ok((Affine { m: [r(&h.srow_x), r(&h.srow_y), r(&h.srow_z)] }, AffineSource::Sform));
    }
    if h.qform_code > 0 {
        let s = spatial_pixdim(path, h, nd, "qform")?;
        let quat = [h.quatern_b, h.quatern_c, h.quatern_d].map(|v| v as f64);
        let offset = [h.quatern_x, h.quatern_y, h.quatern_z].map(|v| v as f64);
        if !quat.iter().chain(&offset).all(|v| v.is_finite()) {
            return Err(IoError::BadAffine {
                path: path.to_path_buf(),
                source_name: "qform",
                reason: "quaternion or offset not finite".into(),
            });
        }
        // Method 2 uses |pixdim| (a negative spacing is not meaningful there; the sign of the
        // third axis is carried by qfac).
        let qfac = if h.pixdim[0] < 0.0 { -1.0 } else { 1.0 };
        return Ok((qform_affine(quat, s.map(f64::abs), qfac, offset), AffineSource::Qform));
    }
    let s = spatial_pixdim(path, h, nd, "pixdim affine")?;
    Ok((Affine::from_spacing_origin(s, [0.0; 3]), AffineSource::Pixdim))
}

/// The qform map of NIfTI-1 method 2 (formula in the comments of `nifti1.h`):
///
/// `a = sqrt(1 − b² − c² − d²)` and
/// ```text
///     [ a²+b²−c²−d²   2bc−2ad       2bd+2ac     ]
/// R = [ 2bc+2ad       a²+c²−b²−d²   2cd−2ab     ]
///     [ 2bd−2ac       2cd+2ab       a²+d²−c²−b² ]
/// ```
/// `[x y z]ᵀ = R · diag(pixdim1, pixdim2, qfac·pixdim3) · [i j k]ᵀ + [qoffset_x y z]ᵀ`.
/// When `1 − b² − c² − d²` is below 1e-7 the quaternion is renormalised with `a = 0`.
pub fn qform_affine(quat: [f64; 3], spacing: [f64; 3], qfac: f64, offset: [f64; 3]) -> Affine {
    let [mut b, mut c, mut d] = quat;
    let mut a = 1.0 - (b * b + c * c + d * d);
    if a < 1e-7 {
        let n = 1.0 / (b * b + c * c + d * d).sqrt();
        b *= n;
        c *= n;
        d *= n;
        a = 0.0;
    } else {
        a = a.sqrt();
    }
    let r = [
        [a * a + b * b - c * c - d * d, 2.0 * (b * c - a * d), 2.0 * (b * d + a * c)],
        [2.0 * (b * c + a * d), a * a + c * c - b * b - d * d, 2.0 * (c * d - a * b)],
        [2.0 * (b * d - a * c), 2.0 * (c * d + a * b), a * a + d * d - c * c - b * b],
    ];
    let z = [spacing[0], spacing[1], qfac * spacing[2]];
    let mut lin = [[0.0; 3]; 3];
    for row in 0..3 {
        for col in 0..3 {
            lin[row][col] = r[row][col] * z[col];
        }
    }
    Affine::from_parts(lin, offset)
}

/// The qform parameters closest to `affine`: `(quaternion b c d, spacing, qfac, offset)`.
///
/// Spacing is the column norms; the normalised columns (third negated when the determinant
/// is negative, giving `qfac = −1`) are replaced by their nearest rotation (orthogonal polar
/// factor, by the Newton iteration `X ← (X + X⁻ᵀ)/2`), so an affine with shear gets the
/// closest rigid qform while the sform keeps it exactly. The quaternion is taken with `a ≥ 0`.
pub fn affine_to_qform(affine: &Affine) -> ([f64; 3], [f64; 3], f64, [f64; 3]) {
    let lin = affine.linear();
    let spacing = affine.column_norms();
    let mut x = [[0.0; 3]; 3];
    for r in 0..3 {
        for c in 0..3 {
            x[r][c] = lin[r][c] / spacing[c];
        }
    }
    let qfac = if det3(&x) < 0.0 { -1.0 } else { 1.0 };
    for row in x.iter_mut() {
        row[2] *= qfac;
    }
    for _ in 0..100 {
        let inv = Affine::from_parts(x, [0.0; 3]).inverse().expect("a grid affine is non-singular").linear();
        let mut next = [[0.0; 3]; 3];
        let mut change = 0.0f64;
        for r in 0..3 {
            for c in 0..3 {
                next[r][c] = 0.5 * (x[r][c] + inv[c][r]);
                change = change.max((next[r][c] - x[r][c]).abs());
            }
        }
        x = next;
        if change < 1e-15 {
            break;
        }
    }
    (rotation_to_quaternion(&x), spacing, qfac, affine.translation())
}

/// Quaternion `(b, c, d)` with `a ≥ 0` of a rotation matrix (the inverse of [`qform_affine`]'s
/// `R`), choosing the numerically largest of `a, b, c, d` first.
fn rotation_to_quaternion(r: &[[f64; 3]; 3]) -> [f64; 3] {
    let tr = r[0][0] + r[1][1] + r[2][2];
    let (a, b, c, d);
    if tr > 0.0 {
        let s = 2.0 * (tr + 1.0).sqrt(); // s = 4a
        a = 0.25 * s;
        b = (r[2][1] - r[1][2]) / s;
        c = (r[0][2] - r[2][0]) / s;
        d = (r[1][0] - r[0][1]) / s;
    } else if r[0][0] > r[1][1] && r[0][0] > r[2][2] {
        let s = 2.0 * (1.0 + r[0][0] - r[1][1] - r[2][2]).sqrt(); // s = 4b
        a = (r[2][1] - r[1][2]) / s;
        b = 0.25 * s;
        c = (r[0][1] + r[1][0]) / s;
        d = (r[0][2] + r[2][0]) / s;
    } else if r[1][1] > r[2][2] {
        let s = 2.0 * (1.0 + r[1][1] - r[0][0] - r[2][2]).sqrt(); // s = 4c
        a = (r[0][2] - r[2][0]) / s;
        b = (r[0][1] + r[1][0]) / s;
        c = 0.25 * s;
        d = (r[1][2] + r[2][1]) / s;
    } else {
        let s = 2.0 * (1.0 + r[2][2] - r[0][0] - r[1][1]).sqrt(); // s = 4d
        a = (r[1][0] - r[0][1]) / s;
        b = (r[0][2] + r[2][0]) / s;
        c = (r[1][2] + r[2][1]) / s;
        d = 0.25 * s;
    }
    let sign = if a < 0.0 { -1.0 } else { 1.0 };
    [sign * b, sign * c, sign * d]
}

/// What goes into a header we write, beyond the grid.
pub(crate) struct WriteHeader<'a> {
    /// `dim[1..]` (3 entries for volumes, 5 for fields).
    pub dims: &'a [usize],
    pub datatype: DataType,
    pub intent_code: i16,
    pub intent_name: &'a str,
    pub descrip: &'a str,
}

/// Serialises a little-endian NIfTI-1 header plus the 4-byte empty extension flag
/// (352 bytes): sform and qform both set from the grid (codes 1, scanner anatomical),
/// `pixdim` = spacing, `xyzt_units` = mm, `scl_slope` 1, `scl_inter` 0.
///
/// # Panics
/// When an extent exceeds `i16::MAX` or `dims` has more than 7 entries (callers check).
#[track_caller]
pub(crate) fn serialize(grid: &Grid, w: &WriteHeader<'_>) -> Vec<u8> {
    assert!(w.dims.len() <= 7 && w.dims.iter().all(|&d| (1..=i16::MAX as usize).contains(&d)), "dims {:?}", w.dims);
    let mut b = vec![0u8; WRITE_VOX_OFFSET];
    let put_i16 = |b: &mut [u8], off: usize, v: i16| b[off..off + 2].copy_from_slice(&v.to_le_bytes());
    let put_f32 = |b: &mut [u8], off: usize, v: f64| b[off..off + 4].copy_from_slice(&(v as f32).to_le_bytes());
    b[0..4].copy_from_slice(&(HEADER_SIZE as i32).to_le_bytes());
    b[38] = b'r'; // "regular"
    put_i16(&mut b, 40, w.dims.len() as i16);
    for (d, &n) in w.dims.iter().enumerate() {
        put_i16(&mut b, 42 + 2 * d, n as i16);
    }
    for d in w.dims.len()..7 {
        put_i16(&mut b, 42 + 2 * d, 1);
    }
    put_i16(&mut b, 68, w.intent_code);
    put_i16(&mut b, 70, w.datatype.code());
    put_i16(&mut b, 72, w.datatype.bits() as i16);
    let (quat, spacing, qfac, offset) = affine_to_qform(grid.affine());
    put_f32(&mut b, 76, qfac);
    for (d, &sp) in spacing.iter().enumerate() {
        put_f32(&mut b, 80 + 4 * d, sp);
    }
    for d in 3..7 {
        put_f32(&mut b, 80 + 4 * d, 1.0);
    }
    put_f32(&mut b, 108, WRITE_VOX_OFFSET as f64);
    put_f32(&mut b, 112, 1.0); // scl_slope
    put_f32(&mut b, 116, 0.0); // scl_inter
    b[123] = 2; // xyzt_units: NIFTI_UNITS_MM
    let desc = w.descrip.as_bytes();
    b[148..148 + desc.len().min(79)].copy_from_slice(&desc[..desc.len().min(79)]);
    put_i16(&mut b, 252, 1); // qform_code: scanner anatomical
    put_i16(&mut b, 254, 1); // sform_code: scanner anatomical
    for (d, (&q, &o)) in quat.iter().zip(&offset).enumerate() {
        put_f32(&mut b, 256 + 4 * d, q);
        put_f32(&mut b, 268 + 4 * d, o);
    }
    for (r, row) in grid.affine().m.iter().enumerate() {
        for (c, &v) in row.iter().enumerate() {
            put_f32(&mut b, 280 + 16 * r + 4 * c, v);
        }
    }
    let name = w.intent_name.as_bytes();
    b[328..328 + name.len().min(15)].copy_from_slice(&name[..name.len().min(15)]);
    b[344..348].copy_from_slice(b"n+1\0");
    b
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sheared_affine_gets_nearest_rotation() {
        let a = Affine::from_parts([[1.0, 0.2, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 2.0]], [0.0; 3]);
        let (q, sp, qfac, off) = affine_to_qform(&a);
        let b = qform_affine(q, [1.0; 3], qfac, off);
        // The result is a rotation: columns orthonormal.
        let l = b.linear();
        for c1 in 0..3 {
            for c2 in 0..3 {
                let dot: f64 = (0..3).map(|r| l[r][c1] * l[r][c2]).sum();
                approx::assert_abs_diff_eq!(dot, if c1 == c2 { 1.0 } else { 0.0 }, epsilon = 1e-12);
            }
        }
        approx::assert_abs_diff_eq!(sp[1], (1.0f64 + 0.04).sqrt(), epsilon = 1e-12);
    }
}
