//! Intensity window and scaling.
//!
//! - window `[lo, hi]` (HU): `v ← min(max(v, lo), hi)`;
//! - unit scaling: `v ← (v − lo)/(hi − lo)`, with `[lo, hi]` the window (or, without one, the
//!   image's own minimum and maximum), so the window maps onto `[0, 1]`;
//! - z-score: `v ← (v − μ)/σ` with `μ` the mean and `σ` the standard deviation (population,
//!   divisor N) of the (windowed) values inside the body mask; applied to every voxel.

use serde::{Deserialize, Serialize};
use sinew_grid::{Image, LabelMap};

use crate::PrepError;

/// An intensity window in the image's units (HU for CT).
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Window {
    /// Lower bound.
    pub lo: f32,
    /// Upper bound.
    pub hi: f32,
}

impl Window {
    /// A window; fails unless both bounds are finite and `lo < hi`.
    pub fn new(lo: f32, hi: f32) -> Result<Window, PrepError> {
        if !(lo.is_finite() && hi.is_finite() && lo < hi) {
            return Err(PrepError::BadWindow { lo, hi });
        }
        Ok(Window { lo, hi })
    }
}

/// How to scale intensities after windowing.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Scale {
    /// Leave the values as they are.
    #[default]
    None,
    /// Map the window (or the image range) onto `[0, 1]`.
    Unit,
    /// Zero mean, unit standard deviation inside the body mask.
    Zscore,
}

/// Clips every voxel to the window; returns the counts of voxels raised and lowered.
pub fn apply_window(img: &mut Image, w: Window) -> (usize, usize) {
    let (mut low, mut high) = (0, 0);
    for v in img.as_slice_mut() {
        if *v < w.lo {
            *v = w.lo;
            low += 1;
        } else if *v > w.hi {
            *v = w.hi;
            high += 1;
        }
    }
    (low, high)
}

/// Maps `[lo, hi]` onto `[0, 1]`: `v ← (v − lo)/(hi − lo)` (computed in f64).
pub fn scale_unit(img: &mut Image, lo: f32, hi: f32) {
    let (lo, width) = (lo as f64, hi as f64 - lo as f64);
    for v in img.as_slice_mut() {
        *v = ((*v as f64 - lo) / width) as f32;
    }
}

/// Mean and population standard deviation of the values where `mask` is non-zero, with the
/// voxel count (two passes in f64, sequential in index order, so independent of threads).
pub fn masked_mean_std(img: &Image, mask: &LabelMap) -> (f64, f64, usize) {
    let vals = || img.as_slice().iter().zip(mask.as_slice()).filter(|(_, &m)| m != 0).map(|(&v, _)| v as f64);
    let n = vals().count();
    if n == 0 {
        return (f64::NAN, f64::NAN, 0);
    }
    let mean = vals().sum::<f64>() / n as f64;
    let var = vals().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n as f64;
    (mean, var.sqrt(), n)
}

/// z-scores `img` with the statistics inside `mask`; returns `(μ, σ, voxels)`.
///
/// Fails when the mask is empty or the values inside it are constant.
pub fn zscore(img: &mut Image, mask: &LabelMap) -> Result<(f64, f64, usize), PrepError> {
    let (mean, std, n) = masked_mean_std(img, mask);
    if n == 0 {
        return Err(PrepError::EmptyMask { threshold: f32::NAN, min: f32::NAN, max: f32::NAN });
    }
    if std.is_nan() || std <= 0.0 {
        return Err(PrepError::ConstantInMask { voxels: n, value: mean });
    }
    for v in img.as_slice_mut() {
        *v = ((*v as f64 - mean) / std) as f32;
    }
    Ok((mean, std, n))
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::{Grid, Volume};

    fn ramp() -> Image {
        // v(i, j, k) = −1200 + 100·i over i = 0..31: a ramp from −1200 to 1800 HU.
        let g = Grid::axis_aligned([31, 2, 3], [1.0; 3], [0.0; 3]);
        let mut img = Image::filled(g, 0.0);
        for ((i, _, _), v) in img.data.indexed_iter_mut() {
            *v = -1200.0 + 100.0 * i as f32;
        }
        img
    }

    #[test]
    fn window_and_unit_scale_match_the_closed_form() {
        // Closed form (definition above): u(i) = (clip(−1200 + 100 i, −1000, 1500) + 1000) / 2500.
        let mut img = ramp();
        let w = Window::new(-1000.0, 1500.0).unwrap();
        let (low, high) = apply_window(&mut img, w);
        assert_eq!((low, high), (2 * 6, 3 * 6)); // i = 0, 1 below; i = 28, 29, 30 above
        scale_unit(&mut img, w.lo, w.hi);
        for ((i, _, _), &v) in img.data.indexed_iter() {
            let hu = (-1200.0 + 100.0 * i as f64).clamp(-1000.0, 1500.0);
            let want = (hu + 1000.0) / 2500.0;
            assert!(approx::abs_diff_eq!(v as f64, want, epsilon = 1e-7), "i={i}: {v} vs {want}");
        }
        assert!(Window::new(1.0, 1.0).is_err());
        assert!(Window::new(f32::NAN, 1.0).is_err());
    }

    #[test]
    fn zscore_matches_the_closed_form_on_a_ramp() {
        // Mask i in 10..=20: values −200..=800 step 100, mean 300, population variance
        // 100²·(11² − 1)/12 = 100² · 10 (variance of 11 equally spaced points, exact fact).
        let mut img = ramp();
        let mut mask: LabelMap = Volume::filled(img.grid.clone(), 0);
        for ((i, _, _), m) in mask.data.indexed_iter_mut() {
            *m = u16::from((10..=20).contains(&i));
        }
        let (mean, std, n) = zscore(&mut img, &mask).unwrap();
        assert_eq!(n, 11 * 6);
        approx::assert_abs_diff_eq!(mean, 300.0, epsilon = 1e-9);
        let sd = 100.0 * 10f64.sqrt();
        approx::assert_abs_diff_eq!(std, sd, epsilon = 1e-9);
        for ((i, _, _), &v) in img.data.indexed_iter() {
            let want = (-1200.0 + 100.0 * i as f64 - 300.0) / sd;
            approx::assert_abs_diff_eq!(v as f64, want, epsilon = 1e-6);
        }
        let flat = Image::filled(img.grid.clone(), 3.0);
        assert!(matches!(zscore(&mut flat.clone(), &mask), Err(PrepError::ConstantInMask { .. })));
    }
}
