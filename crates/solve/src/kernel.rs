//! The fused hot loop: warp the moving descriptor, compare it with the fixed one, and
//! accumulate the data term, the diffusion term and their gradients in one pass.
//!
//! Objective (per pyramid level, `N` voxels counted, `C` channels):
//! ```text
//! E(u) = D(u) + λ·R(u)
//! D(u) = 1/(N·C) · Σ_x Σ_c ( M_c(x + u(x)) − F_c(x) )²
//! R(u) = 1/N · Σ_x Σ_d Σ_a w_da · ( u_d(x + e_a) − u_d(x) )²,   w_da = (h_d / h_a)²
//! ```
//! `u` is in voxels, `h` is the voxel spacing in mm, so `h_d·u_d` is the displacement in mm
//! and `R` is the squared gradient of the displacement in mm per mm (dimensionless): the
//! same λ means the same smoothness at every level. Gradients:
//! ```text
//! ∂D/∂u_d(x) = 2/(N·C) · Σ_c r_c(x) · ∂_d M_c(x + u(x)),     r_c = M_c(x+u) − F_c(x)
//! ∂R/∂u_d(x) = 2/N · Σ_a w_da · (2·u_d(x) − u_d(x+e_a) − u_d(x−e_a))   (missing neighbours dropped)
//! ```
//! where `∂_d M_c` is the exact derivative of the trilinear interpolant.
//!
//! **Strided lattices.** The field may live on a lattice coarser than the descriptors: with
//! stride `s`, lattice point `c` sits on descriptor voxel `s·c`, the data term compares
//! `F(s·c)` with `M(s·(c + u(c)))` (`u` in lattice voxels), and its gradient gains the factor
//! `s`. The regulariser runs on the lattice with the lattice spacing `s·h`. Every lattice
//! point sees a full-resolution descriptor, at an eighth of the cost for `s = 2`.

use crate::simd::F4;

/// Read-only inputs of one evaluation at one level.
pub struct Problem<'a> {
    /// Shape `(nx, ny, nz)` of the field's lattice.
    pub shape: [usize; 3],
    /// Spacing in mm of the field's lattice.
    pub spacing: [f64; 3],
    /// Lattice stride `s` in descriptor voxels (1 = the field lives on the descriptor grid).
    pub stride: usize,
    /// Shape of the descriptor grid; lattice point `c` sits on descriptor voxel `s·c`.
    pub desc_shape: [usize; 3],
    /// Channels per voxel.
    pub channels: usize,
    /// Fixed descriptor, channel-last (`n·C + c`).
    pub fixed: &'a [f32],
    /// Moving descriptor on the same grid, channel-last.
    pub moving: &'a [f32],
    /// Optional mask of voxels whose data term counts (standard order).
    pub mask: Option<&'a [bool]>,
    /// Diffusion weight λ.
    pub lambda: f32,
}

/// Energies of one evaluation.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Energy {
    /// Data term `D`.
    pub data: f64,
    /// Diffusion term `R` (before multiplying by λ).
    pub diffusion: f64,
    /// `D + λ·R`.
    pub total: f64,
}

impl Problem<'_> {
    /// Number of voxels whose data term counts.
    pub fn data_count(&self) -> usize {
        match self.mask {
            Some(m) => m.iter().filter(|&&b| b).count().max(1),
            None => self.shape.iter().product(),
        }
    }

    /// Evaluates `E(u)` and writes `∂E/∂u` into `grad` (both component-first, length 3·N).
    /// Parallel over `i` slabs; the per-slab sums are added in slab order, so the result does
    /// not depend on the number of threads.
    pub fn evaluate(&self, u: &[f32], grad: &mut [f32], slab_sums: &mut Vec<[f64; 2]>) -> Energy {
        let [nx, ny, nz] = self.shape;
        let n = nx * ny * nz;
        assert!(u.len() == 3 * n && grad.len() == 3 * n, "field buffers must hold 3·N values");
        let st = self.stride;
        let ds = self.desc_shape;
        let nd_vox: usize = ds.iter().product();
        assert!(st >= 1 && (0..3).all(|d| (self.shape[d] - 1) * st < ds[d]), "lattice inside the descriptor grid");
        assert!(self.fixed.len() == nd_vox * self.channels && self.moving.len() == nd_vox * self.channels);
        let c = self.channels;
        let sf = st as f32;
        assert!(c == 1 || c == 12, "descriptors have 1 or 12 channels");
        let nd = self.data_count() as f64;
        let data_scale = (2.0 * st as f64 / (nd * c as f64)) as f32;
        let h = self.spacing;
        let w: [[f32; 3]; 3] = std::array::from_fn(|d| std::array::from_fn(|a| ((h[d] / h[a]) * (h[d] / h[a])) as f32));
        let reg_scale = (2.0 / n as f64) as f32 * self.lambda;
        let (ux, rest) = u.split_at(n);
        let (uy, uz) = rest.split_at(n);
        let uc = [ux, uy, uz];
        let ctx = SlabContext { p: self, uc, data_scale, reg_scale, w, sf };
        sinew_grid::par_component_slabs_collect(grad, self.shape, slab_sums, |i, g| ctx.slab(i, g));
        let (mut data, mut reg) = (0.0, 0.0);
        for s in slab_sums.iter() {
            data += s[0];
            reg += s[1];
        }
        let data = data / (nd * c as f64);
        let diffusion = reg / n as f64;
        Energy { data, diffusion, total: data + self.lambda as f64 * diffusion }
    }
}

/// Everything one slab pass needs, shared by the worker threads.
struct SlabContext<'a> {
    p: &'a Problem<'a>,
    uc: [&'a [f32]; 3],
    data_scale: f32,
    reg_scale: f32,
    w: [[f32; 3]; 3],
    sf: f32,
}

impl SlabContext<'_> {
    /// One `i` slab: data and diffusion gradients into `g`, returns `[Σ data, Σ diffusion]`.
    /// Runs the AVX2+FMA build of the same code when the processor has it (checked at run
    /// time), else the baseline build.
    fn slab(&self, i: usize, g: [&mut [f32]; 3]) -> [f64; 2] {
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                // SAFETY: the features this build needs were just detected.
                return unsafe { self.slab_avx2(i, g) };
            }
        }
        self.slab_generic::<false>(i, g)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn slab_avx2(&self, i: usize, g: [&mut [f32]; 3]) -> [f64; 2] {
        self.slab_generic::<true>(i, g)
    }

    /// The slab pass; `AVX` selects the 8+4-lane data term of [`data_term12_avx2`] for 12
    /// channels (only inside [`slab_avx2`](Self::slab_avx2), where AVX2 is known present).
    #[inline(always)]
    fn slab_generic<const AVX: bool>(&self, i: usize, g: [&mut [f32]; 3]) -> [f64; 2] {
        let [gx, gy, gz] = g;
        let data = match self.p.channels {
            12 => self.data_slab::<12, AVX>(i, [&mut *gx, &mut *gy, &mut *gz]),
            _ => self.data_slab::<1, false>(i, [&mut *gx, &mut *gy, &mut *gz]),
        };
        let mut reg = 0.0;
        for (d, gd) in [gx, gy, gz].into_iter().enumerate() {
            reg += self.diffusion_slab(i, d, gd);
        }
        [data, reg]
    }

    /// Adds `λ·∂R/∂u_d` of slab `i` to `g` and returns slab `i`'s share of `R` for component
    /// `d` (forward differences). A missing neighbour at the border is replaced by the
    /// centre value, which drops its difference, as in the formula. The two ends of a row are
    /// computed apart, so the loop over the rest of the row has no branches and vectorises;
    /// its energy terms go through a small buffer and are added to the row total one by one
    /// in order of `k`, so every value is the same as a plain loop over `k` gives.
    #[inline(always)]
    fn diffusion_slab(&self, i: usize, d: usize, g: &mut [f32]) -> f64 {
        const CHUNK: usize = 64;
        let [nx, ny, nz] = self.p.shape;
        let u = self.uc[d];
        let [wx, wy, wz] = self.w[d];
        let rs = self.reg_scale;
        let slab = ny * nz;
        let mut sum = 0.0f64;
        let mut terms = [0.0f32; CHUNK];
        for j in 0..ny {
            let at = |ii: usize, jj: usize| &u[ii * slab + jj * nz..ii * slab + jj * nz + nz];
            let c = at(i, j);
            let xp = if i + 1 < nx { at(i + 1, j) } else { c };
            let xm = if i > 0 { at(i - 1, j) } else { c };
            let yp = if j + 1 < ny { at(i, j + 1) } else { c };
            let ym = if j > 0 { at(i, j - 1) } else { c };
            let gr = &mut g[j * nz..j * nz + nz];
            // Equal lengths let the compiler drop the bounds checks of the inner loop.
            assert!(c.len() == nz && xp.len() == nz && xm.len() == nz && yp.len() == nz && ym.len() == nz);
            // Energy term and gradient at `k`, with `zm`, `zp` its neighbours along `k` (the
            // centre value beyond either end of the row).
            let point = |k: usize, zm: f32, zp: f32| -> (f32, f32) {
                let ck = c[k];
                let (dxp, dyp, dzp) = (xp[k] - ck, yp[k] - ck, zp - ck);
                let e = wx * dxp * dxp + wy * dyp * dyp + wz * dzp * dzp;
                let lap = wx * (2.0 * ck - xp[k] - xm[k]) + wy * (2.0 * ck - yp[k] - ym[k]) + wz * (2.0 * ck - zp - zm);
                (e, rs * lap)
            };
            let mut row = 0.0f32;
            let mut k0 = 0;
            while k0 < nz {
                let k1 = (k0 + CHUNK).min(nz);
                let t = &mut terms[..k1 - k0];
                if k0 == 0 {
                    let (e, gk) = point(0, c[0], if nz > 1 { c[1] } else { c[0] });
                    t[0] = e;
                    gr[0] += gk;
                }
                for k in k0.max(1)..k1.min(nz - 1) {
                    let (e, gk) = point(k, c[k - 1], c[k + 1]);
                    t[k - k0] = e;
                    gr[k] += gk;
                }
                if k1 == nz && nz > 1 {
                    let (e, gk) = point(nz - 1, c[nz - 2], c[nz - 1]);
                    t[nz - 1 - k0] = e;
                    gr[nz - 1] += gk;
                }
                for &e in t.iter() {
                    row += e;
                }
                k0 = k1;
            }
            sum += row as f64;
        }
        sum
    }

    /// Data term and its gradient for slab `i`; the diffusion term is added afterwards.
    #[inline(always)]
    fn data_slab<const C: usize, const AVX: bool>(&self, i: usize, g: [&mut [f32]; 3]) -> f64 {
        let p = self.p;
        let [_, ny, nz] = p.shape;
        let ds = p.desc_shape;
        let st = p.stride;
        let sf = self.sf;
        let [ux, uy, uz] = self.uc;
        let [gx, gy, gz] = g;
        let mut sum = 0.0f64;
        for j in 0..ny {
            let mut row = 0.0f32;
            for k in 0..nz {
                let idx = (i * ny + j) * nz + k;
                let local = j * nz + k;
                if !p.mask.map_or(true, |m| m[idx]) {
                    gx[local] = 0.0;
                    gy[local] = 0.0;
                    gz[local] = 0.0;
                    continue;
                }
                let q = [sf * (i as f32 + ux[idx]), sf * (j as f32 + uy[idx]), sf * (k as f32 + uz[idx])];
                let fi = ((st * i) * ds[1] + st * j) * ds[2] + st * k;
                let fixed = &p.fixed[fi * C..fi * C + C];
                #[cfg(target_arch = "x86_64")]
                let (e, acc) = if AVX && C == 12 {
                    // SAFETY: `AVX` is only set by `slab_avx2`, which runs after AVX2 and FMA
                    // were detected.
                    unsafe { data_term12_avx2(q, ds, p.moving, fixed) }
                } else {
                    data_term::<C>(q, ds, p.moving, fixed)
                };
                #[cfg(not(target_arch = "x86_64"))]
                let (e, acc) = data_term::<C>(q, ds, p.moving, fixed);
                row += e;
                gx[local] = acc[0] * self.data_scale;
                gy[local] = acc[1] * self.data_scale;
                gz[local] = acc[2] * self.data_scale;
            }
            sum += row as f64;
        }
        sum
    }
}

/// Data term of one voxel: `Σ_c r_c²` and `Σ_c r_c·∇M_c` at sample position `p` (voxels),
/// with `r_c = M_c(p) − F_c`, trilinear `M` and its slope under sinew's one border rule
/// ([`sinew_grid::interp`]: the value is clamped to the volume, the slope beyond a face is the
/// edge cell's, a restoring force that keeps lattice points from drifting out of the scan).
///
/// The eight corners of [`sinew_grid::interp::stencil`] are visited once each with the
/// weights of the value and of `∂x, ∂y, ∂z`, so value and gradient of all channels accumulate
/// as `C`-wide multiply-adds that the compiler vectorises.
#[inline(always)]
fn data_term<const C: usize>(p: [f32; 3], shape: [usize; 3], moving: &[f32], fixed: &[f32]) -> (f32, [f32; 3]) {
    let st = sinew_grid::interp::stencil([p[0] as f64, p[1] as f64, p[2] as f64], shape);
    let base = st.offset.map(|o| o * C);
    let wts = st.weight;
    if C % 4 == 0 {
        // Four channels at a time: every accumulator is one 4-lane vector register.
        let w4: [[F4; 4]; 8] = std::array::from_fn(|n| wts[n].map(F4::splat));
        let (mut e4, mut ax, mut ay, mut az) = (F4::zero(), F4::zero(), F4::zero(), F4::zero());
        for q in 0..C / 4 {
            let (mut val, mut gx, mut gy, mut gz) = (F4::zero(), F4::zero(), F4::zero(), F4::zero());
            for n in 0..8 {
                let v = F4::load(moving[base[n] + 4 * q..base[n] + 4 * q + 4].try_into().expect("4 channels"));
                let [w, dx, dy, dz] = w4[n];
                val = val.add_mul(w, v);
                gx = gx.add_mul(dx, v);
                gy = gy.add_mul(dy, v);
                gz = gz.add_mul(dz, v);
            }
            let r = val.sub(F4::load(fixed[4 * q..4 * q + 4].try_into().expect("4 channels")));
            e4 = e4.add_mul(r, r);
            ax = ax.add_mul(r, gx);
            ay = ay.add_mul(r, gy);
            az = az.add_mul(r, gz);
        }
        return (e4.sum(), [ax.sum(), ay.sum(), az.sum()]);
    }
    let mut e = 0.0f32;
    let mut acc = [0.0f32; 3];
    for ch in 0..C {
        let (mut val, mut gx, mut gy, mut gz) = (0.0f32, 0.0f32, 0.0f32, 0.0f32);
        for n in 0..8 {
            let v = moving[base[n] + ch];
            let [w, dx, dy, dz] = wts[n];
            val += w * v;
            gx += dx * v;
            gy += dy * v;
            gz += dz * v;
        }
        let r = val - fixed[ch];
        e += r * r;
        acc[0] += r * gx;
        acc[1] += r * gy;
        acc[2] += r * gz;
    }
    (e, acc)
}

/// [`data_term`] for 12 channels in one 8-lane AVX register (channels 0–7) and one 4-lane SSE
/// register (channels 8–11) per accumulator: 2 loads and 16 multiply-adds per corner instead
/// of 3 loads and 24. Every channel sees the same operations in the same order as in the
/// 4-lane loop of [`data_term`] (a sum over the corners from zero, then the residual), and
/// the per-lane totals are combined as there (`((0 + ch l) + ch 4+l) + ch 8+l`, then the lane
/// sum), so the result is the same bit for bit.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[inline]
unsafe fn data_term12_avx2(p: [f32; 3], shape: [usize; 3], moving: &[f32], fixed: &[f32]) -> (f32, [f32; 3]) {
    use std::arch::x86_64::*;
    let st = sinew_grid::interp::stencil([p[0] as f64, p[1] as f64, p[2] as f64], shape);
    // The last corner (upper cell side along every axis) has the largest offset.
    assert!(fixed.len() == 12 && st.offset[7] * 12 + 12 <= moving.len(), "12 channels in bounds");
    let (mut v8, mut x8, mut y8, mut z8) =
        (_mm256_setzero_ps(), _mm256_setzero_ps(), _mm256_setzero_ps(), _mm256_setzero_ps());
    let (mut v4, mut x4, mut y4, mut z4) = (_mm_setzero_ps(), _mm_setzero_ps(), _mm_setzero_ps(), _mm_setzero_ps());
    for n in 0..8 {
        // SAFETY: 12 floats from `offset·12` lie inside `moving`: asserted above for the
        // largest offset.
        let ptr = moving.as_ptr().add(st.offset[n] * 12);
        let (a, b) = (_mm256_loadu_ps(ptr), _mm_loadu_ps(ptr.add(8)));
        let [w, dx, dy, dz] = st.weight[n];
        v8 = _mm256_add_ps(v8, _mm256_mul_ps(_mm256_set1_ps(w), a));
        x8 = _mm256_add_ps(x8, _mm256_mul_ps(_mm256_set1_ps(dx), a));
        y8 = _mm256_add_ps(y8, _mm256_mul_ps(_mm256_set1_ps(dy), a));
        z8 = _mm256_add_ps(z8, _mm256_mul_ps(_mm256_set1_ps(dz), a));
        v4 = _mm_add_ps(v4, _mm_mul_ps(_mm_set1_ps(w), b));
        x4 = _mm_add_ps(x4, _mm_mul_ps(_mm_set1_ps(dx), b));
        y4 = _mm_add_ps(y4, _mm_mul_ps(_mm_set1_ps(dy), b));
        z4 = _mm_add_ps(z4, _mm_mul_ps(_mm_set1_ps(dz), b));
    }
    let r8 = _mm256_sub_ps(v8, _mm256_loadu_ps(fixed.as_ptr()));
    let r4 = _mm_sub_ps(v4, _mm_loadu_ps(fixed.as_ptr().add(8)));
    let e = fold(_mm256_mul_ps(r8, r8), _mm_mul_ps(r4, r4));
    let gx = fold(_mm256_mul_ps(r8, x8), _mm_mul_ps(r4, x4));
    let gy = fold(_mm256_mul_ps(r8, y8), _mm_mul_ps(r4, y4));
    let gz = fold(_mm256_mul_ps(r8, z8), _mm_mul_ps(r4, z4));
    // The four lane totals `(l0 + l1) + (l2 + l3)` at once: `hadd(a, b)` is
    // `[a0 + a1, a2 + a3, b0 + b1, b2 + b3]`, so the second one adds the pairs as `F4::sum`.
    let t = _mm_hadd_ps(_mm_hadd_ps(e, gx), _mm_hadd_ps(gy, gz));
    let mut a = [0.0f32; 4];
    // SAFETY: `a` holds four writable floats; unaligned store.
    _mm_storeu_ps(a.as_mut_ptr(), t);
    (a[0], [a[1], a[2], a[3]])
}

/// The 12 channels held as 8 + 4 lanes, added per lane as the 4-lane loop of [`data_term`]
/// adds them: lane `l` is `((0 + ch l) + ch 4+l) + ch 8+l`.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[inline]
unsafe fn fold(p8: std::arch::x86_64::__m256, p4: std::arch::x86_64::__m128) -> std::arch::x86_64::__m128 {
    use std::arch::x86_64::*;
    let lo = _mm_add_ps(_mm_setzero_ps(), _mm256_castps256_ps128(p8));
    _mm_add_ps(_mm_add_ps(lo, _mm256_extractf128_ps::<1>(p8)), p4)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testing::{central_difference, smooth_volume, Descriptors};

    #[test]
    fn gradient_matches_central_finite_differences() {
        // Reference: central differences (E(u+h) − E(u−h)) / 2h, a standard numerical check.
        let shape = [7, 6, 5];
        let n = 7 * 6 * 5;
        let d = Descriptors::new(shape, 0.4);
        let mask: Vec<bool> = (0..n).map(|i| i % 7 != 3).collect();
        let p = Problem { mask: Some(&mask), ..d.problem(shape, [1.0, 2.0, 1.5], 1, 0.3) };
        let u: Vec<f32> = (0..3 * n).map(|i| 0.3 * ((i as f32) * 0.37).sin()).collect();
        let worst = worst_gradient_error(&p, u, &[5, 77, 150, 211, 3 * n - 4, n + 40, 2 * n + 99]);
        assert!(worst < 2e-2, "relative gradient error {worst}");
    }

    /// Largest relative difference `|fd − g| / max(|fd|, 1e-4)` between the analytic gradient
    /// and central differences `(E(u+h) − E(u−h)) / 2h` (h = 1e-3) at the given indices.
    fn worst_gradient_error(p: &Problem, mut u: Vec<f32>, indices: &[usize]) -> f64 {
        let mut g = vec![0.0; u.len()];
        let mut sums = Vec::new();
        p.evaluate(&u, &mut g, &mut sums);
        let mut scratch = vec![0.0; u.len()];
        let mut worst = 0.0f64;
        for &idx in indices {
            let fd = central_difference(&mut u, idx, 1e-3, |u| p.evaluate(u, &mut scratch, &mut sums).total);
            worst = worst.max((fd - g[idx] as f64).abs() / fd.abs().max(1e-4));
        }
        worst
    }

    #[test]
    fn gradient_beyond_every_face_follows_the_border_rule() {
        // Reference: central differences of E (a standard numerical check) and the border
        // rule of sinew_grid::interp. λ = 0, so each lattice point's energy depends on its own
        // displacement only. For a point beyond a face, the components along the face are
        // central differences at the point; the one across it is the edge cell's slope, i.e.
        // the central difference with the point moved to 2.5·h inside that face (the value
        // beyond the face equals the value on it, so the residuals agree to O(h)).
        let shape = [7, 6, 5];
        let n = 7 * 6 * 5;
        let d = Descriptors::new(shape, 0.4);
        let p = d.problem(shape, [1.0, 2.0, 1.5], 1, 0.0);
        let base: Vec<f32> = (0..3 * n).map(|i| 0.2 * ((i as f32) * 0.37).sin()).collect();
        let h = 1e-3f32;
        let mut sums = Vec::new();
        let mut g = vec![0.0; 3 * n];
        let mut scratch = vec![0.0; 3 * n];
        let mut sums2 = Vec::new();
        let mut energy = |u: &[f32]| p.evaluate(u, &mut scratch, &mut sums2).total;
        let mut checked = 0;
        for axis in 0..3 {
            let len = shape[axis] as f32;
            for (outside, inside) in [(-0.6f32, 2.5e-3f32), (len - 1.0 + 0.7, len - 1.0 - 2.5e-3)] {
                // Lattice point (3, 2, 2), sampled at `outside` along `axis`.
                let x = [3usize, 2, 2];
                let idx = (x[0] * 6 + x[1]) * 5 + x[2];
                let mut u = base.clone();
                u[axis * n + idx] = outside - x[axis] as f32;
                p.evaluate(&u, &mut g, &mut sums);
                for a in 0..3 {
                    let at = a * n + idx;
                    let want = if a == axis {
                        let mut v = u.clone();
                        v[at] = inside - x[axis] as f32;
                        central_difference(&mut v, at, h, &mut energy)
                    } else {
                        central_difference(&mut u, at, h, &mut energy)
                    };
                    assert!(
                        approx::relative_eq!(g[at] as f64, want, epsilon = 2e-6, max_relative = 2e-2),
                        "axis {axis} at {outside}, component {a}: {} vs {want}",
                        g[at]
                    );
                    checked += 1;
                }
                // The slope across the face is not zero (the restoring force exists).
                assert!(g[axis * n + idx].abs() > 1e-5, "axis {axis} at {outside}: zero slope");
            }
        }
        assert_eq!(checked, 18);
    }

    #[test]
    fn strided_gradient_matches_central_finite_differences() {
        // Same check as above on a stride-2 lattice over an 11×9×9 descriptor grid. The
        // displacements (0.3 … 0.7 lattice voxels) keep every sample inside the descriptor
        // grid, where the slope is the derivative of the value; samples beyond the faces are
        // checked by `gradient_beyond_every_face_follows_the_border_rule`.
        let shape = [5, 4, 4];
        let n = 80;
        let d = Descriptors::new([11, 9, 9], 0.5);
        let p = d.problem(shape, [2.0, 4.0, 3.0], 2, 0.2);
        let u: Vec<f32> = (0..3 * n).map(|i| 0.5 + 0.2 * ((i as f32) * 0.61).sin()).collect();
        let worst = worst_gradient_error(&p, u, &[3, 41, 77, 100, 199, 230]);
        assert!(worst < 2e-2, "relative gradient error {worst}");
    }

    #[cfg(target_arch = "x86_64")]
    #[test]
    fn avx2_data_term_equals_the_four_lane_one_bit_for_bit() {
        // The 8+4-lane build must reproduce the 4-lane loop exactly, inside the grid and
        // beyond every face (the border rule of sinew_grid::interp).
        if !(std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma")) {
            eprintln!("skipped: no AVX2+FMA on this processor");
            return;
        }
        let shape = [7, 6, 5];
        let Descriptors { fixed, moving, .. } = Descriptors::new(shape, 0.4);
        for t in 0..500 {
            let t = t as f32;
            let q = [8.0 * (0.37 * t).sin() + 3.0, 7.0 * (0.53 * t).cos() + 2.5, 6.0 * (0.71 * t).sin() + 2.0];
            let fi = (t as usize * 12) % (fixed.len() - 12);
            let f = &fixed[fi..fi + 12];
            let a = data_term::<12>(q, shape, &moving, f);
            // SAFETY: AVX2 and FMA were detected above.
            let b = unsafe { data_term12_avx2(q, shape, &moving, f) };
            assert_eq!(a.0.to_bits(), b.0.to_bits(), "energy at {q:?}");
            for d in 0..3 {
                assert_eq!(a.1[d].to_bits(), b.1[d].to_bits(), "gradient {d} at {q:?}");
            }
        }
    }

    #[test]
    fn diffusion_term_equals_the_formula_bit_for_bit() {
        // The module doc's R and ∂R/∂u written out voxel by voxel (forward differences, a
        // missing neighbour replaced by the centre value), in the kernel's order of
        // operations: rows along k summed in f32, rows and slabs added in f64. Zero
        // descriptors make the data term and its gradient exactly 0. Rows of 70 points cross
        // the kernel's 64-point chunks; rows of 1 point have both ends at once.
        for shape in [[3usize, 4, 70], [4, 3, 1], [2, 2, 2]] {
            let [nx, ny, nz] = shape;
            let n = nx * ny * nz;
            let zeros = vec![0.0f32; n];
            let p = Problem {
                shape,
                spacing: [1.0, 2.0, 1.5],
                stride: 1,
                desc_shape: shape,
                channels: 1,
                fixed: &zeros,
                moving: &zeros,
                mask: None,
                lambda: 0.7,
            };
            let u: Vec<f32> = (0..3 * n).map(|x| 0.4 * ((x as f32) * 0.61).sin()).collect();
            let mut g = vec![0.0f32; 3 * n];
            let e = p.evaluate(&u, &mut g, &mut Vec::new());
            let h = p.spacing;
            let rs = (2.0 / n as f64) as f32 * p.lambda;
            let mut want_g = vec![0.0f32; 3 * n];
            let mut slabs = vec![0.0f64; nx];
            for d in 0..3 {
                let w: [f32; 3] = std::array::from_fn(|a| ((h[d] / h[a]) * (h[d] / h[a])) as f32);
                let v = |i: usize, j: usize, k: usize| u[d * n + (i * ny + j) * nz + k];
                for (i, slab) in slabs.iter_mut().enumerate() {
                    for j in 0..ny {
                        let mut row = 0.0f32;
                        for k in 0..nz {
                            let ck = v(i, j, k);
                            let xp = if i + 1 < nx { v(i + 1, j, k) } else { ck };
                            let xm = if i > 0 { v(i - 1, j, k) } else { ck };
                            let yp = if j + 1 < ny { v(i, j + 1, k) } else { ck };
                            let ym = if j > 0 { v(i, j - 1, k) } else { ck };
                            let zp = if k + 1 < nz { v(i, j, k + 1) } else { ck };
                            let zm = if k > 0 { v(i, j, k - 1) } else { ck };
                            let (dx, dy, dz) = (xp - ck, yp - ck, zp - ck);
                            row += w[0] * dx * dx + w[1] * dy * dy + w[2] * dz * dz;
                            let lap =
                                w[0] * (2.0 * ck - xp - xm) + w[1] * (2.0 * ck - yp - ym) + w[2] * (2.0 * ck - zp - zm);
                            want_g[d * n + (i * ny + j) * nz + k] = 0.0 + rs * lap;
                        }
                        *slab += row as f64;
                    }
                }
            }
            let want_r = slabs.iter().sum::<f64>() / n as f64;
            assert_eq!(e.data, 0.0);
            assert_eq!(e.diffusion.to_bits(), want_r.to_bits(), "{shape:?}: {} vs {want_r}", e.diffusion);
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&g), bits(&want_g), "{shape:?}");
        }
    }

    #[test]
    fn zero_field_on_identical_descriptors_has_zero_energy() {
        let shape = [4, 4, 4];
        let f = smooth_volume(shape, 1, 0.0);
        let p = Problem {
            shape,
            spacing: [1.0; 3],
            stride: 1,
            desc_shape: shape,
            channels: 1,
            fixed: &f,
            moving: &f,
            mask: None,
            lambda: 1.0,
        };
        let u = vec![0.0; 192];
        let mut g = vec![1.0; 192];
        let e = p.evaluate(&u, &mut g, &mut Vec::new());
        assert_eq!(e.total, 0.0);
        assert!(g.iter().all(|&v| v == 0.0));
    }
}
