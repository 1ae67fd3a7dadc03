//! A coarse discrete displacement search that captures large shifts before the continuous
//! refinement.
//!
//! Gradient-based optimisation sees only about one voxel around the current estimate, so an
//! organ displaced by more than its own size can settle in a wrong minimum. Here every
//! lattice point tries every integer displacement `d ∈ {−R, …, R}³` (voxels of the coarsest
//! level) and scores it by the descriptor distance aggregated over a small patch:
//! ```text
//! c_d(x) = 1/C · Σ_{y ∈ B(x)} Σ_c ( M_c(y + d) − F_c(y) )² / |B|       (box patch B, radius p)
//! ```
//! The labels are then regularised by a few rounds of a quadratic pull towards the smoothed
//! current estimate (an iterated-conditional-modes approximation of the discrete
//! Markov-random-field formulation of "Dense image registration through MRFs and efficient
//! linear programming", Medical Image Analysis, 2008):
//! ```text
//! ū = G_σ ∗ u,    u(x) = argmin_d  c_d(x) + α·|d − ū(x)|²
//! ```
//! and the result, smoothed once more, is the starting field of the coarsest level.
//! The cost volume holds `(2R+1)³` values per lattice point, so the search runs on the
//! coarsest level only, where that is small.

use rayon::prelude::*;

/// Settings of the discrete search.
#[derive(Clone, Copy, Debug)]
pub struct SearchParams {
    /// Search radius R in voxels of the level (displacements `−R..=R` per axis).
    pub radius: usize,
    /// Radius p of the box patch over which costs are aggregated (voxels).
    pub patch: usize,
    /// Weight α of the pull towards the smoothed estimate, relative to the mean cost.
    pub alpha: f32,
    /// σ (voxels) of the Gaussian that smooths the estimate.
    pub sigma: f64,
    /// Rounds of regularisation.
    pub rounds: usize,
}

/// Runs the search on descriptors `fixed`, `moving` (channel-last, `channels` per voxel, on a
/// grid of `shape`) and returns the component-first displacement field (voxels).
pub fn discrete_search(
    fixed: &[f32],
    moving: &[f32],
    channels: usize,
    shape: [usize; 3],
    sp: &SearchParams,
) -> Vec<f32> {
    let [nx, ny, nz] = shape;
    let n = nx * ny * nz;
    let r = sp.radius as isize;
    let side = 2 * sp.radius + 1;
    let labels: Vec<[isize; 3]> = (0..side * side * side)
        .map(|l| [(l / (side * side)) as isize - r, ((l / side) % side) as isize - r, (l % side) as isize - r])
        .collect();
    let nl = labels.len();
    // Cost volume, label-major: cost[l·N + x].
    let mut cost = vec![0.0f32; nl * n];
    let clamp = |v: isize, m: usize| v.clamp(0, m as isize - 1) as usize;
    cost.par_chunks_mut(n).zip(labels.par_iter()).for_each(|(c, d)| {
        for i in 0..nx {
            let mi = clamp(i as isize + d[0], nx);
            for j in 0..ny {
                let mj = clamp(j as isize + d[1], ny);
                for k in 0..nz {
                    let mk = clamp(k as isize + d[2], nz);
                    let f = ((i * ny + j) * nz + k) * channels;
                    let m = ((mi * ny + mj) * nz + mk) * channels;
                    let mut s = 0.0f32;
                    for ch in 0..channels {
                        let e = moving[m + ch] - fixed[f + ch];
                        s += e * e;
                    }
                    c[(i * ny + j) * nz + k] = s / channels as f32;
                }
            }
        }
        let mut scratch = Vec::new();
        for axis in 0..3 {
            box_filter_axis(c, shape, axis, sp.patch, &mut scratch);
        }
    });
    // Mean cost sets the scale of α.
    let mean_cost = cost.iter().map(|&v| v as f64).sum::<f64>() / cost.len() as f64;
    let alpha = sp.alpha * mean_cost.max(1e-12) as f32;
    let mut u = vec![0.0f32; 3 * n];
    let mut smooth = vec![0.0f32; 3 * n];
    let kernel = sinew_grid::smooth::gaussian_kernel(sp.sigma);
    let mut scratch = Vec::new();
    for round in 0..=sp.rounds {
        let weight = if round == 0 { 0.0 } else { alpha };
        let (ux, rest) = u.split_at_mut(n);
        let (uy, uz) = rest.split_at_mut(n);
        let (cost, labels, prior_field) = (&cost, &labels, &smooth);
        ux.par_chunks_mut(ny * nz)
            .zip(uy.par_chunks_mut(ny * nz))
            .zip(uz.par_chunks_mut(ny * nz))
            .enumerate()
            .for_each(|(i, ((ox, oy), oz))| {
                for jk in 0..ny * nz {
                    let x = i * ny * nz + jk;
                    let prior = [prior_field[x], prior_field[n + x], prior_field[2 * n + x]];
                    let mut best = f32::INFINITY;
                    let mut arg = [0isize; 3];
                    for (l, d) in labels.iter().enumerate() {
                        let dist = (d[0] as f32 - prior[0]).powi(2)
                            + (d[1] as f32 - prior[1]).powi(2)
                            + (d[2] as f32 - prior[2]).powi(2);
                        let e = cost[l * n + x] + weight * dist;
                        // Ties go to the smaller displacement: labels run from −R, so compare
                        // lengths on equality.
                        if e < best || (e == best && len2(d) < len2(&arg)) {
                            best = e;
                            arg = *d;
                        }
                    }
                    ox[jk] = arg[0] as f32;
                    oy[jk] = arg[1] as f32;
                    oz[jk] = arg[2] as f32;
                }
            });
        smooth.copy_from_slice(&u);
        for comp in smooth.chunks_exact_mut(n) {
            for axis in 0..3 {
                sinew_grid::smooth::convolve_axis_slice(comp, shape, axis, &kernel, &mut scratch);
            }
        }
    }
    smooth
}

fn len2(d: &[isize; 3]) -> isize {
    d[0] * d[0] + d[1] * d[1] + d[2] * d[2]
}

/// Box mean of radius `p` along `axis` (edges clamped), in place.
fn box_filter_axis(v: &mut [f32], shape: [usize; 3], axis: usize, p: usize, scratch: &mut Vec<f32>) {
    if p == 0 {
        return;
    }
    let [nx, ny, nz] = shape;
    let stride = match axis {
        0 => ny * nz,
        1 => nz,
        _ => 1,
    };
    let len = shape[axis];
    let lines: Vec<usize> = (0..nx * ny * nz).filter(|&x| (x / stride) % len == 0).collect();
    let w = 1.0 / (2 * p + 1) as f32;
    for start in lines {
        scratch.clear();
        scratch.extend((0..len).map(|t| v[start + t * stride]));
        for t in 0..len {
            let mut s = 0.0f32;
            for o in 0..=2 * p {
                let q = (t as isize + o as isize - p as isize).clamp(0, len as isize - 1) as usize;
                s += scratch[q];
            }
            v[start + t * stride] = s * w;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_a_known_integer_shift_of_a_textured_volume() {
        // Exact: the moving volume is the fixed one shifted by (2, −1, 3) voxels, so the
        // interior cost is zero at that label and positive elsewhere.
        let shape = [16, 14, 18];
        let n = 16 * 14 * 18;
        let tex = |i: isize, j: isize, k: isize| {
            ((i * 7 + j * 13 + k * 5) as f32 * 0.37).sin() + ((i * j + k) as f32 * 0.11).cos()
        };
        let shift = [2isize, -1, 3];
        let mut f = vec![0.0f32; n];
        let mut m = vec![0.0f32; n];
        for i in 0..16 {
            for j in 0..14 {
                for k in 0..18 {
                    let x = ((i * 14 + j) * 18 + k) as usize;
                    f[x] = tex(i, j, k);
                    // fixed(x) = moving(x + shift)  ⇔  moving(y) = tex(y − shift)
                    m[x] = tex(i - shift[0], j - shift[1], k - shift[2]);
                }
            }
        }
        let sp = SearchParams { radius: 3, patch: 1, alpha: 0.1, sigma: 1.0, rounds: 2 };
        let u = discrete_search(&f, &m, 1, shape, &sp);
        let centre = (8 * 14 + 7) * 18 + 9;
        for d in 0..3 {
            approx::assert_abs_diff_eq!(u[d * n + centre], shift[d] as f32, epsilon = 0.05);
        }
    }
}
