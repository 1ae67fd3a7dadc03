//! Voxel-to-world affine maps (NIfTI convention: world millimetres, RAS+ axes).

/// A 3-D affine map `y = M·x + t`, stored as a 3×4 matrix `[M | t]` (row-major).
///
/// For a [`Grid`](crate::Grid) it maps a voxel index `(i, j, k)` (continuous, in voxels)
/// to a world point `(x, y, z)` in millimetres, exactly as NIfTI's sform/qform do.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Affine {
    /// Rows of `[M | t]`: `m[r] = [M_r0, M_r1, M_r2, t_r]`.
    pub m: [[f64; 4]; 3],
}

impl Affine {
    /// The identity map.
    pub const IDENTITY: Affine = Affine { m: [[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]] };

    /// A diagonal scaling by `spacing` (mm per voxel) followed by a translation `origin` (mm).
    pub fn from_spacing_origin(spacing: [f64; 3], origin: [f64; 3]) -> Affine {
        let mut m = [[0.0; 4]; 3];
        for r in 0..3 {
            m[r][r] = spacing[r];
            m[r][3] = origin[r];
        }
        Affine { m }
    }

    /// Builds the map from its linear part `lin` (rows) and translation `t`.
    pub fn from_parts(lin: [[f64; 3]; 3], t: [f64; 3]) -> Affine {
        let mut m = [[0.0; 4]; 3];
        for r in 0..3 {
            m[r][..3].copy_from_slice(&lin[r]);
            m[r][3] = t[r];
        }
        Affine { m }
    }

    /// From a 4×4 homogeneous matrix (the last row is ignored).
    pub fn from_4x4(a: [[f64; 4]; 4]) -> Affine {
        Affine { m: [a[0], a[1], a[2]] }
    }

    /// As a 4×4 homogeneous matrix with last row `[0, 0, 0, 1]`.
    pub fn to_4x4(&self) -> [[f64; 4]; 4] {
        [self.m[0], self.m[1], self.m[2], [0.0, 0.0, 0.0, 1.0]]
    }

    /// The linear part `M`.
    pub fn linear(&self) -> [[f64; 3]; 3] {
        let mut l = [[0.0; 3]; 3];
        for (lr, mr) in l.iter_mut().zip(&self.m) {
            lr.copy_from_slice(&mr[..3]);
        }
        l
    }

    /// The translation `t`.
    pub fn translation(&self) -> [f64; 3] {
        [self.m[0][3], self.m[1][3], self.m[2][3]]
    }

    /// Applies the map to a point: `M·p + t`.
    #[inline]
    pub fn apply(&self, p: [f64; 3]) -> [f64; 3] {
        let m = &self.m;
        [
            m[0][0] * p[0] + m[0][1] * p[1] + m[0][2] * p[2] + m[0][3],
            m[1][0] * p[0] + m[1][1] * p[1] + m[1][2] * p[2] + m[1][3],
            m[2][0] * p[0] + m[2][1] * p[1] + m[2][2] * p[2] + m[2][3],
        ]
    }

    /// Applies only the linear part to a vector: `M·v`.
    #[inline]
    pub fn apply_vector(&self, v: [f64; 3]) -> [f64; 3] {
        let m = &self.m;
        [
            m[0][0] * v[0] + m[0][1] * v[1] + m[0][2] * v[2],
            m[1][0] * v[0] + m[1][1] * v[1] + m[1][2] * v[2],
            m[2][0] * v[0] + m[2][1] * v[1] + m[2][2] * v[2],
        ]
    }

    /// Determinant of the linear part.
    pub fn determinant(&self) -> f64 {
        det3(&self.linear())
    }

    /// The composition `self ∘ other`: first `other`, then `self`.
    pub fn compose(&self, other: &Affine) -> Affine {
        let a = self.to_4x4();
        let b = other.to_4x4();
        let mut c = [[0.0; 4]; 4];
        for r in 0..4 {
            for col in 0..4 {
                c[r][col] = (0..4).map(|k| a[r][k] * b[k][col]).sum();
            }
        }
        Affine::from_4x4(c)
    }

    /// The inverse map, or `None` when the linear part is singular (|det| < 1e-12) or not finite.
    pub fn inverse(&self) -> Option<Affine> {
        let l = self.linear();
        let d = det3(&l);
        if !d.is_finite() || d.abs() < 1e-12 {
            return None;
        }
        // Inverse by the adjugate: M⁻¹ = adj(M) / det(M).
        let mut inv = [[0.0; 3]; 3];
        for (r, row) in inv.iter_mut().enumerate() {
            for (c, v) in row.iter_mut().enumerate() {
                let (r1, r2) = ((c + 1) % 3, (c + 2) % 3);
                let (c1, c2) = ((r + 1) % 3, (r + 2) % 3);
                *v = (l[r1][c1] * l[r2][c2] - l[r1][c2] * l[r2][c1]) / d;
            }
        }
        let t = self.translation();
        let ti = inv.map(|row| -(row[0] * t[0] + row[1] * t[1] + row[2] * t[2]));
        Some(Affine::from_parts(inv, ti))
    }

    /// Voxel spacing in mm: the Euclidean norms of the columns of `M`.
    pub fn column_norms(&self) -> [f64; 3] {
        let mut s = [0.0; 3];
        for (c, sc) in s.iter_mut().enumerate() {
            *sc = (0..3).map(|r| self.m[r][c] * self.m[r][c]).sum::<f64>().sqrt();
        }
        s
    }

    /// True when every entry is finite.
    pub fn is_finite(&self) -> bool {
        self.m.iter().flatten().all(|v| v.is_finite())
    }

    /// Orientation codes of the voxel axes, e.g. `['R', 'A', 'S']`.
    ///
    /// The rule is the one of `nibabel.aff2axcodes`: a voxel axis whose direction is mostly
    /// +x in world is labelled "R", −x "L", +y "A", −y "P", +z "S", −z "I" (NIfTI world space
    /// is RAS+, so "RAS" means i, j, k point along +x, +y, +z).
    pub fn axis_codes(&self) -> [char; 3] {
        let mut codes = ['?'; 3];
        let mut used = [false; 3];
        // Greedy assignment by largest absolute component of the normalised column, the same
        // answer as an optimal assignment for all non-pathological (near-orthogonal) affines.
        let l = self.linear();
        let norms = self.column_norms();
        let mut order: Vec<(f64, usize, usize)> = Vec::with_capacity(9);
        for (c, &norm) in norms.iter().enumerate() {
            for (r, row) in l.iter().enumerate() {
                let v = if norm > 0.0 { row[c] / norm } else { 0.0 };
                order.push((v.abs(), c, r));
            }
        }
        order.sort_by(|a, b| b.0.partial_cmp(&a.0).unwrap_or(std::cmp::Ordering::Equal));
        let mut col_done = [false; 3];
        for (mag, c, r) in order {
            if col_done[c] || used[r] || mag == 0.0 {
                continue;
            }
            let positive = l[r][c] > 0.0;
            codes[c] = match (r, positive) {
                (0, true) => 'R',
                (0, false) => 'L',
                (1, true) => 'A',
                (1, false) => 'P',
                (2, true) => 'S',
                _ => 'I',
            };
            col_done[c] = true;
            used[r] = true;
        }
        codes
    }
}

/// Determinant of a 3×3 matrix.
pub fn det3(l: &[[f64; 3]; 3]) -> f64 {
    l[0][0] * (l[1][1] * l[2][2] - l[1][2] * l[2][1]) - l[0][1] * (l[1][0] * l[2][2] - l[1][2] * l[2][0])
        + l[0][2] * (l[1][0] * l[2][1] - l[1][1] * l[2][0])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inverse_composes_to_identity() {
        let a = Affine::from_parts([[0.0, -2.0, 0.1], [1.5, 0.0, 0.0], [0.0, 0.2, 3.0]], [10.0, -5.0, 2.0]);
        let i = a.inverse().unwrap();
        let p = [1.0, 2.0, 3.0];
        let q = i.apply(a.apply(p));
        for d in 0..3 {
            approx::assert_abs_diff_eq!(q[d], p[d], epsilon = 1e-12);
        }
        assert!(Affine::from_parts([[1.0, 0.0, 0.0], [2.0, 0.0, 0.0], [0.0, 0.0, 1.0]], [0.0; 3]).inverse().is_none());
    }

    #[test]
    fn axis_codes_follow_nibabel_rule() {
        // nibabel.aff2axcodes(np.diag([-2, 2, 2, 1])) == ('L', 'A', 'S') (nibabel docs, from memory)
        let a = Affine::from_spacing_origin([-2.0, 2.0, 2.0], [0.0; 3]);
        assert_eq!(a.axis_codes(), ['L', 'A', 'S']);
        let b = Affine::from_parts([[0.0, 0.0, 1.0], [-1.0, 0.0, 0.0], [0.0, 1.0, 0.0]], [0.0; 3]);
        assert_eq!(b.axis_codes(), ['P', 'S', 'R']);
    }
}
