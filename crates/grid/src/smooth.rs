//! Separable Gaussian smoothing with spacing-aware widths.

use ndarray::Array3;
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
    for (axis, &h) in spacing.iter().enumerate() {
        let k = gaussian_kernel(sigma_mm / h);
        convolve_axis(data, axis, &k);
    }
}

/// Convolves `data` along `axis` with the odd-length kernel `k` (centre at `k.len()/2`),
/// clamping indices at the borders. Results do not depend on the thread count.
pub fn convolve_axis(data: &mut Array3<f32>, axis: usize, k: &[f32]) {
    assert!(data.is_standard_layout(), "standard layout");
    let shape = [data.shape()[0], data.shape()[1], data.shape()[2]];
    let mut scratch = Vec::new();
    convolve_axis_slice(data.as_slice_mut().expect("standard layout"), shape, axis, k, &mut scratch);
}

/// [`convolve_axis`] on a standard-order slice of shape `shape`. `scratch` is grown to
/// `data.len()` when `axis` is 0 and reused between calls, so repeated smoothing (once per
/// optimiser iteration) does not allocate. Every inner loop runs over contiguous rows.
pub fn convolve_axis_slice(data: &mut [f32], shape: [usize; 3], axis: usize, k: &[f32], scratch: &mut Vec<f32>) {
    assert!(k.len() % 2 == 1, "odd kernel");
    assert_eq!(data.len(), shape.iter().product::<usize>(), "slice length matches the shape");
    if k.len() == 1 && k[0] == 1.0 {
        return;
    }
    let [nx, ny, nz] = shape;
    let r = k.len() / 2;
    match axis {
        2 => {
            data.par_chunks_mut(nz).for_each_init(|| vec![0.0f32; nz + 2 * r], |line, row| convolve_line(row, line, k))
        }
        1 => data.par_chunks_mut(ny * nz).for_each_init(
            || vec![0.0f32; ny * nz],
            |copy, slab| {
                copy.copy_from_slice(slab);
                rows_weighted_sum(slab, copy, ny, nz, k);
            },
        ),
        _ => {
            scratch.resize(data.len(), 0.0);
            scratch.copy_from_slice(data);
            let plane = ny * nz;
            let src: &[f32] = scratch;
            data.par_chunks_mut(plane).enumerate().for_each(|(i, out)| {
                out.iter_mut().for_each(|v| *v = 0.0);
                for (t, &w) in k.iter().enumerate() {
                    let ii = (i + t).saturating_sub(r).min(nx - 1);
                    for (o, &v) in out.iter_mut().zip(&src[ii * plane..(ii + 1) * plane]) {
                        *o += w * v;
                    }
                }
            });
        }
    }
}

/// `out` row `j` = `Σ_t k[t] · src` row `clamp(j + t − r)`, rows of length `len`.
fn rows_weighted_sum(out: &mut [f32], src: &[f32], rows: usize, len: usize, k: &[f32]) {
    let r = k.len() / 2;
    for j in 0..rows {
        let o = &mut out[j * len..(j + 1) * len];
        o.iter_mut().for_each(|v| *v = 0.0);
        for (t, &w) in k.iter().enumerate() {
            let jj = (j + t).saturating_sub(r).min(rows - 1);
            for (ov, &v) in o.iter_mut().zip(&src[jj * len..(jj + 1) * len]) {
                *ov += w * v;
            }
        }
    }
}

/// Convolves the contiguous `data` with `k`, using `line` (length `data.len() + 2r`) as the
/// edge-padded copy. Each output is `((0 + k[0]·v[t]) + k[1]·v[t+1]) + …`, taps in order;
/// the loop runs over the outputs tap by tap, so it vectorises across outputs (a sum per
/// output in tap order is a serial chain of additions that does not).
#[inline]
fn convolve_line(data: &mut [f32], line: &mut [f32], k: &[f32]) {
    let r = k.len() / 2;
    let n = data.len();
    line[r..r + n].copy_from_slice(data);
    let (first, last) = (data[0], data[n - 1]);
    line[..r].iter_mut().for_each(|v| *v = first);
    line[r + n..].iter_mut().for_each(|v| *v = last);
    data.iter_mut().for_each(|o| *o = 0.0);
    for (t, &w) in k.iter().enumerate() {
        for (o, &v) in data.iter_mut().zip(&line[t..t + n]) {
            *o += w * v;
        }
    }
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
        approx::assert_abs_diff_eq!(r[[10, 1, 1]], 10.0, epsilon = 1e-4);
        let k = gaussian_kernel(1.0);
        assert_eq!(k.len(), 7);
        approx::assert_abs_diff_eq!(k.iter().sum::<f32>(), 1.0, epsilon = 1e-6);
    }
}
