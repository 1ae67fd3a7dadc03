//! What must hold when the NIfTI reader is given arbitrary bytes.
//!
//! Run every reader (`read_header`, `read_image`, `read_labels`, `read_field`) on the same bytes
//! and check: no panic (the caller sees a panic as a crash); no single allocation larger than
//! [`ALLOC_BOUND`] while the voxel-data limit is [`MAX_BYTES`] (a header's claims alone never
//! make the reader reserve memory); every error is one line naming the file; every success is
//! self-consistent (the header's size claim matches the array, the grid is finite and
//! invertible).

use std::alloc::{GlobalAlloc, Layout, System};
use std::path::Path;
use std::sync::atomic::{AtomicUsize, Ordering};

use sinew_io::{FieldReadOptions, IoError, ReadOptions};

/// The caller's limit on voxel data (bytes as stored) used while fuzzing.
pub const MAX_BYTES: u64 = 1 << 20;

/// Largest single allocation allowed during one check: decoding may widen each stored byte to
/// an f32 (×4, uint8 → f32) and reordering copies once; plus 1 MiB for buffers (file reader
/// 64 KiB, gzip window 32 KiB, header strings).
pub const ALLOC_BOUND: usize = 4 * MAX_BYTES as usize + (1 << 20);

/// The name the in-memory input is given in error messages.
pub const NAME: &str = "fuzz-input.nii";

static PEAK: AtomicUsize = AtomicUsize::new(0);

/// The system allocator, recording the largest single request since [`reset_peak`].
pub struct PeakAlloc;

// SAFETY: forwards to the system allocator unchanged; only records sizes.
unsafe impl GlobalAlloc for PeakAlloc {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        PEAK.fetch_max(layout.size(), Ordering::Relaxed);
        System.alloc(layout)
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        PEAK.fetch_max(layout.size(), Ordering::Relaxed);
        System.alloc_zeroed(layout)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        System.dealloc(ptr, layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        PEAK.fetch_max(new_size, Ordering::Relaxed);
        System.realloc(ptr, layout, new_size)
    }
}

/// Forgets the largest allocation seen so far.
pub fn reset_peak() {
    PEAK.store(0, Ordering::Relaxed);
}

/// The largest single allocation since [`reset_peak`] (0 unless [`PeakAlloc`] is the global
/// allocator).
pub fn peak() -> usize {
    PEAK.load(Ordering::Relaxed)
}

#[track_caller]
fn check_err(what: &str, e: &IoError) {
    let name = Path::new(NAME);
    let msg = e.to_string();
    assert!(!msg.contains('\n'), "{what}: error is not one line: {msg:?}");
    assert!(msg.starts_with(NAME), "{what}: error does not start with the file name: {msg:?}");
    assert_eq!(e.path(), name, "{what}: error names another path");
}

/// Runs every reader on `bytes` and asserts the properties above; returns how many of the four
/// readers accepted the input.
pub fn check(bytes: &[u8]) -> usize {
    let src = sinew_io::Nifti::Bytes { name: Path::new(NAME), bytes };
    let opts = ReadOptions { max_bytes: MAX_BYTES };
    reset_peak();
    let mut accepted = 0;
    let header = sinew_io::read_header_of(src);
    match &header {
        Ok(h) => {
            accepted += 1;
            // The claim can exceed u64 (seven extents up to 32767): compare saturated, as the
            // reader reports it (found by the fuzzer: this check itself overflowed).
            let n = h.dims.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d as u64));
            let sane_grid = h.grid.affine().is_finite() && h.grid.shape().iter().all(|&d| d >= 1);
            assert!(sane_grid, "header accepted with a bad grid: {:?}", h.grid);
            let claimed = n.and_then(|n| n.checked_mul(h.datatype.bytes() as u64));
            assert_eq!(claimed.unwrap_or(u64::MAX), h.data_bytes, "data_bytes disagrees with dims {:?}", h.dims);
            assert!(h.vox_offset >= 352, "vox_offset {} accepted", h.vox_offset);
        }
        Err(e) => check_err("read_header", e),
    }
    match sinew_io::read_image_of(src, &opts) {
        Ok(img) => {
            accepted += 1;
            let h = header.as_ref().expect("image read but header rejected");
            assert_eq!(img.grid.shape(), h.grid.shape());
            assert_eq!((img.grid.len() * h.datatype.bytes()) as u64, h.data_bytes);
        }
        Err(e) => check_err("read_image", &e),
    }
    match sinew_io::read_labels_of(src, &opts) {
        Ok(lab) => {
            accepted += 1;
            let h = header.as_ref().expect("labels read but header rejected");
            assert_eq!(lab.grid.shape(), h.grid.shape());
        }
        Err(e) => check_err("read_labels", &e),
    }
    match sinew_io::read_field_of(src, FieldReadOptions { units: None, read: opts }) {
        Ok((field, _)) => {
            accepted += 1;
            let h = header.as_ref().expect("field read but header rejected");
            assert_eq!((3 * field.grid.len() * h.datatype.bytes()) as u64, h.data_bytes);
        }
        Err(e) => check_err("read_field", &e),
    }
    let p = peak();
    assert!(p <= ALLOC_BOUND, "one allocation of {p} bytes exceeds the bound {ALLOC_BOUND} (limit {MAX_BYTES})");
    accepted
}
