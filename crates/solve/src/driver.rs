//! The pyramid driver: coarse to fine, descriptors → optimisation → Jacobian check → upsample.

use std::time::Instant;

use serde::Serialize;
use sinew_features::{DescriptorKind, MindParams};
use sinew_grid::{pyramid, resample, Field, Grid, Image, LabelMap};
use sinew_transform::{jacobian_determinant, jacobian_stats, JacobianStats};

use crate::bspline::BsplineModel;
use crate::curvature::CurvaturePenalty;
use crate::fold::FoldPenalty;
use crate::kernel::{Energy, Problem};
use crate::param::{GaussianDense, Parametrisation};
use crate::{adam::Adam, affine, lbfgs, svf, AffineMode, Model, Optimiser, RegParams, Similarity, SolveError};

/// A stage of the registration, reported to the observer.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Stage {
    /// Building the image pyramids.
    Pyramid,
    /// Computing the descriptors of one level.
    Descriptors,
    /// Optimising the field of one level.
    Optimise,
    /// Computing the Jacobian determinant and its statistics.
    Jacobian,
}

/// A progress event: the level being worked on (0 = finest), the stage, and for
/// [`Stage::Optimise`] the iteration.
#[derive(Clone, Copy, Debug)]
pub struct Progress {
    /// Pyramid level (0 = input grid).
    pub level: usize,
    /// The stage.
    pub stage: Stage,
    /// Iteration done within the stage (optimisation only).
    pub iteration: usize,
    /// Iterations planned for the stage.
    pub iterations: usize,
    /// Iterations planned over all optimised levels of this registration:
    /// [`RegParams::planned_iterations`] of the parameters after [`RegParams::for_spacing`]
    /// (the length of a progress bar; levels stopped early by the tolerance run fewer).
    pub planned_iterations: usize,
}

/// What happened at one level.
#[derive(Clone, Debug, Serialize)]
pub struct LevelReport {
    /// Pyramid level (0 = input grid).
    pub level: usize,
    /// Shape of the field's lattice at this level.
    pub shape: [usize; 3],
    /// Spacing of the field's lattice in mm.
    pub spacing_mm: [f64; 3],
    /// Lattice stride over the level's descriptors (1 = one field vector per voxel).
    pub stride: usize,
    /// Iterations run (fewer than planned when the tolerance stopped the level).
    pub iterations: usize,
    /// Objective evaluations (fused kernel passes).
    pub evaluations: usize,
    /// Energies at the start of the level.
    pub energy_start: EnergyReport,
    /// Energies at the end of the level.
    pub energy_end: EnergyReport,
    /// Seconds spent on the descriptors of both images.
    pub descriptors_s: f64,
    /// Seconds spent optimising.
    pub optimise_s: f64,
    /// Seconds spent on the Jacobian check.
    pub jacobian_s: f64,
    /// Jacobian statistics of the level's field.
    pub jacobian: JacobianStats,
}

/// Energies in a report (see the objective in [`crate::kernel`]).
#[derive(Clone, Copy, Debug, Default, Serialize)]
pub struct EnergyReport {
    /// Data term.
    pub data: f64,
    /// Diffusion term (before λ).
    pub diffusion: f64,
    /// Total `data + λ·diffusion`.
    pub total: f64,
}

impl From<Energy> for EnergyReport {
    fn from(e: Energy) -> Self {
        EnergyReport { data: e.data, diffusion: e.diffusion, total: e.total }
    }
}

/// The result of [`register`].
#[derive(Clone, Debug)]
pub struct Registration {
    /// The displacement field on the fixed grid (voxels, pull convention).
    pub field: Field,
    /// One report per optimised level, coarsest first.
    pub levels: Vec<LevelReport>,
    /// Seconds spent building the pyramids.
    pub pyramid_s: f64,
    /// Seconds spent upsampling the final field to the input grid.
    pub upsample_s: f64,
    /// The linear stage's map (fixed world mm → moving world mm), already part of `field`.
    pub affine: Option<affine::AffineEstimate>,
    /// Seconds spent on the linear stage.
    pub affine_s: f64,
}

/// Registers `moving` to `fixed`; both must be on the same grid (bring the moving scan onto
/// the fixed grid first). `mask` (non-zero = inside) restricts the data term. The returned
/// field maps fixed voxels into the moving scan: `warped(x) = moving(x + u(x))`.
pub fn register(
    fixed: &Image,
    moving: &Image,
    mask: Option<&LabelMap>,
    params: &RegParams,
    observer: &mut dyn FnMut(Progress),
) -> Result<Registration, SolveError> {
    register_from(fixed, moving, mask, params, None, observer)
}

/// [`register`] with the linear stage's map already found by the caller (`linear`, e.g. the
/// body-moments map from the body masks the initial alignment found:
/// [`affine::body_map_of`]); `None` runs the stage `params.affine` asks for.
pub fn register_from(
    fixed: &Image,
    moving: &Image,
    mask: Option<&LabelMap>,
    params: &RegParams,
    linear: Option<affine::AffineEstimate>,
    observer: &mut dyn FnMut(Progress),
) -> Result<Registration, SolveError> {
    params.validate()?;
    // Coarse scans run fewer levels (see `RegParams::levels_for_mm`).
    let params = &params.for_spacing(fixed.grid.spacing());
    fixed.grid.ensure_same(&moving.grid)?;
    ensure_finite(fixed, moving)?;
    if let Some(m) = mask {
        fixed.grid.ensure_same(&m.grid)?;
    }
    // Linear stage (see [`crate::affine`]), then one of two ways to carry its map A:
    // - A close to a translation (linear part within `SAMPLE_THROUGH_MAX` of the identity in
    //   voxel coordinates, see `linear_part_departure`): the field starts from the map. On
    //   every level `u = b + v` with `b(x) = A·x − x` exact on the lattice, the data term
    //   samples the moving scan's own descriptors at `x + u(x)` (the moving scan is
    //   interpolated once), the diffusion and curvature penalties act on the deviation `v`
    //   alone ([`LinearStart`]), the folding penalty on the whole `u`.
    // - Otherwise (and in the diffeomorphic mode, whose variable is a velocity): the moving
    //   scan is resampled through A, the deformable stage registers what is left, and the
    //   final field is composed with A exactly.
    // Why both: resampling blurs the moving scan (trilinear), which costs known-warp accuracy;
    // but MIND-SSC compares neighbours along the grid's axes, so the moving scan's own
    // descriptors only match the fixed ones when A neither turns nor stretches the axes.
    // Measured with `--affine affine` (accuracy benchmark, mean endpoint error): real chest CT
    // under a known 10 mm warp (departure 0.021) 0.73 mm resampled, 0.60 mm started from the
    // map (0.58 mm without the stage); demo subject under 15 mm (0.012) 0.40 / 0.35 mm (0.35);
    // brain template under 12 mm (0.074) 0.33 / 0.33 mm but p95 0.71 / 0.76 mm; a 4 mm subject
    // moved by 10° about each axis, 5 % scaling and 20 mm (the affine-composition test) 1.56 mm
    // resampled, 4.34 mm started from the map.
    let t0 = Instant::now();
    let affine = match (linear, params.affine) {
        (Some(found), _) => Some(found),
        (None, AffineMode::None) => None,
        (None, mode) => Some(affine::estimate(fixed, moving, mask, &affine::AffineParams::new(mode))?),
    };
    let start_from_map = affine
        .as_ref()
        .map(|a| a.affine())
        .filter(|a| !params.diffeomorphic && linear_part_departure(a, &fixed.grid) <= SAMPLE_THROUGH_MAX);
    let aligned = affine.as_ref().filter(|_| start_from_map.is_none()).map(|a| {
        let pad = moving.finite_range().map_or(0.0, |r| r.0);
        affine::apply_to_image(moving, &a.affine(), &fixed.grid, pad)
    });
    // Where the affine map sends a fixed voxel outside the moving scan, the aligned scan holds
    // padding whose edge would pull the field: those voxels leave the data term (measured on
    // a 4 mm subject moved by a 20 mm affine: 4.4 mm mean endpoint error with them, see the
    // affine-composition test). Kept only when at least a tenth of the grid remains.
    let inside = affine.as_ref().map(|a| affine::inside_moving(&moving.grid, &a.affine(), &fixed.grid, 1.0));
    let combined =
        inside.filter(|m| m.as_slice().iter().filter(|&&v| v != 0).count() * 10 >= m.grid.len()).map(|mut m| {
            if let Some(user) = mask {
                m.data.zip_mut_with(&user.data, |a, &b| *a = u16::from(*a != 0 && b != 0));
            }
            m
        });
    let mask = combined.as_ref().or(mask);
    let moving = aligned.as_ref().unwrap_or(moving);
    let affine_s = t0.elapsed().as_secs_f64();
    let t0 = Instant::now();
    let planned_iterations = params.planned_iterations();
    observer(Progress {
        level: params.levels - 1,
        stage: Stage::Pyramid,
        iteration: 0,
        iterations: 0,
        planned_iterations,
    });
    let normalised = prepare_intensities(fixed, moving, params.similarity);
    let (fixed_n, moving_n) = normalised.as_ref().map_or((fixed, moving), |(f, m)| (f, m));
    let (fixed_pyr, moving_pyr) =
        rayon::join(|| pyramid::build(fixed_n, params.levels), || pyramid::build(moving_n, params.levels));
    drop(normalised);
    let pyramid_s = t0.elapsed().as_secs_f64();

    // The optimised variable carried from level to level (displacement, or velocity).
    let mut variable: Option<Field> = None;
    let mut reports = Vec::new();
    // The data term's descriptor and the transform model, chosen once for every level.
    let descriptor = descriptor_kind(params);
    let parametrisation = model_of(params);
    for (step, level) in (params.finest_level..params.levels).rev().enumerate() {
        let desc_grid = fixed_pyr[level].grid.clone();
        let stride = params.stride_for(step, fixed.grid.spacing());
        let lattice = desc_grid.strided(stride);
        observer(Progress { level, stage: Stage::Descriptors, iteration: 0, iterations: 0, planned_iterations });
        let t = Instant::now();
        let (fd, md) = rayon::join(|| descriptor.compute(&fixed_pyr[level]), || descriptor.compute(&moving_pyr[level]));
        let descriptors_s = t.elapsed().as_secs_f64();
        let level_mask = mask.map(|m| mask_on(m, &lattice));
        let init = match variable.take() {
            Some(f) => resample::resample_field(&f, &lattice),
            None => Field::zeros(lattice.clone()),
        };
        let base = start_from_map.as_ref().map(|a| linear_displacement(&lattice, a));
        let t = Instant::now();
        let problem = Problem {
            shape: lattice.shape(),
            spacing: lattice.spacing(),
            stride,
            desc_shape: desc_grid.shape(),
            channels: fd.channels,
            fixed: &fd.data,
            moving: &md.data,
            mask: level_mask.as_deref(),
            lambda: params.lambda_at(step),
        };
        let mut param = parametrisation(&lattice);
        let plan = LevelPlan { iterations: params.iterations[step], step_size: params.step_size[step], level };
        let outcome = optimise_level(&problem, &mut param, init, base, &plan, params, observer)?;
        let optimise_s = t.elapsed().as_secs_f64();
        drop((fd, md));
        observer(Progress { level, stage: Stage::Jacobian, iteration: 0, iterations: 0, planned_iterations });
        let t = Instant::now();
        let det = jacobian_determinant(&outcome.field);
        let jac = jacobian_stats(&det, None);
        let jacobian_s = t.elapsed().as_secs_f64();
        reports.push(LevelReport {
            level,
            shape: lattice.shape(),
            spacing_mm: lattice.spacing(),
            stride,
            iterations: outcome.iterations,
            evaluations: outcome.evaluations,
            energy_start: outcome.start.into(),
            energy_end: outcome.end.into(),
            descriptors_s,
            optimise_s,
            jacobian_s,
            jacobian: jac,
        });
        variable = Some(outcome.variable);
    }
    let t = Instant::now();
    let mut variable = variable.expect("at least one level is optimised");
    if !variable.grid.same_as(&fixed.grid, 1e-6) {
        variable = resample::resample_field(&variable, &fixed.grid);
    }
    let mut field = displacement_of(&variable, params.diffeomorphic);
    match (&start_from_map, &affine) {
        (Some(a), _) => add_field(&mut field, &linear_displacement(&fixed.grid, a)),
        (None, Some(a)) => affine::compose_after(&mut field, &a.affine()),
        (None, None) => {}
    }
    let upsample_s = t.elapsed().as_secs_f64();
    Ok(Registration { field, levels: reports, pyramid_s, upsample_s, affine, affine_s })
}

/// What the data term compares (`params.similarity`): the descriptor of each level's scans.
fn descriptor_kind(params: &RegParams) -> DescriptorKind {
    match params.similarity {
        Similarity::MindSsc => {
            DescriptorKind::MindSsc(MindParams { radius: params.mind_radius, dilation: params.mind_dilation })
        }
        Similarity::Ssd => DescriptorKind::Intensity,
        Similarity::Lncc => DescriptorKind::LocalStandardised { sigma: params.ncc_sigma },
    }
}

/// The transform model (`params.model`): what makes a level's parametrisation of the field on
/// its lattice.
type ModelMaker = Box<dyn Fn(&Grid) -> Box<dyn Parametrisation>>;

/// The maker of each level's parametrisation for `params.model`.
fn model_of(params: &RegParams) -> ModelMaker {
    match params.model {
        Model::Dense => {
            let sigma = params.update_sigma as f64;
            Box::new(move |lattice| Box::new(GaussianDense::new(lattice.shape(), sigma)))
        }
        Model::Bspline => {
            let (spacing_mm, bending) = (params.grid_spacing_mm, params.bending);
            Box::new(move |lattice| Box::new(BsplineModel::new(lattice, spacing_mm, bending)))
        }
    }
}

/// What one level runs.
struct LevelPlan {
    iterations: usize,
    step_size: f32,
    level: usize,
}

struct LevelOutcome {
    /// The optimised variable: the displacement (its deviation from the linear map when the
    /// field starts from it), or the velocity when diffeomorphic.
    variable: Field,
    /// The displacement field (the linear map's share included).
    field: Field,
    iterations: usize,
    evaluations: usize,
    start: Energy,
    end: Energy,
}

/// Buffers and closure state of one level's objective `θ ↦ E(u₀ + P·θ)`.
struct LevelObjective<'a> {
    problem: &'a Problem<'a>,
    param: &'a mut dyn Parametrisation,
    init: Field,
    /// `u₀ + P·θ`: the displacement, or the velocity when diffeomorphic.
    var: Field,
    /// `exp(var)` when diffeomorphic.
    u: Field,
    scratch: Field,
    grad_u: Vec<f32>,
    sums: Vec<[f64; 2]>,
    diffeomorphic: bool,
    /// The folding penalty and its weight μ and threshold τ (off when μ = 0).
    fold: FoldPenalty,
    fold_weight: f32,
    fold_threshold: f32,
    /// The curvature penalty and its weight κ in mm² (off when κ = 0).
    curvature: CurvaturePenalty,
    curvature_weight: f32,
    /// The linear map's share when the field starts from it (`u = b + var`).
    linear: Option<LinearStart>,
    evaluations: usize,
}

/// The linear map's share of a level's field `u = b + v`, `b(x) = A·x − x` (voxels of the
/// lattice), with what the quadratic penalties need to act on the deviation `v` alone. For
/// `Q = λ·R + κ·C` (diffusion and curvature, both quadratic forms `Q(u) = uᵀHu` of the
/// field's differences):
/// ```text
/// Q(v) = Q(v + b) − ⟨v, ∇Q(b)⟩ − Q(b)        ∇Q(v) = ∇Q(v + b) − ∇Q(b)
/// ```
/// (expand `(v + b)ᵀH(v + b)`; `∇Q(b) = 2Hb`), so the fused kernel evaluates the whole `u`
/// and a dot product and a subtraction remove `b`'s share. So the penalties mean what they
/// mean when the moving scan is resampled through the map: the deviation from the linear map
/// is penalised, never the map itself (whose discrete diffusion and curvature are not zero at
/// the lattice's faces).
struct LinearStart {
    /// `b`, component-first.
    field: Field,
    /// `∇Q(b)`.
    grad: Vec<f32>,
    /// `λ·∇R(b)`, the diffusion's part of it (for the reported diffusion term).
    grad_diffusion: Vec<f32>,
    /// `Q(b)`.
    value: f64,
    /// `λ·R(b)`.
    diffusion: f64,
}

impl LinearStart {
    /// `b`'s share of the penalties of `problem` (its λ) and `curvature` (weight κ).
    fn new(field: Field, problem: &Problem, curvature: &mut CurvaturePenalty, kappa: f32) -> LinearStart {
        let b = as_slice(&field);
        let mut sums = Vec::new();
        let mut with_diffusion = vec![0.0f32; b.len()];
        let mut data_only = vec![0.0f32; b.len()];
        let e = problem.evaluate(b, &mut with_diffusion, &mut sums);
        Problem { lambda: 0.0, ..*problem }.evaluate(b, &mut data_only, &mut sums);
        let grad_diffusion: Vec<f32> = with_diffusion.iter().zip(&data_only).map(|(a, d)| a - d).collect();
        let diffusion = problem.lambda as f64 * e.diffusion;
        let mut grad = grad_diffusion.clone();
        let value = diffusion + curvature.evaluate(b, kappa, &mut grad);
        LinearStart { field, grad, grad_diffusion, value, diffusion }
    }

    /// Removes `b`'s share from an evaluation at `u = v + b` (energies and `grad_u`).
    fn remove_share(&self, v: &[f32], lambda: f32, e: &mut Energy, grad_u: &mut [f32]) {
        let (mut dq, mut dr) = (0.0f64, 0.0f64);
        for (((g, &vi), &gq), &gr) in grad_u.iter_mut().zip(v).zip(&self.grad).zip(&self.grad_diffusion) {
            *g -= gq;
            dq += vi as f64 * gq as f64;
            dr += vi as f64 * gr as f64;
        }
        e.total -= dq + self.value;
        if lambda > 0.0 {
            e.diffusion -= (dr + self.diffusion) / lambda as f64;
        }
    }
}

/// `b(x) = A·x − x` on `grid` (voxels), `A` in world mm.
fn linear_displacement(grid: &Grid, a: &sinew_grid::Affine) -> Field {
    let mut f = Field::zeros(grid.clone());
    affine::compose_after(&mut f, a);
    f
}

/// Largest departure from the identity that still starts the field from the linear map
/// instead of resampling the moving scan (see [`register`]): an entry of `M − I` of 0.03 turns
/// an axis by at most 1.7° or stretches it by 3 %. Chosen between the measured cases of the
/// accuracy benchmark: known warps at 0.012 and 0.021 gain from starting from the map, the
/// brain template at 0.074 loses (p95), and inter-subject demo pairs lie at 0.066 and above.
const SAMPLE_THROUGH_MAX: f64 = 0.03;

/// `max_rc |M_rc − δ_rc|` of the linear part `M` of `A` in the voxel coordinates of `grid`
/// (`G⁻¹·A·G`): how far the map turns, stretches or shears the grid's axes.
fn linear_part_departure(a: &sinew_grid::Affine, grid: &Grid) -> f64 {
    let m = grid.inverse_affine().compose(&a.compose(grid.affine())).linear();
    (0..3)
        .flat_map(|r| (0..3).map(move |c| (r, c)))
        .map(|(r, c)| (m[r][c] - f64::from(r == c)).abs())
        .fold(0.0, f64::max)
}

/// `f += g` (same grid).
fn add_field(f: &mut Field, g: &Field) {
    f.data.zip_mut_with(&g.data, |a, &b| *a += b);
}

impl LevelObjective<'_> {
    /// Sets the variable from θ, evaluates the energy and writes `∂E/∂θ` into `grad_theta`.
    /// With `diffeomorphic`, the gradient w.r.t. the velocity is approximated by the gradient
    /// w.r.t. the displacement (common practice for stationary velocity fields).
    fn eval(&mut self, theta: &[f32], grad_theta: &mut [f32]) -> Energy {
        let var = self.var.data.as_slice_mut().expect("standard layout");
        self.param.expand(theta, var);
        var.iter_mut().zip(self.init.data.as_slice().expect("standard layout")).for_each(|(v, i)| *v += i);
        let u = if self.diffeomorphic {
            svf::exp_into(&self.var, &mut self.u, &mut self.scratch);
            &self.u
        } else if let Some(ls) = &self.linear {
            self.u.data.assign(&self.var.data);
            add_field(&mut self.u, &ls.field);
            &self.u
        } else {
            &self.var
        };
        let mut e = self.problem.evaluate(as_slice(u), &mut self.grad_u, &mut self.sums);
        e.total += self.fold.evaluate(as_slice(u), self.fold_weight, self.fold_threshold, &mut self.grad_u);
        e.total += self.curvature.evaluate(as_slice(u), self.curvature_weight, &mut self.grad_u);
        if let Some(ls) = &self.linear {
            ls.remove_share(as_slice(&self.var), self.problem.lambda, &mut e, &mut self.grad_u);
        }
        self.param.adjoint(&self.grad_u, grad_theta);
        e.total += self.param.penalty(theta, grad_theta);
        self.evaluations += 1;
        e
    }
}

/// Optimises one level from `init` over `u = init + P·θ`. With `diffeomorphic`, the variable
/// is a stationary velocity field and the returned field is its exponential (see [`svf`]).
fn optimise_level(
    problem: &Problem,
    param: &mut dyn Parametrisation,
    init: Field,
    base: Option<Field>,
    plan: &LevelPlan,
    params: &RegParams,
    observer: &mut dyn FnMut(Progress),
) -> Result<LevelOutcome, SolveError> {
    let level = plan.level;
    let grid = init.grid.clone();
    let n_theta = param.len();
    let mut curvature = CurvaturePenalty::new(grid.shape(), grid.spacing());
    let linear = base.map(|b| LinearStart::new(b, problem, &mut curvature, params.curvature));
    let mut obj = LevelObjective {
        problem,
        param,
        var: init.clone(),
        u: Field::zeros(grid.clone()),
        scratch: Field::zeros(grid.clone()),
        init,
        grad_u: vec![0.0; 3 * grid.len()],
        sums: Vec::new(),
        diffeomorphic: params.diffeomorphic,
        fold: FoldPenalty::new(grid.shape(), grid.spacing()),
        fold_weight: params.fold_weight,
        fold_threshold: params.fold_threshold,
        curvature,
        curvature_weight: params.curvature,
        linear,
        evaluations: 0,
    };
    let mut theta = vec![0.0f32; n_theta];
    let mut grad = vec![0.0f32; n_theta];
    let start = obj.eval(&theta, &mut grad);
    if !start.total.is_finite() {
        return Err(SolveError::Diverged { level });
    }
    let mut iterations = 0;
    match params.optimiser {
        Optimiser::Adam => {
            let mut adam = Adam::new(n_theta, plan.step_size);
            // Adam is scale-invariant but for ε: give it the gradient of the per-voxel energy.
            let n_vox = grid.len() as f32;
            let mut best = start.total;
            let mut since_best = 0usize;
            for it in 0..plan.iterations {
                if it > 0 {
                    let e = obj.eval(&theta, &mut grad);
                    if !e.total.is_finite() {
                        return Err(SolveError::Diverged { level });
                    }
                    // Stop when the best energy has not improved by `tolerance` (relative)
                    // for `patience` iterations.
                    if e.total < best * (1.0 - params.tolerance) {
                        best = e.total;
                        since_best = 0;
                    } else {
                        since_best += 1;
                        if since_best >= params.patience {
                            break;
                        }
                    }
                }
                grad.iter_mut().for_each(|g| *g *= n_vox);
                adam.step(&mut theta, &grad);
                iterations = it + 1;
                observer(Progress {
                    level,
                    stage: Stage::Optimise,
                    iteration: iterations,
                    iterations: plan.iterations,
                    planned_iterations: params.planned_iterations(),
                });
            }
        }
        Optimiser::Lbfgs => {
            let out =
                lbfgs::minimise(theta.clone(), plan.iterations, params.tolerance, &mut |th, g| obj.eval(th, g).total)
                    .map_err(|message| SolveError::Lbfgs { level, message })?;
            theta = out.param;
            iterations = out.iterations;
            observer(Progress {
                level,
                stage: Stage::Optimise,
                iteration: plan.iterations,
                iterations: plan.iterations,
                planned_iterations: params.planned_iterations(),
            });
        }
    }
    // The energy and field of the final θ.
    let end = obj.eval(&theta, &mut grad);
    if !end.total.is_finite() {
        return Err(SolveError::Diverged { level });
    }
    let evaluations = obj.evaluations;
    let linear = obj.linear.take();
    let mut variable = obj.var;
    if params.field_sigma > 0.0 {
        smooth_field(&mut variable, params.field_sigma as f64);
    }
    let mut field = displacement_of(&variable, params.diffeomorphic);
    if let Some(ls) = &linear {
        add_field(&mut field, &ls.field);
    }
    Ok(LevelOutcome { variable, field, iterations, evaluations, start, end })
}

/// The displacement of the optimised variable: itself, or `exp(v)` when diffeomorphic.
fn displacement_of(variable: &Field, diffeomorphic: bool) -> Field {
    if !diffeomorphic {
        return variable.clone();
    }
    let mut u = Field::zeros(variable.grid.clone());
    let mut scratch = Field::zeros(variable.grid.clone());
    svf::exp_into(variable, &mut u, &mut scratch);
    u
}

/// Gaussian smoothing of each component, σ in voxels.
fn smooth_field(f: &mut Field, sigma_vox: f64) {
    let mut p = GaussianDense::new(f.grid.shape(), sigma_vox);
    let copy = f.data.as_slice().expect("standard layout").to_vec();
    p.expand(&copy, f.data.as_slice_mut().expect("standard layout"));
}

fn as_slice(f: &Field) -> &[f32] {
    f.data.as_slice().expect("standard layout")
}

/// A mask on `grid` from a label map on the input grid (nearest neighbour, non-zero = in).
fn mask_on(mask: &LabelMap, grid: &Grid) -> Vec<bool> {
    let m = resample::resample_labels(mask, grid);
    m.as_slice().iter().map(|&v| v != 0).collect()
}

/// For SSD the images are scaled by the fixed image's standard deviation (so λ means the
/// same as with descriptors, whose values lie in [0, 1]); MIND-SSC is invariant to this.
/// `None`: the images are used as they are.
fn prepare_intensities(fixed: &Image, moving: &Image, sim: Similarity) -> Option<(Image, Image)> {
    match sim {
        Similarity::MindSsc | Similarity::Lncc => None,
        Similarity::Ssd => {
            let s = fixed.as_slice();
            let n = s.len() as f64;
            let mean = s.iter().map(|&v| v as f64).sum::<f64>() / n;
            let var = s.iter().map(|&v| (v as f64 - mean).powi(2)).sum::<f64>() / n;
            let scale = if var > 0.0 { 1.0 / var.sqrt() } else { 1.0 } as f32;
            let mut f = fixed.clone();
            let mut m = moving.clone();
            f.data.mapv_inplace(|v| (v - mean as f32) * scale);
            m.data.mapv_inplace(|v| (v - mean as f32) * scale);
            Some((f, m))
        }
    }
}

/// Refuses scans holding NaN or infinite voxels, naming the scan and the count.
pub(crate) fn ensure_finite(fixed: &Image, moving: &Image) -> Result<(), SolveError> {
    for (which, img) in [("fixed", fixed), ("moving", moving)] {
        let count = img.count_non_finite();
        if count > 0 {
            return Err(SolveError::NonFinite { which, count });
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_linear_share_leaves_the_penalties_of_the_deviation() {
        // Exact algebra of quadratic forms (see `LinearStart`): with the data term constant
        // (identical flat descriptors), E(v + b) minus b's share equals E(v) evaluated
        // directly, energy and gradient, for an arbitrary smooth v and a non-trivial map b.
        let shape = [9, 8, 10];
        let spacing = [2.0, 2.5, 3.0];
        let grid = Grid::axis_aligned(shape, spacing, [-5.0, 3.0, 1.0]);
        let n: usize = shape.iter().product();
        let flat = vec![0.5f32; n];
        let problem = Problem {
            shape,
            spacing,
            stride: 1,
            desc_shape: shape,
            channels: 1,
            fixed: &flat,
            moving: &flat,
            mask: None,
            lambda: 0.7,
        };
        let a =
            sinew_grid::Affine::from_parts([[1.04, 0.1, 0.0], [-0.08, 0.97, 0.05], [0.02, 0.0, 1.1]], [4.0, -3.0, 2.0]);
        let b = linear_displacement(&grid, &a);
        let kappa = 1.3;
        let mut curvature = CurvaturePenalty::new(shape, spacing);
        let share = LinearStart::new(b.clone(), &problem, &mut curvature, kappa);
        let v: Vec<f32> = crate::testing::smooth_volume(shape, 3, 0.3).iter().map(|x| 0.8 * x).collect();
        let mut sums = Vec::new();
        // Directly at v.
        let mut g_direct = vec![0.0f32; 3 * n];
        let mut e_direct = problem.evaluate(&v, &mut g_direct, &mut sums);
        e_direct.total += curvature.evaluate(&v, kappa, &mut g_direct);
        // At u = v + b, then b's share removed.
        let u: Vec<f32> = v.iter().zip(as_slice(&b)).map(|(x, y)| x + y).collect();
        let mut g = vec![0.0f32; 3 * n];
        let mut e = problem.evaluate(&u, &mut g, &mut sums);
        e.total += curvature.evaluate(&u, kappa, &mut g);
        share.remove_share(&v, problem.lambda, &mut e, &mut g);
        let scale = e_direct.total.abs().max(1e-12);
        approx::assert_relative_eq!(e.total, e_direct.total, max_relative = 1e-4);
        assert!(approx::relative_eq!(e.diffusion, e_direct.diffusion, max_relative = 1e-4), "{e:?} vs {e_direct:?}");
        let gmax = g_direct.iter().fold(0.0f32, |m, x| m.max(x.abs()));
        let worst = g.iter().zip(&g_direct).fold(0.0f32, |m, (x, y)| m.max((x - y).abs()));
        assert!(worst < 1e-3 * gmax, "gradient differs by {worst} (largest {gmax})");
        // And the share is not trivial: b alone has penalties at the faces.
        assert!(share.value > 1e-3 * scale, "b's share {}", share.value);
    }

    #[test]
    fn departure_of_a_translation_is_zero_and_of_a_turn_its_sine() {
        // Exact facts: a translation leaves the axes; a turn by θ about z puts ±sin θ off the
        // diagonal and cos θ − 1 on it, so the largest entry of M − I is sin θ.
        let grid = Grid::axis_aligned([10, 10, 10], [2.0; 3], [0.0; 3]);
        let shift =
            sinew_grid::Affine::from_parts([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]], [7.3, -2.0, 11.0]);
        assert!(linear_part_departure(&shift, &grid) < 1e-12);
        let t = 5f64.to_radians();
        let turn = sinew_grid::Affine::from_parts(
            [[t.cos(), -t.sin(), 0.0], [t.sin(), t.cos(), 0.0], [0.0, 0.0, 1.0]],
            [0.0; 3],
        );
        approx::assert_abs_diff_eq!(linear_part_departure(&turn, &grid), t.sin(), epsilon = 1e-12);
        assert!(linear_part_departure(&turn, &grid) > SAMPLE_THROUGH_MAX);
    }

    #[test]
    fn progress_plans_only_the_levels_that_run() {
        // A 4 mm scan with `levels_for_mm` = 2 drops round(log2(4 / 2)) = 1 coarsest level
        // (`RegParams::for_spacing`): the planned total is the other three levels' iterations.
        let grid = Grid::axis_aligned([24, 20, 28], [4.0; 3], [0.0; 3]);
        let pattern = |shift: f32| {
            let a = ndarray::Array3::from_shape_fn((24, 20, 28), |(i, j, k)| {
                ((i as f32 + shift) * 0.4).sin() + (j as f32 * 0.3).cos() + (k as f32 * 0.25).sin()
            });
            Image::new(grid.clone(), a).unwrap()
        };
        let params = RegParams { iterations: vec![5, 4, 3, 2], ..RegParams::default() };
        assert_eq!(params.levels, 4);
        let mut events = Vec::new();
        let reg = register(&pattern(0.0), &pattern(0.5), None, &params, &mut |p| events.push(p)).unwrap();
        assert_eq!(reg.levels.len(), 3);
        assert!(!events.is_empty());
        assert!(events.iter().all(|p| p.planned_iterations == 4 + 3 + 2), "{events:?}");
        // The per-level plans of the optimisation events add up to the same total.
        let per_level: std::collections::BTreeMap<usize, usize> =
            events.iter().filter(|p| p.stage == Stage::Optimise).map(|p| (p.level, p.iterations)).collect();
        assert_eq!(per_level.values().sum::<usize>(), 4 + 3 + 2);
    }
}
