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
pub fn resample_labels(src: &LabelMap, target: &Grid) -> LabelMap {
    let m = voxel_map(target, &src.grid);
    let out = map_voxels(target, &m, |p| interp::nearest(src.as_slice(), src.grid.shape(), p, 0u16));
    Volume { grid: target.clone(), data: out }
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
                let v = [0, 1, 2].map(|d| interp::trilinear(comps[d], shape, p, Border::Nearest) as f64);
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
        assert!(up.component(0).iter().all(|&v| (v - 3.0).abs() < 1e-5));
        assert!(up.component(1).iter().all(|&v| (v + 1.0).abs() < 1e-5));
        assert!(up.component(2).iter().all(|&v| (v - 1.0).abs() < 1e-5));
    }
}
