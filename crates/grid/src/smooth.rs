//! Separable Gaussian smoothing with spacing-aware widths.

use ndarray::{Array3, Axis};
use rayon::prelude::*;

/// Normalised 1-D Gaussian kernel `g[t] ∝ exp(−t²/(2σ²))` for `t = −r..=r`, `r = ⌈3σ⌉`,
/// with σ in voxels. σ ≤ 0 gives the one-tap kernel `[1]`.
pub fn gaussian_kernel(sigma: f64) -> Vec<f32> {
    if sigma <= 0.0 {
        return vec![1.0];
    }
    let r = (3.0 * sigma).ceil() as isize;
    let mut k: Vec<f64> = (-r..=r).map(|t| (-(t * t) as f64 / (2.0 * sigma * sigma)).exp()).collect();
    let s: f64 = k.iter().sum();
    k.iter_mut().for_each(|v| *v /= s);
    k.into_iter().map(|v| v as f32).collect()
}

/// Smooths `data` in place with a separable Gaussian of standard deviation `sigma_mm / spacing`
/// voxels along each axis; borders repeat the edge value (`Border::Nearest`).
pub fn gaussian_smooth(data: &mut Array3<f32>, spacing: [f64; 3], sigma_mm: f64) {
    for axis in 0..3 {
        let k = gaussian_kernel(sigma_mm / spacing[axis]);
        convolve_axis(data, axis, &k);
    }
}

/// Convolves `data` along `axis` with the odd-length kernel `k` (centre at `k.len()/2`),
/// clamping indices at the borders. Results do not depend on the thread count.
pub fn convolve_axis(data: &mut Array3<f32>, axis: usize, k: &[f32]) {
    if k.len() == 1 && k[0] == 1.0 {
        return;
    }
    assert!(data.is_standard_layout() && k.len() % 2 == 1, "standard layout and odd kernel");
    let shape = data.shape().to_vec();
    let r = (k.len() / 2) as isize;
    let n = shape[axis] as isize;
    if axis == 0 {
        // Work per j-row: gather lines along i.
        let src = data.clone();
        let (ny, nz) = (shape[1], shape[2]);
        data.axis_iter_mut(Axis(0)).into_par_iter().enumerate().for_each(|(i, mut slab)| {
            let out = slab.as_slice_mut().unwrap();
            let s = src.as_slice().unwrap();
            out.iter_mut().for_each(|v| *v = 0.0);
            for (t, &w) in k.iter().enumerate() {
                let ii = (i as isize + t as isize - r).clamp(0, n - 1) as usize;
                let row = &s[ii * ny * nz..(ii + 1) * ny * nz];
                for (o, &v) in out.iter_mut().zip(row) {
                    *o += w * v;
                }
            }
        });
        return;
    }
    // Axes 1 and 2 stay inside an i slab.
    data.axis_iter_mut(Axis(0)).into_par_iter().for_each(|mut slab| {
        let (ny, nz) = (shape[1], shape[2]);
        let s = slab.as_slice_mut().unwrap();
        if axis == 2 {
            let mut line = vec![0.0f32; nz];
            for j in 0..ny {
                let row = &mut s[j * nz..(j + 1) * nz];
                line.copy_from_slice(row);
                for (z, o) in row.iter_mut().enumerate() {
                    let mut acc = 0.0;
                    for (t, &w) in k.iter().enumerate() {
                        let zz = (z as isize + t as isize - r).clamp(0, n - 1) as usize;
                        acc += w * line[zz];
                    }
                    *o = acc;
                }
            }
        } else {
            let copy = s.to_vec();
            for j in 0..ny {
                let row = &mut s[j * nz..(j + 1) * nz];
                row.iter_mut().for_each(|v| *v = 0.0);
                for (t, &w) in k.iter().enumerate() {
                    let jj = (j as isize + t as isize - r).clamp(0, n - 1) as usize;
                    let src = &copy[jj * nz..(jj + 1) * nz];
                    for (o, &v) in row.iter_mut().zip(src) {
                        *o += w * v;
                    }
                }
            }
        }
    });
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn smoothing_preserves_constants_and_linear_ramps_inside() {
        let mut a = Array3::<f32>::from_elem((9, 8, 7), 3.5);
        gaussian_smooth(&mut a, [1.0, 2.0, 1.0], 1.5);
        assert!(a.iter().all(|&v| (v - 3.5).abs() < 1e-5));
        // A symmetric kernel leaves a linear ramp unchanged away from the border (exact fact).
        let mut r = Array3::<f32>::from_shape_fn((20, 3, 3), |(i, _, _)| i as f32);
        gaussian_smooth(&mut r, [1.0, 1.0, 1.0], 1.0);
        assert!((r[[10, 1, 1]] - 10.0).abs() < 1e-4);
        let k = gaussian_kernel(1.0);
        assert_eq!(k.len(), 7);
        assert!((k.iter().sum::<f32>() - 1.0).abs() < 1e-6);
    }
}
