//! Turning a push (forward) displacement field into sinew's pull convention.
//!
//! A push field `u` maps a point `y` to `y + u(y)`. The pull field `v` of the inverse map
//! satisfies `x + v(x) = y` with `y + u(y) = x`, that is
//!
//! `v(x) = −u(x + v(x))`,
//!
//! solved by fixed-point iteration `v₀ = −u`, `v_{t+1}(x) = −u(x + v_t(x))` with `u` sampled
//! trilinearly (indices clamped at the border). The iteration converges when the map is
//! invertible and `u` is a contraction (its Jacobian norm below 1), as for smooth fields
//! without folds. Both fields are sampled on the same grid (the one `u` comes on).
//!
//! The **residual** `r(x) = |v(x) + u(x + v(x))|` in mm (world axes) measures how far the result
//! is from an exact inverse; its maximum and mean over the grid are reported.

use serde::{Deserialize, Serialize};
use sinew_grid::Field;
use sinew_transform::{invert_from, InvertStart};

/// The result of [`invert_push_field`].
#[derive(Clone, Debug)]
pub struct Inversion {
    /// The pull field `v` (voxels along i, j, k, on the input field's grid).
    pub field: Field,
    /// Summary of the iteration, for reports.
    pub report: InversionReport,
}

/// How the inversion went.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct InversionReport {
    /// Fixed-point iterations run.
    pub iterations: usize,
    /// Largest residual `|v(x) + u(x + v(x))|` over the grid, mm.
    pub residual_max_mm: f64,
    /// Mean residual over the grid, mm.
    pub residual_mean_mm: f64,
}

/// Inverts the push field `u` into a pull field by `iterations` fixed-point steps from
/// `v₀ = −u` (see the module documentation; the iteration is [`sinew_transform::invert_from`]).
/// Deterministic: each voxel is computed alone, sums are per `i` slab merged in order.
pub fn invert_push_field(u: &Field, iterations: usize) -> Inversion {
    let inv = invert_from(u, iterations, InvertStart::Negated);
    let (mean, max) = inv.residual_mm();
    Inversion { field: inv.field, report: InversionReport { iterations, residual_max_mm: max, residual_mean_mm: mean } }
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    #[test]
    fn inverts_translations_and_linear_maps() {
        // Exact: the inverse of a translation by c is the translation by −c.
        let g = Grid::axis_aligned([12, 10, 8], [2.0, 1.0, 3.0], [0.0; 3]);
        let mut u = Field::zeros(g.clone());
        for (d, c) in [0.7f32, -1.2, 0.4].iter().enumerate() {
            u.data.index_axis_mut(ndarray::Axis(0), d).fill(*c);
        }
        let inv = invert_push_field(&u, 20);
        for (&v, &u) in inv.field.data.iter().zip(u.data.iter()) {
            approx::assert_abs_diff_eq!(v, -u, epsilon = 1e-6);
        }
        assert!(inv.report.residual_max_mm < 1e-5);

        // Exact: the push map y ↦ (I + A)·y about the centre c has the pull inverse
        // v(x) = ((I + A)⁻¹ − I)(x − c); trilinear sampling of a linear field is exact, so
        // interior voxels (whose x + v(x) stays inside) match it to rounding.
        let a = [[0.05, 0.02, 0.0], [-0.03, 0.04, 0.01], [0.0, 0.02, -0.05]];
        let shape = g.shape();
        let c = shape.map(|n| (n as f64 - 1.0) / 2.0);
        let mut u = Field::zeros(g.clone());
        for (i, j, k) in ndarray::indices((shape[0], shape[1], shape[2])) {
            let y = [i as f64 - c[0], j as f64 - c[1], k as f64 - c[2]];
            for (d, row) in a.iter().enumerate() {
                u.data[[d, i, j, k]] = (row[0] * y[0] + row[1] * y[1] + row[2] * y[2]) as f32;
            }
        }
        let m =
            [[1.0 + a[0][0], a[0][1], a[0][2]], [a[1][0], 1.0 + a[1][1], a[1][2]], [a[2][0], a[2][1], 1.0 + a[2][2]]];
        let det = sinew_grid::det3(&m);
        // inverse by the adjugate
        let inv_m: [[f64; 3]; 3] = std::array::from_fn(|r| {
            std::array::from_fn(|s| {
                let (r1, r2, s1, s2) = ((s + 1) % 3, (s + 2) % 3, (r + 1) % 3, (r + 2) % 3);
                (m[r1][s1] * m[r2][s2] - m[r1][s2] * m[r2][s1]) / det
            })
        });
        let inv = invert_push_field(&u, 30);
        for (i, j, k) in ndarray::indices((shape[0], shape[1], shape[2])) {
            if i < 2 || j < 2 || k < 2 || i + 2 >= shape[0] || j + 2 >= shape[1] || k + 2 >= shape[2] {
                continue;
            }
            let x = [i as f64 - c[0], j as f64 - c[1], k as f64 - c[2]];
            for d in 0..3 {
                let exact = inv_m[d][0] * x[0] + inv_m[d][1] * x[1] + inv_m[d][2] * x[2] - x[d];
                assert!(
                    approx::abs_diff_eq!(inv.field.data[[d, i, j, k]] as f64, exact, epsilon = 1e-4),
                    "{d} {i} {j} {k}"
                );
            }
        }
    }
}
