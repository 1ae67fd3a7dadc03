//! Stable-Rust companion of the libFuzzer target `fuzz/fuzz_targets/nifti_read.rs`: seeded
//! mutations of valid NIfTI files (the fuzz corpus, nibabel-written) and every crash input kept
//! in `fuzz/regressions/`, checked with the same properties (`fuzz/src/check.rs`): no panic,
//! no allocation beyond the caller's limit because of a header's claims, one-line errors
//! naming the file, self-consistent successes.
//!
//! `SINEW_MUTATIONS=<n>` sets the number of mutated inputs (default 4000, a few seconds).
//! This file holds a single test so that the allocation bound is not disturbed by other
//! tests running in parallel threads.

use std::io::Write;
use std::path::{Path, PathBuf};

use sinew_testkit::SplitMix64;

#[path = "../../../fuzz/src/check.rs"]
#[allow(dead_code)]
mod check;

#[global_allocator]
static ALLOC: check::PeakAlloc = check::PeakAlloc;

fn files_in(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file())
        .collect();
    v.sort();
    v
}

/// Offsets of the NIfTI-1 header fields that drive the reader (nifti1.h): dim[0..8] (40),
/// intent_code (68), datatype (70), bitpix (72), pixdim[0..8] (76), vox_offset (108),
/// scl_slope (112), scl_inter (116), qform_code (252), sform_code (254), quatern_b.. and
/// qoffset_x.. (256..280), srow_x/y/z (280..328), magic (344).
const I16_FIELDS: [usize; 14] = [40, 42, 44, 46, 48, 50, 52, 54, 68, 70, 72, 252, 254, 0];
const F32_FIELDS: [usize; 12] = [76, 80, 84, 88, 108, 112, 116, 256, 268, 280, 300, 320];
const I16_VALUES: [i16; 12] = [0, 1, -1, 2, 3, 5, 7, 8, 16, 64, i16::MAX, i16::MIN];
const F32_VALUES: [f32; 10] = [0.0, -0.0, 1.0, -1.0, 348.0, 351.0, 1e30, -1e30, f32::NAN, f32::INFINITY];

fn mutate(rng: &mut SplitMix64, seed: &[u8]) -> Vec<u8> {
    let mut b = seed.to_vec();
    for _ in 0..1 + rng.below(4) {
        let plain_header = b.len() >= 348 && !(b[0] == 0x1f && b[1] == 0x8b);
        match rng.below(7) {
            0 if !b.is_empty() => {
                let i = rng.below(b.len());
                b[i] ^= 1 << rng.below(8);
            }
            1 if !b.is_empty() => {
                let i = rng.below(b.len());
                b[i] = [0u8, 0xff, 0x7f, 0x80, 1][rng.below(5)];
            }
            2 if plain_header => {
                let off = I16_FIELDS[rng.below(I16_FIELDS.len())];
                let v = I16_VALUES[rng.below(I16_VALUES.len())];
                let bytes = if b[0] == 0x5c { v.to_le_bytes() } else { v.to_be_bytes() };
                b[off..off + 2].copy_from_slice(&bytes);
            }
            3 if plain_header => {
                let off = F32_FIELDS[rng.below(F32_FIELDS.len())] + 4 * rng.below(2);
                let v = F32_VALUES[rng.below(F32_VALUES.len())];
                let bytes = if b[0] == 0x5c { v.to_le_bytes() } else { v.to_be_bytes() };
                b[off..off + 4].copy_from_slice(&bytes);
            }
            4 => {
                let n = rng.below(b.len() + 1);
                b.truncate(n);
            }
            5 => {
                let n = rng.below(64);
                b.extend((0..n).map(|_| rng.next_u64() as u8));
            }
            _ => {}
        }
    }
    // Sometimes gzip the result so the decompressing path sees the same corruption.
    if rng.below(4) == 0 {
        let mut e = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        e.write_all(&b).unwrap();
        b = e.finish().unwrap();
    }
    b
}

#[test]
fn seeded_mutations_and_fuzz_regressions() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz");
    let regressions = files_in(&root.join("regressions/nifti_read"));
    for p in &regressions {
        let bytes = std::fs::read(p).unwrap();
        check::check(&bytes); // panics (failing the test) on any violated property
    }
    let mut seeds: Vec<Vec<u8>> =
        files_in(&root.join("corpus/nifti_read")).iter().map(|p| std::fs::read(p).unwrap()).collect();
    assert!(seeds.len() >= 10, "fuzz corpus missing");
    // Decompressed copies of gzip seeds, so header-field mutations also reach them.
    let mut plain = Vec::new();
    for s in &seeds {
        if s.starts_with(&[0x1f, 0x8b]) {
            let mut out = Vec::new();
            if std::io::Read::read_to_end(&mut flate2::read::MultiGzDecoder::new(&s[..]), &mut out).is_ok() {
                plain.push(out);
            }
        }
    }
    seeds.extend(plain);
    let valid: usize = seeds.iter().filter(|s| check::check(s) > 0).count();
    assert!(valid >= 10, "only {valid} seeds are readable");
    assert!(check::peak() > 0, "the allocation recorder is not installed");
    let n: usize = std::env::var("SINEW_MUTATIONS").ok().and_then(|v| v.parse().ok()).unwrap_or(4000);
    let mut rng = SplitMix64(0x5EED_0F51_11E7);
    let mut accepted = 0;
    for _ in 0..n {
        let seed = &seeds[rng.below(seeds.len())];
        let m = mutate(&mut rng, seed);
        if check::check(&m) > 0 {
            accepted += 1;
        }
    }
    // Some mutations must still be readable, or the harness only exercises the first checks.
    assert!(n < 100 || accepted > n / 20, "only {accepted} of {n} mutated inputs were read at all");
    eprintln!("{n} mutated inputs, {accepted} accepted by at least one reader, {} regressions", regressions.len());
}
