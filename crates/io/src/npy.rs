//! `.npy` displacement fields (NumPy format version 1.0 written; 1.0–3.0 read), voxel units.
//!
//! Format (NumPy Enhancement Proposal 1, "A Simple File Format for NumPy Arrays"): the
//! magic `\x93NUMPY`, a major and minor version byte, the header length (u16 little-endian
//! for 1.0, u32 for 2.0/3.0), then an ASCII Python dict literal with `descr`,
//! `fortran_order` and `shape`, padded with spaces and ending in `\n` so that the data
//! starts at a multiple of 64 bytes. Written by hand: it is a few lines, and it lets the
//! reader check sizes before allocating.

use std::path::Path;

use ndarray::{Array4, ShapeBuilder};
use sinew_grid::{Field, Grid};

use crate::atomic::write_atomic;
use crate::IoError;

/// Axis order of a `.npy` displacement array.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum NpyLayout {
    /// `(nx, ny, nz, 3)`: the vector is the last axis (what [`write_npy_field`] writes).
    ChannelLast,
    /// `(3, nx, ny, nz)`: one block per component.
    ChannelFirst,
}

const MAGIC: &[u8; 6] = b"\x93NUMPY";

/// Writes `field` as `.npy` of shape `(nx, ny, nz, 3)`, float32 little-endian, C order,
/// displacements in voxels along the array axes i, j, k.
pub fn write_npy_field(path: &Path, field: &Field) -> Result<(), IoError> {
    let [nx, ny, nz] = field.grid.shape();
    let mut dict = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': ({nx}, {ny}, {nz}, 3), }}");
    let unpadded = MAGIC.len() + 2 + 2 + dict.len() + 1;
    dict.push_str(&" ".repeat(unpadded.next_multiple_of(64) - unpadded));
    dict.push('\n');
    let data = field.to_voxel_channel_last();
    write_atomic(path, |w| {
        w.write_all(MAGIC)?;
        w.write_all(&[1, 0])?;
        w.write_all(&(dict.len() as u16).to_le_bytes())?;
        w.write_all(dict.as_bytes())?;
        let mut buf = Vec::with_capacity(4 * 65536);
        for chunk in data.as_slice().expect("standard layout").chunks(65536) {
            buf.clear();
            chunk.iter().for_each(|v| buf.extend_from_slice(&v.to_le_bytes()));
            w.write_all(&buf)?;
        }
        Ok(())
    })
}

fn bad(path: &Path, reason: impl Into<String>) -> IoError {
    IoError::BadNpy { path: path.to_path_buf(), reason: reason.into() }
}

/// The text after `'key':` in a header dict, trimmed.
fn dict_value<'a>(dict: &'a str, key: &str) -> Option<&'a str> {
    let at = dict.find(&format!("'{key}'"))? + key.len() + 2;
    let rest = dict[at..].trim_start().strip_prefix(':')?;
    Some(rest.trim_start())
}

/// Parsed header: (element size 2, 4 or 8, little-endian, fortran order, shape, data offset).
type NpyHeader = (usize, bool, bool, Vec<usize>, usize);

fn parse_header(path: &Path, bytes: &[u8]) -> Result<NpyHeader, IoError> {
    if bytes.len() < 10 || &bytes[..6] != MAGIC {
        return Err(bad(path, "missing the \\x93NUMPY magic"));
    }
    let (len, start): (usize, usize) = match bytes[6] {
        1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
        2 | 3 if bytes.len() >= 12 => (u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]) as usize, 12),
        v => return Err(bad(path, format!("unsupported format version {v}"))),
    };
    let end = start
        .checked_add(len)
        .filter(|&e| e <= bytes.len())
        .ok_or_else(|| bad(path, "header runs past the end of the file"))?;
    let dict = std::str::from_utf8(&bytes[start..end]).map_err(|_| bad(path, "header is not text"))?;
    let descr = dict_value(dict, "descr").ok_or_else(|| bad(path, "no 'descr' in header"))?;
    let (size, little) = match descr.get(..5) {
        Some("'<f2'") => (2, true),
        Some("'>f2'") => (2, false),
        Some("'<f4'") => (4, true),
        Some("'>f4'") => (4, false),
        Some("'<f8'") => (8, true),
        Some("'>f8'") => (8, false),
        _ => {
            return Err(bad(
                path,
                format!("dtype {} is not float32, float64 or float16", descr.split(',').next().unwrap_or("")),
            ))
        }
    };
    let fortran = match dict_value(dict, "fortran_order") {
        Some(v) if v.starts_with("False") => false,
        Some(v) if v.starts_with("True") => true,
        _ => return Err(bad(path, "no 'fortran_order' in header")),
    };
    let shape_txt = dict_value(dict, "shape")
        .and_then(|v| v.strip_prefix('('))
        .and_then(|v| v.split(')').next())
        .ok_or_else(|| bad(path, "no 'shape' in header"))?;
    let shape = shape_txt
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(|s| s.parse::<usize>().map_err(|_| bad(path, format!("bad shape entry {s:?}"))))
        .collect::<Result<Vec<_>, _>>()?;
    Ok((size, little, fortran, shape, end))
}

/// Reads a `.npy` displacement field in voxel units (along i, j, k) on `grid`.
///
/// The array must be float32 or float64 (either byte order, C or Fortran order) with shape
/// `(nx, ny, nz, 3)` for [`NpyLayout::ChannelLast`] or `(3, nx, ny, nz)` for
/// [`NpyLayout::ChannelFirst`], where `(nx, ny, nz)` is the grid's shape; the file size must
/// match exactly.
pub fn read_npy_field(path: &Path, grid: &Grid, layout: NpyLayout) -> Result<Field, IoError> {
    let [nx, ny, nz] = grid.shape();
    let expected = match layout {
        NpyLayout::ChannelLast => vec![nx, ny, nz, 3],
        NpyLayout::ChannelFirst => vec![3, nx, ny, nz],
    };
    let file_len = std::fs::metadata(path).map_err(|e| IoError::os(path, "cannot open", e))?.len();
    // Header (< 64 KiB + 12) plus at most 8 bytes per value: refuse anything larger before reading.
    let limit = (grid.len() as u64 * 3 * 8).saturating_add(1 << 17);
    if file_len > limit {
        return Err(bad(path, format!("{file_len} bytes is too large for a field on a {nx}×{ny}×{nz} grid")));
    }
    let bytes = std::fs::read(path).map_err(|e| IoError::os(path, "cannot read", e))?;
    let (size, little, fortran, shape, offset) = parse_header(path, &bytes)?;
    if shape != expected {
        return Err(bad(path, format!("shape {shape:?} does not match the expected {expected:?} ({layout:?})")));
    }
    let data = &bytes[offset..];
    if data.len() != grid.len() * 3 * size {
        return Err(bad(path, format!("{} data bytes, expected {}", data.len(), grid.len() * 3 * size)));
    }
    let values = decode(data, size, little);
    let dims = (shape[0], shape[1], shape[2], shape[3]);
    let arr = Array4::from_shape_vec(dims.set_f(fortran), values).expect("length checked above");
    let field = match layout {
        NpyLayout::ChannelLast => Field::from_voxel_channel_last(grid.clone(), &arr),
        NpyLayout::ChannelFirst => Field::from_voxel_components(grid.clone(), arr),
    };
    field.map_err(|cause| IoError::Grid { path: path.to_path_buf(), cause })
}

/// Converts IEEE 754 binary16 bits to `f32` exactly (every half value is an `f32` value):
/// sign bit 15, exponent bits 10–14 (bias 15), fraction bits 0–9; exponent 0 is zero or
/// subnormal (`fraction · 2⁻²⁴`), exponent 31 is infinity or NaN.
pub fn f16_to_f32(h: u16) -> f32 {
    let sign = if h & 0x8000 != 0 { -1.0f32 } else { 1.0 };
    let exp = (h >> 10) & 0x1f;
    let frac = (h & 0x03ff) as f32;
    match exp {
        0 => sign * frac * 2f32.powi(-24),
        31 if frac == 0.0 => sign * f32::INFINITY,
        31 => f32::NAN,
        e => sign * (1.0 + frac / 1024.0) * 2f32.powi(e as i32 - 15),
    }
}

/// Decodes `data` of `size`-byte floats (2, 4 or 8) in the given byte order to `f32`.
fn decode(data: &[u8], size: usize, little: bool) -> Vec<f32> {
    match (size, little) {
        (2, true) => data.chunks_exact(2).map(|c| f16_to_f32(u16::from_le_bytes([c[0], c[1]]))).collect(),
        (2, false) => data.chunks_exact(2).map(|c| f16_to_f32(u16::from_be_bytes([c[0], c[1]]))).collect(),
        (4, true) => data.chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().expect("4 bytes"))).collect(),
        (4, false) => data.chunks_exact(4).map(|c| f32::from_be_bytes(c.try_into().expect("4 bytes"))).collect(),
        (_, true) => data.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")) as f32).collect(),
        (_, false) => data.chunks_exact(8).map(|c| f64::from_be_bytes(c.try_into().expect("8 bytes")) as f32).collect(),
    }
}

/// A floating-point array read from a `.npy` file or a `.npz` member, in C (row-major)
/// order whatever the file's order, converted to `f32`.
#[derive(Clone, Debug, PartialEq)]
pub struct NpyArray {
    /// The array's shape as stored.
    pub shape: Vec<usize>,
    /// The values in C order (last axis fastest).
    pub values: Vec<f32>,
    /// The stored element type: `"float16"`, `"float32"` or `"float64"`.
    pub dtype: &'static str,
    /// The `.npz` member it came from (without `.npy`), for `.npz` files.
    pub npz_key: Option<String>,
}

/// Parses `.npy` bytes into an [`NpyArray`], refusing more than `max_values` values before
/// allocating them.
fn parse_array(path: &Path, bytes: &[u8], max_values: usize) -> Result<NpyArray, IoError> {
    let (size, little, fortran, shape, offset) = parse_header(path, bytes)?;
    let count = shape.iter().try_fold(1usize, |a, &d| a.checked_mul(d)).unwrap_or(usize::MAX);
    if count > max_values {
        return Err(bad(path, format!("shape {shape:?} holds {count} values, more than the {max_values} expected")));
    }
    let data = &bytes[offset..];
    if data.len() != count * size {
        return Err(bad(path, format!("{} data bytes, expected {} for shape {shape:?}", data.len(), count * size)));
    }
    let mut values = decode(data, size, little);
    if fortran && shape.len() > 1 {
        let arr = ndarray::ArrayD::from_shape_vec(ndarray::IxDyn(&shape).f(), values).expect("length checked above");
        values = arr.as_standard_layout().iter().copied().collect();
    }
    let dtype = match size {
        2 => "float16",
        4 => "float32",
        _ => "float64",
    };
    Ok(NpyArray { shape, values, dtype, npz_key: None })
}

/// Reads a floating-point `.npy` array of any shape (float16, float32 or float64, either byte
/// order, C or Fortran order) holding at most `max_values` values.
pub fn read_npy_array(path: &Path, max_values: usize) -> Result<NpyArray, IoError> {
    let file_len = std::fs::metadata(path).map_err(|e| IoError::os(path, "cannot open", e))?.len();
    if file_len > (max_values as u64).saturating_mul(8).saturating_add(1 << 17) {
        return Err(bad(path, format!("{file_len} bytes is more than an array of {max_values} values needs")));
    }
    let bytes = std::fs::read(path).map_err(|e| IoError::os(path, "cannot read", e))?;
    parse_array(path, &bytes, max_values)
}

/// Reads one array of a `.npz` archive (what `numpy.savez` and `numpy.savez_compressed`
/// write: a zip file of `.npy` members, stored or deflated). With `key`, the member
/// `key.npy`; without, the archive must hold exactly one array.
pub fn read_npz_array(path: &Path, key: Option<&str>, max_values: usize) -> Result<NpyArray, IoError> {
    let file = std::fs::File::open(path).map_err(|e| IoError::os(path, "cannot open", e))?;
    let mut zip = zip::ZipArchive::new(std::io::BufReader::new(file))
        .map_err(|e| bad(path, format!("not a .npz (zip) archive: {e}")))?;
    let names: Vec<String> = zip.file_names().filter_map(|n| n.strip_suffix(".npy")).map(str::to_string).collect();
    let chosen = match key {
        Some(k) if names.iter().any(|n| n == k) => k.to_string(),
        Some(k) => return Err(bad(path, format!("no array {k:?} in the archive (it holds {names:?})"))),
        None if names.len() == 1 => names[0].clone(),
        None => {
            return Err(bad(path, format!("the archive holds {} arrays {names:?}: name one (--npz-key)", names.len())))
        }
    };
    let mut member =
        zip.by_name(&format!("{chosen}.npy")).map_err(|e| bad(path, format!("cannot open member {chosen:?}: {e}")))?;
    if member.size() > (max_values as u64).saturating_mul(8).saturating_add(1 << 17) {
        return Err(bad(path, format!("member {chosen:?} is more than an array of {max_values} values needs")));
    }
    let mut bytes = Vec::with_capacity(member.size() as usize);
    std::io::Read::read_to_end(&mut member, &mut bytes)
        .map_err(|e| bad(path, format!("cannot read member {chosen:?}: {e}")))?;
    let mut arr = parse_array(path, &bytes, max_values)?;
    arr.npz_key = Some(chosen);
    Ok(arr)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn half_floats_decode_exactly() {
        // IEEE 754-2008 binary16 examples (exact values, from the format's definition):
        // 0x3c00 = 1, 0xc000 = -2, 0x7bff = 65504 (largest finite), 0x0001 = 2^-24 (smallest
        // subnormal), 0x0400 = 2^-14 (smallest normal), 0x3555 = 0.333251953125, 0x7c00 = +inf.
        assert_eq!(f16_to_f32(0x3c00), 1.0);
        assert_eq!(f16_to_f32(0xc000), -2.0);
        assert_eq!(f16_to_f32(0x7bff), 65504.0);
        assert_eq!(f16_to_f32(0x0001), 2f32.powi(-24));
        assert_eq!(f16_to_f32(0x0400), 2f32.powi(-14));
        assert_eq!(f16_to_f32(0x3555), 0.333_251_95);
        assert_eq!(f16_to_f32(0x7c00), f32::INFINITY);
        assert!(f16_to_f32(0x7e00).is_nan());
        assert_eq!(f16_to_f32(0x8000), 0.0);
    }
}
