//! Point sampling of volumes at continuous voxel positions.

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

/// Trilinear interpolation of `data` (standard order, shape `shape`) at voxel position `p`.
///
/// `f(p) = Σ_{c ∈ {0,1}³} w_c · data[⌊p⌋ + c]`, with `w_c = Π_d (c_d ? t_d : 1 − t_d)` and
/// `t = p − ⌊p⌋`.
#[inline]
pub fn trilinear(data: &[f32], shape: [usize; 3], p: [f32; 3], border: Border) -> f32 {
    let (nx, ny, nz) = (shape[0] as isize, shape[1] as isize, shape[2] as isize);
    let fx = p[0].floor();
    let fy = p[1].floor();
    let fz = p[2].floor();
    let (tx, ty, tz) = (p[0] - fx, p[1] - fy, p[2] - fz);
    let (x0, y0, z0) = (fx as isize, fy as isize, fz as isize);
    // `x0 < nx - 1` rather than `x0 + 1 < nx`: a huge finite position saturates `x0` at
    // isize::MAX, where `x0 + 1` would overflow.
    if x0 >= 0 && y0 >= 0 && z0 >= 0 && x0 < nx - 1 && y0 < ny - 1 && z0 < nz - 1 {
        // Fast path: all eight neighbours inside.
        let sy = shape[2];
        let sx = shape[1] * shape[2];
        let b = x0 as usize * sx + y0 as usize * sy + z0 as usize;
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
        return c0 + tx * (c1 - c0);
    }
    if !(p[0].is_finite() && p[1].is_finite() && p[2].is_finite()) {
        return match border {
            Border::Constant(c) => c,
            Border::Nearest => data[0],
        };
    }
    // Beyond one voxel outside, every neighbour along that axis is outside (Constant) or
    // clamped to the same edge (Nearest): clamping the corner there changes no sample and
    // keeps `x0 + 1` from overflowing for huge positions.
    let (x0, y0, z0) = (x0.clamp(-2, nx), y0.clamp(-2, ny), z0.clamp(-2, nz));
    let fetch = |x: isize, y: isize, z: isize| -> f32 {
        match border {
            Border::Constant(c) => {
                if x < 0 || y < 0 || z < 0 || x >= nx || y >= ny || z >= nz {
                    c
                } else {
                    data[((x * ny + y) * nz + z) as usize]
                }
            }
            Border::Nearest => {
                let (x, y, z) = (x.clamp(0, nx - 1), y.clamp(0, ny - 1), z.clamp(0, nz - 1));
                data[((x * ny + y) * nz + z) as usize]
            }
        }
    };
    let c00 = fetch(x0, y0, z0) * (1.0 - tz) + fetch(x0, y0, z0 + 1) * tz;
    let c01 = fetch(x0, y0 + 1, z0) * (1.0 - tz) + fetch(x0, y0 + 1, z0 + 1) * tz;
    let c10 = fetch(x0 + 1, y0, z0) * (1.0 - tz) + fetch(x0 + 1, y0, z0 + 1) * tz;
    let c11 = fetch(x0 + 1, y0 + 1, z0) * (1.0 - tz) + fetch(x0 + 1, y0 + 1, z0 + 1) * tz;
    let c0 = c00 * (1.0 - ty) + c01 * ty;
    let c1 = c10 * (1.0 - ty) + c11 * ty;
    c0 * (1.0 - tx) + c1 * tx
}

/// Nearest-neighbour lookup of `data` at voxel position `p` (rounding half away from zero);
/// `outside` when the rounded index is outside the array.
#[inline]
pub fn nearest<T: Copy>(data: &[T], shape: [usize; 3], p: [f32; 3], outside: T) -> T {
    let x = p[0].round();
    let y = p[1].round();
    let z = p[2].round();
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
            assert!((v - f(p[0], p[1], p[2])).abs() < 1e-5, "{p:?}");
        }
        // grid-constant: half a voxel outside blends half of the constant in
        let v = trilinear(&data, shape, [-0.5, 0.0, 0.0], Border::Constant(0.0));
        assert!((v - 0.5 * f(0.0, 0.0, 0.0)).abs() < 1e-6);
        assert_eq!(nearest(&data, shape, [0.6, 1.4, 5.4], -1.0), f(1.0, 1.0, 5.0));
        assert_eq!(nearest(&data, shape, [3.6, 1.0, 1.0], -1.0), -1.0);
    }
}
