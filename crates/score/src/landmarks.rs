//! Landmark (target registration) error through a displacement field.
//!
//! # Definition
//! For fixed landmarks `x_n` and corresponding moving landmarks `y_n` (world mm), the field
//! `u` (pull convention, on the fixed grid) maps `x_n` to `x_n + u(x_n)`, with `u` sampled
//! trilinearly at the voxel position of `x_n` and converted to world mm by the affine's linear
//! part. The error of landmark `n` is `e_n = |x_n + u(x_n) − y_n|` (mm); the error before
//! registration is `|x_n − y_n|` (identity map). Reported: mean, median (linear interpolation,
//! see [`crate::stats`]) and maximum.

use serde::{Deserialize, Serialize};
use sinew_grid::{interp, Border, Field, WorldPoint};

use crate::{percentile_linear, ScoreError};

/// Landmark errors in mm.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LandmarkErrors {
    /// Number of landmark pairs.
    pub n: usize,
    /// Mean error after mapping through the field, mm.
    pub mean_mm: f64,
    /// Median error after, mm.
    pub median_mm: f64,
    /// Largest error after, mm.
    pub max_mm: f64,
    /// Mean error before (identity map), mm.
    pub mean_before_mm: f64,
    /// Error of each landmark after, mm, in input order.
    pub per_landmark_mm: Vec<f64>,
}

/// Errors of `fixed` landmarks mapped through `field` against `moving` landmarks (both world
/// mm, same order). Fails when the counts differ, the list is empty, or a fixed landmark lies
/// outside the field's grid (beyond half a voxel from the outermost voxel centres).
pub fn landmark_errors(
    field: &Field,
    fixed: &[WorldPoint],
    moving: &[WorldPoint],
) -> Result<LandmarkErrors, ScoreError> {
    if fixed.len() != moving.len() || fixed.is_empty() {
        return Err(ScoreError::LandmarkCount { fixed: fixed.len(), moving: moving.len() });
    }
    let grid = &field.grid;
    let shape = grid.shape();
    let lin = grid.affine().linear();
    let mut after = Vec::with_capacity(fixed.len());
    let mut before = 0.0;
    for (n, (x, y)) in fixed.iter().zip(moving).enumerate() {
        let p = grid.world_to_voxel(*x);
        if (0..3).any(|d| !(p[d] >= -0.5 && p[d] <= shape[d] as f64 - 0.5)) {
            return Err(ScoreError::LandmarkOutside { index: n, point: *x, voxel: p, shape });
        }
        let pf = [p[0] as f32, p[1] as f32, p[2] as f32];
        let u: [f64; 3] =
            std::array::from_fn(|d| interp::trilinear(field.component(d), shape, pf, Border::Nearest) as f64);
        let mapped: [f64; 3] = std::array::from_fn(|a| x[a] + lin[a][0] * u[0] + lin[a][1] * u[1] + lin[a][2] * u[2]);
        after.push(dist(&mapped, y));
        before += dist(x, y);
    }
    let n = after.len();
    let mut sorted = after.clone();
    sorted.sort_by(f64::total_cmp);
    Ok(LandmarkErrors {
        n,
        mean_mm: after.iter().sum::<f64>() / n as f64,
        median_mm: percentile_linear(&sorted, 50.0),
        max_mm: sorted[n - 1],
        mean_before_mm: before / n as f64,
        per_landmark_mm: after,
    })
}

fn dist(a: &[f64; 3], b: &[f64; 3]) -> f64 {
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::{Affine, Grid};

    #[test]
    fn constant_shift_on_an_oblique_grid() {
        // Exact: a constant displacement of (1, 0, 2) voxels on a grid whose axes are
        // (i → −y · 2 mm, j → x · 1.5 mm, k → z · 3 mm) moves every point by (0, −2, 6) mm.
        let a = Affine::from_parts([[0.0, 1.5, 0.0], [-2.0, 0.0, 0.0], [0.0, 0.0, 3.0]], [5.0, 40.0, -3.0]);
        let g = Grid::new([10, 10, 10], a).unwrap();
        let mut f = Field::zeros(g.clone());
        f.data.index_axis_mut(ndarray::Axis(0), 0).fill(1.0);
        f.data.index_axis_mut(ndarray::Axis(0), 2).fill(2.0);
        let x = [g.voxel_to_world([3.0, 4.0, 5.0]), g.voxel_to_world([1.2, 7.5, 2.0])];
        let y = [[x[0][0], x[0][1] - 2.0, x[0][2] + 6.0], [x[1][0] + 3.0, x[1][1] - 2.0, x[1][2] + 10.0]];
        let e = landmark_errors(&f, &x, &y).unwrap();
        assert!(e.per_landmark_mm[0] < 1e-9);
        approx::assert_abs_diff_eq!(e.per_landmark_mm[1], 5.0, epsilon = 1e-9); // |(−3, 0, −4)| = 5
        approx::assert_abs_diff_eq!(e.mean_mm, 2.5, epsilon = 1e-9);
        approx::assert_abs_diff_eq!(e.max_mm, 5.0, epsilon = 1e-9);
        approx::assert_abs_diff_eq!(e.median_mm, 2.5, epsilon = 1e-9);
        approx::assert_abs_diff_eq!(
            e.mean_before_mm,
            (40f64.sqrt() + 3f64.hypot(2.0).hypot(10.0)) / 2.0,
            epsilon = 1e-9
        );
        assert!(matches!(landmark_errors(&f, &x, &y[..1]), Err(ScoreError::LandmarkCount { .. })));
        let far = [g.voxel_to_world([12.0, 0.0, 0.0])];
        assert!(matches!(landmark_errors(&f, &far, &far), Err(ScoreError::LandmarkOutside { index: 0, .. })));
    }
}
