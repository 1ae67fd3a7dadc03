//! Jacobian determinant of `φ(x) = x + u(x)` and its summary statistics.
//!
//! # Definition
//! `J(x) = det(I + ∇u(x))`, with `∇u` in voxel units: `(∇u)_ab = ∂u_a/∂x_b`, estimated by
//! central differences `(u(x + e_b) − u(x − e_b)) / 2` inside and one-sided differences
//! `u(x₁) − u(x₀)`, `u(x_{n−1}) − u(x_{n−2})` at the first and last voxel of each axis (an
//! axis with one voxel has zero derivative). This is `numpy.gradient(u, axis=b, edge_order=1)`.
//!
//! # Why voxel units give the physical determinant
//! Let `A(x) = M·x + t` be the voxel-to-world affine (any invertible `M`: anisotropic spacing,
//! rotations, shears). The field in mm is `U(y) = M·u(x)` at `y = A(x)`, so the physical map is
//! `Φ(y) = y + U(y) = M·(x + u(x)) + t = A(φ(x))`, i.e. `Φ = A ∘ φ ∘ A⁻¹`. By the chain rule
//! `DΦ = M · Dφ · M⁻¹`, hence `det DΦ = det M · det Dφ · (det M)⁻¹ = det Dφ`. The same algebra
//! holds for the finite-difference estimates, because the stencils are linear and act along the
//! voxel axes: the mm-space estimate of `DΦ` from the same neighbours is exactly
//! `M · (I + G) · M⁻¹` with `G` the voxel-space estimate. So the spacing cancels and
//! `det(I + G)` is the physical Jacobian determinant.

use rayon::prelude::*;
use serde::Serialize;
use sinew_grid::{det3, Field, Image};

/// The Jacobian determinant `det(I + ∇u)` at every voxel of the field's grid (see the
/// [module documentation](self)); computed in `f64`, stored as `f32`.
pub fn jacobian_determinant(field: &Field) -> Image {
    let [nx, ny, nz] = field.grid.shape();
    let plane = ny * nz;
    let u = [field.component(0), field.component(1), field.component(2)];
    let mut out = Image::filled(field.grid.clone(), 0.0);
    out.as_slice_mut().par_chunks_mut(plane).enumerate().for_each(|(i, slab)| {
        let (i0, i1) = (i.saturating_sub(1), (i + 1).min(nx - 1));
        for j in 0..ny {
            let (j0, j1) = (j.saturating_sub(1), (j + 1).min(ny - 1));
            for k in 0..nz {
                let (k0, k1) = (k.saturating_sub(1), (k + 1).min(nz - 1));
                // Neighbour linear indices along each axis and their distances in voxels.
                let along = [
                    ((i0 * ny + j) * nz + k, (i1 * ny + j) * nz + k, i1 - i0),
                    ((i * ny + j0) * nz + k, (i * ny + j1) * nz + k, j1 - j0),
                    ((i * ny + j) * nz + k0, (i * ny + j) * nz + k1, k1 - k0),
                ];
                let mut m = [[0.0f64; 3]; 3];
                for (a, ua) in u.iter().enumerate() {
                    for (b, &(lo, hi, h)) in along.iter().enumerate() {
                        let g = if h == 0 { 0.0 } else { (ua[hi] as f64 - ua[lo] as f64) / h as f64 };
                        m[a][b] = g + if a == b { 1.0 } else { 0.0 };
                    }
                }
                slab[j * nz + k] = det3(&m) as f32;
            }
        }
    });
    out
}

/// Summary of a Jacobian determinant image, over the voxels of a mask (or all voxels).
///
/// Voxels whose determinant is not finite are counted in `non_finite` and left out of every
/// other figure. With no voxel left, `min`, `max`, `mean` are NaN (JSON `null`) and the
/// fractions are 0.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct JacobianStats {
    /// Voxels considered (inside the mask, finite determinant).
    pub voxels: usize,
    /// Share of considered voxels with `det ≤ 0` (folding).
    pub folding_fraction: f64,
    /// Number of considered voxels with `det ≤ 0`.
    pub folded_voxels: usize,
    /// Population standard deviation (divisor = count) of `ln det` over voxels with `det > 0`.
    pub sd_log_j: f64,
    /// Considered voxels left out of `sd_log_j` because `det ≤ 0` (equals `folded_voxels`).
    pub excluded_from_sdlogj: usize,
    /// Voxels inside the mask whose determinant is NaN or infinite.
    pub non_finite: usize,
    /// Smallest determinant.
    pub min: f64,
    /// Largest determinant.
    pub max: f64,
    /// Mean determinant.
    pub mean: f64,
}

/// Per-slab partial sums, merged in index order (so results do not depend on thread count).
#[derive(Clone, Copy)]
struct Partial {
    voxels: usize,
    folded: usize,
    non_finite: usize,
    sum: f64,
    sum_log: f64,
    min: f64,
    max: f64,
}

/// Statistics of `det` (from [`jacobian_determinant`]) over the voxels where `mask` is true
/// (all voxels when `None`). Sums in `f64` per `i` slab, merged in index order; `sd_log_j` is
/// computed in two passes (mean first) for accuracy.
///
/// # Panics
/// When `mask` has not exactly one entry per voxel (standard order).
#[track_caller]
pub fn jacobian_stats(det: &Image, mask: Option<&[bool]>) -> JacobianStats {
    let values = det.as_slice();
    if let Some(m) = mask {
        assert_eq!(m.len(), values.len(), "mask must have one entry per voxel");
    }
    let plane = det.grid.shape()[1] * det.grid.shape()[2];
    let inside = |n: usize| mask.map_or(true, |m| m[n]);
    let partials: Vec<Partial> = values
        .par_chunks(plane)
        .enumerate()
        .map(|(i, slab)| {
            let mut p = Partial {
                voxels: 0,
                folded: 0,
                non_finite: 0,
                sum: 0.0,
                sum_log: 0.0,
                min: f64::INFINITY,
                max: f64::NEG_INFINITY,
            };
            for (t, &v) in slab.iter().enumerate() {
                if !inside(i * plane + t) {
                    continue;
                }
                let v = v as f64;
                if !v.is_finite() {
                    p.non_finite += 1;
                    continue;
                }
                p.voxels += 1;
                p.sum += v;
                p.min = p.min.min(v);
                p.max = p.max.max(v);
                if v > 0.0 {
                    p.sum_log += v.ln();
                } else {
                    p.folded += 1;
                }
            }
            p
        })
        .collect();
    let mut t = partials[0];
    for p in &partials[1..] {
        t.voxels += p.voxels;
        t.folded += p.folded;
        t.non_finite += p.non_finite;
        t.sum += p.sum;
        t.sum_log += p.sum_log;
        t.min = t.min.min(p.min);
        t.max = t.max.max(p.max);
    }
    let positive = t.voxels - t.folded;
    let mean_log = if positive > 0 { t.sum_log / positive as f64 } else { 0.0 };
    let sq: Vec<f64> = values
        .par_chunks(plane)
        .enumerate()
        .map(|(i, slab)| {
            let mut s = 0.0;
            for (t, &v) in slab.iter().enumerate() {
                let v = v as f64;
                if inside(i * plane + t) && v.is_finite() && v > 0.0 {
                    s += (v.ln() - mean_log).powi(2);
                }
            }
            s
        })
        .collect();
    let sd_log_j = if positive > 0 { (sq.iter().sum::<f64>() / positive as f64).sqrt() } else { 0.0 };
    let empty = t.voxels == 0;
    JacobianStats {
        voxels: t.voxels,
        folding_fraction: if empty { 0.0 } else { t.folded as f64 / t.voxels as f64 },
        folded_voxels: t.folded,
        sd_log_j,
        excluded_from_sdlogj: t.folded,
        non_finite: t.non_finite,
        min: if empty { f64::NAN } else { t.min },
        max: if empty { f64::NAN } else { t.max },
        mean: if empty { f64::NAN } else { t.sum / t.voxels as f64 },
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    #[test]
    fn affine_field_has_constant_determinant_including_borders() {
        // Exact fact: for u(x) = (A − I)x + t, ∇u = A − I, and central and one-sided differences
        // are exact for linear functions, so det = det(A) at every voxel.
        let a = [[1.1, 0.2, -0.1], [0.05, 0.9, 0.3], [-0.2, 0.1, 1.2]];
        let t = [0.5, -1.0, 2.0];
        let g = Grid::axis_aligned([7, 6, 5], [2.0, 0.7, 3.0], [0.0; 3]);
        let mut f = Field::zeros(g.clone());
        let [_, ny, nz] = g.shape();
        for c in 0..3 {
            let comp = &mut f.components_mut()[c];
            for (n, v) in comp.iter_mut().enumerate() {
                let x = [(n / (ny * nz)) as f64, ((n / nz) % ny) as f64, (n % nz) as f64];
                let id = [0, 1, 2].map(|b| if b == c { 1.0 } else { 0.0 });
                *v = ((0..3).map(|b| (a[c][b] - id[b]) * x[b]).sum::<f64>() + t[c]) as f32;
            }
        }
        let want = det3(&a);
        let det = jacobian_determinant(&f);
        let worst = det.as_slice().iter().map(|&v| (v as f64 - want).abs()).fold(0.0, f64::max);
        assert!(worst < 1e-5, "max deviation {worst} from det(A) = {want}");
    }

    #[test]
    fn stats_follow_the_definitions() {
        // Hand-computed: dets [2, 0.5, -1, 1, NaN], all in mask except the 4th.
        let g = Grid::axis_aligned([5, 1, 1], [1.0; 3], [0.0; 3]);
        let mut d = Image::filled(g, 0.0);
        d.as_slice_mut().copy_from_slice(&[2.0, 0.5, -1.0, 1.0, f32::NAN]);
        let s = jacobian_stats(&d, Some(&[true, true, true, false, true]));
        assert_eq!((s.voxels, s.folded_voxels, s.non_finite, s.excluded_from_sdlogj), (3, 1, 1, 1));
        approx::assert_abs_diff_eq!(s.folding_fraction, 1.0 / 3.0, epsilon = 1e-15);
        // ln 2 and ln 0.5 = ±ln 2: mean 0, population sd = ln 2.
        approx::assert_abs_diff_eq!(s.sd_log_j, 2f64.ln(), epsilon = 1e-12);
        assert_eq!((s.min, s.max), (-1.0, 2.0));
        approx::assert_abs_diff_eq!(s.mean, 0.5, epsilon = 1e-15);
        let all = jacobian_stats(&d, None);
        assert_eq!(all.voxels, 4);
        let json = serde_json::to_value(&s).unwrap();
        assert_eq!(json["folded_voxels"], 1);
    }
}
