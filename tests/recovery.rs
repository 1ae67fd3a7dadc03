//! Accuracy of the default registration: known-deformation recovery, inter-subject overlap
//! and a real scan. The quality bar of the design notes.
//!
//! Known warps: a scan is the moving image; the fixed image is the moving one pulled through
//! a known smooth field `u*` (`fixed(x) = moving(x + u*(x))`), so registration should find
//! `u ≈ u*`. The checks are the mean and 95th percentile of `|u(x) − u*(x)|` in mm over the
//! body, and the share of folded voxels. The noise of the two scans is drawn independently
//! AFTER warping (a scanner adds its own noise to each acquisition), so that a registration
//! cannot match the noise pattern instead of the anatomy. Sources: the construction is the
//! usual synthetic-deformation protocol (common practice); the tolerances are about 1.25 × the
//! figures measured when the defaults were last changed (2-core x86-64, recorded beside each
//! test), so a regression of a quarter fails.

use sinew_grid::{Image, LabelMap};
use sinew_phantom::{generate, PhantomParams, LABELS};
use sinew_solve::{register, RegParams, Similarity};
use sinew_testkit::{endpoint_error, KnownWarp};

struct Outcome {
    mean: f64,
    p95: f64,
    folding: f64,
}

/// Registers `moving` to `moving ∘ (x + u*)` (both then given fresh noise of `noise` HU, and
/// the moving one remapped by `remap`), returns the endpoint error over `inside`.
fn recover_case(
    clean: &Image,
    inside: &LabelMap,
    max_mm: f64,
    noise: f32,
    remap: &dyn Fn(&mut Image),
    params: &RegParams,
) -> Outcome {
    // Each scan gets its own noise after the warp (seeds 1 and 2; sinew_testkit::KnownWarp).
    let mut case = KnownWarp::new(clean.clone(), max_mm, noise);
    remap(&mut case.moving);
    let reg = register(&case.fixed, &case.moving, None, params, &mut |_| {}).unwrap();
    let (mean, p95) = endpoint_error(&reg.field, &case.truth, &case.on_fixed(inside));
    let det = sinew_transform::jacobian_determinant(&reg.field);
    let stats = sinew_transform::jacobian_stats(&det, None);
    eprintln!("max {max_mm} mm: EPE mean {mean:.3} mm p95 {p95:.3} mm, folding {:.6}", stats.folding_fraction);
    Outcome { mean, p95, folding: stats.folding_fraction }
}

/// A demo-generator subject without noise (the tests add their own), and its body mask.
fn phantom_subject() -> (Image, LabelMap) {
    let s = generate(11, 0, &PhantomParams { noise_hu: 0.0, ..PhantomParams::default() });
    (s.image, s.labels)
}

fn no_remap(_: &mut Image) {}

/// A different "contrast": a non-linear, inverting intensity remap (bright becomes dark, with
/// a square-root compression). MIND-SSC compares local self-similarity, which such a
/// bijective remap largely keeps.
fn invert_sqrt(m: &mut Image) {
    m.data.mapv_inplace(|v| {
        let t = ((v + 1000.0) / 2500.0).max(0.0);
        1000.0 - 2000.0 * t.sqrt()
    });
}

fn check(o: &Outcome, mean: f64, p95: f64, folding: f64) {
    assert!(o.mean <= mean, "mean endpoint error {:.3} mm > {mean} mm", o.mean);
    assert!(o.p95 <= p95, "95th percentile {:.3} mm > {p95} mm", o.p95);
    assert!(o.folding <= folding, "folded share {:.6} > {folding}", o.folding);
}

#[test]
fn recovers_a_15_mm_field() {
    let (img, labels) = phantom_subject();
    let o = recover_case(&img, &labels, 15.0, 12.0, &no_remap, &RegParams::default());
    check(&o, MEAN_15, P95_15, 0.0);
}

#[test]
fn recovers_a_25_mm_field() {
    let (img, labels) = phantom_subject();
    let o = recover_case(&img, &labels, 25.0, 12.0, &no_remap, &RegParams::default());
    check(&o, MEAN_25, P95_25, 0.0);
}

#[test]
fn recovery_holds_after_an_intensity_remap() {
    let (img, labels) = phantom_subject();
    let o = recover_case(&img, &labels, 15.0, 12.0, &invert_sqrt, &RegParams::default());
    check(&o, MEAN_REMAP, P95_REMAP, 0.0);
}

#[test]
fn diffeomorphic_mode_recovers_a_25_mm_field_without_a_single_fold() {
    // Scaling and squaring of a smooth velocity field gives an invertible map: no voxel may
    // fold, whatever the data ("A fast diffeomorphic image registration algorithm",
    // NeuroImage 2007, for the construction).
    let (img, labels) = phantom_subject();
    let mut params = RegParams::default();
    params.make_diffeomorphic();
    let o = recover_case(&img, &labels, 25.0, 12.0, &no_remap, &params);
    check(&o, MEAN_DIFFEO, P95_DIFFEO, 0.0);
}

#[test]
fn local_ncc_recovers_a_15_mm_field_under_a_spatially_varying_bias() {
    // Local NCC is invariant to a LOCALLY affine intensity change; a global a·I + b would be
    // removed by the z-score alone, so the moving scan gets a smooth multiplicative bias of
    // ±30 % and an additive one of ±100 HU that vary across the field of view.
    let (img, labels) = phantom_subject();
    let grid = img.grid.clone();
    let [nx, ny, nz] = grid.shape();
    let bias = move |m: &mut Image| {
        for ((i, j, k), v) in m.data.indexed_iter_mut() {
            let (x, y, z) = (i as f32 / nx as f32, j as f32 / ny as f32, k as f32 / nz as f32);
            let gain = 1.0 + 0.3 * (std::f32::consts::PI * (x + 0.5 * z)).sin();
            let offset = 100.0 * (std::f32::consts::PI * (y - z)).cos();
            *v = gain * *v + offset;
        }
    };
    let params = RegParams { similarity: Similarity::Lncc, ..RegParams::default() };
    let o = recover_case(&img, &labels, 15.0, 12.0, &bias, &params);
    check(&o, MEAN_LNCC, P95_LNCC, FOLD_LNCC);
}

#[test]
fn local_ncc_descriptor_ignores_an_affine_intensity_change() {
    // Local NCC is invariant to I -> a·I + b with a > 0 (definition of the correlation
    // coefficient); ε scales with the variance, so the standardised image is unchanged.
    let subject = generate(5, 1, &PhantomParams::small());
    let mut remapped = subject.image.clone();
    remapped.data.mapv_inplace(|v| 2.5 * v + 300.0);
    let a = sinew_features::local_standardised(&subject.image, 2.0);
    let b = sinew_features::local_standardised(&remapped, 2.0);
    let worst = a.data.iter().zip(&b.data).map(|(x, y)| (x - y).abs()).fold(0.0f32, f32::max);
    assert!(worst < 1e-3, "largest difference {worst}");
}

#[test]
fn inter_subject_pairs_gain_overlap_without_folding() {
    // Two pairs of a held-out cohort of the demo generator (seed 1001: the defaults were
    // chosen on seed 7 and on the harder cohort of variation 2, seed 7). Dice per label:
    // "Measures of the amount of ecologic association between species", Ecology 1945.
    let pp = PhantomParams::default();
    let s: Vec<_> = (0..3).map(|i| generate(1001, i, &pp)).collect();
    let labels: Vec<u16> = LABELS.iter().map(|l| l.0).collect();
    let mut gains = Vec::new();
    for (f, m) in [(0, 1), (1, 2)] {
        let reg = register(&s[f].image, &s[m].image, None, &RegParams::default(), &mut |_| {}).unwrap();
        let warped = sinew_transform::warp_labels(&s[m].labels, &reg.field).unwrap();
        let after =
            sinew_score::mean_dice(&sinew_score::dice_per_label(&s[f].labels, &warped, &labels).unwrap()).unwrap();
        let before =
            sinew_score::mean_dice(&sinew_score::dice_per_label(&s[f].labels, &s[m].labels, &labels).unwrap()).unwrap();
        let det = sinew_transform::jacobian_determinant(&reg.field);
        let folding = sinew_transform::jacobian_stats(&det, None).folding_fraction;
        eprintln!("pair {f}-{m}: Dice {before:.3} -> {after:.3}, folding {folding:.6}");
        assert!(folding <= 5e-4, "pair {f}-{m}: folded share {folding} (no pair may reach 0.05 %)");
        assert!(after >= MIN_DICE, "pair {f}-{m}: Dice {after:.3} < {MIN_DICE}");
        gains.push(after - before);
    }
    let gain = gains.iter().sum::<f64>() / gains.len() as f64;
    assert!(gain >= MIN_GAIN, "mean Dice gain {gain:.3} < {MIN_GAIN}");
}

/// Block average of `img` over `f × f × 1` voxels (in-plane), on the matching coarser grid.
fn block_average_in_plane(img: &Image, f: usize) -> Image {
    let [nx, ny, nz] = img.grid.shape();
    let (mx, my) = (nx / f, ny / f);
    let mut data = ndarray::Array3::<f32>::zeros((mx, my, nz));
    for ((i, j, k), v) in data.indexed_iter_mut() {
        let mut s = 0.0;
        for a in 0..f {
            for b in 0..f {
                s += img.data[[i * f + a, j * f + b, k]];
            }
        }
        *v = s / (f * f) as f32;
    }
    // The new voxel (i, j) covers old voxels f·i .. f·i + f − 1: its centre is at old index
    // f·i + (f − 1)/2, and its spacing is f times the old one.
    let m = img.grid.affine().m;
    let mut a = m;
    for r in 0..3 {
        for c in 0..2 {
            a[r][c] = m[r][c] * f as f64;
        }
        a[r][3] = m[r][3] + (m[r][0] + m[r][1]) * (f as f64 - 1.0) / 2.0;
    }
    let grid = sinew_grid::Grid::new([mx, my, nz], sinew_grid::Affine { m: a }).unwrap();
    Image::new(grid, data).unwrap()
}

#[test]
fn recovers_a_10_mm_field_on_a_real_thick_slice_ct() {
    // Real data: chest_ct_a.nii.gz from ../shared/data/real-ct/ (an open chest CT, BSD-3,
    // provenance in that folder's README; read in place, not copied). 512 × 512 × 48 voxels
    // of 0.57 × 0.57 × 5 mm, block-averaged in-plane to 256 × 256 × 48 (1.14 × 1.14 × 5 mm).
    // The body is where the CT is denser than −500 HU (common practice for a body mask).
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../shared/data/real-ct/chest_ct_a.nii.gz");
    let img = sinew_io::read_image(&path)
        .unwrap_or_else(|e| panic!("the real CT is needed by this test ({}): {e}", path.display()));
    let img = block_average_in_plane(&img, 2);
    let body = img.data.mapv(|v| u16::from(v > -500.0));
    let body = LabelMap::new(img.grid.clone(), body).unwrap();
    let o = recover_case(&img, &body, 10.0, 0.0, &no_remap, &RegParams::default());
    check(&o, MEAN_CT, P95_CT, 0.0);
}

// Tolerances: about 1.25 × the figures measured with the defaults on the project's 2-core
// x86-64 machine (measured: mean / 95th percentile / folded share).
/// Measured 0.509 / 1.150 mm / 0 (0.571 / 1.323 before the curvature penalty).
const MEAN_15: f64 = 0.64;
const P95_15: f64 = 1.45;
/// Measured 0.930 / 3.498 mm / 0 (1.033 / 4.061 before the curvature penalty).
const MEAN_25: f64 = 1.17;
const P95_25: f64 = 4.4;
/// Measured 0.562 / 1.415 mm / 0 (0.632 / 1.582 before the curvature penalty).
const MEAN_REMAP: f64 = 0.71;
const P95_REMAP: f64 = 1.77;
/// Measured 1.729 / 5.373 mm / 0.
const MEAN_DIFFEO: f64 = 2.2;
const P95_DIFFEO: f64 = 6.7;
/// Measured 0.819 / 2.500 mm / 1.1e-5 (0.867 / 2.229 / 4.5e-5 before the curvature penalty).
const MEAN_LNCC: f64 = 1.03;
const P95_LNCC: f64 = 3.1;
const FOLD_LNCC: f64 = 6e-5;
/// Measured 0.594 / 1.347 mm / 0 (0.622 / 1.340 before the curvature penalty).
const MEAN_CT: f64 = 0.75;
const P95_CT: f64 = 1.7;
/// Measured: Dice 0.824 and 0.810 after (0.814 and 0.820 before the curvature penalty),
/// gains above 0.24, no folds.
const MIN_DICE: f64 = 0.75;
const MIN_GAIN: f64 = 0.23;
