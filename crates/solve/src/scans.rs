//! Registering two scans as they come: each on its own native grid, in its own world frame.
//!
//! ```text
//! fixed (native) ──> working grid W (about 2 mm) ──────────────┐
//! moving (native) ─> its own working grid ─> bodies ─> T₀ ─> rigid/affine A ─> moving on W
//!                                                                │
//!                          register(fixed on W, moving on W) ─> u on W
//!              field on the fixed native grid = A ∘ (x + u(x)), upsampled and composed exactly
//! ```
//! 1. **Working grids.** Each scan is brought to [`working_grid`]: the axes finer than the
//!    working spacing are resampled to about that spacing over the same field of view (with
//!    the anti-aliasing prefilter of [`sinew_grid::resample::resample_image_antialiased`]
//!    unless switched off); thicker axes (thick slices) are kept as they are, never
//!    interpolated finer. A scan already at about the working spacing is used as it is.
//! 2. **Initial alignment** ([`crate::frames`]) between the two working images, each on its
//!    own grid, so nothing outside the fixed field of view has been cut away yet.
//! 3. **Linear stage** ([`crate::affine::estimate`]) from `T₀`, between the fixed working image
//!    and the moving working image on its own grid: the rigid or affine mode asked for, or
//!    rigid when the initial alignment was applied and none was asked for.
//! 4. The moving working image is resampled through the linear map `A` onto the fixed working
//!    grid `W`, and the deformable stage ([`crate::register`]) finds `u` on `W`.
//! 5. The field is carried to the fixed scan's native grid ([`sinew_grid::resample::resample_field`],
//!    which keeps the displacement in mm) and composed with `A` exactly
//!    ([`crate::affine::compose_after`]): for fixed voxel `x`, `G_f·(x + u(x))` is the moving
//!    scan's world point. This happens block by block where the native field is used
//!    ([`NativeField`]): the whole native field is never held.
//!
//! When the fixed and moving scans share one grid that is already the working grid and the
//! initial alignment is not needed, this is exactly [`crate::register`] on them.

use std::time::Instant;

use serde::Serialize;
use sinew_grid::{resample, Affine, Border, Grid, Image, LabelMap};
use sinew_transform::JacobianStats;

use crate::affine::{self, AffineEstimate, AffineParams};
use crate::driver::register_from;
use crate::frames::{self, InitialAlignment, InitialMode};
use crate::native::{native_outputs, NativeField, NativeOutputs};
use crate::{register, AffineMode, LevelReport, Progress, RegParams, SolveError};

/// Options of [`register_scans`] beyond the registration parameters.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ScanOptions {
    /// Working spacing in mm (see [`working_grid`]); 0 registers on the fixed scan's own grid.
    pub working_spacing_mm: f64,
    /// When the initial alignment is applied.
    pub initial: InitialMode,
    /// Prefilter (Gaussian) when a scan is brought to a coarser working grid.
    pub antialias: bool,
}

impl Default for ScanOptions {
    /// 2 mm working grid, initial alignment when the frames disagree, anti-aliasing on.
    fn default() -> Self {
        ScanOptions { working_spacing_mm: DEFAULT_WORKING_MM, initial: InitialMode::Auto, antialias: true }
    }
}

/// The default working spacing (mm).
pub const DEFAULT_WORKING_MM: f64 = 2.0;

/// An axis is resampled to the working spacing only when its spacing is below this share of it.
pub const KEEP_RATIO: f64 = 0.8;

/// The working grid of `grid` for a working spacing `s` mm: along each axis whose spacing is
/// below `0.8·s` ([`KEEP_RATIO`]), `n' = max(1, round(n·spacing/s))` voxels over the same field
/// of view (voxel corners kept, [`Grid::with_shape`]); other axes (already about `s` or
/// thicker) keep their voxels. `s = 0` or no axis to change gives `grid` itself.
pub fn working_grid(grid: &Grid, s: f64) -> Grid {
    if s <= 0.0 {
        return grid.clone();
    }
    let sp = grid.spacing();
    let n = grid.shape();
    let shape: [usize; 3] = std::array::from_fn(|d| {
        if sp[d] < KEEP_RATIO * s {
            ((n[d] as f64 * sp[d] / s).round() as usize).max(1)
        } else {
            n[d]
        }
    });
    if shape == n {
        return grid.clone();
    }
    grid.with_shape(shape).expect("non-empty shape")
}

/// A grid's shape and spacing, for reports.
#[derive(Clone, Debug, Serialize)]
pub struct GridSummary {
    /// Voxels along i, j, k.
    pub shape: [usize; 3],
    /// Spacing in mm along i, j, k.
    pub spacing_mm: [f64; 3],
}

impl From<&Grid> for GridSummary {
    fn from(g: &Grid) -> Self {
        GridSummary { shape: g.shape(), spacing_mm: g.spacing() }
    }
}

/// The scans of one registration with their optional label maps and mask: what
/// `sinew register` reads and what the Python module's `register` is given.
#[derive(Clone, Debug)]
pub struct PairScans {
    /// Fixed scan: the field lives on its grid.
    pub fixed: Image,
    /// Moving scan, on its own grid.
    pub moving: Image,
    /// Labels of the fixed scan (on its grid).
    pub fixed_labels: Option<LabelMap>,
    /// Labels of the moving scan (on its grid).
    pub moving_labels: Option<LabelMap>,
    /// Mask on the fixed grid (non-zero = inside): only voxels inside drive the data term.
    pub mask: Option<LabelMap>,
}

/// The result of [`register_scans`].
#[derive(Clone, Debug)]
pub struct ScanRegistration {
    /// The displacement field on the fixed scan's native grid (voxels, pull:
    /// `warped(x) = moving(x + u(x))`, `x + u(x)` in fixed voxel coordinates, which may lie
    /// outside the fixed grid when the frames differ), evaluated block by block from the
    /// working-grid field ([`NativeField::to_field`] for the whole field).
    pub field: NativeField,
    /// The fixed scan on the working grid (the fixed scan itself when the working grid is its
    /// own grid): for the QC sheet.
    pub fixed_working: Image,
    /// The moving scan on the working grid through the linear map alone, NaN outside the
    /// moving scan (padding, not border streaks): the QC sheet's "before" panel.
    pub moving_before: Image,
    /// The fixed working grid.
    pub working: GridSummary,
    /// The moving scan's own working grid.
    pub moving_working: GridSummary,
    /// True when the registration ran on the fixed native grid itself.
    pub working_is_fixed_grid: bool,
    /// The initial alignment (with the overlap after the linear stage).
    pub initial: InitialAlignment,
    /// The linear stage, when one ran.
    pub linear: Option<AffineEstimate>,
    /// The whole linear part `A` (4×4, world mm, fixed point ↦ moving point) included in
    /// `field`: initial alignment then linear stage.
    pub linear_map: [[f64; 4]; 4],
    /// Per-level reports of the deformable stage (coarsest first).
    pub levels: Vec<LevelReport>,
    /// Seconds bringing both scans to their working grids.
    pub working_s: f64,
    /// Seconds for the bodies and the initial alignment.
    pub initial_s: f64,
    /// Seconds for the linear stage.
    pub affine_s: f64,
    /// Seconds building the pyramids.
    pub pyramid_s: f64,
    /// Seconds carrying the field to the native grid (and composing `A`); with the native
    /// field evaluated on demand, only the working grid's part of the work.
    pub upsample_s: f64,
}

impl ScanRegistration {
    /// The linear stage as a report records it: its `matrix` replaced by the whole linear map
    /// [`ScanRegistration::linear_map`] (the stage ran after the initial alignment, so its own
    /// matrix alone is not the map). `None` when no stage ran.
    pub fn linear_record(&self) -> Option<AffineEstimate> {
        self.linear.clone().map(|mut e| {
            e.matrix = self.linear_map;
            e
        })
    }
}

/// Stage timings of one registration in seconds, as `report.json` (the command line) and the
/// Python module's report give them. The entries about files (`load_s`, `write_s`) and the
/// process (`peak_rss_mb`) are left out of the report when not set.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Timings {
    /// Reading the inputs.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub load_s: Option<f64>,
    /// Bringing both scans to their working grids (with the anti-aliasing prefilter).
    pub resample_s: f64,
    /// Body masks and the initial alignment.
    pub initial_s: f64,
    /// The linear (rigid/affine) stage.
    pub affine_s: f64,
    /// Building the pyramids.
    pub pyramid_s: f64,
    /// Descriptors, all levels.
    pub descriptors_s: f64,
    /// Optimisation, all levels.
    pub optimise_s: f64,
    /// Per-level Jacobian checks.
    pub level_jacobian_s: f64,
    /// Upsampling the field to the input grid.
    pub upsample_s: f64,
    /// From the start (with `load_s`, of loading) to the field in memory.
    pub register_s: f64,
    /// Warping the scan and labels.
    pub warp_s: f64,
    /// Final Jacobian and statistics.
    pub jacobian_s: f64,
    /// Writing the outputs.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub write_s: Option<f64>,
    /// Wall time of the whole command (or call).
    pub total_s: f64,
    /// Peak resident memory of the process in MB.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub peak_rss_mb: Option<f64>,
}

impl Timings {
    /// Records the stages of `reg`: the working grids, the initial alignment, the linear
    /// stage, the pyramids, the upsampling, and the per-level descriptors, optimisation and
    /// Jacobian checks summed over the levels (coarsest first).
    pub fn record(&mut self, reg: &ScanRegistration) {
        self.resample_s = reg.working_s;
        self.initial_s = reg.initial_s;
        self.affine_s = reg.affine_s;
        self.pyramid_s = reg.pyramid_s;
        self.upsample_s = reg.upsample_s;
        for l in &reg.levels {
            self.descriptors_s += l.descriptors_s;
            self.optimise_s += l.optimise_s;
            self.level_jacobian_s += l.jacobian_s;
        }
    }
}

impl ScanRegistration {
    /// The outputs on the fixed scan's native grid: [`native_outputs`] of the moving scan
    /// (padding = its finite minimum) and its labels, and the statistics of the Jacobian
    /// determinant ([`sinew_transform::jacobian_stats`], every voxel); the seconds of each go
    /// into `timings.warp_s` and `timings.jacobian_s`.
    pub fn native_results(
        &self,
        moving: &Image,
        moving_labels: Option<&LabelMap>,
        timings: &mut Timings,
    ) -> (NativeOutputs, JacobianStats) {
        let t = Instant::now();
        let pad = moving.finite_range().map_or(0.0, |r| r.0);
        let native = native_outputs(&self.field, moving, pad, moving_labels);
        timings.warp_s = t.elapsed().as_secs_f64();
        let t = Instant::now();
        let jacobian = sinew_transform::jacobian_stats(&native.jacdet, None);
        timings.jacobian_s = t.elapsed().as_secs_f64();
        (native, jacobian)
    }
}

/// A worker pool that [`with_threads`] could not start.
#[derive(Debug, thiserror::Error)]
pub enum ThreadsError {
    /// Zero threads were asked for.
    #[error("threads must be at least 1")]
    Zero,
    /// The operating system refused the threads.
    #[error("starting {threads} worker threads: {why}")]
    Start {
        /// Threads asked for.
        threads: usize,
        /// The reason given.
        why: String,
    },
}

/// Runs `f` on a pool of `threads` workers, or on the current pool (all cores unless the
/// caller made another) when `None`. The results do not depend on the thread count (sums per
/// slab are added in slab order); only the time does.
pub fn with_threads<T: Send, E: From<ThreadsError> + Send>(
    threads: Option<usize>,
    f: impl FnOnce() -> Result<T, E> + Send,
) -> Result<T, E> {
    match threads {
        None => f(),
        Some(0) => Err(ThreadsError::Zero.into()),
        Some(n) => rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build()
            .map_err(|e| ThreadsError::Start { threads: n, why: e.to_string() })?
            .install(f),
    }
}

fn to_working(img: &Image, grid: &Grid, antialias: bool) -> Option<Image> {
    if grid.same_as(&img.grid, 1e-9) {
        return None;
    }
    Some(if antialias {
        resample::resample_image_antialiased(img, grid, Border::Nearest)
    } else {
        resample::resample_image(img, grid, Border::Nearest)
    })
}

/// Registers `moving` to `fixed`, each on its own grid and in its own world frame (see the
/// module docs). `mask` lies on the fixed grid (non-zero = inside the data term).
pub fn register_scans(
    fixed: &Image,
    moving: &Image,
    mask: Option<&LabelMap>,
    params: &RegParams,
    opts: &ScanOptions,
    observer: &mut dyn FnMut(Progress),
) -> Result<ScanRegistration, SolveError> {
    params.validate()?;
    if !(opts.working_spacing_mm >= 0.0 && opts.working_spacing_mm.is_finite()) {
        return Err(SolveError::Parameter {
            name: "working_spacing_mm",
            why: format!("{} (must be 0 or a positive number of mm)", opts.working_spacing_mm),
        });
    }
    crate::driver::ensure_finite(fixed, moving)?;
    if let Some(m) = mask {
        fixed.grid.ensure_same(&m.grid)?;
    }
    // `InitialMode::Off` trusts the world frames as they are: nothing found from the body
    // masks moves the moving scan, so the body-moments start is off too.
    let without_body;
    let params = if opts.initial == InitialMode::Off && params.affine == AffineMode::Body {
        without_body = RegParams { affine: AffineMode::None, ..params.clone() };
        &without_body
    } else {
        params
    };
    let t = Instant::now();
    let wf = working_grid(&fixed.grid, opts.working_spacing_mm);
    let wm = working_grid(&moving.grid, opts.working_spacing_mm);
    let fixed_w_own = to_working(fixed, &wf, opts.antialias);
    let moving_w_own = to_working(moving, &wm, opts.antialias);
    let fixed_w = fixed_w_own.as_ref().unwrap_or(fixed);
    let moving_w = moving_w_own.as_ref().unwrap_or(moving);
    let working_s = t.elapsed().as_secs_f64();

    let t = Instant::now();
    let (mut initial, fmask, mmask) = frames::initial_alignment(fixed_w, moving_w, opts.initial);
    let initial_s = t.elapsed().as_secs_f64();
    let working_is_fixed_grid = fixed_w_own.is_none();

    let mask_w = mask.map(|m| if working_is_fixed_grid { m.clone() } else { resample::resample_labels(m, &wf) });
    // Frames agree and both scans share one working grid (always so for two scans on one
    // grid): the linear stage, if asked for, runs inside `register`, which starts the field
    // from its map and samples the moving working image itself. (Resampling the moving image
    // through A first blurs it; measured on the real chest CT of the accuracy benchmark
    // under a known 10 mm warp with `--affine affine`: 0.73 mm mean endpoint error that way.)
    if !initial.applied && moving_w.grid.same_as(&wf, 1e-3) {
        // The body-moments start comes from the bodies just found (not found again).
        let t = Instant::now();
        let body = (params.affine == AffineMode::Body)
            .then(|| affine::body_map_of(fixed_w, &fmask, &initial.fixed_body, moving_w, &mmask, &initial.moving_body));
        let body_s = t.elapsed().as_secs_f64();
        let reg = register_from(fixed_w, moving_w, mask_w.as_ref(), params, body, observer)?;
        let a = reg.affine.as_ref().map_or(Affine::IDENTITY, |e| e.affine());
        initial.overlap_final = Some(frames::overlap(fixed_w, &fmask, moving_w, &mmask, &a));
        let moving_before = affine::apply_to_image(moving_w, &a, &wf, f32::NAN);
        let t = Instant::now();
        let field = if working_is_fixed_grid {
            NativeField::full(reg.field)
        } else {
            // The field holds A: take it out (`A⁻¹·(x + v(x)) − x`) so that the native field
            // composes it exactly after upsampling.
            let mut f = reg.field;
            if a != Affine::IDENTITY {
                affine::compose_after(&mut f, &a.inverse().expect("the linear map is invertible"));
            }
            NativeField::upsampled(f, &fixed.grid, &a)
        };
        let upsample_s = reg.upsample_s + t.elapsed().as_secs_f64();
        return Ok(ScanRegistration {
            field,
            fixed_working: fixed_w_own.unwrap_or_else(|| fixed.clone()),
            moving_before,
            working: (&wf).into(),
            moving_working: (&wm).into(),
            working_is_fixed_grid,
            initial,
            linear_map: a.to_4x4(),
            linear: reg.affine,
            levels: reg.levels,
            working_s,
            initial_s,
            affine_s: body_s + reg.affine_s,
            pyramid_s: reg.pyramid_s,
            upsample_s,
        });
    }

    let t0 = initial.affine();
    let mode = match (params.affine, initial.applied) {
        (AffineMode::None | AffineMode::Body, true) => AffineMode::Rigid,
        (m, _) => m,
    };
    let t = Instant::now();
    let (linear, a) = if mode == AffineMode::None {
        (None, t0)
    } else if mode == AffineMode::Body {
        // Only when the initial alignment was not applied (else the mode is rigid): the
        // moving working image is where the bodies were just found, so they are not found again.
        let est = affine::body_map_of(fixed_w, &fmask, &initial.fixed_body, moving_w, &mmask, &initial.moving_body);
        let a = t0.compose(&est.affine());
        (Some(est), a)
    } else {
        // The moving working image with its world coordinates pulled back through T₀, so the
        // linear stage starts from the initial alignment: voxel p sits at T₀⁻¹·G_m·p.
        let t0_inv = t0.inverse().expect("the initial alignment is invertible");
        let relabelled_grid = Grid::new(wm.shape(), t0_inv.compose(moving_w.grid.affine()))?;
        let relabelled = Image { grid: relabelled_grid, data: moving_w.data.clone() };
        let est = affine::estimate(fixed_w, &relabelled, mask_w.as_ref(), &AffineParams::new(mode))?;
        let a = t0.compose(&est.affine());
        (Some(est), a)
    };
    let affine_s = t.elapsed().as_secs_f64();
    initial.overlap_final = Some(frames::overlap(fixed_w, &fmask, moving_w, &mmask, &a));
    drop((fmask, mmask));

    // The moving scan on W through A: voxel p of W samples the moving scan at A·G_W·p.
    let through = Grid::new(wf.shape(), a.compose(wf.affine()))?;
    let mut moving_on_w = resample::resample_image(moving_w, &through, Border::Nearest);
    moving_on_w.grid = wf.clone();
    let moving_before = affine::apply_to_image(moving_w, &a, &wf, f32::NAN);
    drop(moving_w_own);
    let deformable = RegParams { affine: AffineMode::None, ..params.clone() };
    let reg = register(fixed_w, &moving_on_w, mask_w.as_ref(), &deformable, observer)?;
    drop((moving_on_w, mask_w));
    let fixed_working = fixed_w_own.unwrap_or_else(|| fixed.clone());

    let t = Instant::now();
    let field = if working_is_fixed_grid {
        let mut f = reg.field;
        if a != Affine::IDENTITY {
            affine::compose_after(&mut f, &a);
        }
        NativeField::full(f)
    } else {
        NativeField::upsampled(reg.field, &fixed.grid, &a)
    };
    let upsample_s = reg.upsample_s + t.elapsed().as_secs_f64();
    Ok(ScanRegistration {
        field,
        fixed_working,
        moving_before,
        working: (&wf).into(),
        moving_working: (&wm).into(),
        working_is_fixed_grid,
        initial,
        linear,
        linear_map: a.to_4x4(),
        levels: reg.levels,
        working_s,
        initial_s,
        affine_s,
        pyramid_s: reg.pyramid_s,
        upsample_s,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn working_grid_keeps_thick_and_two_mm_axes() {
        let g = Grid::axis_aligned([512, 512, 48], [0.57, 0.57, 5.0], [0.0; 3]);
        let w = working_grid(&g, 2.0);
        assert_eq!(w.shape(), [146, 146, 48]);
        let sp = w.spacing();
        approx::assert_abs_diff_eq!(sp[0], 0.57 * 512.0 / 146.0, epsilon = 1e-9);
        assert_eq!(sp[2], 5.0);
        // A 2 mm grid is its own working grid (the demo's case).
        let d = Grid::axis_aligned([144, 112, 192], [2.0; 3], [1.0, 2.0, 3.0]);
        assert_eq!(working_grid(&d, 2.0), d);
        assert_eq!(working_grid(&g, 0.0), g);
    }
}
