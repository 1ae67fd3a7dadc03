//! The pyramid driver: coarse to fine, descriptors → optimisation → Jacobian check → upsample.

use std::time::Instant;

use serde::Serialize;
use sinew_features::{mind_ssc, Descriptor, MindParams};
use sinew_grid::{pyramid, resample, Field, Grid, Image, LabelMap};
use sinew_transform::{jacobian_determinant, jacobian_stats, JacobianStats};

use crate::kernel::{Energy, Problem};
use crate::{adam::Adam, lbfgs, svf, Optimiser, RegParams, Similarity, SolveError};

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
}

/// What happened at one level.
#[derive(Clone, Debug, Serialize)]
pub struct LevelReport {
    /// Pyramid level (0 = input grid).
    pub level: usize,
    /// Shape of the level grid.
    pub shape: [usize; 3],
    /// Spacing of the level grid in mm.
    pub spacing_mm: [f64; 3],
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
    params.validate()?;
    fixed.grid.ensure_same(&moving.grid)?;
    for (which, img) in [("fixed", fixed), ("moving", moving)] {
        let count = img.count_non_finite();
        if count > 0 {
            return Err(SolveError::NonFinite { which, count });
        }
    }
    if let Some(m) = mask {
        fixed.grid.ensure_same(&m.grid)?;
    }
    let t0 = Instant::now();
    observer(Progress { level: params.levels - 1, stage: Stage::Pyramid, iteration: 0, iterations: 0 });
    let (fixed_n, moving_n) = prepare_intensities(fixed, moving, params.similarity);
    let fixed_pyr = pyramid::build(&fixed_n, params.levels);
    let moving_pyr = pyramid::build(&moving_n, params.levels);
    let pyramid_s = t0.elapsed().as_secs_f64();

    // The optimised variable carried from level to level (displacement, or velocity).
    let mut variable: Option<Field> = None;
    let mut reports = Vec::new();
    let mind = MindParams { radius: params.mind_radius, dilation: params.mind_dilation };
    for (step, level) in (params.finest_level..params.levels).rev().enumerate() {
        let grid = fixed_pyr[level].grid.clone();
        observer(Progress { level, stage: Stage::Descriptors, iteration: 0, iterations: 0 });
        let t = Instant::now();
        let (fd, md) = match params.similarity {
            Similarity::MindSsc => rayon::join(|| mind_ssc(&fixed_pyr[level], &mind), || mind_ssc(&moving_pyr[level], &mind)),
            Similarity::Ssd => (intensity_descriptor(&fixed_pyr[level]), intensity_descriptor(&moving_pyr[level])),
        };
        let descriptors_s = t.elapsed().as_secs_f64();
        let level_mask = mask.map(|m| mask_on(m, &grid));
        let init = match variable.take() {
            Some(f) => resample::resample_field(&f, &grid),
            None => Field::zeros(grid.clone()),
        };
        let t = Instant::now();
        let problem = Problem {
            shape: grid.shape(),
            spacing: grid.spacing(),
            channels: fd.channels,
            fixed: &fd.data,
            moving: &md.data,
            mask: level_mask.as_deref(),
            lambda: params.lambda,
        };
        let iters = params.iterations[step];
        let lr = params.step_size[step];
        let outcome = optimise_level(&problem, init, iters, lr, params, level, observer)?;
        let optimise_s = t.elapsed().as_secs_f64();
        observer(Progress { level, stage: Stage::Jacobian, iteration: 0, iterations: 0 });
        let t = Instant::now();
        let det = jacobian_determinant(&outcome.field);
        let jac = jacobian_stats(&det, None);
        let jacobian_s = t.elapsed().as_secs_f64();
        reports.push(LevelReport {
            level,
            shape: grid.shape(),
            spacing_mm: grid.spacing(),
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
    if params.finest_level > 0 {
        variable = resample::resample_field(&variable, &fixed.grid);
    }
    let field = displacement_of(&variable, params.diffeomorphic);
    let upsample_s = t.elapsed().as_secs_f64();
    Ok(Registration { field, levels: reports, pyramid_s, upsample_s })
}

struct LevelOutcome {
    /// The optimised variable: the displacement, or the velocity when diffeomorphic.
    variable: Field,
    /// The displacement field.
    field: Field,
    iterations: usize,
    evaluations: usize,
    start: Energy,
    end: Energy,
}

/// Optimises one level from `init`. With `diffeomorphic` (Adam only), the optimised
/// variable is a stationary velocity field and the returned field is its exponential
/// (see [`svf`]).
fn optimise_level(
    problem: &Problem,
    init: Field,
    iters: usize,
    lr: f32,
    params: &RegParams,
    level: usize,
    observer: &mut dyn FnMut(Progress),
) -> Result<LevelOutcome, SolveError> {
    let n3 = init.data.len();
    let mut grad = vec![0.0f32; n3];
    let mut sums = Vec::new();
    let grid = init.grid.clone();
    let mut theta = init;
    let start = problem.evaluate(as_slice(&theta), &mut grad, &mut sums);
    if !start.total.is_finite() {
        return Err(SolveError::Diverged { level });
    }
    let mut iterations = 0;
    let mut evaluations = 1;
    match params.optimiser {
        Optimiser::Adam => {
            // Smoothed parametrisation: variable = init + G_σ·θ with θ = 0 at the start of the
            // level, so the gradient w.r.t. θ is G_σ·∂E/∂variable (G_σ is a Gaussian, σ =
            // `update_sigma` voxels): a preconditioner that keeps Adam's per-voxel steps smooth.
            let init = theta;
            let mut adam = Adam::new(n3, lr);
            let mut th = vec![0.0f32; n3];
            let mut cur = init.clone();
            // With `diffeomorphic`, `cur` holds the velocity and `u` its exponential.
            let mut u = Field::zeros(grid.clone());
            let mut scratch = Field::zeros(grid.clone());
            let mut best = f64::INFINITY;
            let mut since_best = 0usize;
            // Adam is scale-invariant but for ε: give it the gradient of the per-voxel energy.
            let n_vox = (n3 / 3) as f32;
            let kernel = sinew_grid::smooth::gaussian_kernel(params.update_sigma as f64);
            let mut conv_scratch = Vec::new();
            for it in 0..iters {
                let energy = if params.diffeomorphic {
                    svf::exp_into(&cur, &mut u, &mut scratch);
                    problem.evaluate(as_slice(&u), &mut grad, &mut sums)
                } else {
                    problem.evaluate(as_slice(&cur), &mut grad, &mut sums)
                };
                evaluations += 1;
                if !energy.total.is_finite() {
                    return Err(SolveError::Diverged { level });
                }
                // Gradient w.r.t. the velocity approximated by the gradient w.r.t. the
                // displacement (common practice for stationary velocity fields).
                smooth_components(&mut grad, grid.shape(), &kernel, &mut conv_scratch);
                grad.iter_mut().for_each(|g| *g *= n_vox);
                adam.step(&mut th, &grad);
                cur.data.as_slice_mut().expect("standard layout").copy_from_slice(&th);
                smooth_components(cur.data.as_slice_mut().expect("standard layout"), grid.shape(), &kernel, &mut conv_scratch);
                cur.data += &init.data;
                iterations = it + 1;
                observer(Progress { level, stage: Stage::Optimise, iteration: iterations, iterations: iters });
                // Stop when the best energy has not improved by `tolerance` (relative) for 10
                // iterations.
                if energy.total < best * (1.0 - params.tolerance) {
                    best = energy.total;
                    since_best = 0;
                } else {
                    since_best += 1;
                    if since_best >= 10 {
                        break;
                    }
                }
            }
            theta = cur;
        }
        Optimiser::Lbfgs => {
            let init_vec = theta.data.as_slice().expect("standard layout").to_vec();
            let out = lbfgs::minimise(problem, init_vec, iters, params.tolerance)
                .map_err(|message| SolveError::Lbfgs { level, message })?;
            theta.data.as_slice_mut().expect("standard layout").copy_from_slice(&out.param);
            iterations = out.iterations;
            evaluations += out.evaluations;
            observer(Progress { level, stage: Stage::Optimise, iteration: iters, iterations: iters });
        }
    }
    if params.field_sigma > 0.0 {
        smooth_field(&mut theta, params.field_sigma as f64);
    }
    let field = displacement_of(&theta, params.diffeomorphic);
    // The energy of the field actually returned (after integration and smoothing).
    let end = problem.evaluate(as_slice(&field), &mut grad, &mut sums);
    Ok(LevelOutcome { variable: theta, field, iterations, evaluations: evaluations + 1, start, end })
}

/// Gaussian smoothing (σ in voxels) of the three components of a component-first buffer.
fn smooth_components(buf: &mut [f32], shape: [usize; 3], kernel: &[f32], scratch: &mut Vec<f32>) {
    let n: usize = shape.iter().product();
    for comp in buf.chunks_exact_mut(n) {
        for axis in 0..3 {
            sinew_grid::smooth::convolve_axis_slice(comp, shape, axis, kernel, scratch);
        }
    }
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
    for d in 0..3 {
        let mut comp = f.data.index_axis(ndarray::Axis(0), d).to_owned();
        sinew_grid::smooth::gaussian_smooth(&mut comp, [1.0; 3], sigma_vox);
        f.data.index_axis_mut(ndarray::Axis(0), d).assign(&comp);
    }
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
fn prepare_intensities(fixed: &Image, moving: &Image, sim: Similarity) -> (Image, Image) {
    match sim {
        Similarity::MindSsc => (fixed.clone(), moving.clone()),
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
            (f, m)
        }
    }
}

/// A one-channel "descriptor" holding the intensities.
fn intensity_descriptor(img: &Image) -> Descriptor {
    Descriptor { grid: img.grid.clone(), channels: 1, data: img.as_slice().to_vec() }
}
