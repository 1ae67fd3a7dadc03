//! Inversion of a pull displacement field by fixed-point iteration.
//!
//! The inverse `v` of `u` (same grid) satisfies `x + v(x) + u(x + v(x)) = x`, i.e.
//! `v(x) = −u(x + v(x))`; starting from `v = 0`, the iteration `v ← −u(x + v(x))` (trilinear
//! `u`, edge vectors repeated outside the grid) converges when `u` is a contraction
//! (`|∇u| < 1`, i.e. no folding), as in "A simple fixed-point approach to invert a
//! deformation field", Medical Physics 2008. The residual `|v(x) + u(x + v(x))|` (voxels) is
//! reported: it is the distance by which `compose(v, u)` misses the identity.

use rayon::prelude::*;
use serde::Serialize;
use sinew_grid::interp::trilinear;
use sinew_grid::{Border, Field};

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

/// The inverse of `u` by `iterations` fixed-point steps (see the module docs), with the
/// residual of the result.
pub fn invert(u: &Field, iterations: usize) -> (Field, InvertReport) {
    let mut v = Field::zeros(u.grid.clone());
    let mut next = Field::zeros(u.grid.clone());
    for _ in 0..iterations {
        step(u, &v, &mut next);
        std::mem::swap(&mut v, &mut next);
    }
    // Residual: r = v − (−u(x + v)) = v − step(v).
    step(u, &v, &mut next);
    let n = u.grid.len();
    let (mut sum, mut max) = (0.0f64, 0.0f64);
    for idx in 0..n {
        let r2: f64 = (0..3).map(|d| (v.component(d)[idx] as f64 - next.component(d)[idx] as f64).powi(2)).sum();
        sum += r2.sqrt();
        max = max.max(r2.sqrt());
    }
    (v, InvertReport { iterations, mean_residual_vox: sum / n as f64, max_residual_vox: max })
}

/// `out(x) = −u(x + v(x))`, parallel over `i` slabs.
fn step(u: &Field, v: &Field, out: &mut Field) {
    let shape = u.grid.shape();
    let [_, ny, nz] = shape;
    let n = u.grid.len();
    let uc = [u.component(0), u.component(1), u.component(2)];
    let vc = [v.component(0), v.component(1), v.component(2)];
    let data = out.data.as_slice_mut().expect("standard layout");
    let (o0, rest) = data.split_at_mut(n);
    let (o1, o2) = rest.split_at_mut(n);
    let plane = ny * nz;
    o0.par_chunks_mut(plane).zip(o1.par_chunks_mut(plane)).zip(o2.par_chunks_mut(plane)).enumerate().for_each(
        |(i, ((c0, c1), c2))| {
            for idx in 0..plane {
                let g = i * plane + idx;
                let p = [i as f32 + vc[0][g], (idx / nz) as f32 + vc[1][g], (idx % nz) as f32 + vc[2][g]];
                c0[idx] = -trilinear(uc[0], shape, p, Border::Nearest);
                c1[idx] = -trilinear(uc[1], shape, p, Border::Nearest);
                c2[idx] = -trilinear(uc[2], shape, p, Border::Nearest);
            }
        },
    );
}
