//! Resampling a volume onto another grid through world coordinates.

use ndarray::{Array3, Axis};
use rayon::prelude::*;

use crate::{interp, Affine, Border, Grid, Image, LabelMap, Volume};

/// The map from `target` voxel positions to `source` voxel positions through world space:
/// `p_src = A_src⁻¹ · A_target · p_target`.
pub fn voxel_map(target: &Grid, source: &Grid) -> Affine {
    source.inverse_affine().compose(target.affine())
}

/// Resamples `src` onto `target` with trilinear interpolation; the value at target voxel
/// `p` is `src(A_src⁻¹ · A_target · p)`.
pub fn resample_image(src: &Image, target: &Grid, border: Border) -> Image {
    let m = voxel_map(target, &src.grid);
    let out = map_voxels(target, &m, |p| interp::trilinear(src.as_slice(), src.grid.shape(), p, border));
    Volume { grid: target.clone(), data: out }
}

/// Resamples a label map onto `target` by nearest neighbour; outside is label 0.
///
/// When `target` has the shape of `src` and the voxel map moves no voxel by a quarter voxel
/// or more (the label map already lies on `target`, as the moving labels of two scans on one
/// grid do), every rounded position is the voxel itself, so the labels are copied as they are
/// (the same values as sampling each voxel).
pub fn resample_labels(src: &LabelMap, target: &Grid) -> LabelMap {
    let m = voxel_map(target, &src.grid);
    if target.shape() == src.grid.shape() && moves_less_than_a_quarter(&m, target.shape()) {
        return Volume { grid: target.clone(), data: src.data.clone() };
    }
    let out = map_voxels(target, &m, |p| interp::nearest(src.as_slice(), src.grid.shape(), p, 0u16));
    Volume { grid: target.clone(), data: out }
}

/// True when `|m·p − p| < 1/4` voxel along every axis for every voxel `p` of a grid of
/// `shape`: per row `r`, `Σ_c |m_rc − δ_rc|·(n_c − 1) + |t_r| < 1/4` bounds the move (the
/// largest `|p_c|` is `n_c − 1`). The sampler rounds `p + e` to f32 first: `p` (an index below
/// 2²⁴) is an f32 itself, so the nearest f32 to `p + e` lies within `2·|e| < 1/2` of `p`, and
/// rounding it to the nearest integer gives `p` again: nearest-neighbour sampling through `m`
/// reads voxel `p` itself.
fn moves_less_than_a_quarter(m: &Affine, shape: [usize; 3]) -> bool {
    shape.iter().all(|&n| n < 1 << 24)
        && (0..3).all(|r| {
            let row = &m.m[r];
            let bound: f64 = (0..3)
                .map(|c| (row[c] - f64::from(u8::from(r == c))).abs() * (shape[c].max(1) - 1) as f64)
                .sum::<f64>()
                + row[3].abs();
            bound < 0.25
        })
}

/// Fills an array on `target` with `f(m · p)` for every voxel `p`, in parallel over `i` slabs.
fn map_voxels<T, F>(target: &Grid, m: &Affine, f: F) -> Array3<T>
where
    T: Copy + Default + Send + Sync,
    F: Fn([f32; 3]) -> T + Sync,
{
    let [nx, ny, nz] = target.shape();
    let mut out = Array3::<T>::default((nx, ny, nz));
    out.axis_iter_mut(Axis(0)).into_par_iter().enumerate().for_each(|(i, mut slab)| {
        let s = slab.as_slice_mut().expect("standard layout");
        for j in 0..ny {
            for k in 0..nz {
                let q = m.apply([i as f64, j as f64, k as f64]);
                s[j * nz + k] = f([q[0] as f32, q[1] as f32, q[2] as f32]);
            }
        }
    });
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn resampling_onto_own_grid_is_identity_and_shift_is_exact() {
        let g = Grid::axis_aligned([6, 5, 4], [2.0, 2.0, 3.0], [10.0, -4.0, 0.0]);
        let mut img = Image::filled(g.clone(), 0.0);
        for ((i, j, k), v) in img.data.indexed_iter_mut() {
            *v = (i * 100 + j * 10 + k) as f32;
        }
        let same = resample_image(&img, &g, Border::Constant(-1.0));
        assert_eq!(same.data, img.data);
        // A target grid shifted by one source voxel along i (2 mm): values shift by 100.
        let shifted = Grid::axis_aligned([5, 5, 4], [2.0, 2.0, 3.0], [12.0, -4.0, 0.0]);
        let r = resample_image(&img, &shifted, Border::Constant(-1.0));
        assert_eq!(r.data[[0, 1, 2]], 112.0);
        let mut lab = LabelMap::filled(g.clone(), 0);
        lab.data[[3, 2, 1]] = 7;
        let rl = resample_labels(&lab, &shifted);
        assert_eq!(rl.data[[2, 2, 1]], 7);
        // Exact facts of nearest-neighbour sampling: a target shifted by 0.2 voxel (0.4 mm
        // along i) reads every voxel itself (the copy of a map already on the grid); shifted by
        // 0.6 voxel it reads the next voxel along i, and label 0 beyond the last one.
        for (i, j, k) in [(0usize, 0usize, 0usize), (3, 2, 1), (5, 4, 3)] {
            lab.data[[i, j, k]] = (1 + i * 100 + j * 10 + k) as u16;
        }
        let near = Grid::axis_aligned([6, 5, 4], [2.0, 2.0, 3.0], [10.4, -4.0, 0.0]);
        let rn = resample_labels(&lab, &near);
        assert_eq!(rn.data, lab.data);
        assert_eq!(rn.grid, near);
        let far = Grid::axis_aligned([6, 5, 4], [2.0, 2.0, 3.0], [11.2, -4.0, 0.0]);
        let rf = resample_labels(&lab, &far);
        for ((i, j, k), &v) in rf.data.indexed_iter() {
            let want = if i + 1 < 6 { lab.data[[i + 1, j, k]] } else { 0 };
            assert_eq!(v, want, "({i}, {j}, {k})");
        }
    }
}

/// Resamples a displacement field onto another grid (typically one pyramid level finer),
/// trilinearly, keeping the physical displacement: each vector is carried to world mm with
/// the source affine's linear part and back to voxels of `target`:
/// `u_target(p) = M_t⁻¹ · M_s · u_src(A_s⁻¹ · A_t · p)`. Outside the source grid the edge
/// vector is repeated.
pub fn resample_field(src: &crate::Field, target: &Grid) -> crate::Field {
    let m = voxel_map(target, &src.grid);
    let lin = target.inverse_affine().compose(src.grid.affine()).linear();
    let shape = src.grid.shape();
    let comps = [src.component(0), src.component(1), src.component(2)];
    let mut out = crate::Field::zeros(target.clone());
    let [_, ny, nz] = target.shape();
    out.par_slabs_mut(|i, [oa, ob, oc]| {
        for j in 0..ny {
            for k in 0..nz {
                let q = m.apply([i as f64, j as f64, k as f64]);
                let p = [q[0] as f32, q[1] as f32, q[2] as f32];
                // The three components share the cell (trilinear's own fast path).
                let v = match interp::InsideCell::at(p, shape) {
                    Some(cell) => [0, 1, 2].map(|d| cell.sample(comps[d], shape) as f64),
                    None => [0, 1, 2].map(|d| interp::trilinear(comps[d], shape, p, Border::Nearest) as f64),
                };
                let w = [0, 1, 2].map(|r| (lin[r][0] * v[0] + lin[r][1] * v[1] + lin[r][2] * v[2]) as f32);
                let idx = j * nz + k;
                oa[idx] = w[0];
                ob[idx] = w[1];
                oc[idx] = w[2];
            }
        }
    });
    out
}

#[cfg(test)]
mod field_tests {
    use super::*;

    #[test]
    fn upsampled_constant_field_keeps_its_length_in_mm() {
        let fine = Grid::axis_aligned([8, 8, 6], [2.0, 2.0, 3.0], [0.0; 3]);
        let coarse = fine.halved([false, false, true]);
        let mut f = crate::Field::zeros(coarse.clone());
        let [a, b, c] = f.components_mut();
        a.iter_mut().for_each(|v| *v = 1.5); // 1.5 coarse voxels = 6 mm along i
        b.iter_mut().for_each(|v| *v = -0.5); // -2 mm along j
        c.iter_mut().for_each(|v| *v = 1.0); // 3 mm along k (not halved)
        let up = resample_field(&f, &fine);
        for (d, want) in [3.0, -1.0, 1.0].into_iter().enumerate() {
            for &v in up.component(d).iter() {
                approx::assert_abs_diff_eq!(v, want, epsilon = 1e-5);
            }
        }
    }
}

/// Anti-aliasing widths for resampling from `source` onto `target`: σ in voxels of `source`
/// along each of its axes.
///
/// The downsampling factor along source axis `d` is the largest step, in source voxels, that
/// one target voxel makes along `d`: `r_d = max_e |(A_s⁻¹·A_t)_{d,e}|` (for axis-aligned grids
/// the plain spacing ratio). The width is `σ_d = max(0, (r_d − 1)/2)`: zero when the target is
/// not coarser, half a target voxel minus half a source voxel otherwise (the default
/// anti-aliasing width of scikit-image's `skimage.transform.resize`).
pub fn antialias_sigmas(source: &Grid, target: &Grid) -> [f64; 3] {
    let lin = voxel_map(target, source).linear();
    std::array::from_fn(|d| {
        let r = lin[d].iter().fold(0.0f64, |a, v| a.max(v.abs()));
        ((r - 1.0) / 2.0).max(0.0)
    })
}

/// [`resample_image`] with an anti-aliasing prefilter: when `target` is coarser than `src`
/// along an axis, `src` is first smoothed along it by a Gaussian of σ from
/// [`antialias_sigmas`] (separable, edge values repeated), so that detail finer than the new
/// grid can resolve (noise, thin structures) is averaged instead of aliased. Where the target
/// is not coarser, this is exactly [`resample_image`].
pub fn resample_image_antialiased(src: &Image, target: &Grid, border: Border) -> Image {
    let sigmas = antialias_sigmas(&src.grid, target);
    if sigmas.iter().all(|&s| s <= 0.0) {
        return resample_image(src, target, border);
    }
    let shape = src.grid.shape();
    let mut data = src.data.clone();
    let mut scratch = Vec::new();
    for (d, &s) in sigmas.iter().enumerate() {
        if s > 0.0 && shape[d] > 1 {
            let k = crate::smooth::gaussian_kernel(s);
            crate::smooth::convolve_axis_slice(
                data.as_slice_mut().expect("standard layout"),
                shape,
                d,
                &k,
                &mut scratch,
            );
        }
    }
    drop(scratch);
    let smoothed = Volume { grid: src.grid.clone(), data };
    resample_image(&smoothed, target, border)
}

#[cfg(test)]
mod antialias_tests {
    use super::*;

    /// Independent Gaussian taps (not the crate's kernel): `exp(−t²/2σ²)` for
    /// `|t| ≤ ⌈3σ⌉`, normalised to sum 1 (the definition of a sampled normalised Gaussian).
    fn taps(sigma: f64) -> Vec<f64> {
        let r = (3.0 * sigma).ceil() as i64;
        let w: Vec<f64> = (-r..=r).map(|t| (-((t * t) as f64) / (2.0 * sigma * sigma)).exp()).collect();
        let s: f64 = w.iter().sum();
        w.into_iter().map(|v| v / s).collect()
    }

    /// Autocovariance at lag `l` of unit white noise filtered by `g`: `Σ_t g[t]·g[t+l]`.
    fn autocov(g: &[f64], l: i64) -> f64 {
        let n = g.len() as i64;
        (0..n).filter(|t| (0..n).contains(&(t + l))).map(|t| g[t as usize] * g[(t + l) as usize]).sum()
    }

    /// Variance of a linear interpolation at fraction `f` between two samples of that noise:
    /// `(1−f)²·C(0) + f²·C(0) + 2f(1−f)·C(1)` (variance of a linear combination).
    fn lerp_var(g: &[f64], f: f64) -> f64 {
        ((1.0 - f).powi(2) + f * f) * autocov(g, 0) + 2.0 * f * (1.0 - f) * autocov(g, 1)
    }

    #[test]
    fn white_noise_keeps_the_variance_the_filter_predicts_and_a_ramp_is_unchanged() {
        // Unit-variance white noise on a 1 mm grid, resampled to 3.5 mm (factor 3.5 along
        // every axis): σ = (3.5 − 1)/2 = 1.25 voxels. Target voxel centres sit at source
        // positions 1.25 + 3.5·c (corners aligned), i.e. at fractions 0.25 and 0.75.
        // Prediction (exact maths: variance of a linear combination of independent samples):
        // per axis, the mean over both fractions of the interpolated filtered variance; the
        // three axes multiply (separable filter and interpolation).
        let n = 154; // 44 target voxels per axis
        let g = Grid::axis_aligned([n, n, n], [1.0; 3], [0.0; 3]);
        let mut state = 0x2545_f491_4f6c_dd1du64;
        let mut next = || {
            // xorshift64* then Box–Muller: standard normal deviates.
            let mut u = || {
                state ^= state >> 12;
                state ^= state << 25;
                state ^= state >> 27;
                ((state.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 11) as f64 + 0.5) / (1u64 << 53) as f64
            };
            let (a, b) = (u(), u());
            ((-2.0 * a.ln()).sqrt() * (2.0 * std::f64::consts::PI * b).cos()) as f32
        };
        let img = Image { grid: g.clone(), data: ndarray::Array3::from_shape_simple_fn((n, n, n), &mut next) };
        let target = g.with_shape([44, 44, 44]).unwrap();
        assert_eq!(antialias_sigmas(&g, &target), [1.25; 3]);
        let out = resample_image_antialiased(&img, &target, Border::Nearest);
        // Interior only: the filter repeats edge values, which changes the statistics there.
        let vals: Vec<f64> = out
            .data
            .indexed_iter()
            .filter(|((i, j, k), _)| [*i, *j, *k].iter().all(|&c| (2..42).contains(&c)))
            .map(|(_, &v)| v as f64)
            .collect();
        let mean = vals.iter().sum::<f64>() / vals.len() as f64;
        let var = vals.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / vals.len() as f64;
        let k = taps(1.25);
        let per_axis = 0.5 * (lerp_var(&k, 0.25) + lerp_var(&k, 0.75));
        let predicted = per_axis.powi(3);
        // 64 000 nearly independent samples: the estimate's relative standard error is about
        // √(2/64000) ≈ 0.6 %; 5 % leaves room for the residual correlation between neighbours.
        assert!(
            approx::abs_diff_eq!(var / predicted, 1.0, epsilon = 0.05),
            "variance {var:.3e} vs predicted {predicted:.3e}"
        );
        // Without the filter the variance is that of plain interpolation of white noise,
        // `(0.25² + 0.75²)³ ≈ 0.244`, about 50 times more.
        let plain = resample_image(&img, &target, Border::Nearest);
        let pv = plain.data.iter().map(|&v| (v as f64).powi(2)).sum::<f64>() / plain.data.len() as f64;
        assert!(approx::abs_diff_eq!(pv / 0.625f64.powi(3), 1.0, epsilon = 0.05), "plain variance {pv}");

        // A smooth ramp is unchanged: a symmetric kernel keeps a linear function (exact fact),
        // and trilinear interpolation reproduces it; checked away from the repeated edges.
        let ramp = Image {
            grid: g.clone(),
            data: ndarray::Array3::from_shape_fn((n, n, n), |(i, j, k)| {
                0.5 * i as f32 - 0.25 * j as f32 + 0.1 * k as f32
            }),
        };
        let out = resample_image_antialiased(&ramp, &target, Border::Nearest);
        for ((i, j, k), &v) in out.data.indexed_iter() {
            if [i, j, k].iter().all(|&c| (2..42).contains(&c)) {
                let w = target.voxel_to_world([i as f64, j as f64, k as f64]);
                let expect = 0.5 * w[0] - 0.25 * w[1] + 0.1 * w[2];
                assert!(approx::abs_diff_eq!(v as f64, expect, epsilon = 1e-3), "ramp at {i},{j},{k}: {v} vs {expect}");
            }
        }
    }
}
