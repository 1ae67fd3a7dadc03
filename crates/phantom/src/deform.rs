//! Known deformations for recovery checks.

use sinew_grid::{Field, Grid};

/// A smooth pull field on `grid` whose largest vector is `max_mm` long (mm): per component a
/// sum of low-frequency sinusoids over the normalised voxel position, with wavelengths of
/// 0.8 to 2 field-of-view widths. Used to make a fixed scan from a moving one,
/// `fixed(x) = moving(x + u(x))`, so that registration should recover `u`.
pub fn known_field(grid: &Grid, max_mm: f64) -> Field {
    let [nx, ny, nz] = grid.shape();
    let sp = grid.spacing();
    let mut f = Field::zeros(grid.clone());
    let tau = std::f64::consts::TAU;
    for d in 0..3 {
        let mut comp = f.data.index_axis_mut(ndarray::Axis(0), d);
        for ((i, j, k), v) in comp.indexed_iter_mut() {
            let (x, y, z) = (i as f64 / nx as f64, j as f64 / ny as f64, k as f64 / nz as f64);
            let ph = d as f64 * 1.3;
            let mm = (tau * x + ph).sin() * (tau * 0.5 * y + 0.4).cos() * (tau * 0.7 * z + ph).sin()
                + 0.5 * (tau * 1.2 * z + 0.3 * ph).cos() * (tau * 0.8 * x).sin();
            *v = mm as f32;
        }
    }
    let mut peak = 0.0f64;
    for n in 0..grid.len() {
        let l2: f64 = (0..3).map(|d| (f.component(d)[n] as f64).powi(2)).sum();
        peak = peak.max(l2.sqrt());
    }
    let scale = if peak > 0.0 { max_mm / peak } else { 0.0 };
    for (d, &h) in sp.iter().enumerate() {
        // mm -> voxels along axis d (axis-aligned phantom grids)
        let s = (scale / h) as f32;
        f.data.index_axis_mut(ndarray::Axis(0), d).mapv_inplace(|v| v * s);
    }
    f
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn largest_vector_has_the_requested_length() {
        let g = Grid::axis_aligned([20, 16, 24], [2.0, 2.0, 3.0], [0.0; 3]);
        let f = known_field(&g, 15.0);
        assert!(approx::abs_diff_eq!(f.max_norm_mm(), 15.0, epsilon = 1e-3), "{}", f.max_norm_mm());
    }
}
