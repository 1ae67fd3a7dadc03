//! Minimal `.npy` reader for test fixtures (format version 1.0/2.0, little-endian `<f4`/`<f8`,
//! C order), following the published NPY format description in the numpy documentation
//! (`numpy.lib.format`). Test support only.
#![allow(dead_code)]

use std::path::{Path, PathBuf};

/// A loaded array: its shape and its values widened to `f64`, C order.
pub struct Npy {
    pub shape: Vec<usize>,
    pub data: Vec<f64>,
}

/// `tests/fixtures/<name>` at the workspace root.
pub fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/fixtures").join(name)
}

/// Reads a `<f4` or `<f8` C-order `.npy` file; panics with the path on any problem.
#[track_caller]
pub fn read(path: &Path) -> Npy {
    let bytes = std::fs::read(path)
        .unwrap_or_else(|e| panic!("{}: {e} (run python3 scripts/make_fixtures.py)", path.display()));
    assert_eq!(&bytes[..6], b"\x93NUMPY", "{}: not an npy file", path.display());
    let (hlen, hstart) = match bytes[6] {
        1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
        2 | 3 => (u32::from_le_bytes(bytes[8..12].try_into().unwrap()) as usize, 12),
        v => panic!("{}: npy version {v}", path.display()),
    };
    let header = std::str::from_utf8(&bytes[hstart..hstart + hlen]).unwrap();
    assert!(header.contains("'fortran_order': False"), "{}: C order expected", path.display());
    let width = if header.contains("'<f4'") {
        4
    } else if header.contains("'<f8'") {
        8
    } else {
        panic!("{}: unsupported dtype in {header}", path.display())
    };
    let sh = &header[header.find("'shape': (").unwrap() + 10..];
    let sh = &sh[..sh.find(')').unwrap()];
    let shape: Vec<usize> =
        sh.split(',').map(str::trim).filter(|s| !s.is_empty()).map(|s| s.parse().unwrap()).collect();
    let body = &bytes[hstart + hlen..];
    let n: usize = shape.iter().product();
    assert_eq!(body.len(), n * width, "{}: size", path.display());
    let data = if width == 4 {
        body.chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().unwrap()) as f64).collect()
    } else {
        body.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap())).collect()
    };
    Npy { shape, data }
}
