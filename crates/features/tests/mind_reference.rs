//! MIND-SSC checked against outside references: the numpy/scipy implementation in
//! `scripts/ref/feat_mind_ssc.py` (fixtures from `scripts/fixtures.py::make_feat_mind`) and
//! exact facts of the definition.

#[path = "common/npy.rs"]
mod npy;

use sinew_features::{mind_ssc, mind_ssc_into, Descriptor, MindParams, MindScratch, SSC_CHANNELS};
use sinew_grid::{Grid, Image};

fn load(name: &str) -> Image {
    let a = npy::read(&npy::fixture(name));
    let shape = [a.shape[0], a.shape[1], a.shape[2]];
    let mut img = Image::filled(Grid::axis_aligned(shape, [1.5, 0.8, 2.5], [0.0; 3]), 0.0);
    img.as_slice_mut().iter_mut().zip(&a.data).for_each(|(o, &v)| *o = v as f32);
    img
}

/// Seeded pseudo-random volume (a 64-bit LCG, value-stable).
fn random_image(shape: [usize; 3], seed: u64) -> Image {
    let mut s = seed;
    let mut img = Image::filled(Grid::axis_aligned(shape, [1.0; 3], [0.0; 3]), 0.0);
    for v in img.as_slice_mut() {
        s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        *v = (s >> 40) as f32 / (1u64 << 24) as f32;
    }
    img
}

#[test]
fn matches_numpy_scipy_reference() {
    // Reference: scipy.ndimage.uniform_filter(mode="nearest") + numpy, scripts/ref/feat_mind_ssc.py.
    // The two-level volume has noise levels 1000× apart, so the lower clamp of V is active in
    // a quarter of its voxels. The thin volume (2×1×5) is smaller than patch and dilation.
    let cases = [
        ("feat_mind_input.npy", 1, 2, "feat_mind_r1_d2.npy"),
        ("feat_mind_input.npy", 0, 1, "feat_mind_r0_d1.npy"),
        ("feat_mind_input.npy", 2, 3, "feat_mind_r2_d3.npy"),
        ("feat_mind_twolevel_input.npy", 1, 2, "feat_mind_twolevel_r1_d2.npy"),
        ("feat_mind_thin_input.npy", 2, 3, "feat_mind_thin_r2_d3.npy"),
    ];
    for (input, r, d, expected) in cases {
        let img = load(input);
        let want = npy::read(&npy::fixture(expected));
        let s = img.grid.shape();
        assert_eq!(want.shape, vec![s[0], s[1], s[2], SSC_CHANNELS]);
        let got = mind_ssc(&img, &MindParams { radius: r, dilation: d });
        assert_eq!(got.channels, SSC_CHANNELS);
        let mut worst = 0.0f64;
        for (n, (&g, &w)) in got.data.iter().zip(&want.data).enumerate() {
            let e = (g as f64 - w).abs();
            assert!(e <= 1e-5, "{expected}: voxel {} channel {}: {g} vs {w}", n / 12, n % 12);
            worst = worst.max(e);
        }
        assert!(worst > 0.0 || got.data.iter().all(|&v| v == 1.0));
    }
}

#[test]
fn constant_image_gives_all_ones() {
    // Exact fact: a constant image has D_c = 0 for every channel, so all channels are equal and
    // the max-normalised descriptor is 1.
    let img = Image::filled(Grid::axis_aligned([9, 7, 5], [1.0; 3], [0.0; 3]), -42.5);
    let desc = mind_ssc(&img, &MindParams::default());
    assert!(desc.data.iter().all(|&v| v == 1.0));
}

#[test]
fn invariant_to_affine_intensity_maps() {
    // Exact fact (the purpose of MIND): I' = a·I + b scales every D_c and V by a², so D/V and
    // the descriptor are unchanged. Only float rounding differs: storing a·I + b in f32 rounds
    // each voxel by up to 2⁻²⁴·|a·I + b|, a relative change of the differences of order
    // 2⁻²⁴·|b|/|a| (I in [0, 1)), so the offsets are kept within a few units of |a|.
    let img = random_image([13, 10, 11], 7);
    let base = mind_ssc(&img, &MindParams::default());
    for (a, b) in [(-3.0f32, 100.0f32), (0.01, -0.03), (250.0, 1000.0)] {
        let mut remapped = img.clone();
        remapped.as_slice_mut().iter_mut().for_each(|v| *v = a * *v + b);
        let got = mind_ssc(&remapped, &MindParams::default());
        let worst = base.data.iter().zip(&got.data).map(|(x, y)| (x - y).abs()).fold(0.0f32, f32::max);
        assert!(worst < 1e-4, "a={a} b={b}: max difference {worst}");
    }
}

#[test]
fn values_in_unit_interval_with_a_one_per_voxel() {
    // Exact facts of the max normalisation: 0 < M_c ≤ 1 and max_c M_c = 1.
    let img = random_image([10, 12, 9], 3);
    let desc = mind_ssc(&img, &MindParams { radius: 1, dilation: 1 });
    for n in 0..img.grid.len() {
        let v = desc.voxel(n);
        assert!(v.iter().all(|&x| x > 0.0 && x <= 1.0));
        assert_eq!(v.iter().cloned().fold(0.0, f32::max), 1.0);
    }
}

#[test]
fn into_reuses_buffers_and_is_thread_count_independent() {
    // The same result from a fresh call, a reused scratch and descriptor, and 1 vs 3 threads.
    let img = random_image([21, 9, 14], 11);
    let big = random_image([23, 11, 16], 5);
    let p = MindParams { radius: 2, dilation: 2 };
    let fresh = mind_ssc(&img, &p);
    let mut scratch = MindScratch::default();
    let mut out = Descriptor::zeros(big.grid.clone());
    mind_ssc_into(&big, &p, &mut out, &mut scratch);
    let ptr = out.data.as_ptr();
    mind_ssc_into(&img, &p, &mut out, &mut scratch);
    assert_eq!(out.data.as_ptr(), ptr, "a smaller volume must reuse the buffer");
    assert_eq!(out, fresh);
    for threads in [1, 3] {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        let got = pool.install(|| mind_ssc(&img, &p));
        assert_eq!(got, fresh, "{threads} threads");
    }
}
