//! Evaluation `P·φ` of a cubic B-spline control grid on a dense lattice and its transpose.

use rayon::prelude::*;
use sinew_grid::Affine;

/// The four uniform cubic B-spline weights at fractional position `t ∈ [0, 1)`:
/// `[(1−t)³, 3t³ − 6t² + 4, −3t³ + 3t² + 3t + 1, t³] / 6`.
#[inline]
pub fn cubic_weights(t: f64) -> [f64; 4] {
    let t2 = t * t;
    let t3 = t2 * t;
    let s = 1.0 - t;
    [s * s * s / 6.0, (3.0 * t3 - 6.0 * t2 + 4.0) / 6.0, (-3.0 * t3 + 3.0 * t2 + 3.0 * t + 1.0) / 6.0, t3 / 6.0]
}

/// A sparse matrix in compressed rows, used as the 1-D operator of one axis.
#[derive(Clone, Debug)]
struct AxisMatrix {
    rows: usize,
    cols: usize,
    /// Row `r` holds entries `start[r]..start[r + 1]`.
    start: Vec<usize>,
    col: Vec<usize>,
    val: Vec<f32>,
}

impl AxisMatrix {
    /// The `n × n_c` evaluation matrix of one axis with control spacing `s` (lattice voxels).
    fn evaluation(n: usize, n_c: usize, s: f64) -> AxisMatrix {
        let mut m = AxisMatrix { rows: n, cols: n_c, start: vec![0], col: Vec::new(), val: Vec::new() };
        for x in 0..n {
            let (cell, w) = cell_and_weights(x as f64, s, n_c);
            for (a, &wa) in w.iter().enumerate() {
                m.col.push(cell + a);
                m.val.push(wa as f32);
            }
            m.start.push(m.col.len());
        }
        m
    }

    /// The transpose, with the same values (entries of each row in ascending column order).
    fn transpose(&self) -> AxisMatrix {
        let mut rows: Vec<Vec<(usize, f32)>> = vec![Vec::new(); self.cols];
        for r in 0..self.rows {
            for e in self.start[r]..self.start[r + 1] {
                rows[self.col[e]].push((r, self.val[e]));
            }
        }
        let mut t = AxisMatrix { rows: self.cols, cols: self.rows, start: vec![0], col: Vec::new(), val: Vec::new() };
        for row in rows {
            for (c, v) in row {
                t.col.push(c);
                t.val.push(v);
            }
            t.start.push(t.col.len());
        }
        t
    }

    #[inline]
    fn row(&self, r: usize) -> impl Iterator<Item = (usize, f32)> + '_ {
        (self.start[r]..self.start[r + 1]).map(move |e| (self.col[e], self.val[e]))
    }
}

/// The first control index `ℓ` and the four weights of lattice position `x` (voxels) on an axis
/// with control spacing `s` and `n_c` control points.
fn cell_and_weights(x: f64, s: f64, n_c: usize) -> (usize, [f64; 4]) {
    let t = x / s;
    let cell = (t.floor().max(0.0) as usize).min(n_c - 4);
    (cell, cubic_weights(t - cell as f64))
}

/// `dst = M ⊗ (axis)` applied to `src` of shape `src_shape`; `dst` has `src_shape` with
/// `src_shape[axis]` replaced by `M.rows`. A gather, parallel over the outer index.
fn apply_axis(m: &AxisMatrix, src: &[f32], src_shape: [usize; 3], axis: usize, dst: &mut [f32]) {
    assert_eq!(src_shape[axis], m.cols, "axis length matches the operator");
    let [s0, s1, s2] = src_shape;
    assert_eq!(src.len(), s0 * s1 * s2);
    match axis {
        0 => {
            let plane = s1 * s2;
            assert_eq!(dst.len(), m.rows * plane);
            dst.par_chunks_mut(plane).enumerate().for_each(|(r, out)| {
                out.fill(0.0);
                for (c, w) in m.row(r) {
                    for (o, &v) in out.iter_mut().zip(&src[c * plane..(c + 1) * plane]) {
                        *o += w * v;
                    }
                }
            });
        }
        1 => {
            assert_eq!(dst.len(), s0 * m.rows * s2);
            dst.par_chunks_mut(m.rows * s2).enumerate().for_each(|(i, out)| {
                let slab = &src[i * s1 * s2..(i + 1) * s1 * s2];
                for (r, orow) in out.chunks_exact_mut(s2).enumerate() {
                    orow.fill(0.0);
                    for (c, w) in m.row(r) {
                        for (o, &v) in orow.iter_mut().zip(&slab[c * s2..(c + 1) * s2]) {
                            *o += w * v;
                        }
                    }
                }
            });
        }
        _ => {
            assert_eq!(dst.len(), s0 * s1 * m.rows);
            dst.par_chunks_mut(s1 * m.rows).enumerate().for_each(|(i, out)| {
                for (j, orow) in out.chunks_exact_mut(m.rows).enumerate() {
                    let line = &src[(i * s1 + j) * s2..(i * s1 + j + 1) * s2];
                    for (r, o) in orow.iter_mut().enumerate() {
                        *o = m.row(r).map(|(c, w)| w * line[c]).sum();
                    }
                }
            });
        }
    }
}

/// The cubic B-spline basis of a control grid over a dense lattice (see the module docs for
/// the layout and formulas). Holds the per-axis weight tables and two scratch buffers, built
/// once; [`expand`](BsplineBasis::expand) and [`adjoint`](BsplineBasis::adjoint) allocate
/// nothing.
///
/// Both work on component-first buffers: control values `(3, n_cx, n_cy, n_cz)` and dense
/// values `(3, nx, ny, nz)`; each component is evaluated independently.
#[derive(Clone, Debug)]
pub struct BsplineBasis {
    shape: [usize; 3],
    control_shape: [usize; 3],
    spacing: [f64; 3],
    forward: [AxisMatrix; 3],
    backward: [AxisMatrix; 3],
    /// `(n_cx, n_cy, nz)`: after the `k` pass.
    t1: Vec<f32>,
    /// `(n_cx, ny, nz)`: after the `j` pass.
    t2: Vec<f32>,
}

impl BsplineBasis {
    /// The basis for a lattice of `shape` points with control points every `spacing[d]`
    /// lattice voxels along axis `d`.
    ///
    /// # Panics
    /// When an extent is zero or a spacing is not finite and positive.
    #[track_caller]
    pub fn new(shape: [usize; 3], spacing: [f64; 3]) -> BsplineBasis {
        assert!(shape.iter().all(|&n| n > 0), "lattice shape {shape:?} has a zero extent");
        assert!(spacing.iter().all(|s| s.is_finite() && *s > 0.0), "control spacing {spacing:?} must be positive");
        let control_shape: [usize; 3] =
            std::array::from_fn(|d| ((shape[d] - 1) as f64 / spacing[d]).floor() as usize + 4);
        let forward: [AxisMatrix; 3] =
            std::array::from_fn(|d| AxisMatrix::evaluation(shape[d], control_shape[d], spacing[d]));
        let backward = std::array::from_fn(|d| forward[d].transpose());
        let [cx, cy, _] = control_shape;
        let [_, ny, nz] = shape;
        BsplineBasis {
            shape,
            control_shape,
            spacing,
            forward,
            backward,
            t1: vec![0.0; cx * cy * nz],
            t2: vec![0.0; cx * ny * nz],
        }
    }

    /// Shape of the dense lattice.
    pub fn shape(&self) -> [usize; 3] {
        self.shape
    }

    /// Shape `(n_cx, n_cy, n_cz)` of the control grid.
    pub fn control_shape(&self) -> [usize; 3] {
        self.control_shape
    }

    /// Control spacing in lattice voxels per axis.
    pub fn spacing(&self) -> [f64; 3] {
        self.spacing
    }

    /// Number of control points (one component).
    pub fn control_len(&self) -> usize {
        self.control_shape.iter().product()
    }

    /// Lattice position (voxels) of control point `c`: `(c − 1)·s` per axis.
    pub fn control_position(&self, c: [usize; 3]) -> [f64; 3] {
        std::array::from_fn(|d| (c[d] as f64 - 1.0) * self.spacing[d])
    }

    /// Control values (component-first) whose spline is the displacement `A·x − x` of the
    /// affine map `a` of lattice positions (voxels): by linear precision, the evaluated field
    /// equals it everywhere.
    pub fn control_from_affine(&self, a: &Affine) -> Vec<f32> {
        let n = self.control_len();
        let [_, cy, cz] = self.control_shape;
        let mut out = vec![0.0f32; 3 * n];
        for idx in 0..n {
            let c = [idx / (cy * cz), (idx / cz) % cy, idx % cz];
            let p = self.control_position(c);
            let q = a.apply(p);
            for d in 0..3 {
                out[d * n + idx] = (q[d] - p[d]) as f32;
            }
        }
        out
    }

    /// `out = P·φ`: evaluates the control values `phi` (`3·n_c` values) on the lattice
    /// (`out`: `3·N` values), component by component.
    ///
    /// # Panics
    /// When the buffer lengths do not match.
    #[track_caller]
    pub fn expand(&mut self, phi: &[f32], out: &mut [f32]) {
        let (nc, n) = (self.control_len(), self.shape.iter().product::<usize>());
        assert!(phi.len() == 3 * nc && out.len() == 3 * n, "B-spline buffers: {} / {}", phi.len(), out.len());
        let [cx, cy, cz] = self.control_shape;
        let [_, ny, nz] = self.shape;
        for (p, o) in phi.chunks_exact(nc).zip(out.chunks_exact_mut(n)) {
            apply_axis(&self.forward[2], p, [cx, cy, cz], 2, &mut self.t1);
            apply_axis(&self.forward[1], &self.t1, [cx, cy, nz], 1, &mut self.t2);
            apply_axis(&self.forward[0], &self.t2, [cx, ny, nz], 0, o);
        }
    }

    /// `out = Pᵀ·g`: the exact transpose of [`expand`](BsplineBasis::expand) (the same
    /// weights, scattered back to the control points), `g`: `3·N` values, `out`: `3·n_c`.
    ///
    /// # Panics
    /// When the buffer lengths do not match.
    #[track_caller]
    pub fn adjoint(&mut self, g: &[f32], out: &mut [f32]) {
        let (nc, n) = (self.control_len(), self.shape.iter().product::<usize>());
        assert!(g.len() == 3 * n && out.len() == 3 * nc, "B-spline buffers: {} / {}", g.len(), out.len());
        let [cx, cy, _] = self.control_shape;
        let [nx, ny, nz] = self.shape;
        for (gc, o) in g.chunks_exact(n).zip(out.chunks_exact_mut(nc)) {
            apply_axis(&self.backward[0], gc, [nx, ny, nz], 0, &mut self.t2);
            apply_axis(&self.backward[1], &self.t2, [cx, ny, nz], 1, &mut self.t1);
            apply_axis(&self.backward[2], &self.t1, [cx, cy, nz], 2, o);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weights_are_a_partition_of_unity_with_linear_precision() {
        // Textbook facts of uniform cubic B-splines: Σ B_a(t) = 1 and Σ B_a(t)·(a − 1) = t.
        for n in 0..=20 {
            let t = n as f64 / 20.0;
            let w = cubic_weights(t);
            approx::assert_abs_diff_eq!(w.iter().sum::<f64>(), 1.0, epsilon = 1e-14);
            let lin: f64 = w.iter().enumerate().map(|(a, wa)| wa * (a as f64 - 1.0)).sum();
            assert!(approx::abs_diff_eq!(lin, t, epsilon = 1e-14), "{t}: {lin}");
        }
    }

    #[test]
    fn transposed_table_holds_the_same_entries() {
        let m = AxisMatrix::evaluation(11, ((10.0f64) / 2.5).floor() as usize + 4, 2.5);
        let t = m.transpose();
        let mut dense = vec![0.0f32; m.rows * m.cols];
        for r in 0..m.rows {
            for (c, v) in m.row(r) {
                dense[r * m.cols + c] += v;
            }
        }
        for r in 0..t.rows {
            for (c, v) in t.row(r) {
                dense[c * m.cols + r] -= v;
            }
        }
        assert!(dense.iter().all(|&v| v == 0.0));
    }
}
