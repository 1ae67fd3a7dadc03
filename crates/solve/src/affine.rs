//! The linear stage: a rigid (6 parameters) or affine (12 parameters) map between two scans,
//! found on a coarse pyramid before the deformable stage.
//!
//! **Map.** The result is a 4×4 matrix `A` in world mm such that a fixed-scan point `x` lies
//! on the moving-scan point `A·x` (the pull convention of the fields). It is parametrised
//! about the fixed scan's centre of mass `c`:
//! ```text
//! A·x = L·(x − c) + c + t
//! rigid:  L = R_z(γ)·R_y(β)·R_x(α)     θ = (ρ·α, ρ·β, ρ·γ, t)        (angles in radians)
//! affine: L = I + Q                    θ = (ρ·Q_00, ρ·Q_01, …, ρ·Q_22, t)
//! ```
//! with `ρ` = [`LEVER_MM`], so every parameter is roughly "mm of motion" and one step size
//! fits all of them.
//!
//! **Initialisation** by the centres of mass: `t₀ = c_moving − c_fixed`, `L₀ = I`. Each
//! centre is intensity-weighted over the voxels brighter than the image's mean, with weight
//! `v − mean` (for CT: the body, not the air around it).
//!
//! **Objective** per level: MIND-SSC descriptors of both scans ("MIND: modality independent
//! neighbourhood descriptor for multi-modal deformable registration", Medical Image
//! Analysis 2012; the SSC variant, MICCAI 2013) compared by their mean squared difference:
//! ```text
//! E(A) = 1/(N·C) · Σ_x Σ_c ( M_c(p(x)) − F_c(x) )²,    p(x) = G_m⁻¹·A·G_f·x
//! ∂E/∂t   = Σ_x g(x)                                   g = G_m⁻ᵀ · 2/(N·C) · Σ_c r_c·∇M_c(p)
//! ∂E/∂L   = Σ_x g(x) ⊗ (G_f·x − c)
//! ```
//! (the sums over the fixed voxels compared: every `s`-th along each axis on levels with
//! more than [`AffineParams::max_points`] voxels, `N` their number; `G_f`, `G_m` the
//! voxel-to-world maps of the level, `∇M` the exact derivative of the
//! trilinear interpolant, zero across the border where samples are clamped: the exact slope
//! of [`sinew_grid::interp`]), chained to θ.
//! Adam ("Adam: A Method for Stochastic Optimization", ICLR 2015) runs on every level from
//! [`AffineParams::coarsest_mm`] down to [`AffineParams::finest_mm`], step size decaying
//! linearly to a tenth, keeping the best θ seen; on every level after the first, L-BFGS
//! (through argmin) polishes Adam's best. Measured on a demo subject: stopping at 4 mm left
//! a 2 mm bias (affine) that the 2 mm level removes.

use std::time::Instant;

use rayon::prelude::*;
use serde::Serialize;
use sinew_features::{mind_ssc, Descriptor, MindParams};
use sinew_grid::{pyramid, resample, Affine, Grid, Image, LabelMap};

use crate::adam::Adam;
use crate::{AffineMode, SolveError};

/// Lever arm ρ (mm) that turns rotations and linear coefficients into mm-sized parameters.
pub const LEVER_MM: f64 = 100.0;

/// Settings of the linear stage.
#[derive(Clone, Debug, PartialEq)]
pub struct AffineParams {
    /// Rigid or affine (with [`AffineMode::None`], [`estimate`] returns the identity).
    pub mode: AffineMode,
    /// The coarsest level used: the first pyramid level whose smallest spacing reaches this (mm).
    pub coarsest_mm: f64,
    /// The finest level used: levels finer than this (mm) are skipped.
    pub finest_mm: f64,
    /// Adam iterations per level, coarsest first (the last value repeats).
    pub iterations: Vec<usize>,
    /// Initial Adam step size per level (mm of motion per iteration), coarsest first.
    pub step_mm: Vec<f64>,
    /// MIND-SSC settings (voxels of each level).
    pub mind: MindParams,
    /// Most fixed voxels compared per level: a level with more compares every `s`-th voxel
    /// along each axis, `s` the smallest integer with `N / s³ ≤ max_points` (the moving
    /// descriptors are still sampled at the level's full resolution). Default: no limit
    /// (every voxel). Measured: 400 k (every 2nd voxel of a 144×112×192 grid at 2 mm) cuts the
    /// stage's CPU time from about 28 to 7.9 s per pair, but the rigid stage that follows the
    /// initial alignment then lowered three held-out demo pairs (−0.0075, −0.0007, −0.0005
    /// Dice); 100 k rotated a thick-slice real CT moved into another frame by 12° (6.0 mm mean
    /// endpoint error against 1.13 mm).
    pub max_points: usize,
    /// Adam's step falls linearly over a level's iterations, from `step_mm` at the first to
    /// `(1 − step_decay)·step_mm` at the last: `lr_t = lr₀·(1 − step_decay·t / iterations)`.
    pub step_decay: f64,
    /// Early stop of a level's Adam iterations: an energy `E` counts as an improvement when
    /// `E < (1 − tolerance)·E_best` (relative) ...
    pub tolerance: f64,
    /// ... and the level stops when `patience` iterations in a row bring none.
    pub patience: usize,
    /// Iterations of the L-BFGS polish after Adam on every level but the coarsest (0 = none).
    pub polish_iterations: usize,
    /// Gradient-norm tolerance of the L-BFGS polish ([`crate::lbfgs::minimise`]).
    pub polish_tolerance: f64,
}

impl AffineParams {
    /// Levels at 8, 4 and 2 mm: Adam for 200, 100 and 20 iterations (steps 2, 0.5, 0.2 mm,
    /// each falling to a tenth over its level; a level stops after 25 iterations without a
    /// relative improvement of 10⁻⁶), then on the 4 and 2 mm levels an L-BFGS polish of at
    /// most 30 iterations (tolerance 10⁻⁹); every fixed voxel compared.
    pub fn new(mode: AffineMode) -> AffineParams {
        AffineParams {
            mode,
            coarsest_mm: 8.0,
            finest_mm: 2.0,
            iterations: vec![200, 100, 20],
            step_mm: vec![2.0, 0.5, 0.2],
            mind: MindParams::default(),
            max_points: usize::MAX,
            step_decay: 0.9,
            tolerance: 1e-6,
            patience: 25,
            polish_iterations: 30,
            polish_tolerance: 1e-9,
        }
    }
}

/// A pyramid level reaches a spacing `s` when its smallest spacing is at least `SPACING_SLACK·s`,
/// so that spacings rounded in a header still count: halving a 1.9999 mm grid twice gives
/// 7.9996 mm, which should count as the 8 mm level.
const SPACING_SLACK: f64 = 0.99;

/// At most this many halvings (a 0.5 mm scan reaches 32 mm).
const MAX_HALVINGS: usize = 6;

/// The pyramid halves only while every axis has at least this many voxels: on a smaller level
/// the voxels within the descriptors' reach of a face (MIND-SSC patch radius plus dilation,
/// 3 voxels by default) would be a large share of the level.
const MIN_LEVEL_VOXELS: usize = 16;

/// Adam is invariant to the gradient's scale except through its ε (10⁻⁸, [`Adam::new`]): the
/// gradient of the summed energy is multiplied by this before each step so that ε stays
/// negligible against it.
const ADAM_GRADIENT_SCALE: f64 = 1e3;

/// One optimised level of the linear stage.
#[derive(Clone, Debug, Serialize)]
pub struct AffineLevel {
    /// Voxel spacing of the level in mm.
    pub spacing_mm: [f64; 3],
    /// Iterations run.
    pub iterations: usize,
    /// Energy at the start and at the best θ of the level.
    pub energy_start: f64,
    /// Energy of the best θ.
    pub energy_end: f64,
}

/// The result of [`estimate`].
#[derive(Clone, Debug, Serialize)]
pub struct AffineEstimate {
    /// Rigid or affine.
    pub mode: AffineMode,
    /// `A` (4×4, world mm): fixed point `x` ↦ moving point `A·x`.
    pub matrix: [[f64; 4]; 4],
    /// The parameters in natural units: rigid = rotations α, β, γ about x, y, z in degrees
    /// then the translation `t` in mm; affine = the rows of `L` then `t` (mm).
    pub parameters: Vec<f64>,
    /// Centre `c` (fixed world mm) the map is parametrised about: the fixed centre of mass.
    pub centre_mm: [f64; 3],
    /// Translation of the centre-of-mass initialisation, mm.
    pub initial_translation_mm: [f64; 3],
    /// Per level, coarsest first.
    pub levels: Vec<AffineLevel>,
    /// Wall time in seconds.
    pub seconds: f64,
}

impl AffineEstimate {
    /// The map as an [`Affine`].
    pub fn affine(&self) -> Affine {
        Affine::from_4x4(self.matrix)
    }
}

/// Intensity-weighted centre of mass (world mm) over voxels brighter than the image mean,
/// weight `v − mean`; the grid centre when no voxel is brighter.
pub fn centre_of_mass(img: &Image) -> [f64; 3] {
    let s = img.as_slice();
    let mean = s.iter().map(|&v| v as f64).sum::<f64>() / s.len() as f64;
    let [_, ny, nz] = img.grid.shape();
    let (mut w, mut acc) = (0.0f64, [0.0f64; 3]);
    for (n, &v) in s.iter().enumerate() {
        let wv = v as f64 - mean;
        if wv > 0.0 {
            w += wv;
            acc[0] += wv * (n / (ny * nz)) as f64;
            acc[1] += wv * ((n / nz) % ny) as f64;
            acc[2] += wv * (n % nz) as f64;
        }
    }
    let p = if w > 0.0 { acc.map(|a| a / w) } else { img.grid.shape().map(|n| (n as f64 - 1.0) / 2.0) };
    img.grid.voxel_to_world(p)
}

/// The parameter model: θ ↦ `L`, and the chain rule from `∂E/∂L` to `∂E/∂θ`.
struct Model {
    mode: AffineMode,
    centre: [f64; 3],
}

fn rot(axis: usize, a: f64, derivative: bool) -> [[f64; 3]; 3] {
    let (s, c) = a.sin_cos();
    let (c1, s1, one) = if derivative { (-s, c, 0.0) } else { (c, s, 1.0) };
    match axis {
        0 => [[one, 0.0, 0.0], [0.0, c1, -s1], [0.0, s1, c1]],
        1 => [[c1, 0.0, s1], [0.0, one, 0.0], [-s1, 0.0, c1]],
        _ => [[c1, -s1, 0.0], [s1, c1, 0.0], [0.0, 0.0, one]],
    }
}

fn mat_mul(a: &[[f64; 3]; 3], b: &[[f64; 3]; 3]) -> [[f64; 3]; 3] {
    std::array::from_fn(|r| std::array::from_fn(|c| (0..3).map(|k| a[r][k] * b[k][c]).sum()))
}

impl Model {
    fn len(&self) -> usize {
        if self.mode == AffineMode::Rigid {
            6
        } else {
            12
        }
    }

    /// `L` and, for rigid, the three derivative matrices `∂L/∂angle`.
    fn linear(&self, th: &[f64]) -> ([[f64; 3]; 3], [[[f64; 3]; 3]; 3]) {
        if self.mode == AffineMode::Rigid {
            let a = [th[0] / LEVER_MM, th[1] / LEVER_MM, th[2] / LEVER_MM];
            let r = |d: usize, axis: usize| rot(axis, a[axis], d == axis);
            let l = mat_mul(&r(3, 2), &mat_mul(&r(3, 1), &r(3, 0)));
            let dl = std::array::from_fn(|d| mat_mul(&r(d, 2), &mat_mul(&r(d, 1), &r(d, 0))));
            (l, dl)
        } else {
            let l = std::array::from_fn(|r| std::array::from_fn(|c| th[3 * r + c] / LEVER_MM + f64::from(r == c)));
            (l, [[[0.0; 3]; 3]; 3])
        }
    }

    fn translation<'a>(&self, th: &'a [f64]) -> &'a [f64] {
        &th[self.len() - 3..]
    }

    fn matrix(&self, th: &[f64]) -> Affine {
        let (l, _) = self.linear(th);
        let t = self.translation(th);
        let c = self.centre;
        let off: [f64; 3] = std::array::from_fn(|r| c[r] + t[r] - (0..3).map(|k| l[r][k] * c[k]).sum::<f64>());
        Affine::from_parts(l, off)
    }

    /// `∂E/∂θ` from `∂E/∂L` and `∂E/∂t`.
    fn chain(&self, th: &[f64], g_l: &[[f64; 3]; 3], g_t: &[f64; 3], out: &mut [f64]) {
        let n = self.len();
        if self.mode == AffineMode::Rigid {
            let (_, dl) = self.linear(th);
            for a in 0..3 {
                out[a] = (0..9).map(|e| g_l[e / 3][e % 3] * dl[a][e / 3][e % 3]).sum::<f64>() / LEVER_MM;
            }
        } else {
            for e in 0..9 {
                out[e] = g_l[e / 3][e % 3] / LEVER_MM;
            }
        }
        out[n - 3..].copy_from_slice(g_t);
    }

    fn natural(&self, th: &[f64]) -> Vec<f64> {
        if self.mode == AffineMode::Rigid {
            let mut v: Vec<f64> = th[..3].iter().map(|a| (a / LEVER_MM).to_degrees()).collect();
            v.extend_from_slice(&th[3..]);
            v
        } else {
            let (l, _) = self.linear(th);
            let mut v: Vec<f64> = l.iter().flatten().copied().collect();
            v.extend_from_slice(&th[9..]);
            v
        }
    }
}

/// One level's descriptors and mask, the stride of the fixed voxels compared and their
/// number `N` (fixed for the level, so counted once).
struct Level {
    fixed: Descriptor,
    moving: Descriptor,
    mask: Option<Vec<bool>>,
    stride: usize,
    count: usize,
}

/// The smallest stride `s ≥ 1` with `Π_d ⌈n_d / s⌉ ≤ max_points`.
fn point_stride(shape: [usize; 3], max_points: usize) -> usize {
    let mut s = 1;
    while shape.iter().map(|&n| n.div_ceil(s)).product::<usize>() > max_points.max(1) {
        s += 1;
    }
    s
}

impl Level {
    /// A level comparing every `s`-th fixed voxel along each axis, `s` from
    /// [`point_stride`] (inside `mask` when given).
    fn new(fixed: Descriptor, moving: Descriptor, mask: Option<Vec<bool>>, max_points: usize) -> Level {
        let [nx, ny, nz] = fixed.grid.shape();
        let s = point_stride([nx, ny, nz], max_points);
        let count = (0..nx)
            .step_by(s)
            .flat_map(|i| (0..ny).step_by(s).flat_map(move |j| (0..nz).step_by(s).map(move |k| (i * ny + j) * nz + k)))
            .filter(|&n| mask.as_ref().map_or(true, |m| m[n]))
            .count()
            .max(1);
        Level { fixed, moving, mask, stride: s, count }
    }

    /// `E(A)`, with `∂E/∂L` and `∂E/∂t` (see the module docs). Parallel over `i` slabs; slab
    /// sums are added in slab order (thread-count independent).
    fn evaluate(&self, a: &Affine, centre: [f64; 3], g_l: &mut [[f64; 3]; 3], g_t: &mut [f64; 3]) -> f64 {
        let fg = &self.fixed.grid;
        let mg = &self.moving.grid;
        let [nx, ny, nz] = fg.shape();
        let ms = mg.shape();
        const C: usize = sinew_features::SSC_CHANNELS;
        let c = C;
        assert!(self.fixed.channels == C && self.moving.channels == C, "MIND-SSC descriptors");
        let to_moving = mg.inverse_affine().compose(&a.compose(fg.affine()));
        let minv = mg.inverse_affine().linear();
        let s = self.stride;
        let compared = |n: usize| self.mask.as_ref().map_or(true, |m| m[n]);
        let count = self.count;
        let scale = 2.0 / (count * c) as f64;
        let slabs: Vec<(f64, [f64; 12])> = (0..nx)
            .into_par_iter()
            .step_by(s)
            .map(|i| {
                let mut e = 0.0f64;
                let mut acc = [0.0f64; 12];
                let mut val = [0.0f32; C];
                let mut grad = [[0.0f32; C]; 3];
                for j in (0..ny).step_by(s) {
                    for k in (0..nz).step_by(s) {
                        let n = (i * ny + j) * nz + k;
                        if !compared(n) {
                            continue;
                        }
                        let x = [i as f64, j as f64, k as f64];
                        let p = to_moving.apply(x);
                        sample::<C>(&self.moving.data, ms, p, &mut val, &mut grad);
                        let f = &self.fixed.data[n * C..(n + 1) * C];
                        let (mut e1, mut gv1) = (0.0f32, [0.0f32; 3]);
                        for ch in 0..C {
                            let r = val[ch] - f[ch];
                            e1 += r * r;
                            gv1[0] += r * grad[0][ch];
                            gv1[1] += r * grad[1][ch];
                            gv1[2] += r * grad[2][ch];
                        }
                        e += e1 as f64;
                        let gv = gv1.map(|v| v as f64);
                        // World gradient g = G_m⁻ᵀ·gv (scaled at the end).
                        let g: [f64; 3] = std::array::from_fn(|r| (0..3).map(|d| minv[d][r] * gv[d]).sum());
                        let w = fg.voxel_to_world(x);
                        for r in 0..3 {
                            acc[9 + r] += g[r];
                            for k2 in 0..3 {
                                acc[3 * r + k2] += g[r] * (w[k2] - centre[k2]);
                            }
                        }
                    }
                }
                (e, acc)
            })
            .collect();
        let mut e = 0.0;
        let mut acc = [0.0f64; 12];
        for (se, sa) in &slabs {
            e += se;
            acc.iter_mut().zip(sa).for_each(|(a, b)| *a += b);
        }
        for r in 0..3 {
            for k in 0..3 {
                g_l[r][k] = scale * acc[3 * r + k];
            }
            g_t[r] = scale * acc[9 + r];
        }
        e / (count * c) as f64
    }
}

/// Trilinear value and voxel-space slope of every channel of a channel-last volume at `p`,
/// with sinew's one trilinear sampler ([`sinew_grid::interp::stencil_exact`]: the value is
/// clamped to the volume, the slope beyond a face is 0, the exact derivative that L-BFGS's
/// line searches need; the same cells and values as the warper's and the objective kernel's).
#[inline(always)]
fn sample<const C: usize>(data: &[f32], shape: [usize; 3], p: [f64; 3], val: &mut [f32; C], grad: &mut [[f32; C]; 3]) {
    let st = sinew_grid::interp::stencil_exact(p, shape);
    *val = [0.0; C];
    *grad = [[0.0; C]; 3];
    for n in 0..8 {
        let base = st.offset[n] * C;
        let v: &[f32; C] = data[base..base + C].try_into().expect("C channels");
        let [w, dx, dy, dz] = st.weight[n];
        for ch in 0..C {
            val[ch] += w * v[ch];
            grad[0][ch] += dx * v[ch];
            grad[1][ch] += dy * v[ch];
            grad[2][ch] += dz * v[ch];
        }
    }
}

/// Estimates the rigid or affine map from `fixed` to `moving` (each on its own grid; see the
/// module docs). `mask` (on the fixed grid, non-zero = inside) restricts the voxels compared.
pub fn estimate(
    fixed: &Image,
    moving: &Image,
    mask: Option<&LabelMap>,
    params: &AffineParams,
) -> Result<AffineEstimate, SolveError> {
    let t0 = Instant::now();
    let bad = |name, why: String| Err(SolveError::Parameter { name, why });
    if params.iterations.is_empty() || params.step_mm.is_empty() {
        return bad("affine", "needs iterations and step sizes".into());
    }
    if !(params.coarsest_mm >= params.finest_mm && params.finest_mm > 0.0) {
        return bad("affine", format!("levels {} .. {} mm", params.coarsest_mm, params.finest_mm));
    }
    if params.mode == AffineMode::Body {
        return Ok(body_map(fixed, moving));
    }
    let centre = centre_of_mass(fixed);
    let moving_centre = centre_of_mass(moving);
    let init_t: [f64; 3] = std::array::from_fn(|d| moving_centre[d] - centre[d]);
    let model = Model { mode: params.mode, centre };
    let mut theta = vec![0.0f64; model.len()];
    if params.mode == AffineMode::None {
        return Ok(AffineEstimate {
            mode: params.mode,
            matrix: Affine::IDENTITY.to_4x4(),
            parameters: Vec::new(),
            centre_mm: centre,
            initial_translation_mm: [0.0; 3],
            levels: Vec::new(),
            seconds: t0.elapsed().as_secs_f64(),
        });
    }
    let n = model.len();
    theta[n - 3..].copy_from_slice(&init_t);

    // Pyramid depth: halve until the smallest spacing reaches the coarsest level.
    let min_spacing = |g: &Grid| g.spacing().iter().cloned().fold(f64::INFINITY, f64::min);
    let mut depth = 1;
    let mut g = fixed.grid.clone();
    while min_spacing(&g) < params.coarsest_mm * SPACING_SLACK
        && depth <= MAX_HALVINGS
        && g.shape().iter().all(|&s| s >= MIN_LEVEL_VOXELS)
    {
        g = g.halved(pyramid::axes_to_keep(&g));
        depth += 1;
    }
    let fixed_pyr = pyramid::build(fixed, depth);
    let moving_pyr = pyramid::build(moving, depth);
    let mut levels = Vec::new();
    let mut step = 0usize;
    for l in (0..depth).rev() {
        let fg = &fixed_pyr[l].grid;
        // Levels finer than finest_mm are skipped (the coarsest level always runs).
        if l + 1 < depth && min_spacing(fg) < params.finest_mm * SPACING_SLACK {
            break;
        }
        let (fd, md) = rayon::join(|| mind_ssc(&fixed_pyr[l], &params.mind), || mind_ssc(&moving_pyr[l], &params.mind));
        let level_mask = mask.map(|m| resample::resample_labels(m, fg).as_slice().iter().map(|&v| v != 0).collect());
        let level = Level::new(fd, md, level_mask, params.max_points);
        let iters = params.iterations[step.min(params.iterations.len() - 1)];
        let lr0 = params.step_mm[step.min(params.step_mm.len() - 1)];
        step += 1;
        let mut adam = Adam::new(n, lr0 as f32);
        let (mut g_l, mut g_t) = ([[0.0; 3]; 3], [0.0; 3]);
        let mut grad = vec![0.0f64; n];
        let mut th32: Vec<f32> = theta.iter().map(|&v| v as f32).collect();
        let mut best = (f64::INFINITY, theta.clone());
        let mut start = f64::NAN;
        let mut done = 0;
        let mut since_best = 0usize;
        for it in 0..=iters {
            let th: Vec<f64> = if it == 0 { theta.clone() } else { th32.iter().map(|&v| v as f64).collect() };
            let e = level.evaluate(&model.matrix(&th), centre, &mut g_l, &mut g_t);
            if !e.is_finite() {
                return Err(SolveError::Diverged { level: l });
            }
            if it == 0 {
                start = e;
            }
            if e < best.0 * (1.0 - params.tolerance) {
                best = (e, th.clone());
                since_best = 0;
            } else {
                since_best += 1;
            }
            // Stop at the planned count, or when the best energy has not improved for `patience` iterations.
            if it == iters || since_best >= params.patience {
                break;
            }
            model.chain(&th, &g_l, &g_t, &mut grad);
            let g32: Vec<f32> = grad.iter().map(|&v| (v * ADAM_GRADIENT_SCALE) as f32).collect();
            adam.lr = (lr0 * (1.0 - params.step_decay * it as f64 / iters.max(1) as f64)) as f32;
            adam.step(&mut th32, &g32);
            done = it + 1;
        }
        theta = best.1;
        if step > 1 && params.polish_iterations > 0 {
            // Finer levels: polish with L-BFGS from Adam's best (fast on a smooth 6/12-D energy).
            let mut eval = |th: &[f32], g: &mut [f32]| {
                let th64: Vec<f64> = th.iter().map(|&v| v as f64).collect();
                let (mut g_l, mut g_t) = ([[0.0; 3]; 3], [0.0; 3]);
                let e = level.evaluate(&model.matrix(&th64), centre, &mut g_l, &mut g_t);
                let mut g64 = vec![0.0; th.len()];
                model.chain(&th64, &g_l, &g_t, &mut g64);
                g.iter_mut().zip(&g64).for_each(|(o, v)| *o = *v as f32);
                e
            };
            let th32: Vec<f32> = theta.iter().map(|&v| v as f32).collect();
            let out = crate::lbfgs::minimise(th32, params.polish_iterations, params.polish_tolerance, &mut eval)
                .map_err(|message| SolveError::Lbfgs { level: l, message })?;
            let polished: Vec<f64> = out.param.iter().map(|&v| v as f64).collect();
            let (mut g_l, mut g_t) = ([[0.0; 3]; 3], [0.0; 3]);
            let e = level.evaluate(&model.matrix(&polished), centre, &mut g_l, &mut g_t);
            if e < best.0 {
                best = (e, polished.clone());
                theta = polished;
            }
            done += out.iterations;
        }
        levels.push(AffineLevel {
            spacing_mm: fg.spacing(),
            iterations: done,
            energy_start: start,
            energy_end: best.0,
        });
    }
    Ok(AffineEstimate {
        mode: params.mode,
        matrix: model.matrix(&theta).to_4x4(),
        parameters: model.natural(&theta),
        centre_mm: centre,
        initial_translation_mm: init_t,
        levels,
        seconds: t0.elapsed().as_secs_f64(),
    })
}

/// `moving` resampled so that its value at fixed world point `x` is `moving(A·x)`, on
/// `target` (trilinear; outside the moving scan: `pad`).
pub fn apply_to_image(moving: &Image, a: &Affine, target: &Grid, pad: f32) -> Image {
    // A grid whose voxel p sits at world A·G_t·p: resampling onto it samples moving(A·x).
    let mapped = Grid::new(target.shape(), a.compose(target.affine())).expect("an invertible map keeps the grid valid");
    let mut out = resample::resample_image(moving, &mapped, sinew_grid::Border::Constant(pad));
    out.grid = target.clone();
    out
}

/// The fixed voxels whose image under the affine map `a` lies inside the moving scan
/// (at least `margin` voxels of the moving grid from its outer voxel centres): 1 inside,
/// 0 where [`apply_to_image`] can only return padding. On `target`.
pub fn inside_moving(moving: &Grid, a: &Affine, target: &Grid, margin: f64) -> sinew_grid::LabelMap {
    // Target voxel p sits at moving voxel G_m⁻¹·A·G_t·p.
    let m = moving.inverse_affine().compose(&a.compose(target.affine()));
    let shape = moving.shape();
    let [_, ny, nz] = target.shape();
    let mut out = sinew_grid::LabelMap::filled(target.clone(), 0);
    out.data.as_slice_mut().expect("standard layout").par_chunks_mut(ny * nz).enumerate().for_each(|(i, slab)| {
        for (idx, v) in slab.iter_mut().enumerate() {
            let q = m.apply([i as f64, (idx / nz) as f64, (idx % nz) as f64]);
            let inside = (0..3).all(|d| q[d] >= margin && q[d] <= shape[d] as f64 - 1.0 - margin);
            *v = u16::from(inside);
        }
    });
    out
}

/// Composes a displacement field on `u.grid` with the affine map applied after it (both
/// into one pull field): `u'(x) = G⁻¹·A·G·(x + u(x)) − x`, exact (no interpolation).
pub fn compose_after(u: &mut sinew_grid::Field, a: &Affine) {
    let g = u.grid.clone();
    let m = g.inverse_affine().compose(&a.compose(g.affine()));
    let [_, ny, nz] = g.shape();
    u.par_slabs_mut(|i, [ax, ay, az]| {
        for idx in 0..ny * nz {
            let x = [i as f64, (idx / nz) as f64, (idx % nz) as f64];
            let q = m.apply([x[0] + ax[idx] as f64, x[1] + ay[idx] as f64, x[2] + az[idx] as f64]);
            ax[idx] = (q[0] - x[0]) as f32;
            ay[idx] = (q[1] - x[1]) as f32;
            az[idx] = (q[2] - x[2]) as f32;
        }
    });
}

/// Bounds of the per-axis scale of [`body_map`]: `[BODY_SCALE_MIN, 1 / BODY_SCALE_MIN]`.
/// Chosen on the tuning splits (seed 7, 6 pairs each; mean Dice demo / second cohort):
/// 0.65 → 0.8546 / 0.6589, 0.7 → 0.8546 / 0.6643, 0.75 → 0.8546 / 0.6575, 0.8 → 0.8537 /
/// 0.6562, none (0.5) → 0.8546 / 0.6560; a damped scale `s^0.75` or `s^0.5` was worse
/// (0.8502 / 0.6538, 0.8519 / 0.6468). Body extents include the fat layer, which varies more
/// between people than the organs do, so unbounded ratios (up to 1.59 in the second cohort)
/// overshoot.
pub const BODY_SCALE_MIN: f64 = 0.7;

/// Bodies whose volumes differ by more than this factor are not the same part of two
/// comparable bodies (or one mask failed): [`body_map`] then keeps the identity.
pub const BODY_VOLUME_RATIO_MAX: f64 = 3.0;

/// The linear map of two body masks' moments ([`AffineMode::Body`]):
/// `A·x = c_m + S·(x − c_f)` with `S = diag(s_x, s_y, s_z)` along the world axes,
/// `s_d = σ_m,d / σ_f,d` (the bodies' standard deviations along world axis `d`, from the
/// covariances of [`crate::frames::body_moments`]: `σ_d² = Σ_i e_i² a_i,d²` with extents
/// `e_i` and unit axes `a_i`), clamped to `[BODY_SCALE_MIN, 1 / BODY_SCALE_MIN]`, and
/// `c_f`, `c_m` the body centres (world mm). An axis along which either body reaches both
/// faces of its scan's field of view (the grid axis closest to that world axis) says nothing
/// about the body's size or centre there: it keeps scale 1 and no shift. When either mask is
/// empty or the body volumes differ by more than [`BODY_VOLUME_RATIO_MAX`], the map is the
/// identity. `parameters` holds `s_x, s_y, s_z, t_x, t_y, t_z` (`t = A·0`, mm).
pub fn body_map(fixed: &Image, moving: &Image) -> AffineEstimate {
    let t0 = Instant::now();
    let ((fm, bf), (mm, bm)) = rayon::join(|| crate::frames::body(fixed), || crate::frames::body(moving));
    let mut e = body_map_of(fixed, &fm, &bf, moving, &mm, &bm);
    e.seconds = t0.elapsed().as_secs_f64();
    e
}

/// [`body_map`] from body masks and moments already found ([`crate::frames::body`] of each
/// scan, as the initial alignment finds them): the same map, without finding them again.
pub fn body_map_of(
    fixed: &Image,
    fixed_mask: &[bool],
    bf: &crate::frames::BodyMoments,
    moving: &Image,
    moving_mask: &[bool],
    bm: &crate::frames::BodyMoments,
) -> AffineEstimate {
    let t0 = Instant::now();
    let var = |b: &crate::frames::BodyMoments, d: usize| -> f64 {
        (0..3).map(|i| b.extents_mm[i].powi(2) * b.axes[i][d].powi(2)).sum()
    };
    let cut_f = crate::frames::cut_world_axes(fixed, fixed_mask);
    let cut_m = crate::frames::cut_world_axes(moving, moving_mask);
    let ratio = bm.volume_ml / bf.volume_ml;
    let usable =
        bf.voxels > 0 && bm.voxels > 0 && (1.0 / BODY_VOLUME_RATIO_MAX..=BODY_VOLUME_RATIO_MAX).contains(&ratio);
    let mut linear = [[0.0; 3]; 3];
    let mut translation = [0.0; 3];
    for d in 0..3 {
        linear[d][d] = 1.0;
        if !usable || cut_f[d] || cut_m[d] || var(bf, d) <= 0.0 {
            continue;
        }
        let s = (var(bm, d) / var(bf, d)).sqrt().clamp(BODY_SCALE_MIN, 1.0 / BODY_SCALE_MIN);
        linear[d][d] = s;
        translation[d] = bm.centre_mm[d] - s * bf.centre_mm[d];
    }
    let a = Affine::from_parts(linear, translation);
    AffineEstimate {
        mode: AffineMode::Body,
        matrix: a.to_4x4(),
        parameters: [linear[0][0], linear[1][1], linear[2][2], translation[0], translation[1], translation[2]].to_vec(),
        centre_mm: bf.centre_mm,
        initial_translation_mm: [0.0; 3],
        levels: Vec::new(),
        seconds: t0.elapsed().as_secs_f64(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_point_stride_is_the_smallest_that_fits_the_budget() {
        // Exact arithmetic: 144·112·192 = 3 096 576 > 400 000 ≥ 72·56·96 = 387 072.
        assert_eq!(point_stride([144, 112, 192], 400_000), 2);
        assert_eq!(point_stride([72, 56, 96], 400_000), 1);
        // ⌈512/3⌉² · ⌈400/3⌉ = 171² · 134 = 3 918 294 ≤ 4e6 < ⌈512/2⌉² · 200.
        assert_eq!(point_stride([512, 512, 400], 4_000_000), 3);
        assert_eq!(point_stride([5, 5, 5], 0), 5);
    }

    #[test]
    fn rigid_and_affine_gradients_match_central_finite_differences() {
        // Reference: central differences of E(θ) (a standard numerical check).
        let g = Grid::axis_aligned([20, 18, 22], [4.0, 4.0, 4.0], [-40.0, -36.0, -44.0]);
        let mut img = Image::filled(g.clone(), 0.0);
        for ((i, j, k), v) in img.data.indexed_iter_mut() {
            let (x, y, z) = (i as f32 - 9.5, j as f32 - 8.5, k as f32 - 10.5);
            *v = (-(x * x / 40.0 + y * y / 25.0 + z * z / 60.0)).exp() * 100.0 + (0.3 * x + 0.2 * z).sin() * 10.0;
        }
        let fixed = apply_to_image(
            &img,
            &Affine::from_parts([[1.0, 0.05, 0.0], [-0.05, 1.0, 0.0], [0.0, 0.0, 1.0]], [2.0, -1.0, 3.0]),
            &g,
            0.0,
        );
        let mind = MindParams::default();
        let level = Level::new(mind_ssc(&fixed, &mind), mind_ssc(&img, &mind), None, usize::MAX);
        for mode in [AffineMode::Rigid, AffineMode::Affine] {
            let model = Model { mode, centre: [1.0, -2.0, 0.5] };
            let mut th: Vec<f64> = (0..model.len()).map(|i| 0.7 * ((i as f64) * 1.3).sin()).collect();
            let (mut g_l, mut g_t) = ([[0.0; 3]; 3], [0.0; 3]);
            level.evaluate(&model.matrix(&th), model.centre, &mut g_l, &mut g_t);
            let mut grad = vec![0.0; model.len()];
            model.chain(&th, &g_l, &g_t, &mut grad);
            let h = 1e-3;
            for idx in 0..model.len() {
                let orig = th[idx];
                th[idx] = orig + h;
                let ep = level.evaluate(&model.matrix(&th), model.centre, &mut g_l, &mut g_t);
                th[idx] = orig - h;
                let em = level.evaluate(&model.matrix(&th), model.centre, &mut g_l, &mut g_t);
                th[idx] = orig;
                let fd = (ep - em) / (2.0 * h);
                let gmax = grad.iter().fold(0.0f64, |a, g| a.max(g.abs()));
                assert!(
                    approx::abs_diff_eq!(fd, grad[idx], epsilon = 2e-2 * fd.abs() + 2e-3 * gmax),
                    "{mode:?} {idx}: {fd} vs {}",
                    grad[idx]
                );
            }
        }
    }

    #[test]
    fn body_map_of_scaled_ellipsoids_is_the_ratio_of_their_axes() {
        // A solid ellipsoid of half-axis a has standard deviation a/√5 along it (exact maths
        // fact), so two ellipsoids' deviation ratios are their half-axis ratios: here 1.2 along
        // x and 0.9 along y, with the centre moved by (6, −4, 2) mm.
        let g = Grid::axis_aligned([64, 48, 40], [2.0; 3], [-64.0, -48.0, -40.0]);
        let body = |c: [f64; 3], h: [f64; 3]| {
            let mut img = Image::filled(g.clone(), -1000.0);
            for ((i, j, k), v) in img.data.indexed_iter_mut() {
                let w = g.voxel_to_world([i as f64, j as f64, k as f64]);
                if (0..3).map(|d| ((w[d] - c[d]) / h[d]).powi(2)).sum::<f64>() <= 1.0 {
                    *v = 40.0;
                }
            }
            img
        };
        let fixed = body([0.0; 3], [40.0, 30.0, 20.0]);
        let moving = body([6.0, -4.0, 2.0], [48.0, 27.0, 20.0]);
        let e = body_map(&fixed, &moving);
        assert_eq!(e.mode, AffineMode::Body);
        let a = e.affine();
        let lin = a.linear();
        approx::assert_abs_diff_eq!(lin[0][0], 1.2, epsilon = 0.02);
        approx::assert_abs_diff_eq!(lin[1][1], 0.9, epsilon = 0.02);
        approx::assert_abs_diff_eq!(lin[2][2], 1.0, epsilon = 0.02);
        for (r, row) in lin.iter().enumerate() {
            for (c, v) in row.iter().enumerate() {
                if r != c {
                    assert_eq!(*v, 0.0);
                }
            }
        }
        // The fixed centre goes to the moving centre (within a voxel's discretisation).
        let to = a.apply([0.0; 3]);
        for (got, want) in to.iter().zip([6.0, -4.0, 2.0]) {
            approx::assert_abs_diff_eq!(*got, want, epsilon = 0.5);
        }
        // The same body: the identity up to discretisation.
        let same = body_map(&fixed, &fixed).affine();
        assert_eq!(same, Affine::IDENTITY);
        // A ratio beyond the bound is clamped; bodies of very different volume give the identity.
        let wide = body([0.0; 3], [62.0, 30.0, 20.0]);
        approx::assert_abs_diff_eq!(
            body_map(&body([0.0; 3], [40.0, 30.0, 20.0]), &wide).affine().linear()[0][0],
            1.0 / BODY_SCALE_MIN,
            epsilon = 1e-12
        );
        let tiny = body([0.0; 3], [10.0, 10.0, 10.0]);
        assert_eq!(body_map(&fixed, &tiny).affine(), Affine::IDENTITY);
    }
}
