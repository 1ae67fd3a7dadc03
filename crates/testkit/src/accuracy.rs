//! The known-warp recovery case and its endpoint error.
//!
//! A scan is the moving image; the fixed image is the moving one pulled through a known smooth
//! field `u*` (`fixed(x) = moving(x + u*(x))`), so a registration should find `u ≈ u*`. The
//! construction is the usual synthetic-deformation protocol (common practice).

use sinew_grid::{Border, Field, Grid, Image, LabelMap};

use crate::SplitMix64;

/// A known-warp case: `fixed = moving ∘ (x + truth)`, both given their own noise after the
/// warp (a scanner adds its own noise to each acquisition, and a registration must not be
/// able to match the noise pattern instead of the anatomy).
pub struct KnownWarp {
    /// The clean scan pulled through `truth`, then noise of seed 1.
    pub fixed: Image,
    /// The clean scan with noise of seed 2.
    pub moving: Image,
    /// The known field `u*` (`sinew_phantom::known_field`, at most `max_mm` mm), in voxels on
    /// the fixed grid.
    pub truth: Field,
}

impl KnownWarp {
    /// The case of `clean` with a known field of at most `max_mm` mm and Gaussian noise of
    /// `noise` (intensity units) drawn independently for each scan (`add_noise`, seeds 1 and
    /// 2); `noise` 0 adds none.
    pub fn new(clean: Image, max_mm: f64, noise: f32) -> KnownWarp {
        let truth = sinew_phantom::known_field(&clean.grid, max_mm);
        let mut fixed =
            sinew_transform::warp_image(&clean, &truth, Border::Nearest).expect("the field is on the scan's grid");
        let mut moving = clean;
        if noise != 0.0 {
            add_noise(&mut fixed, noise, 1);
            add_noise(&mut moving, noise, 2);
        }
        KnownWarp { fixed, moving, truth }
    }

    /// A mask of the moving scan (its body, its labels) carried onto the fixed grid by the
    /// known field (nearest label), where the endpoint error is measured.
    pub fn on_fixed(&self, moving_mask: &LabelMap) -> LabelMap {
        sinew_transform::warp_labels(moving_mask, &self.truth).expect("the mask is on the scan's grid")
    }
}

/// Adds Gaussian noise of standard deviation `sigma` to `img`, drawn from SplitMix64 of `seed`
/// by Box–Muller (`SplitMix64::normal`; the values are reproducible on every platform).
pub fn add_noise(img: &mut Image, sigma: f32, seed: u64) {
    let mut rng = SplitMix64(seed);
    for v in img.data.iter_mut() {
        *v += sigma * rng.normal() as f32;
    }
}

/// The endpoint error in mm, `|d(x)|` (Euclidean norm), at every voxel `x` of `grid` (in
/// standard order, `k` fastest) where `diff(n, x)` gives `d(x)`: the difference in mm between
/// where a registration sends the voxel (index `n`, voxel coordinates `x`) and where it should
/// go; `None` leaves the voxel out. Every endpoint-error figure of the tests, examples and
/// benchmark is this one loop with its own `diff`.
pub fn endpoint_errors_where(grid: &Grid, diff: impl Fn(usize, [f64; 3]) -> Option<[f64; 3]>) -> Vec<f64> {
    let [_, ny, nz] = grid.shape();
    (0..grid.len())
        .filter_map(|n| diff(n, [(n / (ny * nz)) as f64, ((n / nz) % ny) as f64, (n % nz) as f64]))
        .map(|d| d.iter().map(|v| v * v).sum::<f64>().sqrt())
        .collect()
}

/// The endpoint error `|u(x) − u*(x)|` in mm at every voxel (standard layout), with the
/// displacement components in voxels scaled by the grid's spacing along each axis:
/// `√Σ_d ((u_d − u*_d)·spacing_d)²` ([`endpoint_errors_where`] of that difference).
pub fn endpoint_errors(u: &Field, truth: &Field) -> Vec<f64> {
    let sp = u.grid.spacing();
    endpoint_errors_where(&u.grid, |n, _| {
        Some(std::array::from_fn(|d| (u.component(d)[n] - truth.component(d)[n]) as f64 * sp[d]))
    })
}

/// The arithmetic mean of `values`; panics when there are none.
pub fn mean(values: &[f64]) -> f64 {
    assert!(!values.is_empty(), "no values to average");
    values.iter().sum::<f64>() / values.len() as f64
}

/// Mean and 95th percentile (the value at rank `⌊0.95·n⌋` of the `n` sorted errors) of the
/// endpoint error in mm (`endpoint_errors`) over the voxels where `inside` is non-zero.
/// Panics on an empty mask.
pub fn endpoint_error(u: &Field, truth: &Field, inside: &LabelMap) -> (f64, f64) {
    let all = endpoint_errors(u, truth);
    let mut errs: Vec<f64> = inside.as_slice().iter().zip(all).filter(|(&l, _)| l != 0).map(|(_, e)| e).collect();
    assert!(!errs.is_empty(), "the mask is empty");
    let mean = mean(&errs);
    errs.sort_by(|a, b| a.partial_cmp(b).unwrap());
    (mean, errs[((errs.len() as f64 * 0.95) as usize).min(errs.len() - 1)])
}
