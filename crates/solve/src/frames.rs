//! Scans in different world frames: body masks, their centres and principal axes, the
//! overlap of two bodies, and the initial alignment found from them.
//!
//! Two scans of different people, scan dates or scanners rarely share one world frame: the
//! same anatomy may sit hundreds of mm apart, with the voxel axes flipped. Everything here
//! works on each scan's OWN grid, before anything is resampled onto the other's field of
//! view (resampling first would cut away whatever lies outside it).
//!
//! **Body mask.** Voxels above a threshold found by Otsu's method ("A threshold selection
//! method from gray-level histograms", IEEE Trans. Systems, Man, and Cybernetics 1979) on a
//! 256-bin histogram of the finite values: the threshold `t` maximises the between-class
//! variance `w₀(t)·w₁(t)·(μ₀(t) − μ₁(t))²`. When more than 60 % of the voxels lie above it
//! and the lower class is padding — at least half of it holds the one smallest value, as the
//! constant written outside a scanner's field of view does — the threshold is searched again
//! among the values above it, once. (Without the padding test, a body filling most of a tight
//! field of view lost its soft tissue: the second search split it from the bone. Measured on
//! a demo subject, seed 1001 subject 2: a 302 ml "body" of spine against 14.3 l.)
//!
//! **Moments** (world mm, each voxel weighing its volume): centre `c = mean(x)`, covariance
//! `Σ = mean((x − c)(x − c)ᵀ)`; the principal axes are the eigenvectors of `Σ` (Jacobi
//! rotations), largest variance first, and the extents the square roots of the eigenvalues.
//!
//! **Overlap** of the bodies under a map `A` (fixed world → moving world): the overlap
//! coefficient `|F ∩ A⁻¹(M)| / min(|F|, |M|)` in mm³, counted on the fixed grid (a fixed body
//! voxel `x` is in the intersection when `A·x` falls in a moving body voxel, nearest voxel).
//! It is 1 when the smaller body lies inside the larger one, so scans with different fields
//! of view can still score 1.
//!
//! **Initial alignment** `T₀`: the translation of the body centres, `T₀·x = x + c_m − c_f`,
//! or with [`InitialMode::Axes`] also the rotation between the principal axes,
//! `T₀·x = R·(x − c_f) + c_m` with `R = E_m·S·E_fᵀ` (`E` the axes as columns, `S` the sign
//! choice with `det R = 1` closest to the identity, largest trace).

use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sinew_grid::{Affine, Image};

/// When the initial alignment is applied.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum InitialMode {
    /// When the scans' frames disagree: the bodies overlap by less than
    /// [`AUTO_MIN_OVERLAP`] or their centres lie more than [`AUTO_MAX_SHIFT_MM`] apart.
    #[default]
    Auto,
    /// Always: the translation of the body centres.
    Centres,
    /// Always: the body centres and the rotation between the principal axes.
    Axes,
    /// Never: the world frames are trusted as they are (and the body-moments start,
    /// `AffineMode::Body`, is off too).
    Off,
}

/// With [`InitialMode::Auto`], the alignment is applied below this body overlap.
pub const AUTO_MIN_OVERLAP: f64 = 0.7;
/// With [`InitialMode::Auto`], the alignment is applied when the body centres lie further
/// apart than this (mm).
pub const AUTO_MAX_SHIFT_MM: f64 = 30.0;
/// Below this overlap after alignment, a warning is due: the scans may not show the same
/// part of the body.
pub const WARN_OVERLAP: f64 = 0.5;

/// A body mask's size, centre and principal axes (world mm).
#[derive(Clone, Debug, Serialize)]
pub struct BodyMoments {
    /// The intensity threshold of the mask.
    pub threshold: f32,
    /// Voxels in the mask.
    pub voxels: usize,
    /// Volume of the mask in ml.
    pub volume_ml: f64,
    /// Centre `c` (world mm).
    pub centre_mm: [f64; 3],
    /// Principal axes (unit vectors in world space), largest variance first.
    pub axes: [[f64; 3]; 3],
    /// Standard deviation of the body along each axis (mm).
    pub extents_mm: [f64; 3],
}

/// The initial alignment between two scans and how well their bodies overlap.
#[derive(Clone, Debug, Serialize)]
pub struct InitialAlignment {
    /// The mode asked for.
    pub mode: InitialMode,
    /// Whether the alignment was applied (else the world frames are used as they are).
    pub applied: bool,
    /// Why (for the report).
    pub reason: String,
    /// The fixed scan's body.
    pub fixed_body: BodyMoments,
    /// The moving scan's body.
    pub moving_body: BodyMoments,
    /// `T₀` (4×4, world mm): fixed point `x` ↦ moving point `T₀·x`; the identity when not applied.
    pub matrix: [[f64; 4]; 4],
    /// Translation of the body centres `c_m − c_f` (mm).
    pub centre_shift_mm: [f64; 3],
    /// Rotation angle of `T₀` (degrees; 0 unless [`InitialMode::Axes`]).
    pub rotation_deg: f64,
    /// Body overlap with the world frames as they are.
    pub overlap_identity: f64,
    /// Body overlap under `T₀`.
    pub overlap_initial: f64,
    /// Body overlap under the whole linear map (initial and rigid/affine stage); filled by
    /// the caller that runs that stage.
    pub overlap_final: Option<f64>,
}

impl InitialAlignment {
    /// `T₀` as an [`Affine`].
    pub fn affine(&self) -> Affine {
        Affine::from_4x4(self.matrix)
    }
}

/// The Otsu threshold of the finite values (see the module docs), refined once when the
/// upper class holds more than 60 % of the voxels.
pub fn body_threshold(img: &Image) -> f32 {
    let vals = img.as_slice();
    let t = otsu(vals, f32::NEG_INFINITY);
    let above = vals.iter().filter(|&&v| v > t).count();
    if above as f64 > 0.6 * vals.len() as f64 && lower_class_is_padding(vals, t) {
        otsu(vals, t)
    } else {
        t
    }
}

/// True when at least half of the finite values `≤ t` equal their minimum: a constant pad.
fn lower_class_is_padding(vals: &[f32], t: f32) -> bool {
    let lo = vals.iter().copied().filter(|v| v.is_finite()).fold(f32::INFINITY, f32::min);
    let (mut below, mut at_min) = (0usize, 0usize);
    for &v in vals.iter().filter(|v| v.is_finite() && **v <= t) {
        below += 1;
        at_min += usize::from(v == lo);
    }
    below > 0 && 2 * at_min >= below
}

/// Otsu's threshold over the finite values above `floor` (256 bins between their min and max).
fn otsu(vals: &[f32], floor: f32) -> f32 {
    let (mut lo, mut hi) = (f32::INFINITY, f32::NEG_INFINITY);
    for &v in vals {
        if v.is_finite() && v > floor {
            lo = lo.min(v);
            hi = hi.max(v);
        }
    }
    if lo >= hi || !lo.is_finite() {
        return if lo.is_finite() { lo } else { floor };
    }
    const BINS: usize = 256;
    let width = (hi - lo) as f64 / BINS as f64;
    let mut hist = [0u64; BINS];
    for &v in vals {
        if v.is_finite() && v > floor {
            hist[(((v - lo) as f64 / width) as usize).min(BINS - 1)] += 1;
        }
    }
    let total: u64 = hist.iter().sum();
    let sum_all: f64 = hist.iter().enumerate().map(|(b, &h)| b as f64 * h as f64).sum();
    let (mut w0, mut s0) = (0u64, 0.0f64);
    let (mut best, mut best_b) = (-1.0f64, 0usize);
    for (b, &h) in hist.iter().enumerate().take(BINS - 1) {
        w0 += h;
        s0 += b as f64 * h as f64;
        let w1 = total - w0;
        if w0 == 0 || w1 == 0 {
            continue;
        }
        let (m0, m1) = (s0 / w0 as f64, (sum_all - s0) / w1 as f64);
        let between = w0 as f64 * w1 as f64 * (m0 - m1) * (m0 - m1);
        if between > best {
            best = between;
            best_b = b;
        }
    }
    lo + ((best_b + 1) as f64 * width) as f32
}

/// The body mask (voxels above [`body_threshold`]) and its threshold.
pub fn body_mask(img: &Image) -> (Vec<bool>, f32) {
    let t = body_threshold(img);
    (img.as_slice().iter().map(|&v| v > t).collect(), t)
}

/// The body mask of `img` ([`body_mask`]) and its moments ([`body_moments`]).
pub fn body(img: &Image) -> (Vec<bool>, BodyMoments) {
    let (mask, t) = body_mask(img);
    let moments = body_moments(img, &mask, t);
    (mask, moments)
}

/// Centre, principal axes and extents of a mask on `img`'s grid (see the module docs). An
/// empty mask gives the grid's centre and its axes.
pub fn body_moments(img: &Image, mask: &[bool], threshold: f32) -> BodyMoments {
    let g = &img.grid;
    let [_, ny, nz] = g.shape();
    let (mut n, mut s1, mut s2) = (0usize, [0.0f64; 3], [[0.0f64; 3]; 3]);
    for (idx, _) in mask.iter().enumerate().filter(|(_, &m)| m) {
        let w = g.voxel_to_world([(idx / (ny * nz)) as f64, ((idx / nz) % ny) as f64, (idx % nz) as f64]);
        n += 1;
        for r in 0..3 {
            s1[r] += w[r];
            for c in 0..3 {
                s2[r][c] += w[r] * w[c];
            }
        }
    }
    let voxel_ml = g.affine().determinant().abs() / 1000.0;
    if n == 0 {
        let centre = g.voxel_to_world(g.shape().map(|s| (s as f64 - 1.0) / 2.0));
        return BodyMoments {
            threshold,
            voxels: 0,
            volume_ml: 0.0,
            centre_mm: centre,
            axes: [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]],
            extents_mm: [0.0; 3],
        };
    }
    let nf = n as f64;
    let c = s1.map(|v| v / nf);
    let cov: [[f64; 3]; 3] = std::array::from_fn(|r| std::array::from_fn(|k| s2[r][k] / nf - c[r] * c[k]));
    let (vals, vecs) = symmetric_eigen(cov);
    BodyMoments {
        threshold,
        voxels: n,
        volume_ml: nf * voxel_ml,
        centre_mm: c,
        axes: vecs,
        extents_mm: vals.map(|v| v.max(0.0).sqrt()),
    }
}

/// For each world axis `d`: whether the mask reaches both faces of the grid along the grid
/// axis whose direction is closest to `d` (the body is cut by the field of view there, so
/// its extent and centre along `d` are the field of view's, not the body's).
pub fn cut_world_axes(img: &Image, mask: &[bool]) -> [bool; 3] {
    let [nx, ny, nz] = img.grid.shape();
    let n = [nx, ny, nz];
    // Along each grid axis: does any masked voxel lie in the first / last slice?
    let mut first = [false; 3];
    let mut last = [false; 3];
    for (idx, _) in mask.iter().enumerate().filter(|(_, &m)| m) {
        let ijk = [idx / (ny * nz), (idx / nz) % ny, idx % nz];
        for a in 0..3 {
            first[a] |= ijk[a] == 0;
            last[a] |= ijk[a] + 1 == n[a];
        }
    }
    let lin = img.grid.affine().linear();
    std::array::from_fn(|d| {
        // The grid axis with the largest direction component along world axis d.
        let a = (0..3)
            .max_by(|&p, &q| (lin[d][p] / norm_col(&lin, p)).abs().total_cmp(&(lin[d][q] / norm_col(&lin, q)).abs()))
            .expect("three axes");
        first[a] && last[a]
    })
}

fn norm_col(lin: &[[f64; 3]; 3], c: usize) -> f64 {
    (0..3).map(|r| lin[r][c] * lin[r][c]).sum::<f64>().sqrt()
}

/// Eigenvalues (descending) and unit eigenvectors (rows) of a symmetric 3×3 matrix, by cyclic
/// Jacobi rotations ("a standard method", e.g. Golub & Van Loan's textbook treatment).
pub fn symmetric_eigen(m: [[f64; 3]; 3]) -> ([f64; 3], [[f64; 3]; 3]) {
    let mut a = m;
    let mut v = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]; // columns are eigenvectors
    for _ in 0..50 {
        let off = a[0][1].powi(2) + a[0][2].powi(2) + a[1][2].powi(2);
        let scale = (0..3).map(|i| a[i][i].powi(2)).sum::<f64>();
        if off <= 1e-24 * scale.max(1e-300) {
            break;
        }
        for (p, q) in [(0, 1), (0, 2), (1, 2)] {
            if a[p][q].abs() < 1e-300 {
                continue;
            }
            let theta = (a[q][q] - a[p][p]) / (2.0 * a[p][q]);
            let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
            let t = if theta == 0.0 { 1.0 } else { t };
            let (cs, sn) = (1.0 / (t * t + 1.0).sqrt(), t / (t * t + 1.0).sqrt());
            // a ← Jᵀ·a·J with J the rotation in the (p, q) plane.
            for row in a.iter_mut() {
                let (akp, akq) = (row[p], row[q]);
                row[p] = cs * akp - sn * akq;
                row[q] = sn * akp + cs * akq;
            }
            let (rp, rq) = (a[p], a[q]);
            for k in 0..3 {
                a[p][k] = cs * rp[k] - sn * rq[k];
                a[q][k] = sn * rp[k] + cs * rq[k];
            }
            for row in v.iter_mut() {
                let (vp, vq) = (row[p], row[q]);
                row[p] = cs * vp - sn * vq;
                row[q] = sn * vp + cs * vq;
            }
        }
    }
    let mut order = [0usize, 1, 2];
    order.sort_by(|&x, &y| a[y][y].partial_cmp(&a[x][x]).unwrap_or(std::cmp::Ordering::Equal));
    let vals = order.map(|i| a[i][i]);
    let vecs = order.map(|i| [v[0][i], v[1][i], v[2][i]]);
    (vals, vecs)
}

/// The rotation `R = E_m·S·E_fᵀ` between two sets of principal axes (rows), with the sign
/// choice `S` (det R = +1) that is closest to the identity.
fn axes_rotation(fixed: &[[f64; 3]; 3], moving: &[[f64; 3]; 3]) -> [[f64; 3]; 3] {
    let mut best = ([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]], f64::NEG_INFINITY);
    for signs in 0..8u32 {
        let s: [f64; 3] = std::array::from_fn(|d| if signs >> d & 1 == 1 { -1.0 } else { 1.0 });
        let r: [[f64; 3]; 3] =
            std::array::from_fn(|i| std::array::from_fn(|j| (0..3).map(|a| moving[a][i] * s[a] * fixed[a][j]).sum()));
        if sinew_grid::det3(&r) < 0.0 {
            continue;
        }
        let tr = r[0][0] + r[1][1] + r[2][2];
        if tr > best.1 {
            best = (r, tr);
        }
    }
    best.0
}

/// The overlap coefficient of the two bodies under `a` (fixed world → moving world), see the
/// module docs.
pub fn overlap(fixed: &Image, fixed_mask: &[bool], moving: &Image, moving_mask: &[bool], a: &Affine) -> f64 {
    let fg = &fixed.grid;
    let mg = &moving.grid;
    let [_, ny, nz] = fg.shape();
    let ms = mg.shape();
    let to_moving = mg.inverse_affine().compose(&a.compose(fg.affine()));
    // Counted slab by slab along i (a count: the same whatever the order).
    let inter: usize = fixed_mask
        .par_chunks((ny * nz).max(1))
        .enumerate()
        .map(|(i, slab)| {
            let mut inter = 0usize;
            for (jk, _) in slab.iter().enumerate().filter(|(_, &m)| m) {
                let p = to_moving.apply([i as f64, (jk / nz) as f64, (jk % nz) as f64]);
                let q: [f64; 3] = p.map(round_f64);
                if (0..3).all(|d| q[d] >= 0.0 && q[d] <= (ms[d] - 1) as f64) {
                    let n = (q[0] as usize * ms[1] + q[1] as usize) * ms[2] + q[2] as usize;
                    inter += usize::from(moving_mask[n]);
                }
            }
            inter
        })
        .sum();
    let fv = fg.affine().determinant().abs();
    let mv = mg.affine().determinant().abs();
    let f_count = fixed_mask.iter().filter(|&&m| m).count() as f64 * fv;
    let m_count = moving_mask.iter().filter(|&&m| m).count() as f64 * mv;
    let denom = f_count.min(m_count);
    if denom > 0.0 {
        (inter as f64 * fv / denom).min(1.0)
    } else {
        0.0
    }
}

/// `x.round()` (half away from zero), bit for bit, without the libm call it becomes on
/// x86-64 without SSE4.1: for `|x| < 2⁵²` the truncation `t` and the remainder `x − t` are
/// exact, the result is `t ± 1` when `|x − t| ≥ 1/2`, else `t`, with the sign of `x`. Larger
/// magnitudes (already integers), infinities and NaN go to `f64::round`.
#[inline(always)]
fn round_f64(x: f64) -> f64 {
    if x.abs() < 4_503_599_627_370_496.0 {
        let t = x as i64 as f64;
        (if (x - t).abs() >= 0.5 { t + 1.0f64.copysign(x) } else { t }).copysign(x)
    } else {
        x.round()
    }
}

/// Bodies, overlap and the initial alignment of `moving` to `fixed`, each on its own grid
/// (see the module docs). Returns the alignment and both body masks.
pub fn initial_alignment(fixed: &Image, moving: &Image, mode: InitialMode) -> (InitialAlignment, Vec<bool>, Vec<bool>) {
    let ((fm, fb), (mm, mb)) = rayon::join(|| body(fixed), || body(moving));
    let shift: [f64; 3] = std::array::from_fn(|d| mb.centre_mm[d] - fb.centre_mm[d]);
    let dist = shift.iter().map(|v| v * v).sum::<f64>().sqrt();
    let overlap_identity = overlap(fixed, &fm, moving, &mm, &Affine::IDENTITY);
    let (applied, reason) = match mode {
        InitialMode::Off => (false, "off: world frames used as they are".to_string()),
        InitialMode::Centres | InitialMode::Axes => (true, "asked for".to_string()),
        InitialMode::Auto => {
            if overlap_identity < AUTO_MIN_OVERLAP {
                (true, format!("bodies overlap {overlap_identity:.2} < {AUTO_MIN_OVERLAP} in the world frames"))
            } else if dist > AUTO_MAX_SHIFT_MM {
                (true, format!("body centres {dist:.1} mm apart > {AUTO_MAX_SHIFT_MM} mm"))
            } else {
                (false, format!("world frames agree (overlap {overlap_identity:.2}, centres {dist:.1} mm apart)"))
            }
        }
    };
    let (matrix, rotation_deg) = if !applied {
        (Affine::IDENTITY, 0.0)
    } else if mode == InitialMode::Axes {
        let r = axes_rotation(&fb.axes, &mb.axes);
        let c = fb.centre_mm;
        let off: [f64; 3] = std::array::from_fn(|i| mb.centre_mm[i] - (0..3).map(|k| r[i][k] * c[k]).sum::<f64>());
        let cos = ((r[0][0] + r[1][1] + r[2][2] - 1.0) / 2.0).clamp(-1.0, 1.0);
        (Affine::from_parts(r, off), cos.acos().to_degrees())
    } else {
        (Affine::from_parts([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]], shift), 0.0)
    };
    let overlap_initial = if applied { overlap(fixed, &fm, moving, &mm, &matrix) } else { overlap_identity };
    let init = InitialAlignment {
        mode,
        applied,
        reason,
        fixed_body: fb,
        moving_body: mb,
        matrix: matrix.to_4x4(),
        centre_shift_mm: shift,
        rotation_deg,
        overlap_identity,
        overlap_initial,
        overlap_final: None,
    };
    (init, fm, mm)
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    /// An ellipsoid of half-axes (40, 25, 15) mm, value 100 on 0, centred at `c` (world mm).
    fn ellipsoid(grid: Grid, c: [f64; 3]) -> Image {
        let mut img = Image::filled(grid.clone(), 0.0);
        for ((i, j, k), v) in img.data.indexed_iter_mut() {
            let w = grid.voxel_to_world([i as f64, j as f64, k as f64]);
            let q = (w[0] - c[0]).powi(2) / 1600.0 + (w[1] - c[1]).powi(2) / 625.0 + (w[2] - c[2]).powi(2) / 225.0;
            if q <= 1.0 {
                *v = 100.0;
            }
        }
        img
    }

    #[test]
    fn round_f64_agrees_with_f64_round_bit_for_bit() {
        // The reference is f64::round (IEEE 754 roundToIntegralTiesToAway): a fine ramp, the
        // neighbours of integers and half-integers up to 2^53, signed zeros, huge values.
        let mut xs: Vec<f64> = (-(64 << 8)..=(64 << 8)).map(|n| n as f64 / 256.0).collect();
        for e in 0..54 {
            let v = (1u64 << e) as f64;
            for base in [v, v + 0.5, v - 0.5, 0.5 * v] {
                let (up, down) = (f64::from_bits(base.to_bits() + 1), f64::from_bits(base.to_bits() - 1));
                xs.extend([base, up, down, -base, -up, -down]);
            }
        }
        xs.extend([0.0, -0.0, 0.49999999999999994, -0.49999999999999994, f64::MAX, f64::MIN, f64::INFINITY]);
        for x in xs {
            assert_eq!(round_f64(x).to_bits(), x.round().to_bits(), "round({x:e})");
        }
        assert!(round_f64(f64::NAN).is_nan());
    }

    #[test]
    fn moments_of_an_ellipsoid_match_the_closed_form() {
        // A solid ellipsoid of half-axis a has variance a²/5 along it (exact maths fact).
        let g = Grid::axis_aligned([60, 40, 30], [2.0; 3], [-60.0, -40.0, -30.0]);
        let img = ellipsoid(g, [0.0, 0.0, 0.0]);
        let (m, t) = body_mask(&img);
        assert!(t > 0.0 && t < 100.0);
        let b = body_moments(&img, &m, t);
        for (d, a) in [40.0f64, 25.0, 15.0].iter().enumerate() {
            assert!(approx::abs_diff_eq!(b.extents_mm[d], a / 5f64.sqrt(), epsilon = 0.4), "{:?}", b.extents_mm);
            assert!(b.axes[d][d].abs() > 0.999);
            assert!(b.centre_mm[d].abs() < 1.0 + 1e-9);
        }
        // Ellipsoid volume 4/3·π·abc (exact) in ml.
        let v = 4.0 / 3.0 * std::f64::consts::PI * 40.0 * 25.0 * 15.0 / 1000.0;
        approx::assert_abs_diff_eq!(b.volume_ml / v, 1.0, epsilon = 0.05);
    }

    #[test]
    fn frames_apart_are_detected_and_aligned_by_the_centres() {
        let gf = Grid::axis_aligned([60, 40, 30], [2.0; 3], [-60.0, -40.0, -30.0]);
        // The moving scan: same body 177 mm away, voxel axes i and j flipped in its header.
        let shift = [140.0, -60.0, 90.0];
        let gm = Grid::new(
            [60, 40, 30],
            Affine::from_parts(
                [[-2.0, 0.0, 0.0], [0.0, -2.0, 0.0], [0.0, 0.0, 2.0]],
                [58.0 + 140.0, 38.0 - 60.0, -30.0 + 90.0],
            ),
        )
        .unwrap();
        let (f, m) = (ellipsoid(gf, [0.0; 3]), ellipsoid(gm, shift));
        let (a, _, _) = initial_alignment(&f, &m, InitialMode::Auto);
        assert!(a.applied && a.overlap_identity < 0.01, "{a:?}");
        for (got, want) in a.centre_shift_mm.iter().zip(shift) {
            assert!(approx::abs_diff_eq!(*got, want, epsilon = 1.0), "{:?}", a.centre_shift_mm);
        }
        assert!(a.overlap_initial > 0.95, "{}", a.overlap_initial);
        // With the axes too: the same bodies have the same axes, so no rotation.
        let (b, _, _) = initial_alignment(&f, &m, InitialMode::Axes);
        assert!(b.rotation_deg < 1.0, "{}", b.rotation_deg);
        // Same frame: nothing to do.
        let (c, _, _) = initial_alignment(&f, &f, InitialMode::Auto);
        assert!(!c.applied);
        approx::assert_abs_diff_eq!(c.overlap_identity, 1.0, epsilon = 1e-12);
    }

    #[test]
    fn a_body_filling_the_field_of_view_keeps_its_soft_tissue() {
        // Three classes as in a tight abdominal CT: air −1000 HU (with noise, 20 % of the
        // voxels), soft tissue 40 HU (70 %), bone 700 HU (10 %). Otsu's first split is air
        // against the rest, with 80 % above it; the air is not a constant pad, so no second
        // search: the body is tissue and bone (the second search would keep bone alone).
        let g = Grid::axis_aligned([100, 10, 10], [1.0; 3], [0.0; 3]);
        let mut img = Image::filled(g, 0.0);
        for ((i, j, k), v) in img.data.indexed_iter_mut() {
            let noise = ((i * 7 + j * 13 + k * 29) % 21) as f32 - 10.0;
            *v = match i {
                0..=19 => -1000.0 + noise,
                20..=89 => 40.0 + noise,
                _ => 700.0 + noise,
            };
        }
        let t = body_threshold(&img);
        assert!((-990.0..30.0).contains(&t), "air | tissue split expected, got {t}");
        // The same body with the air replaced by one constant pad value: the lower class is
        // padding, the second search runs, and splits tissue from bone as before the fix.
        img.data.indexed_iter_mut().filter(|((i, _, _), _)| *i < 20).for_each(|(_, v)| *v = -3024.0);
        let t = body_threshold(&img);
        assert!((50.0..690.0).contains(&t), "padding → second search, got {t}");
    }

    #[test]
    fn a_body_cut_by_the_field_of_view_is_cut_along_that_axis_only() {
        // The ellipsoid fits inside along x and y; a slab through the whole grid along z.
        let g = Grid::axis_aligned([60, 40, 30], [2.0; 3], [-60.0, -40.0, -30.0]);
        let img = ellipsoid(g.clone(), [0.0; 3]);
        let (m, _) = body_mask(&img);
        assert_eq!(cut_world_axes(&img, &m), [false, false, false]);
        let mut slab = img.clone();
        slab.data
            .indexed_iter_mut()
            .for_each(|((i, j, _), v)| *v = if (20..40).contains(&i) && (10..30).contains(&j) { 100.0 } else { 0.0 });
        let (m, _) = body_mask(&slab);
        assert_eq!(cut_world_axes(&slab, &m), [false, false, true]);
        // Voxel axes permuted in the header (i runs along world z): the cut follows the world axis.
        let g2 = Grid::new(
            [30, 40, 60],
            Affine::from_parts([[0.0, 0.0, 2.0], [0.0, 2.0, 0.0], [2.0, 0.0, 0.0]], [-60.0, -40.0, -30.0]),
        )
        .unwrap();
        let mut p = Image::filled(g2, 0.0);
        p.data
            .indexed_iter_mut()
            .for_each(|((_, j, k), v)| *v = if (20..40).contains(&k) && (10..30).contains(&j) { 100.0 } else { 0.0 });
        let (m, _) = body_mask(&p);
        assert_eq!(cut_world_axes(&p, &m), [false, false, true]);
    }

    #[test]
    fn jacobi_eigen_of_a_rotated_diagonal_matrix() {
        // R·diag(9, 4, 1)·Rᵀ has eigenvalues 9, 4, 1 and eigenvectors the columns of R.
        let (s, c) = (0.6f64, 0.8f64);
        let r = [[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]];
        let d = [9.0, 4.0, 1.0];
        let m: [[f64; 3]; 3] =
            std::array::from_fn(|i| std::array::from_fn(|j| (0..3).map(|k| r[i][k] * d[k] * r[j][k]).sum()));
        let (vals, vecs) = symmetric_eigen(m);
        for k in 0..3 {
            approx::assert_abs_diff_eq!(vals[k], d[k], epsilon = 1e-10);
            let dot: f64 = (0..3).map(|i| vecs[k][i] * r[i][k]).sum();
            approx::assert_abs_diff_eq!(dot.abs(), 1.0, epsilon = 1e-10);
        }
    }
}
