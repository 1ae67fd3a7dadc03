//! Malformed inputs: each is a clean `Err` naming the file and the problem, never a panic,
//! and nothing large is allocated on a header's word alone. Bad files are made by patching
//! header fields of a valid file at the offsets of the NIfTI-1 standard header (nifti1.h).

use std::io::Write;
use std::path::{Path, PathBuf};

use sinew_grid::{Grid, Volume};
use sinew_io::*;

fn valid(dir: &Path, name: &str) -> PathBuf {
    let p = dir.join(name);
    let grid = Grid::axis_aligned([5, 4, 3], [1.0, 2.0, 3.0], [0.0; 3]);
    let data = ndarray::Array3::from_shape_fn((5, 4, 3), |(i, j, k)| ((i * 7 + j * 13 + k * 29) as f32).sin() * 1e3);
    let img = Volume::new(grid, data).unwrap();
    write_image(&p, &img).unwrap();
    p
}

fn patched(dir: &Path, name: &str, edits: &[(usize, &[u8])]) -> PathBuf {
    let src = valid(dir, "src.nii");
    let mut b = std::fs::read(src).unwrap();
    for (off, bytes) in edits {
        b[*off..*off + bytes.len()].copy_from_slice(bytes);
    }
    let p = dir.join(name);
    std::fs::write(&p, b).unwrap();
    p
}

/// Asserts a one-line error that names the file and contains `needle`.
fn expect_err(r: Result<impl std::fmt::Debug, IoError>, path: &Path, needle: &str) -> IoError {
    let e = r.expect_err("malformed file was accepted");
    let msg = e.to_string();
    assert!(msg.contains(path.file_name().unwrap().to_str().unwrap()), "does not name the file: {msg}");
    assert!(msg.contains(needle), "expected {needle:?} in: {msg}");
    assert!(!msg.contains('\n'), "not one line: {msg}");
    assert_eq!(e.path(), path);
    e
}

#[test]
fn truncated_plain_and_gz() {
    let dir = tempfile::tempdir().unwrap();
    let p = valid(dir.path(), "t.nii");
    let b = std::fs::read(&p).unwrap();
    std::fs::write(&p, &b[..b.len() - 10]).unwrap();
    let e = expect_err(read_image(&p), &p, "truncated");
    assert!(matches!(e, IoError::Truncated { expected: 240, found: 230, .. }), "{e:?}");
    std::fs::write(&p, &b[..200]).unwrap();
    expect_err(read_image(&p), &p, "shorter than a NIfTI-1 header");
    std::fs::write(&p, b"").unwrap();
    expect_err(read_header(&p), &p, "shorter than a NIfTI-1 header");

    let g = valid(dir.path(), "t.nii.gz");
    let gz = std::fs::read(&g).unwrap();
    std::fs::write(&g, &gz[..gz.len() - 20]).unwrap();
    let e = read_image(&g).unwrap_err();
    assert!(matches!(e, IoError::Truncated { .. } | IoError::Os { .. }), "{e:?}");
    assert!(e.to_string().contains("t.nii.gz"));
    // Corrupt deflate data.
    let mut bad = gz.clone();
    for v in &mut bad[30..60] {
        *v ^= 0x5a;
    }
    std::fs::write(&g, &bad).unwrap();
    assert!(read_image(&g).is_err());
}

#[test]
fn wrong_magic_and_sizes() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let p = patched(d, "magic.nii", &[(344, b"abc\0")]);
    expect_err(read_image(&p), &p, "wrong magic");
    let p = patched(d, "pair.nii", &[(344, b"ni1\0")]);
    expect_err(read_image(&p), &p, ".hdr/.img");
    let p = patched(d, "sizeof.nii", &[(0, &100i32.to_le_bytes())]);
    expect_err(read_image(&p), &p, "sizeof_hdr is 100");
    // NIfTI-2: sizeof_hdr 540 and magic "n+2" at offset 4 (NIfTI-2 header layout).
    let p = d.join("two.nii");
    let mut f = std::fs::File::create(&p).unwrap();
    f.write_all(&540i32.to_le_bytes()).unwrap();
    f.write_all(b"n+2\0\r\n\x1a\n").unwrap();
    f.write_all(&[0u8; 600]).unwrap();
    drop(f);
    expect_err(read_image(&p), &p, "NIfTI-2 not supported");
    let p = d.join("text.nii");
    std::fs::write(&p, "hello, this is not an image".repeat(20)).unwrap();
    expect_err(read_image(&p), &p, "not a NIfTI-1 file");
    let p = d.join("missing.nii");
    expect_err(read_image(&p), &p, "cannot open");
}

#[test]
fn bad_header_fields() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    type Case = (&'static str, Vec<(usize, Vec<u8>)>, &'static str);
    let cases: Vec<Case> = vec![
        ("bitpix.nii", vec![(72, 16i16.to_le_bytes().to_vec())], "bitpix = 16 disagrees with datatype float32"),
        ("negdim.nii", vec![(44, (-4i16).to_le_bytes().to_vec())], "dim[2] = -4"),
        ("zerodim.nii", vec![(42, 0i16.to_le_bytes().to_vec())], "dim[1] = 0"),
        ("dim0.nii", vec![(40, 0i16.to_le_bytes().to_vec())], "dim[0] = 0"),
        ("dim0big.nii", vec![(40, 8i16.to_le_bytes().to_vec())], "dim[0] = 8 is not in 1..=7"),
        ("dim0neg.nii", vec![(40, (-3i16).to_le_bytes().to_vec())], "dim[0] = -3"),
        ("voxoff.nii", vec![(108, 100f32.to_le_bytes().to_vec())], "vox_offset = 100"),
        ("voxoffnan.nii", vec![(108, f32::NAN.to_le_bytes().to_vec())], "vox_offset"),
        ("dtype.nii", vec![(70, 32i16.to_le_bytes().to_vec())], "unsupported datatype code 32"),
        // qform in use (sform_code 0) with a zero pixdim[2].
        ("pixdim.nii", vec![(254, 0i16.to_le_bytes().to_vec()), (84, 0f32.to_le_bytes().to_vec())], "pixdim[2] = 0"),
        // neither code, NaN pixdim[1]
        ("pixnan.nii", vec![(252, vec![0; 4]), (80, f32::NAN.to_le_bytes().to_vec())], "pixdim[1] = NaN"),
        // sform in use, all rows zero: singular
        ("singular.nii", vec![(280, vec![0; 48])], "singular"),
        ("sformnan.nii", vec![(280, f32::INFINITY.to_le_bytes().to_vec())], "sform"),
    ];
    for (name, edits, needle) in cases {
        let edits: Vec<(usize, &[u8])> = edits.iter().map(|(o, b)| (*o, b.as_slice())).collect();
        let p = patched(d, name, &edits);
        expect_err(read_header(&p), &p, needle);
        expect_err(read_image(&p), &p, needle);
    }
}

#[test]
fn huge_claims_are_refused_before_allocating() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let big = 32767i16.to_le_bytes();
    // 32767³ float64 voxels ≈ 281 TB claimed by a 592-byte file.
    let p = patched(
        d,
        "huge.nii",
        &[(42, &big), (44, &big), (46, &big), (70, &64i16.to_le_bytes()), (72, &64i16.to_le_bytes())],
    );
    let e = expect_err(read_image(&p), &p, "more than the limit");
    assert!(matches!(e, IoError::TooLarge { bytes, .. } if bytes == 32767u64.pow(3) * 8));
    // 7-D: 32767^7 overflows u64: saturated, still refused.
    let mut edits: Vec<(usize, &[u8])> = vec![(40, &[7, 0])];
    for k in 0..7 {
        edits.push((42 + 2 * k, &big));
    }
    let p = patched(d, "huge7.nii", &edits);
    expect_err(read_header(&p).and_then(|_| read_image(&p)), &p, "more than the limit");
    // Under the limit but the file is short: refused from the file size, before allocating.
    let p = patched(
        d,
        "short.nii",
        &[(42, &1000i16.to_le_bytes()), (44, &1000i16.to_le_bytes()), (46, &1000i16.to_le_bytes())],
    );
    expect_err(read_image(&p), &p, "truncated");
    // A small explicit limit.
    let p = valid(d, "ok.nii");
    expect_err(read_image_of(Nifti::File(&p), &ReadOptions { max_bytes: 100 }), &p, "limit of 100 bytes");
}

#[test]
fn huge_claim_in_gzip_is_bounded_by_the_stream() {
    // 1000³ uint8 = 1 GB claimed by a tiny .gz: reading stops at the end of the stream.
    let dir = tempfile::tempdir().unwrap();
    let src = valid(dir.path(), "src.nii");
    let mut b = std::fs::read(src).unwrap();
    for off in [42, 44, 46] {
        b[off..off + 2].copy_from_slice(&1000i16.to_le_bytes());
    }
    b[70..72].copy_from_slice(&2i16.to_le_bytes());
    b[72..74].copy_from_slice(&8i16.to_le_bytes());
    let p = dir.path().join("claim.nii.gz");
    let mut enc = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
    enc.write_all(&b).unwrap();
    std::fs::write(&p, enc.finish().unwrap()).unwrap();
    let e = expect_err(read_image(&p), &p, "truncated");
    assert!(matches!(e, IoError::Truncated { expected: 1_000_000_000, .. }));
}

#[test]
fn random_corruption_never_panics() {
    // Seeded xorshift mutations of a valid file: every outcome must be Ok or Err.
    let dir = tempfile::tempdir().unwrap();
    let src = std::fs::read(valid(dir.path(), "src.nii")).unwrap();
    let p = dir.path().join("fuzz.nii");
    let mut state = 0x9e3779b97f4a7c15u64;
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    for _ in 0..400 {
        let mut b = src.clone();
        for _ in 0..1 + next() % 4 {
            let off = (next() % 352) as usize;
            b[off] = next() as u8;
        }
        if next() % 5 == 0 {
            b.truncate((next() % src.len() as u64) as usize);
        }
        std::fs::write(&p, &b).unwrap();
        let _ = read_image(&p);
        let _ = read_labels(&p);
        let _ = read_field(&p, FieldReadOptions::default());
        let _ = read_header(&p);
    }
}

#[test]
fn npy_malformed() {
    let dir = tempfile::tempdir().unwrap();
    let g = Grid::axis_aligned([2, 3, 4], [1.0; 3], [0.0; 3]);
    let p = dir.path().join("f.npy");
    write_npy_field(&p, &sinew_grid::Field::zeros(g.clone())).unwrap();
    let good = std::fs::read(&p).unwrap();
    std::fs::write(&p, &good[..good.len() - 4]).unwrap();
    expect_err(read_npy_field(&p, &g, NpyLayout::ChannelLast), &p, "data bytes");
    std::fs::write(&p, b"\x93NUMPY\x01\x00\xff\xff{").unwrap();
    expect_err(read_npy_field(&p, &g, NpyLayout::ChannelLast), &p, "header runs past");
    let mut b = good.clone();
    let at = b.windows(3).position(|w| w == b"<f4").unwrap();
    b[at..at + 3].copy_from_slice(b"<i4");
    std::fs::write(&p, &b).unwrap();
    expect_err(read_npy_field(&p, &g, NpyLayout::ChannelLast), &p, "not float32");
    std::fs::write(&p, b"PK\x03\x04 zip").unwrap();
    expect_err(read_npy_field(&p, &g, NpyLayout::ChannelLast), &p, "magic");
}
