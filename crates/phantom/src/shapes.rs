//! Implicit shapes in template millimetres: perturbed ellipsoids ("blobs") and tubes.
//!
//! All shapes are evaluated at a point `p` (mm) and answer "inside or not" plus a normalised
//! depth used for internal structure (walls, cortex). Each has an axis-aligned bounding box so
//! that the voxel loop can skip it cheaply.

/// An axis-aligned box in mm.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Aabb {
    pub lo: [f64; 3],
    pub hi: [f64; 3],
}

impl Aabb {
    /// The empty box (contains nothing, grows by [`Aabb::union`]).
    pub(crate) const EMPTY: Aabb = Aabb { lo: [f64::INFINITY; 3], hi: [f64::NEG_INFINITY; 3] };

    /// True when `p` lies in the closed box.
    #[inline]
    pub(crate) fn contains(&self, p: &[f64; 3]) -> bool {
        p[0] >= self.lo[0]
            && p[0] <= self.hi[0]
            && p[1] >= self.lo[1]
            && p[1] <= self.hi[1]
            && p[2] >= self.lo[2]
            && p[2] <= self.hi[2]
    }

    /// The smallest box holding both.
    pub(crate) fn union(&self, o: &Aabb) -> Aabb {
        Aabb { lo: [0, 1, 2].map(|d| self.lo[d].min(o.lo[d])), hi: [0, 1, 2].map(|d| self.hi[d].max(o.hi[d])) }
    }
}

#[inline]
fn dot(a: &[f64; 3], b: &[f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

#[inline]
fn sub(a: &[f64; 3], b: &[f64; 3]) -> [f64; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

/// The rotation `Rz(γ)·Ry(β)·Rx(α)` (angles in radians) as a matrix whose columns are the
/// rotated x, y, z axes.
pub(crate) fn rotation(alpha: f64, beta: f64, gamma: f64) -> [[f64; 3]; 3] {
    let (sa, ca) = alpha.sin_cos();
    let (sb, cb) = beta.sin_cos();
    let (sg, cg) = gamma.sin_cos();
    [
        [cg * cb, cg * sb * sa - sg * ca, cg * sb * ca + sg * sa],
        [sg * cb, sg * sb * sa + cg * ca, sg * sb * ca - cg * sa],
        [-sb, cb * sa, cb * ca],
    ]
}

/// Low-order smooth perturbation of the radius of a blob, a polynomial in the unit direction
/// `û`:
/// `g(û) = Σ_d l_d û_d + Σ_d s_d (û_d² − 1/3) + o_xy û_x û_y + o_yz û_y û_z + o_zx û_z û_x
///        + c û_x û_y û_z`.
/// Every term has zero mean over the unit sphere (odd terms by symmetry, `û_d² − 1/3` because
/// the mean of `û_d²` is 1/3), so the enclosed volume changes only at second order in the
/// coefficients.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub(crate) struct Wobble {
    pub lin: [f64; 3],
    pub sq: [f64; 3],
    pub off: [f64; 3],
    pub cubic: f64,
}

impl Wobble {
    #[inline]
    fn eval(&self, u: &[f64; 3]) -> f64 {
        const THIRD: f64 = 1.0 / 3.0;
        dot(&self.lin, u)
            + self.sq[0] * (u[0] * u[0] - THIRD)
            + self.sq[1] * (u[1] * u[1] - THIRD)
            + self.sq[2] * (u[2] * u[2] - THIRD)
            + self.off[0] * u[0] * u[1]
            + self.off[1] * u[1] * u[2]
            + self.off[2] * u[2] * u[0]
            + self.cubic * u[0] * u[1] * u[2]
    }

    /// An upper bound of `|g(û)|` over the sphere.
    fn bound(&self) -> f64 {
        let s: f64 = self.lin.iter().chain(&self.sq).chain(&self.off).map(|v| v.abs()).sum();
        s + self.cubic.abs()
    }
}

/// A perturbed, tapered, bent and rotated ellipsoid.
///
/// With local normalised coordinates `q = diag(1/a, 1/b, 1/c)·Rᵀ·(p − centre)`, the shape is
/// 1. bent by the shear `q_x ← q_x − κ q_z²` (a shear has Jacobian 1: volume unchanged),
/// 2. tapered: `q_y ← q_y / (1 + τ q_x)`, `q_z ← q_z / (1 + τ q_x)` (cross-sections grow
///    linearly along local x),
/// 3. inside when `|q| < 1 + g(q/|q|)` with the [`Wobble`] `g`.
///
/// Without wobble its volume is `(4/3)·π·a·b·c·(1 + τ²/5)`: the cross-section at local
/// `x ∈ [−1, 1]` is a disc of area `π(1 + τx)²(1 − x²)` (in units of `bc`), and
/// `∫₋₁¹ (1 + τx)²(1 − x²) dx = 4/3 + 4τ²/15`.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Blob {
    pub centre: [f64; 3],
    /// Columns: the local axes in world coordinates.
    pub rot: [[f64; 3]; 3],
    pub semi: [f64; 3],
    pub bend: f64,
    pub taper: f64,
    pub wobble: Wobble,
    pub bbox: Aabb,
}

impl Blob {
    /// A blob; its bounding box is derived from the parameters.
    ///
    /// # Panics
    /// When `|taper| ≥ 0.8` or a semi-axis is not positive (programming errors).
    #[track_caller]
    pub(crate) fn new(
        centre: [f64; 3],
        rot: [[f64; 3]; 3],
        semi: [f64; 3],
        bend: f64,
        taper: f64,
        wobble: Wobble,
    ) -> Blob {
        assert!(taper.abs() < 0.8 && semi.iter().all(|&s| s > 0.0), "bad blob parameters");
        let r = 1.0 + wobble.bound();
        // Local extents (mm): the taper widens y/z by at most (1 + |τ| r), the bend moves x
        // by at most |κ| (r (1 + |τ| r))².
        let yz = r * (1.0 + taper.abs() * r);
        let ext = [(r + bend.abs() * yz * yz) * semi[0], yz * semi[1], yz * semi[2]];
        let mut bbox = Aabb::EMPTY;
        for (d, (lo, hi)) in bbox.lo.iter_mut().zip(bbox.hi.iter_mut()).enumerate() {
            let e: f64 = (0..3).map(|l| rot[d][l].abs() * ext[l]).sum();
            *lo = centre[d] - e;
            *hi = centre[d] + e;
        }
        Blob { centre, rot, semi, bend, taper, wobble, bbox }
    }

    /// The normalised level of `p`: below 1 inside, 0 at the centre, growing outwards
    /// (`|q| / (1 + g)`). Points where the taper folds over (`1 + τ q_x ≤ 0.05`) are outside.
    #[inline]
    pub(crate) fn level(&self, p: &[f64; 3]) -> f64 {
        let d = sub(p, &self.centre);
        let r = &self.rot;
        let mut q = [
            (r[0][0] * d[0] + r[1][0] * d[1] + r[2][0] * d[2]) / self.semi[0],
            (r[0][1] * d[0] + r[1][1] * d[1] + r[2][1] * d[2]) / self.semi[1],
            (r[0][2] * d[0] + r[1][2] * d[1] + r[2][2] * d[2]) / self.semi[2],
        ];
        q[0] -= self.bend * q[2] * q[2];
        let w = 1.0 + self.taper * q[0];
        if w <= 0.05 {
            return f64::INFINITY;
        }
        q[1] /= w;
        q[2] /= w;
        let n = dot(&q, &q).sqrt();
        if n == 0.0 {
            return 0.0;
        }
        let u = [q[0] / n, q[1] / n, q[2] / n];
        n / (1.0 + self.wobble.eval(&u)).max(0.05)
    }

    /// The level if `p` is inside the bounding box and the shape, else `None`.
    #[inline]
    pub(crate) fn inside(&self, p: &[f64; 3]) -> Option<f64> {
        if !self.bbox.contains(p) {
            return None;
        }
        let l = self.level(p);
        (l < 1.0).then_some(l)
    }

    #[cfg(test)]
    /// The volume without wobble, mm³: `(4/3)·π·a·b·c·(1 + τ²/5)`.
    pub(crate) fn volume_mm3(&self) -> f64 {
        4.0 / 3.0 * std::f64::consts::PI * self.semi.iter().product::<f64>() * (1.0 + self.taper * self.taper / 5.0)
    }
}

/// One straight piece of a tube: the points within `radius` of the segment `a`–`b`
/// (a capsule). `tag` carries per-piece content (e.g. a gas–fluid level).
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Segment {
    pub a: [f64; 3],
    pub ab: [f64; 3],
    inv_len2: f64,
    pub radius: f64,
    pub tag: f64,
    pub bbox: Aabb,
}

impl Segment {
    /// The capsule around `a`–`b` of `radius` mm.
    pub(crate) fn new(a: [f64; 3], b: [f64; 3], radius: f64, tag: f64) -> Segment {
        let ab = sub(&b, &a);
        let l2 = dot(&ab, &ab);
        let inv_len2 = if l2 > 0.0 { 1.0 / l2 } else { 0.0 };
        let bbox =
            Aabb { lo: [0, 1, 2].map(|d| a[d].min(b[d]) - radius), hi: [0, 1, 2].map(|d| a[d].max(b[d]) + radius) };
        Segment { a, ab, inv_len2, radius, tag, bbox }
    }

    /// Distance (mm) from `p` to the segment and the closest point on it.
    #[inline]
    pub(crate) fn distance(&self, p: &[f64; 3]) -> (f64, [f64; 3]) {
        let ap = sub(p, &self.a);
        let t = (dot(&ap, &self.ab) * self.inv_len2).clamp(0.0, 1.0);
        let c = [self.a[0] + t * self.ab[0], self.a[1] + t * self.ab[1], self.a[2] + t * self.ab[2]];
        let d = sub(p, &c);
        (dot(&d, &d).sqrt(), c)
    }

    #[cfg(test)]
    /// Length of the segment, mm.
    pub(crate) fn length(&self) -> f64 {
        dot(&self.ab, &self.ab).sqrt()
    }
}

/// The closest hit of a tube: depth below the tube surface (mm, positive inside), the
/// piece's radius (mm) and tag, and the closest point on its axis.
#[derive(Clone, Copy, Debug)]
pub(crate) struct TubeHit {
    pub depth: f64,
    pub radius: f64,
    pub tag: f64,
    pub axis: [f64; 3],
}

/// A union of capsules (one or more polylines with per-piece radius).
#[derive(Clone, Debug, Default, PartialEq)]
pub(crate) struct Tube {
    pub segments: Vec<Segment>,
    pub bbox: Option<Aabb>,
}

impl Tube {
    /// Adds the polyline through `points` with radius `radius(piece index)` and tag
    /// `tag(piece index)`.
    pub(crate) fn add_polyline(
        &mut self,
        points: &[[f64; 3]],
        mut radius: impl FnMut(usize) -> f64,
        mut tag: impl FnMut(usize) -> f64,
    ) {
        for (n, w) in points.windows(2).enumerate() {
            let s = Segment::new(w[0], w[1], radius(n), tag(n));
            self.bbox = Some(self.bbox.map_or(s.bbox, |b| b.union(&s.bbox)));
            self.segments.push(s);
        }
    }

    /// The piece whose surface is deepest around `p`, if `p` lies inside the tube.
    #[inline]
    pub(crate) fn inside(&self, p: &[f64; 3]) -> Option<TubeHit> {
        if !self.bbox.is_some_and(|b| b.contains(p)) {
            return None;
        }
        let mut best: Option<TubeHit> = None;
        for s in &self.segments {
            if !s.bbox.contains(p) {
                continue;
            }
            let (dist, axis) = s.distance(p);
            let depth = s.radius - dist;
            if depth > 0.0 && best.map_or(true, |b| depth > b.depth) {
                best = Some(TubeHit { depth, radius: s.radius, tag: s.tag, axis });
            }
        }
        best
    }

    #[cfg(test)]
    /// `Σ π r² L` over the pieces, mm³: the volume of the tube when its pieces meet end to
    /// end at small angles and do not otherwise touch (joints and end caps ignored).
    pub(crate) fn volume_mm3(&self) -> f64 {
        self.segments.iter().map(|s| std::f64::consts::PI * s.radius * s.radius * s.length()).sum()
    }
}

/// Points along the polyline through `ctrl`, subdivided so that no piece is longer than
/// `max_step` mm.
pub(crate) fn subdivide(ctrl: &[[f64; 3]], max_step: f64) -> Vec<[f64; 3]> {
    let mut out = Vec::with_capacity(ctrl.len() * 4);
    for w in ctrl.windows(2) {
        let d = sub(&w[1], &w[0]);
        let n = (dot(&d, &d).sqrt() / max_step).ceil().max(1.0) as usize;
        for s in 0..n {
            let t = s as f64 / n as f64;
            out.push([w[0][0] + t * d[0], w[0][1] + t * d[1], w[0][2] + t * d[2]]);
        }
    }
    if let Some(last) = ctrl.last() {
        out.push(*last);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Volume of `inside` on a regular lattice of `h`-mm cells over `bbox`, mm³.
    fn lattice_volume(bbox: Aabb, h: f64, inside: impl Fn(&[f64; 3]) -> bool) -> f64 {
        let n = [0, 1, 2].map(|d| ((bbox.hi[d] - bbox.lo[d]) / h).ceil() as usize + 1);
        let mut count = 0usize;
        for i in 0..n[0] {
            for j in 0..n[1] {
                for k in 0..n[2] {
                    let p = [
                        bbox.lo[0] + (i as f64 + 0.5) * h,
                        bbox.lo[1] + (j as f64 + 0.5) * h,
                        bbox.lo[2] + (k as f64 + 0.5) * h,
                    ];
                    count += inside(&p) as usize;
                }
            }
        }
        count as f64 * h * h * h
    }

    #[test]
    fn rotation_is_orthonormal() {
        let r = rotation(0.3, -0.7, 1.1);
        for a in 0..3 {
            for b in 0..3 {
                let d: f64 = (0..3).map(|k| r[k][a] * r[k][b]).sum();
                approx::assert_abs_diff_eq!(d, if a == b { 1.0 } else { 0.0 }, epsilon = 1e-12);
            }
        }
    }

    #[test]
    fn plain_ellipsoid_volume_matches_formula() {
        // Ellipsoid volume (4/3)·π·a·b·c (textbook formula). A 1-mm lattice over a body of
        // 60×40×30 mm semi-axes errs by well under 1 % (surface/volume ratio × 0.5 mm).
        let b = Blob::new([3.0, -2.0, 5.0], rotation(0.4, 0.2, -0.5), [60.0, 40.0, 30.0], 0.0, 0.0, Wobble::default());
        let v = lattice_volume(b.bbox, 1.0, |p| b.level(p) < 1.0);
        let expect = 4.0 / 3.0 * std::f64::consts::PI * 60.0 * 40.0 * 30.0;
        assert!(approx::abs_diff_eq!(v / expect, 1.0, epsilon = 0.01), "{v} vs {expect}");
        approx::assert_abs_diff_eq!(b.volume_mm3() / expect, 1.0, epsilon = 1e-12);
    }

    #[test]
    fn bent_tapered_blob_volume_matches_formula() {
        // The shear keeps volume (Jacobian 1); the taper gives (4/3)πabc(1 + τ²/5) (derived in
        // the Blob doc by integrating cross-sections).
        let b = Blob::new([0.0; 3], rotation(0.0, 0.3, 0.2), [50.0, 30.0, 25.0], 0.25, 0.5, Wobble::default());
        let v = lattice_volume(b.bbox, 1.0, |p| b.level(p) < 1.0);
        let expect = 4.0 / 3.0 * std::f64::consts::PI * 50.0 * 30.0 * 25.0 * (1.0 + 0.25 / 5.0);
        assert!(approx::abs_diff_eq!(v / expect, 1.0, epsilon = 0.01), "{v} vs {expect}");
    }

    #[test]
    fn wobble_changes_volume_only_at_second_order() {
        // With coefficients ≤ 0.05 the volume stays within a few % of the unperturbed one:
        // V = (abc/3)∮(1+g)³ dΩ = V₀(1 + 3⟨g²⟩ + ⟨g³⟩) as ⟨g⟩ = 0.
        let w = Wobble { lin: [0.05, -0.04, 0.03], sq: [0.05, -0.03, -0.02], off: [0.04, 0.0, -0.05], cubic: 0.05 };
        let b = Blob::new([0.0; 3], rotation(0.0, 0.0, 0.0), [40.0, 30.0, 30.0], 0.0, 0.0, w);
        let v = lattice_volume(b.bbox, 1.0, |p| b.level(p) < 1.0);
        let v0 = b.volume_mm3();
        assert!(approx::abs_diff_eq!(v / v0, 1.0, epsilon = 0.03), "{v} vs {v0}");
        // and the bounding box really bounds the shape: nothing inside on its faces
        let bb = b.bbox;
        for t in 0..=100 {
            let s = t as f64 / 100.0;
            for p in [
                [bb.lo[0], bb.lo[1] + s * (bb.hi[1] - bb.lo[1]), 0.0],
                [bb.hi[0], 0.0, bb.lo[2] + s * (bb.hi[2] - bb.lo[2])],
                [0.0, bb.hi[1], bb.lo[2] + s * (bb.hi[2] - bb.lo[2])],
            ] {
                assert!(b.level(&p) >= 1.0);
            }
        }
    }

    #[test]
    fn straight_tube_volume_is_cylinder_plus_caps() {
        // Capsule volume π r² L + (4/3) π r³ (cylinder plus two half-balls; textbook formulas).
        let mut t = Tube::default();
        t.add_polyline(&subdivide(&[[0.0, 0.0, -50.0], [0.0, 0.0, 50.0]], 20.0), |_| 12.0, |_| 0.0);
        assert_eq!(t.segments.len(), 5);
        let v = lattice_volume(t.bbox.unwrap(), 1.0, |p| t.inside(p).is_some());
        let pi = std::f64::consts::PI;
        let expect = pi * 144.0 * 100.0 + 4.0 / 3.0 * pi * 1728.0;
        assert!(approx::abs_diff_eq!(v / expect, 1.0, epsilon = 0.01), "{v} vs {expect}");
        approx::assert_abs_diff_eq!(t.volume_mm3(), pi * 144.0 * 100.0, epsilon = 1e-6);
        let hit = t.inside(&[5.0, 0.0, 10.0]).unwrap();
        approx::assert_abs_diff_eq!(hit.depth, 7.0, epsilon = 1e-12);
        assert_eq!(hit.axis, [0.0, 0.0, 10.0]);
    }
}
