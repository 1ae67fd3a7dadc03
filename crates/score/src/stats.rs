//! Summary statistics for cohort tables.
//!
//! # Definitions
//! - **mean**: `Σ x / n`.
//! - **std**: the *sample* standard deviation, `sqrt(Σ (x − mean)² / (n − 1))` (divisor
//!   `n − 1`, numpy's `np.std(x, ddof=1)`); undefined (`None`) for `n = 1`.
//! - **percentile** `P_p` (0 ≤ p ≤ 100), linear interpolation between order statistics, numpy's
//!   default (`np.percentile(x, p)`, method `"linear"`, Hyndman & Fan's definition 7 in
//!   "Sample Quantiles in Statistical Packages", The American Statistician 50(4), 1996): with
//!   the values sorted `x₀ ≤ … ≤ x_{n−1}`, `h = (n − 1)·p/100`,
//!   `P_p = x_⌊h⌋ + (h − ⌊h⌋)·(x_⌊h⌋+1 − x_⌊h⌋)`.
//! - **median** = `P_50`.
//! - **robustness** = `P_q` for a chosen `q` (default 30): the value that the worst `q` % of
//!   the pairs fall below and the other `100 − q` % reach; a method that fails on a few pairs
//!   shows it here while its mean barely moves.

use serde::{Deserialize, Serialize};

/// The `p`-th percentile (0 ≤ p ≤ 100) of ascending `sorted` values by linear interpolation
/// (numpy's default; see the module documentation).
///
/// # Panics
/// When `sorted` is empty or `p` is outside `[0, 100]` (programming errors).
///
/// # Example
/// ```
/// // np.percentile([1, 2, 3, 4], 30) == 1.9
/// approx::assert_abs_diff_eq!(sinew_score::percentile_linear(&[1.0, 2.0, 3.0, 4.0], 30.0), 1.9, epsilon = 1e-12);
/// ```
#[track_caller]
pub fn percentile_linear(sorted: &[f64], p: f64) -> f64 {
    assert!(!sorted.is_empty(), "percentile of no values");
    assert!((0.0..=100.0).contains(&p), "percentile {p} outside [0, 100]");
    let h = (sorted.len() - 1) as f64 * p / 100.0;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

/// Mean, sample standard deviation, median and a low percentile (robustness) of a set of values.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    /// Number of values.
    pub n: usize,
    /// Arithmetic mean.
    pub mean: f64,
    /// Sample standard deviation (divisor `n − 1`); `None` for a single value.
    pub std: Option<f64>,
    /// Median (`P_50`, linear interpolation).
    pub median: f64,
    /// The percentile `q` of [`Summary::robust`] (0 ≤ q ≤ 100).
    pub robust_percentile: f64,
    /// Robustness: the `q`-th percentile (`P_q`, linear interpolation), default `P_30`.
    pub robust: f64,
}

/// The default robustness percentile.
pub const ROBUST_PERCENTILE: f64 = 30.0;

impl Summary {
    /// The summary of `values` with the default robustness percentile (30), or `None` when
    /// there are none.
    ///
    /// # Panics
    /// When a value is not finite (callers leave undefined values out).
    #[track_caller]
    pub fn of(values: &[f64]) -> Option<Summary> {
        Summary::with_percentile(values, ROBUST_PERCENTILE)
    }

    /// The summary of `values` with robustness percentile `q`, or `None` when there are none.
    ///
    /// # Panics
    /// When a value is not finite or `q` is outside `[0, 100]` (callers check both).
    #[track_caller]
    pub fn with_percentile(values: &[f64], q: f64) -> Option<Summary> {
        assert!(values.iter().all(|v| v.is_finite()), "summary of non-finite values");
        if values.is_empty() {
            return None;
        }
        let n = values.len();
        let mean = values.iter().sum::<f64>() / n as f64;
        let std = (n > 1).then(|| (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt());
        let mut sorted = values.to_vec();
        sorted.sort_by(f64::total_cmp);
        Some(Summary {
            n,
            mean,
            std,
            median: percentile_linear(&sorted, 50.0),
            robust_percentile: q,
            robust: percentile_linear(&sorted, q),
        })
    }
}

/// Arithmetic mean, or `None` for no values.
pub fn mean(values: &[f64]) -> Option<f64> {
    (!values.is_empty()).then(|| values.iter().sum::<f64>() / values.len() as f64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn matches_numpy_values() {
        // Values computed by hand from numpy's documented linear rule (from memory, and
        // re-derived here): x = [3, 1, 4, 1, 5, 9, 2, 6] sorted [1, 1, 2, 3, 4, 5, 6, 9];
        // np.percentile(x, 30): h = 7·0.3 = 2.1 → 2 + 0.1·(3 − 2) = 2.1;
        // np.median(x) = (3 + 4)/2 = 3.5; mean = 31/8 = 3.875;
        // np.std(x, ddof=1) = sqrt(Σ(x − 3.875)² / 7) = sqrt(52.875 / 7).
        let x = [3.0, 1.0, 4.0, 1.0, 5.0, 9.0, 2.0, 6.0];
        let s = Summary::of(&x).unwrap();
        assert_eq!(s.n, 8);
        approx::assert_abs_diff_eq!(s.mean, 3.875, epsilon = 1e-15);
        approx::assert_abs_diff_eq!(s.robust, 2.1, epsilon = 1e-12);
        assert_eq!(s.robust_percentile, 30.0);
        // np.percentile(x, 10): h = 0.7 → 1 + 0.7·(1 − 1) = 1; np.percentile(x, 90): h = 6.3 →
        // 6 + 0.3·(9 − 6) = 6.9.
        assert_eq!(Summary::with_percentile(&x, 10.0).unwrap().robust, 1.0);
        approx::assert_abs_diff_eq!(Summary::with_percentile(&x, 90.0).unwrap().robust, 6.9, epsilon = 1e-12);
        approx::assert_abs_diff_eq!(s.median, 3.5, epsilon = 1e-15);
        approx::assert_abs_diff_eq!(s.std.unwrap(), (52.875f64 / 7.0).sqrt(), epsilon = 1e-12);
        let one = Summary::of(&[0.7]).unwrap();
        assert_eq!((one.std, one.median, one.robust), (None, 0.7, 0.7));
        assert_eq!(Summary::of(&[]), None);
        // endpoints: P_0 = min, P_100 = max
        assert_eq!(percentile_linear(&[1.0, 2.0, 10.0], 100.0), 10.0);
        assert_eq!(percentile_linear(&[1.0, 2.0, 10.0], 0.0), 1.0);
    }
}
