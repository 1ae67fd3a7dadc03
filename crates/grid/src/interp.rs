//! Point sampling of volumes at continuous voxel positions.
//!
//! # The border rule of sinew's trilinear sampler
//!
//! Every trilinear sample in sinew whose outside is not a known padding value (the warper with
//! [`Border::Nearest`], the objective kernel of the deformable stage, the linear stage) uses
//! one rule, implemented once in [`stencil`]. Along each axis with samples `a_0 … a_{n−1}`
//! (n ≥ 2) a position `p` (voxels) is handled as
//! ```text
//! q  = clamp(p, 0, n−1)                 the position is clamped into the volume
//! lo = min(⌊q⌋, n−2),  t = q − lo       the cell used is the nearest cell inside: at p ≥ n−1
//!                                       it is the last cell with t = 1, so lo+1 always exists
//! value(p) = (1−t)·a_lo + t·a_{lo+1}
//! slope(p) = a_{lo+1} − a_lo            the derivative reported along this axis
//! ```
//! drawn for `n = 4` (`|` marks the faces at p = 0 and p = n−1):
//! ```text
//!   p:       -2   -1  |  0    1    2    3  |  4    5
//!   value:   a0   a0  | a0 ─ a1 ─ a2 ─ a3  | a3   a3          (edge value repeats)
//!   slope:   a1−a0    |a1−a0 a2−a1 a3−a2   |    a3−a2         (edge cell's slope continues)
//! ```
//! Inside the volume the slope is the exact derivative of the interpolant (one-sided at voxel
//! planes, where the interpolant has a kink: the cell on the upper side is used, except at
//! the last plane). Beyond a face the VALUE is the edge value (the derivative of the value is
//! zero there) but the reported slope is the edge cell's: a restoring force. With the zero
//! slope, lattice points that had left the scan saw no force at all and Adam's normalised
//! steps carried them further out (measured: a 4 mm affine-stage registration went from
//! 1.8 mm to 183 mm mean endpoint error). Optimisers that trust the gradient exactly (line
//! searches) use [`stencil_exact`] instead: the same cell and value, and beyond a face the
//! slope across it is 0, the true derivative of the clamped value:
//! ```text
//! slope_exact(p) = a_{lo+1} − a_lo   if 0 ≤ p ≤ n−1,   else 0
//! ```
//! (the linear stage's L-BFGS polish needs it: with the restoring slope its line searches
//! fail, measured on the affine recovery case: 0.22 → 0.97 mm mean endpoint error).
//! An axis with a single sample (`n = 1`) has value `a_0` and slope 0.
//!
//! In three dimensions the rule applies per axis and the eight corners of the cell are
//! blended with the products of the per-axis weights (see [`Stencil`]). For values this is
//! `scipy.ndimage.map_coordinates(..., order=1, mode="nearest")`.

/// What a sample sees outside the volume.
///
/// ```text
///   Constant(c):  c c c | a b c d | c c c     (each missing neighbour counts as c)
///   Nearest:      a a a | a b c d | d d d     (indices clamped to the edge)
/// ```
/// `Constant` matches `scipy.ndimage.map_coordinates(..., mode="grid-constant", cval=c)` for
/// linear interpolation: neighbours outside the array take the value `c`, and the
/// interpolation still blends them in.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Border {
    /// Neighbours outside the array take this value.
    Constant(f32),
    /// Neighbour indices are clamped to the array.
    Nearest,
}

/// The eight corners of the trilinear cell used at one position, with the weights of the
/// value and of its three derivatives (see the module docs for the border rule).
///
/// For corner `n = 4a + 2b + c` (`a, b, c ∈ {0, 1}` the upper-corner flags along `i, j, k`):
/// ```text
/// offset[n]    = ((lo_i + a)·ny + lo_j + b)·nz + lo_k + c           (voxel index)
/// weight[n][0] = ω_i(a)·ω_j(b)·ω_k(c)          ω_d(0) = 1 − t_d,  ω_d(1) = t_d
/// weight[n][1] = σ(a)·ω_j(b)·ω_k(c)            σ(0) = −1,  σ(1) = +1
/// weight[n][2] = ω_i(a)·σ(b)·ω_k(c)
/// weight[n][3] = ω_i(a)·ω_j(b)·σ(c)
/// ```
/// so `value = Σ_n weight[n][0]·v[offset[n]]` and `slope_d = Σ_n weight[n][1+d]·v[offset[n]]`
/// (voxel units), for every channel of a channel-last volume (`offset·C + channel`).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Stencil {
    /// Voxel index of each corner (standard order). Corner `n = 4a + 2b + c` takes the
    /// upper side of the cell along `i` when `a = 1`, along `j` when `b = 1`, along `k` when
    /// `c = 1`, so `offset[7]` is the largest.
    pub offset: [usize; 8],
    /// Per corner: weight of the value, of `∂/∂i`, `∂/∂j` and `∂/∂k`.
    pub weight: [[f32; 4]; 8],
}

/// The cell of one axis under the border rule of the module docs: `(lo, t, upper step)` with
/// the upper step 1, or 0 for a single-sample axis.
#[inline(always)]
fn axis_cell(p: f64, n: usize) -> (usize, f32, usize) {
    if n < 2 {
        return (0, 0.0, 0);
    }
    let max = (n - 1) as f64;
    // NaN stays NaN through the clamp; `as usize` then gives 0 and the weights are NaN, so a
    // NaN position gives a NaN sample instead of a wrong number.
    let q = p.clamp(0.0, max);
    let lo = q.floor().min(max - 1.0);
    (lo as usize, (q - lo) as f32, 1)
}

/// The trilinear [`Stencil`] at voxel position `p` of a volume of shape `shape`, under the
/// border rule of the module docs (beyond a face: the edge cell's slope, a restoring force).
/// Used by the warper and the objective kernel of the deformable stage, each with its own
/// channel loop.
#[inline(always)]
pub fn stencil(p: [f64; 3], shape: [usize; 3]) -> Stencil {
    stencil_with::<false>(p, shape)
}

/// [`stencil`] with the exact slope of the module docs: beyond a face the slope across it
/// is 0, the derivative of the clamped value (values and cells identical to [`stencil`]).
/// Used by the linear stage, whose L-BFGS line searches trust the gradient.
#[inline(always)]
pub fn stencil_exact(p: [f64; 3], shape: [usize; 3]) -> Stencil {
    stencil_with::<true>(p, shape)
}

/// The one implementation behind [`stencil`] and [`stencil_exact`].
#[inline(always)]
fn stencil_with<const EXACT: bool>(p: [f64; 3], shape: [usize; 3]) -> Stencil {
    let (xi, tx, sx1) = axis_cell(p[0], shape[0]);
    let (yi, ty, sy1) = axis_cell(p[1], shape[1]);
    let (zi, tz, sz1) = axis_cell(p[2], shape[2]);
    let (ny, nz) = (shape[1], shape[2]);
    let wx = [1.0 - tx, tx];
    let wy = [1.0 - ty, ty];
    let wz = [1.0 - tz, tz];
    // Slope sign per axis: ±1, or 0 beyond a face under the exact rule.
    let sign = |p: f64, n: usize| -> [f32; 2] {
        if EXACT && !(0.0..=(n.max(1) - 1) as f64).contains(&p) {
            [0.0, 0.0]
        } else {
            [-1.0, 1.0]
        }
    };
    let (sgx, sgy, sgz) = (sign(p[0], shape[0]), sign(p[1], shape[1]), sign(p[2], shape[2]));
    let xs = [xi, xi + sx1];
    let ys = [yi, yi + sy1];
    let zs = [zi, zi + sz1];
    let mut offset = [0usize; 8];
    let mut weight = [[0.0f32; 4]; 8];
    for a in 0..2 {
        for b in 0..2 {
            for c in 0..2 {
                let n = a * 4 + b * 2 + c;
                offset[n] = (xs[a] * ny + ys[b]) * nz + zs[c];
                weight[n] =
                    [wx[a] * wy[b] * wz[c], sgx[a] * wy[b] * wz[c], wx[a] * sgy[b] * wz[c], wx[a] * wy[b] * sgz[c]];
            }
        }
    }
    Stencil { offset, weight }
}

/// `x.floor()`, bit for bit, without the libm call that `f32::floor` becomes on x86-64
/// without SSE4.1 (the baseline the release binary is built for): for `|x| < 2²³` the
/// truncation `t = x as i32 as f32` is exact and `⌊x⌋ = t − 1` when `t > x` (negative
/// non-integers), else `t`; the sign of a zero result is that of `x` (`⌊−0⌋ = −0`, and a
/// result of 0 only comes from `x` in `[+0, 1)` or `−0`). Larger magnitudes, infinities and
/// NaN go to `f32::floor`.
#[inline(always)]
pub fn floor_f32(x: f32) -> f32 {
    if x.abs() < 8_388_608.0 {
        let t = x as i32 as f32;
        (if t > x { t - 1.0 } else { t }).copysign(x)
    } else {
        x.floor()
    }
}

/// `x.round()` (half away from zero), bit for bit, without a libm call (see [`floor_f32`]):
/// for `|x| < 2²³` the truncation `t` and the remainder `x − t` are exact, and the result is
/// `t ± 1` when `|x − t| ≥ 1/2`, else `t`, with the sign of `x` (`round(−0.3) = −0`).
#[inline(always)]
pub fn round_f32(x: f32) -> f32 {
    if x.abs() < 8_388_608.0 {
        let t = x as i32 as f32;
        (if (x - t).abs() >= 0.5 { t + 1.0f32.copysign(x) } else { t }).copysign(x)
    } else {
        x.round()
    }
}

/// The fast path of [`trilinear`]: a position whose eight neighbours all lie inside the
/// volume, as the index of its lower corner and the fractions along each axis. Several
/// volumes of one shape (a field's components) sampled at one position share it.
#[derive(Clone, Copy, Debug)]
pub struct InsideCell {
    /// Index of the lower corner `(⌊p_i⌋, ⌊p_j⌋, ⌊p_k⌋)` in standard order.
    base: usize,
    /// `p − ⌊p⌋` per axis.
    t: [f32; 3],
}

impl InsideCell {
    /// The cell at `p` in a volume of `shape`, when all eight neighbours are inside.
    #[inline(always)]
    pub fn at(p: [f32; 3], shape: [usize; 3]) -> Option<InsideCell> {
        let (nx, ny, nz) = (shape[0] as isize, shape[1] as isize, shape[2] as isize);
        let (fx, fy, fz) = (floor_f32(p[0]), floor_f32(p[1]), floor_f32(p[2]));
        let (x0, y0, z0) = (fx as isize, fy as isize, fz as isize);
        // `x0 < nx - 1` rather than `x0 + 1 < nx`: a huge finite position saturates `x0` at
        // isize::MAX, where `x0 + 1` would overflow.
        (x0 >= 0 && y0 >= 0 && z0 >= 0 && x0 < nx - 1 && y0 < ny - 1 && z0 < nz - 1).then(|| InsideCell {
            base: (x0 as usize * shape[1] + y0 as usize) * shape[2] + z0 as usize,
            t: [p[0] - fx, p[1] - fy, p[2] - fz],
        })
    }

    /// The trilinear value of `data` (shape `shape`) in this cell: along `k`, then `j`, then `i`.
    #[inline(always)]
    pub fn sample(&self, data: &[f32], shape: [usize; 3]) -> f32 {
        let [tx, ty, tz] = self.t;
        let sy = shape[2];
        let sx = shape[1] * shape[2];
        let b = self.base;
        let c000 = data[b];
        let c001 = data[b + 1];
        let c010 = data[b + sy];
        let c011 = data[b + sy + 1];
        let c100 = data[b + sx];
        let c101 = data[b + sx + 1];
        let c110 = data[b + sx + sy];
        let c111 = data[b + sx + sy + 1];
        let c00 = c000 + tz * (c001 - c000);
        let c01 = c010 + tz * (c011 - c010);
        let c10 = c100 + tz * (c101 - c100);
        let c11 = c110 + tz * (c111 - c110);
        let c0 = c00 + ty * (c01 - c00);
        let c1 = c10 + ty * (c11 - c10);
        c0 + tx * (c1 - c0)
    }
}

/// Trilinear interpolation of `data` (standard order, shape `shape`) at voxel position `p`.
///
/// `f(p) = Σ_{c ∈ {0,1}³} w_c · data[⌊p⌋ + c]`, with `w_c = Π_d (c_d ? t_d : 1 − t_d)` and
/// `t = p − ⌊p⌋`. Outside the volume: [`Border::Nearest`] is the shared border rule of the
/// module docs (through [`stencil`]); [`Border::Constant`] blends in a padding value.
#[inline]
pub fn trilinear(data: &[f32], shape: [usize; 3], p: [f32; 3], border: Border) -> f32 {
    if let Some(cell) = InsideCell::at(p, shape) {
        return cell.sample(data, shape);
    }
    let (nx, ny, nz) = (shape[0] as isize, shape[1] as isize, shape[2] as isize);
    let (fx, fy, fz) = (floor_f32(p[0]), floor_f32(p[1]), floor_f32(p[2]));
    let (tx, ty, tz) = (p[0] - fx, p[1] - fy, p[2] - fz);
    let (x0, y0, z0) = (fx as isize, fy as isize, fz as isize);
    if !(p[0].is_finite() && p[1].is_finite() && p[2].is_finite()) {
        return match border {
            Border::Constant(c) => c,
            Border::Nearest => data[0],
        };
    }
    let c = match border {
        Border::Constant(c) => c,
        Border::Nearest => {
            // The shared border rule (module docs), value part.
            let s = stencil([p[0] as f64, p[1] as f64, p[2] as f64], shape);
            return (0..8).map(|n| s.weight[n][0] * data[s.offset[n]]).sum();
        }
    };
    // Beyond one voxel outside, every neighbour along that axis is outside (Constant) or
    // clamped to the same edge (Nearest): clamping the corner there changes no sample and
    // keeps `x0 + 1` from overflowing for huge positions.
    let (x0, y0, z0) = (x0.clamp(-2, nx), y0.clamp(-2, ny), z0.clamp(-2, nz));
    let fetch = |x: isize, y: isize, z: isize| -> f32 {
        if x < 0 || y < 0 || z < 0 || x >= nx || y >= ny || z >= nz {
            c
        } else {
            data[((x * ny + y) * nz + z) as usize]
        }
    };
    // A corner of weight 0 takes no part (`a·1 + b·0 = a` for finite `b`, so the result is
    // the same), so a NaN padding value does not leak into a sample exactly on the last voxel.
    let mix = |a: f32, b: f32, t: f32| if t == 0.0 { a } else { a * (1.0 - t) + b * t };
    let c00 = mix(fetch(x0, y0, z0), fetch(x0, y0, z0 + 1), tz);
    let c01 = mix(fetch(x0, y0 + 1, z0), fetch(x0, y0 + 1, z0 + 1), tz);
    let c10 = mix(fetch(x0 + 1, y0, z0), fetch(x0 + 1, y0, z0 + 1), tz);
    let c11 = mix(fetch(x0 + 1, y0 + 1, z0), fetch(x0 + 1, y0 + 1, z0 + 1), tz);
    let c0 = mix(c00, c01, ty);
    let c1 = mix(c10, c11, ty);
    mix(c0, c1, tx)
}

/// Nearest-neighbour lookup of `data` at voxel position `p` (rounding half away from zero);
/// `outside` when the rounded index is outside the array.
#[inline]
pub fn nearest<T: Copy>(data: &[T], shape: [usize; 3], p: [f32; 3], outside: T) -> T {
    let x = round_f32(p[0]);
    let y = round_f32(p[1]);
    let z = round_f32(p[2]);
    if !(x >= 0.0 && y >= 0.0 && z >= 0.0) {
        return outside;
    }
    let (x, y, z) = (x as usize, y as usize, z as usize);
    if x >= shape[0] || y >= shape[1] || z >= shape[2] {
        return outside;
    }
    data[(x * shape[1] + y) * shape[2] + z]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn floor_and_round_agree_with_libm_bit_for_bit() {
        // The reference is f32::floor and f32::round (the library routines the sampler called
        // before, IEEE 754 roundToIntegralTowardNegative / ...TiesToAway): every f32 of magnitude below 64 in steps of 2^-8 (all the halves,
        // quarters, ... and their neighbours), the neighbours of each integer and half-integer
        // up to 2^24, signed zeros, the largest values, infinities and NaN.
        let mut xs: Vec<f32> = (-(64 << 8)..=(64 << 8)).map(|n| n as f32 / 256.0).collect();
        for e in 0..25 {
            let v = (1u32 << e) as f32;
            for base in [v, v + 0.5, v - 0.5, 0.5 * v] {
                let (up, down) = (f32::from_bits(base.to_bits() + 1), f32::from_bits(base.to_bits() - 1));
                xs.extend([base, up, down, -base, -up, -down]);
            }
        }
        xs.extend([0.0, -0.0, f32::MIN_POSITIVE, -f32::MIN_POSITIVE, 1e-45, -1e-45, 8_388_607.5, -8_388_607.5]);
        xs.extend([f32::MAX, f32::MIN, f32::INFINITY, f32::NEG_INFINITY, 3e9, -3e9]);
        for x in xs {
            assert_eq!(floor_f32(x).to_bits(), x.floor().to_bits(), "floor({x:e})");
            assert_eq!(round_f32(x).to_bits(), x.round().to_bits(), "round({x:e})");
        }
        assert!(floor_f32(f32::NAN).is_nan() && round_f32(f32::NAN).is_nan());
    }

    #[test]
    fn nan_padding_does_not_leak_into_samples_on_the_last_voxel() {
        // Exact fact: on a voxel centre the sample is that voxel's value, whatever the padding.
        let data: Vec<f32> = (0..24).map(|v| v as f32).collect();
        let shape = [2, 3, 4];
        assert_eq!(trilinear(&data, shape, [1.0, 2.0, 3.0], Border::Constant(f32::NAN)), 23.0);
        assert_eq!(trilinear(&data, shape, [1.0, 0.0, 1.0], Border::Constant(f32::NAN)), 13.0);
        assert!(trilinear(&data, shape, [1.5, 0.0, 1.0], Border::Constant(f32::NAN)).is_nan());
    }

    #[test]
    fn huge_positions_sample_the_border_without_overflow() {
        // Far outside, every neighbour is outside: the padding value (Constant) or the edge
        // voxel (Nearest) exactly.
        let data: Vec<f32> = (0..24).map(|v| v as f32).collect();
        let shape = [2, 3, 4];
        for p in [[1e30, 0.5, 0.5], [-1e30, 1.0, 2.0], [0.0, 3e38, -3e38], [1e10, 1e10, 1e10]] {
            assert_eq!(trilinear(&data, shape, p, Border::Constant(-7.0)), -7.0, "{p:?}");
        }
        assert_eq!(trilinear(&data, shape, [1e30, 0.0, 0.0], Border::Nearest), data[12]);
        assert_eq!(trilinear(&data, shape, [-1e30, -1e30, 1e30], Border::Nearest), data[3]);
    }

    #[test]
    fn trilinear_reproduces_linear_functions() {
        // Exact fact: trilinear interpolation reproduces any function a + b·i + c·j + d·k.
        let shape = [4, 5, 6];
        let f = |i: f32, j: f32, k: f32| 1.0 + 2.0 * i - 0.5 * j + 0.25 * k;
        let mut data = vec![0.0; 120];
        for i in 0..4 {
            for j in 0..5 {
                for k in 0..6 {
                    data[(i * 5 + j) * 6 + k] = f(i as f32, j as f32, k as f32);
                }
            }
        }
        for p in [[0.3, 1.7, 4.2], [2.999, 0.0, 0.5], [3.0, 4.0, 5.0]] {
            let v = trilinear(&data, shape, p, Border::Nearest);
            assert!(approx::abs_diff_eq!(v, f(p[0], p[1], p[2]), epsilon = 1e-5), "{p:?}");
        }
        // grid-constant: half a voxel outside blends half of the constant in
        let v = trilinear(&data, shape, [-0.5, 0.0, 0.0], Border::Constant(0.0));
        approx::assert_abs_diff_eq!(v, 0.5 * f(0.0, 0.0, 0.0), epsilon = 1e-6);
        assert_eq!(nearest(&data, shape, [0.6, 1.4, 5.4], -1.0), f(1.0, 1.0, 5.0));
        assert_eq!(nearest(&data, shape, [3.6, 1.0, 1.0], -1.0), -1.0);
    }

    /// Value and slope of the stencil at `p`, for a scalar volume.
    fn value_and_slope(data: &[f32], shape: [usize; 3], p: [f64; 3]) -> (f64, [f64; 3]) {
        apply(data, &stencil(p, shape))
    }

    /// Value and slopes of a stencil applied to a scalar volume.
    fn apply(data: &[f32], s: &Stencil) -> (f64, [f64; 3]) {
        let mut v = 0.0f64;
        let mut g = [0.0f64; 3];
        for n in 0..8 {
            let d = data[s.offset[n]] as f64;
            v += s.weight[n][0] as f64 * d;
            for (a, ga) in g.iter_mut().enumerate() {
                *ga += s.weight[n][1 + a] as f64 * d;
            }
        }
        (v, g)
    }

    #[test]
    fn stencil_slopes_match_central_differences_inside_and_the_edge_cell_beyond_every_face() {
        // References: central differences (f(p+h) − f(p−h)) / 2h of the sampled value (a
        // standard numerical check) and the border rule written in the module docs.
        let shape = [4, 5, 6];
        let f = |i: f64, j: f64, k: f64| (0.9 * i).sin() + 0.3 * j * j - (0.5 * k).cos() + 0.1 * i * j * k;
        let mut data = vec![0.0f32; 120];
        for i in 0..4 {
            for j in 0..5 {
                for k in 0..6 {
                    data[(i * 5 + j) * 6 + k] = f(i as f64, j as f64, k as f64) as f32;
                }
            }
        }
        let h = 1e-3;
        let value = |p: [f64; 3]| value_and_slope(&data, shape, p).0;
        let fd = |p: [f64; 3], a: usize| {
            let (mut pp, mut pm) = (p, p);
            pp[a] += h;
            pm[a] -= h;
            (value(pp) - value(pm)) / (2.0 * h)
        };
        // Inside (off the voxel planes, where the interpolant is smooth): every slope is the
        // derivative of the value; Border::Nearest agrees with the stencil's value.
        for p in [[0.3, 1.7, 4.2], [2.6, 3.4, 0.45], [1.5, 0.2, 4.9]] {
            let (v, g) = value_and_slope(&data, shape, p);
            let tv = trilinear(&data, shape, p.map(|x| x as f32), Border::Nearest) as f64;
            assert!(approx::abs_diff_eq!(v, tv, epsilon = 1e-5), "{p:?}: {v} vs {tv}");
            for (a, ga) in g.iter().enumerate() {
                assert!(approx::abs_diff_eq!(*ga, fd(p, a), epsilon = 1e-3), "{p:?} axis {a}: {ga} vs {}", fd(p, a));
            }
        }
        // Beyond every face: the value is that of the clamped position, the slopes along the
        // face are central differences of the value, and the slope across it is the edge
        // cell's, i.e. the central difference just inside the face (at 0.25 or n − 1.25).
        for axis in 0..3 {
            for (outside, inside) in [(-0.7, 0.25), (shape[axis] as f64 - 1.0 + 0.8, shape[axis] as f64 - 1.25)] {
                let mut p = [1.3, 2.6, 3.2];
                p[axis] = outside;
                let mut q = p;
                q[axis] = q[axis].clamp(0.0, shape[axis] as f64 - 1.0);
                let (v, g) = value_and_slope(&data, shape, p);
                assert!(approx::abs_diff_eq!(v, value(q), epsilon = 1e-6), "axis {axis} at {outside}: value");
                let tv = trilinear(&data, shape, p.map(|x| x as f32), Border::Nearest) as f64;
                assert!(approx::abs_diff_eq!(v, tv, epsilon = 1e-5), "axis {axis} at {outside}: Border::Nearest");
                for (a, &ga) in g.iter().enumerate() {
                    let want = if a == axis {
                        let mut r = p;
                        r[axis] = inside;
                        fd(r, a)
                    } else {
                        fd(p, a)
                    };
                    assert!(
                        approx::abs_diff_eq!(ga, want, epsilon = 1e-3),
                        "axis {axis} at {outside}, slope {a}: {ga} vs {want}"
                    );
                    if a == axis {
                        assert!(ga.abs() > 0.05, "the edge cell's slope is not zero here");
                    }
                }
            }
        }
    }

    #[test]
    fn exact_stencil_slopes_are_central_differences_everywhere_including_beyond_every_face() {
        // Reference: central differences (f(p+h) − f(p−h)) / 2h of the sampled value (a
        // standard numerical check). Beyond a face the value is constant across it, so the
        // exact slope there is 0; values and cells are those of `stencil`.
        let shape = [4, 5, 6];
        let data: Vec<f32> = (0..120).map(|n| ((n as f32) * 0.37).sin() + 0.01 * n as f32).collect();
        let eval =
            |p: [f64; 3], exact: bool| apply(&data, &if exact { stencil_exact(p, shape) } else { stencil(p, shape) });
        let h = 1e-3;
        let mut beyond = 0;
        for p in [
            [0.3, 1.7, 4.2],
            [-0.8, 2.6, 3.3],
            [3.9, 1.4, 2.2],
            [1.2, -1.5, 2.7],
            [2.4, 4.6, 0.7],
            [1.6, 2.3, -0.4],
            [0.7, 3.3, 5.9],
            [-2.0, 5.5, 7.1],
        ] {
            let (v, g) = eval(p, true);
            assert_eq!(v, eval(p, false).0, "{p:?}: the same value as stencil");
            for (a, &ga) in g.iter().enumerate() {
                let (mut pp, mut pm) = (p, p);
                pp[a] += h;
                pm[a] -= h;
                let fd = (eval(pp, true).0 - eval(pm, true).0) / (2.0 * h);
                assert!(approx::abs_diff_eq!(ga, fd, epsilon = 1e-3), "{p:?} axis {a}: {ga} vs {fd}");
                if !(0.0..=(shape[a] - 1) as f64).contains(&p[a]) {
                    assert_eq!(ga, 0.0, "{p:?} axis {a}: beyond the face");
                    beyond += 1;
                }
            }
        }
        assert_eq!(beyond, 9, "samples beyond both faces of every axis");
    }
}
