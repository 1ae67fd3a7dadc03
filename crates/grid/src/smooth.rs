//! Separable Gaussian smoothing with spacing-aware widths.

use ndarray::Array3;
use rayon::prelude::*;

use crate::simd::with_avx2;

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
    let [_, ny, nz] = shape;
    let r = k.len() / 2;
    match axis {
        2 => data.par_chunks_mut(ny * nz).for_each_init(
            || vec![0.0f32; nz + 2 * r],
            |line, slab| {
                with_avx2(
                    #[inline(always)]
                    || slab.chunks_exact_mut(nz).for_each(|row| convolve_line(row, line, k)),
                )
            },
        ),
        1 => data.par_chunks_mut(ny * nz).for_each_init(
            || vec![0.0f32; ny * nz],
            |copy, slab| {
                copy.copy_from_slice(slab);
                with_avx2(
                    #[inline(always)]
                    || rows_weighted_sum(slab, copy, ny, nz, k),
                );
            },
        ),
        _ => {
            scratch.resize(data.len(), 0.0);
            scratch.copy_from_slice(data);
            data.par_chunks_mut(ny * nz).enumerate().for_each(|(i, out)| {
                with_avx2(
                    #[inline(always)]
                    || plane_weighted_sum(out, scratch, shape, i, k),
                )
            });
        }
    }
}

/// `out = G·src` for the separable kernel `k` applied along `i`, then `j`, then `k` (edge
/// values repeated), without touching `src`: the same values bit for bit as copying `src`
/// into `out` and calling [`convolve_axis_slice`] for axes 0, 1 and 2 in turn, in one
/// parallel pass over the `i` planes (each output plane is finished, all three axes, while
/// it is in cache) and without the copies.
pub fn separable_into(src: &[f32], out: &mut [f32], shape: [usize; 3], k: &[f32]) {
    assert!(k.len() % 2 == 1, "odd kernel");
    let n = shape.iter().product::<usize>();
    assert!(src.len() == n && out.len() == n, "slice lengths match the shape");
    if k.len() == 1 && k[0] == 1.0 {
        out.copy_from_slice(src);
        return;
    }
    let [_, ny, nz] = shape;
    let r = k.len() / 2;
    out.par_chunks_mut(ny * nz).enumerate().for_each_init(
        || (vec![0.0f32; ny * nz], vec![0.0f32; nz + 2 * r]),
        |(copy, line), (i, plane)| {
            with_avx2(
                #[inline(always)]
                || {
                    plane_weighted_sum(plane, src, shape, i, k);
                    copy.copy_from_slice(plane);
                    rows_weighted_sum(plane, copy, ny, nz, k);
                    plane.chunks_exact_mut(nz).for_each(|row| convolve_line(row, line, k));
                },
            )
        },
    );
}

/// `out` = plane `i` of the convolution of `src` (shape `shape`) along axis 0: `Σ_t k[t] ·`
/// plane `clamp(i + t − r)` of `src`.
#[inline(always)]
fn plane_weighted_sum(out: &mut [f32], src: &[f32], shape: [usize; 3], i: usize, k: &[f32]) {
    let [nx, ny, nz] = shape;
    let (r, plane) = (k.len() / 2, ny * nz);
    weighted_sum(out, k, |t| {
        let ii = (i + t).saturating_sub(r).min(nx - 1);
        &src[ii * plane..(ii + 1) * plane]
    })
}

/// `out` row `j` = `Σ_t k[t] · src` row `clamp(j + t − r)`, rows of length `len`.
#[inline(always)]
fn rows_weighted_sum(out: &mut [f32], src: &[f32], rows: usize, len: usize, k: &[f32]) {
    let r = k.len() / 2;
    for j in 0..rows {
        weighted_sum(&mut out[j * len..(j + 1) * len], k, |t| {
            let jj = (j + t).saturating_sub(r).min(rows - 1);
            &src[jj * len..(jj + 1) * len]
        });
    }
}

/// `out = Σ_t k[t] · src(t)` element by element, as `((0 + k[0]·s₀) + k[1]·s₁) + …` (taps
/// in order; `src(t)` is at least as long as `out`). The callers run it inside
/// [`with_avx2`]: 8 lanes instead of 4, the same multiplications and additions, so the same
/// values bit for bit.
#[inline(always)]
fn weighted_sum<'a>(out: &mut [f32], k: &[f32], src: impl Fn(usize) -> &'a [f32]) {
    // The first tap writes `0 + k[0]·s₀` (not `k[0]·s₀`, which differs for −0), so no
    // separate pass zeroes `out`.
    for (o, &v) in out.iter_mut().zip(src(0)) {
        *o = 0.0 + k[0] * v;
    }
    for (t, &w) in k.iter().enumerate().skip(1) {
        for (o, &v) in out.iter_mut().zip(src(t)) {
            *o += w * v;
        }
    }
}

/// Convolves the contiguous `data` with `k`, using `line` (length `data.len() + 2r`) as the
/// edge-padded copy. Each output is `((0 + k[0]·v[t]) + k[1]·v[t+1]) + …`, taps in order;
/// the loop runs over the outputs tap by tap, so it vectorises across outputs (a sum per
/// output in tap order is a serial chain of additions that does not).
#[inline(always)]
fn convolve_line(data: &mut [f32], line: &mut [f32], k: &[f32]) {
    let r = k.len() / 2;
    let n = data.len();
    line[r..r + n].copy_from_slice(data);
    let (first, last) = (data[0], data[n - 1]);
    line[..r].iter_mut().for_each(|v| *v = first);
    line[r + n..].iter_mut().for_each(|v| *v = last);
    let line: &[f32] = line;
    weighted_sum(data, k, |t| &line[t..t + n]);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn smoothing_preserves_constants_and_linear_ramps_inside() {
        let mut a = Array3::<f32>::from_elem((9, 8, 7), 3.5);
        gaussian_smooth(&mut a, [1.0, 2.0, 1.0], 1.5);
        for &v in a.iter() {
            approx::assert_abs_diff_eq!(v, 3.5, epsilon = 1e-5);
        }
        // A symmetric kernel leaves a linear ramp unchanged away from the border (exact fact).
        let mut r = Array3::<f32>::from_shape_fn((20, 3, 3), |(i, _, _)| i as f32);
        gaussian_smooth(&mut r, [1.0, 1.0, 1.0], 1.0);
        approx::assert_abs_diff_eq!(r[[10, 1, 1]], 10.0, epsilon = 1e-4);
        let k = gaussian_kernel(1.0);
        assert_eq!(k.len(), 7);
        approx::assert_abs_diff_eq!(k.iter().sum::<f32>(), 1.0, epsilon = 1e-6);
    }

    /// Direct evaluation of the clamped convolution along `axis` of a standard-order
    /// `shape` volume, output by output, taps in order from 0 (the definition of a
    /// convolution with edge values repeated, written out without any of the module's code).
    fn direct(src: &[f32], shape: [usize; 3], axis: usize, k: &[f32]) -> Vec<f32> {
        let r = k.len() as isize / 2;
        let mut out = vec![0.0f32; src.len()];
        for i in 0..shape[0] {
            for j in 0..shape[1] {
                for z in 0..shape[2] {
                    let mut s = 0.0f32;
                    for (t, &w) in k.iter().enumerate() {
                        let mut p = [i as isize, j as isize, z as isize];
                        p[axis] = (p[axis] + t as isize - r).clamp(0, shape[axis] as isize - 1);
                        s += w * src[((p[0] as usize) * shape[1] + p[1] as usize) * shape[2] + p[2] as usize];
                    }
                    out[(i * shape[1] + j) * shape[2] + z] = s;
                }
            }
        }
        out
    }

    #[test]
    fn vectorised_passes_equal_the_direct_convolution_bit_for_bit() {
        // Rows of 13 (not a multiple of 4 or 8 lanes) and a 7-tap kernel: the AVX2 build of
        // the row loops (when present) must give the direct sums exactly, for each axis alone
        // and for the fused three-axis pass.
        let shape = [9, 6, 13];
        // Row j = 2 of every plane holds −0: sums of −0 terms from +0 are +0 (IEEE 754), which
        // a pass that starts from the first product instead of from zero would get wrong.
        let src: Vec<f32> = (0..9 * 6 * 13)
            .map(|n| if (n / 13) % 6 == 2 { -0.0 } else { ((n as f32) * 0.731).sin() * 3.0 + (n % 5) as f32 })
            .collect();
        let k = gaussian_kernel(1.0);
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        let mut want = src.clone();
        let mut scratch = Vec::new();
        for axis in 0..3 {
            let mut got = src.clone();
            convolve_axis_slice(&mut got, shape, axis, &k, &mut scratch);
            assert_eq!(bits(&got), bits(&direct(&src, shape, axis, &k)), "axis {axis}");
            want = direct(&want, shape, axis, &k);
        }
        let mut got = vec![0.0; src.len()];
        separable_into(&src, &mut got, shape, &k);
        assert_eq!(bits(&got), bits(&want));
        separable_into(&src, &mut got, shape, &[1.0]);
        assert_eq!(got, src);
    }
}
