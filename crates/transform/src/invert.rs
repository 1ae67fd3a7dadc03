//! Inversion of a displacement field by fixed-point iteration: the one inverter, used for a
//! pull field's inverse (`sinew field invert`) and for turning a push field into a pull field
//! (`sinew_score::invert_push_field`).
//!
//! The inverse `v` of `u` (same grid) satisfies `x + v(x) + u(x + v(x)) = x`, i.e.
//! `v(x) = −u(x + v(x))`; the iteration `v ← −u(x + v(x))` (trilinear `u`, edge vectors
//! repeated outside the grid) converges when `u` is a contraction (`|∇u| < 1`, i.e. no
//! folding), as in "A simple fixed-point approach to invert a deformation field", Medical
//! Physics 2008. It starts from `v₀ = 0` or from the first-order guess `v₀ = −u`
//! ([`InvertStart`]). The residual `r(x) = v(x) + u(x + v(x))` (voxels) is the distance by which
//! `compose(v, u)` misses the identity; its mean and maximum length are reported in voxels or,
//! through the grid's linear part, in mm.

use rayon::prelude::*;
use serde::Serialize;
use sinew_grid::interp::trilinear;
use sinew_grid::{Border, Field};

/// Where the fixed-point iteration starts.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum InvertStart {
    /// `v₀ = 0`.
    Zero,
    /// `v₀ = −u`, the first-order inverse (exact for a constant field).
    Negated,
}

/// What [`invert`] reached.
#[derive(Clone, Copy, Debug, Serialize)]
pub struct InvertReport {
    /// Iterations run.
    pub iterations: usize,
    /// Mean residual `|v(x) + u(x + v(x))|` in voxels.
    pub mean_residual_vox: f64,
    /// Largest residual in voxels.
    pub max_residual_vox: f64,
}

/// The result of [`invert_from`].
#[derive(Clone, Debug)]
pub struct Inverse {
    /// The inverse `v` (voxels along i, j, k, on `u`'s grid).
    pub field: Field,
    /// Fixed-point iterations run.
    pub iterations: usize,
    /// The residual vectors `r(x) = v(x) + u(x + v(x))`, voxels along i, j, k.
    pub residual: Field,
}

impl Inverse {
    /// Mean and largest residual length `|r(x)|` over the grid, in voxels.
    pub fn residual_voxels(&self) -> (f64, f64) {
        self.residual_lengths(&[[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    }

    /// Mean and largest residual length `|M·r(x)|` over the grid in mm (`M` the linear part of
    /// the grid's voxel-to-world affine).
    pub fn residual_mm(&self) -> (f64, f64) {
        self.residual_lengths(&self.residual.grid.affine().linear())
    }

    /// Mean and maximum of `|lin·r(x)|`; sums per `i` slab, added in slab order (independent of
    /// the thread count).
    fn residual_lengths(&self, lin: &[[f64; 3]; 3]) -> (f64, f64) {
        let shape = self.residual.grid.shape();
        let plane = shape[1] * shape[2];
        let r = [self.residual.component(0), self.residual.component(1), self.residual.component(2)];
        let partial: Vec<(f64, f64)> = (0..shape[0])
            .into_par_iter()
            .map(|i| {
                let (mut sum, mut max) = (0.0f64, 0.0f64);
                let slab = i * plane..(i + 1) * plane;
                let (x, y, z) = (&r[0][slab.clone()], &r[1][slab.clone()], &r[2][slab]);
                for ((&x, &y), &z) in x.iter().zip(y).zip(z) {
                    let v = [x as f64, y as f64, z as f64];
                    let len = lin
                        .iter()
                        .map(|row| (row[0] * v[0] + row[1] * v[1] + row[2] * v[2]).powi(2))
                        .sum::<f64>()
                        .sqrt();
                    sum += len;
                    max = max.max(len);
                }
                (sum, max)
            })
            .collect();
        let sum: f64 = partial.iter().map(|p| p.0).sum();
        let max = partial.iter().map(|p| p.1).fold(0.0, f64::max);
        (sum / self.residual.grid.len() as f64, max)
    }
}

/// The inverse of `u` by `iterations` fixed-point steps from `v₀ = 0` (see the module docs),
/// with its residual in voxels.
pub fn invert(u: &Field, iterations: usize) -> (Field, InvertReport) {
    let inv = invert_from(u, iterations, InvertStart::Zero);
    let (mean, max) = inv.residual_voxels();
    (inv.field, InvertReport { iterations, mean_residual_vox: mean, max_residual_vox: max })
}

/// The inverse of `u` by `iterations` fixed-point steps from `start`, with the residual
/// vectors. Deterministic: every voxel is computed alone.
pub fn invert_from(u: &Field, iterations: usize, start: InvertStart) -> Inverse {
    let mut v = match start {
        InvertStart::Zero => Field::zeros(u.grid.clone()),
        InvertStart::Negated => {
            let mut v = u.clone();
            v.data.mapv_inplace(|x| -x);
            v
        }
    };
    let mut next = Field::zeros(u.grid.clone());
    for _ in 0..iterations {
        step(u, &v, &mut next);
        std::mem::swap(&mut v, &mut next);
    }
    // Residual: r = v(x) + u(x + v(x)) = v − (the next iterate).
    step(u, &v, &mut next);
    next.data.zip_mut_with(&v.data, |n, &vv| *n = vv - *n);
    Inverse { field: v, iterations, residual: next }
}

/// `out(x) = −u(x + v(x))`, parallel over `i` slabs.
fn step(u: &Field, v: &Field, out: &mut Field) {
    let shape = u.grid.shape();
    let nz = shape[2];
    let plane = shape[1] * nz;
    let uc = [u.component(0), u.component(1), u.component(2)];
    let vc = [v.component(0), v.component(1), v.component(2)];
    out.par_slabs_mut(|i, [c0, c1, c2]| {
        for idx in 0..plane {
            let g = i * plane + idx;
            let p = [i as f32 + vc[0][g], (idx / nz) as f32 + vc[1][g], (idx % nz) as f32 + vc[2][g]];
            c0[idx] = -trilinear(uc[0], shape, p, Border::Nearest);
            c1[idx] = -trilinear(uc[1], shape, p, Border::Nearest);
            c2[idx] = -trilinear(uc[2], shape, p, Border::Nearest);
        }
    });
}
