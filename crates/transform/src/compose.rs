//! Composition of pull displacement fields.
//!
//! For pull fields (`warped(x) = moving(x + u(x))`), warping by `C = compose(first, second)`
//! equals warping by `second` and then warping that result by `first`:
//! ```text
//! C(x) = first(x) + second(x + first(x))         (as maps: φ_C = φ_second ∘ φ_first)
//! warp(m, C) = warp(warp(m, second), first)
//! ```
//! A point of `first`'s grid travels through `first` into `second`'s grid, then through
//! `second`. The two fields may live on different grids: the intermediate point is carried
//! through world mm, `second` is sampled trilinearly there (edge vectors repeat outside its
//! grid) and its vector is carried back with the grids' linear parts. `C` lives on `first`'s
//! grid.

use sinew_grid::interp::trilinear;
use sinew_grid::resample::voxel_map;
use sinew_grid::{Border, Field};

/// `C(x) = first(x) + second(x + first(x))` on `first`'s grid (see the module docs).
pub fn compose(first: &Field, second: &Field) -> Field {
    let ga = &first.grid;
    let gb = &second.grid;
    let to_b = voxel_map(ga, gb); // first's voxels → second's voxels
    let back = ga.inverse_affine().compose(gb.affine()).linear(); // second's voxel vectors → first's
    let shape_b = gb.shape();
    let comps_b = [second.component(0), second.component(1), second.component(2)];
    let mut out = Field::zeros(ga.clone());
    let [_, ny, nz] = ga.shape();
    let (a0, a1, a2) = (first.component(0), first.component(1), first.component(2));
    let plane = ny * nz;
    out.par_slabs_mut(|i, [c0, c1, c2]| {
        for idx in 0..plane {
            let v = i * plane + idx;
            let ua = [a0[v] as f64, a1[v] as f64, a2[v] as f64];
            let p = [i as f64 + ua[0], (idx / nz) as f64 + ua[1], (idx % nz) as f64 + ua[2]];
            let q = to_b.apply(p);
            let qf = [q[0] as f32, q[1] as f32, q[2] as f32];
            let ub = [0, 1, 2].map(|d| trilinear(comps_b[d], shape_b, qf, Border::Nearest) as f64);
            let w = [0, 1, 2].map(|r| back[r][0] * ub[0] + back[r][1] * ub[1] + back[r][2] * ub[2]);
            c0[idx] = (ua[0] + w[0]) as f32;
            c1[idx] = (ua[1] + w[1]) as f32;
            c2[idx] = (ua[2] + w[2]) as f32;
        }
    });
    out
}
