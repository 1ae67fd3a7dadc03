//! The pure-Rust core of the Python module: everything between "arrays in memory" and
//! "arrays out", done as the command line does it after reading its files.
//!
//! - [`resolve_params`]: preset, then a parameter table, then keyword overrides (the order of
//!   `sinew register --preset … --config … --lambda …`).
//! - [`register`]: the checks of `sinew register` on its inputs, then what the command does:
//!   [`sinew_solve::register_scans`] (each scan on its own grid and in its own world frame:
//!   working grid, initial alignment, linear stage, deformable stage, with the command's
//!   [`ScanOptions`]), and on the fixed scan's native grid ([`sinew_solve::native_outputs`])
//!   the warped scan (padding = the moving scan's minimum), the warped labels (nearest
//!   neighbour), the Jacobian determinant and its statistics; Dice before/after, and a report
//!   with the command's fields (less the file names and the QC sheet).
//! - [`field_from_channel_last`], [`score`], [`mind_ssc`]: the field, scoring and descriptor
//!   conventions of `sinew score` / `sinew warp`.

use std::time::Instant;

use ndarray::{Array4, ArrayView3, ArrayView4};
use serde::Serialize;
use serde_json::{Map, Value};
use sinew_grid::{Affine, Field, Grid, Image, LabelMap, Volume, WorldPoint};
use sinew_solve::frames::InitialAlignment;
pub use sinew_solve::nan::{NanPolicy, NanRecord};
use sinew_solve::scans::GridSummary;
pub use sinew_solve::{with_threads, InitialMode, ScanOptions, Timings};
use sinew_solve::{Progress, RegParams};

use crate::error::{input, ApiError};
pub use sinew_score::{dice_report, DiceReport, CAUTION};

/// Fixed-point iterations used to invert a push field (as `sinew score`).
pub const INVERT_ITERATIONS: usize = 20;

/// Units of a field's vectors.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Units {
    /// Voxels along the array axes `(i, j, k)`.
    Voxel,
    /// Millimetres along the world axes: `u_mm = M · u_vox`, `M` the affine's linear part.
    Mm,
}

impl Units {
    /// `"voxel"` or `"mm"`; anything else is an error naming `what`.
    pub fn parse(s: &str, what: &str) -> Result<Units, ApiError> {
        match s {
            "voxel" | "voxels" | "vox" => Ok(Units::Voxel),
            "mm" => Ok(Units::Mm),
            other => Err(input(format!("{what}: units must be \"voxel\" or \"mm\", got {other:?}"))),
        }
    }
}

/// The grid of an array of `shape` with voxel-to-world matrix `affine` (4×4, world mm).
pub fn grid(shape: [usize; 3], affine: [[f64; 4]; 4], what: &str) -> Result<Grid, ApiError> {
    if affine[3] != [0.0, 0.0, 0.0, 1.0] {
        return Err(input(format!("{what}: the affine's last row must be [0, 0, 0, 1], got {:?}", affine[3])));
    }
    Grid::new(shape, Affine::from_4x4(affine)).map_err(|e| input(format!("{what}: {e}")))
}

/// An image from an array view of any layout (copied into standard order).
pub fn image(grid: Grid, data: ArrayView3<'_, f32>) -> Result<Image, ApiError> {
    Ok(Volume::new(grid, data.as_standard_layout().into_owned())?)
}

/// A label map from an array view of any layout (copied into standard order).
pub fn labels(grid: Grid, data: ArrayView3<'_, u16>) -> Result<LabelMap, ApiError> {
    Ok(Volume::new(grid, data.as_standard_layout().into_owned())?)
}

/// A scan must hold no NaN or infinite voxel (the message names `what`).
pub fn check_finite(img: &Image, what: &str) -> Result<(), ApiError> {
    let bad = img.count_non_finite();
    if bad > 0 {
        return Err(input(format!(
            "{what}: {bad} voxels are NaN or infinite; clean the scan first (e.g. replace them by the background value)"
        )));
    }
    Ok(())
}

/// The checks `sinew register` makes on a scan: no NaN or infinite voxel, not constant.
pub fn check_scan(img: &Image, what: &str) -> Result<(), ApiError> {
    check_finite(img, what)?;
    if let Some((lo, hi)) = img.finite_range() {
        if lo == hi {
            return Err(input(format!("{what}: the image is constant ({lo}); nothing to register")));
        }
    }
    Ok(())
}

/// A label map (or mask) must lie on its scan's grid.
fn check_on(l: &LabelMap, what: &str, img: &Image, img_what: &str) -> Result<(), ApiError> {
    if !l.grid.same_as(&img.grid, 1e-3) {
        return Err(input(format!(
            "{what}: grid {:?} does not match its scan {img_what} ({:?}); resample it onto the scan's grid first",
            l.grid.shape(),
            img.grid.shape()
        )));
    }
    Ok(())
}

/// Accepted spellings of parameter names that are not Python identifiers or that clash with
/// `register`'s own keywords: `lambda_` → `lambda`, `prealign` → `affine` (the linear stage),
/// `grid_spacing` → `grid_spacing_mm` (the command line's flag name).
pub const ALIASES: &[(&str, &str)] =
    &[("lambda_", "lambda"), ("prealign", "affine"), ("grid_spacing", "grid_spacing_mm")];

/// Names of every parameter ([`RegParams`]'s fields).
pub fn parameter_names() -> Vec<String> {
    match serde_json::to_value(RegParams::default()) {
        Ok(Value::Object(m)) => m.keys().cloned().collect(),
        _ => unreachable!("RegParams serialises to a table"),
    }
}

/// The parameters of a registration: the preset, then `config` (a table of any fields of
/// the preset, named `config_name` in messages; unknown keys are errors), then `overrides`
/// (keyword arguments). As on the command line, changing `levels` or `finest_level`
/// pads or trims the per-level lists (`iterations`, `step_size`, `strides`) to the new count
/// of optimised levels by repeating the coarsest value or dropping the coarsest entries,
/// unless they are given too. The result is validated.
pub fn resolve_params(
    preset: &str,
    config: Option<&Value>,
    config_name: &str,
    overrides: &Map<String, Value>,
) -> Result<RegParams, ApiError> {
    let mut p = RegParams::preset(preset).ok_or_else(|| {
        ApiError::Parameter(format!("unknown preset {preset:?} (choose one of {})", sinew_solve::PRESETS.join(", ")))
    })?;
    if let Some(cfg) = config {
        if !cfg.is_object() {
            return Err(ApiError::Parameter(format!("{config_name}: expected a table of parameters")));
        }
        p = merged(&p, cfg).map_err(|e| ApiError::Parameter(format!("{config_name}: {e}")))?;
    }
    let names = parameter_names();
    let mut over = Map::new();
    for (k, v) in overrides {
        let key = ALIASES.iter().find(|(a, _)| a == k).map_or(k.as_str(), |(_, n)| n);
        if !names.iter().any(|n| n == key) {
            return Err(ApiError::Parameter(format!("unknown parameter {k:?} (known: {})", names.join(", "))));
        }
        over.insert(key.to_string(), v.clone());
    }
    let levels_changed = over.contains_key("levels") || over.contains_key("finest_level");
    if levels_changed {
        let mut first = Map::new();
        for k in ["levels", "finest_level"] {
            if let Some(v) = over.remove(k) {
                first.insert(k.into(), v);
            }
        }
        p = merged(&p, &Value::Object(first)).map_err(|e| ApiError::Parameter(format!("parameters: {e}")))?;
        let n = p.optimised_levels();
        resize_last(&mut p.iterations, n);
        resize_last(&mut p.step_size, n);
        resize_last(&mut p.strides, n);
        resize_last(&mut p.lambda_scale, n);
    }
    // As the command line's --diffeomorphic: the mode with the settings it is accurate with,
    // before the other keywords (so an explicit `lambda_` still wins).
    if over.get("diffeomorphic") == Some(&Value::Bool(true)) {
        over.remove("diffeomorphic");
        p.make_diffeomorphic();
    }
    p = merged(&p, &Value::Object(over)).map_err(|e| ApiError::Parameter(format!("parameters: {e}")))?;
    p.validate().map_err(|e| match config {
        // As the command line: a table's validation error names the table.
        Some(_) => ApiError::Parameter(format!("{config_name}: parameters (with the keywords applied): {e}")),
        None => ApiError::Parameter(format!("parameters: {e}")),
    })?;
    Ok(p)
}

/// `p` with the fields of `over` replaced (tables merged key by key).
fn merged(p: &RegParams, over: &Value) -> Result<RegParams, serde_json::Error> {
    let base = serde_json::to_value(p)?;
    serde_json::from_value(merge_json(base, over.clone()))
}

fn merge_json(base: Value, over: Value) -> Value {
    match (base, over) {
        (Value::Object(mut b), Value::Object(o)) => {
            for (k, v) in o {
                let m = match b.remove(&k) {
                    Some(old) => merge_json(old, v),
                    None => v,
                };
                b.insert(k, m);
            }
            Value::Object(b)
        }
        (_, o) => o,
    }
}

/// Pads a per-level list by repeating its first (coarsest) value, or drops entries from the
/// front, to `n` entries (the command line's rule).
fn resize_last<T: Clone>(v: &mut Vec<T>, n: usize) {
    while v.len() > n {
        v.remove(0);
    }
    while v.len() < n {
        match v.first().cloned() {
            Some(first) => v.insert(0, first),
            None => return,
        }
    }
}

/// The inputs of one registration (the command line's, [`sinew_solve::PairScans`]).
pub use sinew_solve::PairScans as Inputs;

/// The checks `sinew register` makes after reading: finite, non-constant scans; labels and
/// mask on their scan's grid and not empty.
pub fn check_inputs(inputs: &Inputs) -> Result<(), ApiError> {
    check_scan(&inputs.fixed, "fixed")?;
    check_scan(&inputs.moving, "moving")?;
    for (l, what, img, img_what) in [
        (&inputs.fixed_labels, "fixed_labels", &inputs.fixed, "fixed"),
        (&inputs.moving_labels, "moving_labels", &inputs.moving, "moving"),
        (&inputs.mask, "mask", &inputs.fixed, "fixed"),
    ] {
        if let Some(l) = l {
            check_on(l, what, img, img_what)?;
        }
    }
    if let Some(m) = &inputs.mask {
        if m.as_slice().iter().all(|&v| v == 0) {
            return Err(input("mask: the mask is empty (no non-zero voxel)"));
        }
    }
    for (l, what) in [(&inputs.fixed_labels, "fixed_labels"), (&inputs.moving_labels, "moving_labels")] {
        if let Some(l) = l {
            if l.as_slice().iter().all(|&v| v == 0) {
                return Err(input(format!("{what}: the label map is empty (every voxel is 0, no label to score)")));
            }
        }
    }
    Ok(())
}

/// The report of one registration: the fields of `sinew register`'s `report.json` less the
/// input and output files.
#[derive(Serialize, Clone, Debug)]
pub struct Report {
    /// Always first: how to use (and not use) the result.
    pub caution: &'static str,
    /// sinew's version.
    pub sinew_version: &'static str,
    /// The parameters used.
    pub params: RegParams,
    /// What was done with NaN or infinite voxels (the policy and the counts).
    pub nan: NanRecord,
    /// Units of the returned field.
    pub field_units: Units,
    /// Worker threads.
    pub threads: usize,
    /// Working grid, initial alignment mode and anti-aliasing.
    pub scan: ScanOptions,
    /// Whether the moving scan lies on another grid than the fixed scan.
    pub moving_resampled: bool,
    /// The fixed scan's working grid (the registration's grid).
    pub working_grid: GridSummary,
    /// The moving scan's own working grid.
    pub moving_working_grid: GridSummary,
    /// True when the registration ran on the fixed scan's own grid.
    pub working_is_fixed_grid: bool,
    /// The initial alignment between the world frames (always computed; `applied` says
    /// whether it was used) and the body overlap before and after.
    pub initial_alignment: InitialAlignment,
    /// The whole linear part of the map (4×4 world mm, fixed point ↦ moving point): initial
    /// alignment then rigid/affine stage; the identity when neither ran. Part of the field.
    pub linear_map: [[f64; 4]; 4],
    /// The rigid/affine stage, when one ran (its `matrix` is the whole linear map).
    pub linear: Option<sinew_solve::affine::AffineEstimate>,
    /// Stage timings in seconds (no `load_s`, `write_s` or `peak_rss_mb`: nothing is read or
    /// written).
    pub timings: Timings,
    /// Per-level reports (coarsest first).
    pub levels: Vec<sinew_solve::LevelReport>,
    /// Jacobian statistics of the final field on the fixed grid.
    pub jacobian: sinew_transform::JacobianStats,
    /// Dice per label before and after (with both label maps).
    pub dice: Option<DiceReport>,
}

/// What [`register`] returns.
pub struct Output {
    /// The displacement field on the fixed grid (voxels, pull).
    pub field: Field,
    /// The moving scan warped onto the fixed grid.
    pub warped: Image,
    /// The moving labels warped onto the fixed grid (nearest neighbour).
    pub warped_labels: Option<LabelMap>,
    /// Jacobian determinant of `x + u(x)` on the fixed grid.
    pub jacdet: Image,
    /// The report.
    pub report: Report,
}

/// One registration, as `sinew register` does it once its files are read (see the module
/// documentation). NaN or infinite voxels of the scans are refused, padded or replaced as
/// `nan` says (`--nan`, [`sinew_solve::nan`]) before the checks. `observer` sees the solver's
/// progress events. Runs on the current rayon pool (see [`with_threads`]). The field is
/// formed whole on the fixed scan's native grid ([`sinew_solve::NativeField::to_field`]: 12
/// bytes per voxel).
pub fn register(
    mut inputs: Inputs,
    nan: NanPolicy,
    params: &RegParams,
    scan: &ScanOptions,
    units: Units,
    observer: &mut dyn FnMut(Progress),
) -> Result<Output, ApiError> {
    let t_all = Instant::now();
    let nan =
        sinew_solve::nan::apply_to_pair(nan, &mut inputs).map_err(|e| input(format!("{}: {}", e.which, e.error)))?;
    let inputs = &inputs;
    check_inputs(inputs)?;
    params.validate().map_err(|e| ApiError::Parameter(format!("parameters: {e}")))?;
    if !(scan.working_spacing_mm.is_finite() && scan.working_spacing_mm >= 0.0) {
        return Err(input(format!(
            "working_spacing: {}: must be 0 or a positive number of mm",
            scan.working_spacing_mm
        )));
    }
    let mut timings = Timings::default();
    let moving_resampled = !inputs.fixed.grid.same_as(&inputs.moving.grid, 1e-3);
    let reg = sinew_solve::register_scans(&inputs.fixed, &inputs.moving, inputs.mask.as_ref(), params, scan, observer)?;
    timings.record(&reg);
    timings.register_s = t_all.elapsed().as_secs_f64();

    let (native, jacobian) = reg.native_results(&inputs.moving, inputs.moving_labels.as_ref(), &mut timings);

    let dice = match (&inputs.fixed_labels, &inputs.moving_labels, &native.warped_labels) {
        (Some(f), Some(m), Some(w)) => Some(dice_report(f, m, w)?),
        _ => None,
    };
    let field = reg.field.to_field();
    timings.total_s = t_all.elapsed().as_secs_f64();
    let report = Report {
        caution: CAUTION,
        sinew_version: env!("CARGO_PKG_VERSION"),
        params: params.clone(),
        nan,
        field_units: units,
        threads: rayon::current_num_threads(),
        scan: scan.clone(),
        moving_resampled,
        working_grid: reg.working.clone(),
        moving_working_grid: reg.moving_working.clone(),
        working_is_fixed_grid: reg.working_is_fixed_grid,
        linear: reg.linear_record(),
        initial_alignment: reg.initial,
        linear_map: reg.linear_map,
        timings,
        levels: reg.levels,
        jacobian,
        dice,
    };
    Ok(Output { field, warped: native.warped, warped_labels: native.warped_labels, jacdet: native.jacdet, report })
}

/// The scan options from the Python keywords: `working_spacing` (mm, 0 = the fixed scan's own
/// grid), `initial` (`"auto"`, `"centres"`, `"axes"` or `"off"`, as `--initial`) and
/// `antialias` (false = `--no-antialias`).
/// The spacing is checked by [`register`].
pub fn scan_options(working_spacing: f64, initial: &str, antialias: bool) -> Result<ScanOptions, ApiError> {
    let initial = match initial {
        "auto" => InitialMode::Auto,
        "centres" => InitialMode::Centres,
        "axes" => InitialMode::Axes,
        "off" => InitialMode::Off,
        other => {
            return Err(input(format!("initial: expected \"auto\", \"centres\", \"axes\" or \"off\", got {other:?}")))
        }
    };
    Ok(ScanOptions { working_spacing_mm: working_spacing, initial, antialias })
}

/// A field on `grid` from channel-last vectors `(nx, ny, nz, 3)` (any memory layout) in
/// `units`; mm vectors are converted with the inverse of the affine's linear part,
/// `u_vox = M⁻¹ · u_mm`. NaN or infinite vectors are refused.
pub fn field_from_channel_last(
    grid: Grid,
    data: ArrayView4<'_, f32>,
    units: Units,
    what: &str,
) -> Result<Field, ApiError> {
    let s = grid.shape();
    if data.shape() != [s[0], s[1], s[2], 3] {
        return Err(input(format!(
            "{what}: shape {:?} does not match the grid: expected {:?} (channel-last) or {:?} (channel-first)",
            data.shape(),
            [s[0], s[1], s[2], 3],
            [3, s[0], s[1], s[2]]
        )));
    }
    if data.iter().any(|v| !v.is_finite()) {
        return Err(input(format!("{what}: the field holds NaN or infinite vectors")));
    }
    let owned: Array4<f32> = data.as_standard_layout().into_owned();
    let f = match units {
        Units::Voxel => Field::from_voxel_channel_last(grid, &owned)?,
        Units::Mm => Field::from_world_mm(grid, &owned)?,
    };
    Ok(f)
}

/// A field as channel-last vectors `(nx, ny, nz, 3)` in `units`.
pub fn field_to_channel_last(f: &Field, units: Units) -> Array4<f32> {
    match units {
        Units::Voxel => f.to_voxel_channel_last(),
        Units::Mm => f.to_world_mm(),
    }
}

/// The result of [`score`]: `sinew score`'s figures.
#[derive(Serialize, Clone, Debug)]
pub struct ScoreResult {
    /// Dice before/after, surface distances, Jacobian statistics (with a field).
    pub score: sinew_score::PairScore,
    /// Landmark errors (with landmarks and a field).
    pub landmarks: Option<sinew_score::LandmarkErrors>,
    /// With a push field: the fixed-point inversion and its residual.
    pub inverted: Option<sinew_score::InversionReport>,
}

/// How the moving labels reach the fixed grid in [`score`].
pub enum ScoreWarp {
    /// A field on the fixed grid; `push` = it maps moving points forward and is inverted first.
    Field {
        /// The field.
        field: Field,
        /// Push (true) or pull (false, sinew's).
        push: bool,
    },
    /// Moving labels already on the fixed grid.
    Warped(LabelMap),
}

/// Scores one pair as `sinew score` does: Dice before/after per non-zero label of `fixed`,
/// HD95/HD/ASSD after (mm), the field's Jacobian statistics, and with landmarks (world mm)
/// the landmark errors `|x + u(x) − y|`.
pub fn score(
    fixed: &LabelMap,
    moving: &LabelMap,
    warp: ScoreWarp,
    landmarks: Option<(&[WorldPoint], &[WorldPoint])>,
) -> Result<ScoreResult, ApiError> {
    if fixed.as_slice().iter().all(|&v| v == 0) {
        return Err(input("fixed_labels: the label map is empty (every voxel is 0, no label to score)"));
    }
    match warp {
        ScoreWarp::Field { field, push } => {
            let (field, inverted) = if push {
                let inv = sinew_score::invert_push_field(&field, INVERT_ITERATIONS);
                (inv.field, Some(inv.report))
            } else {
                (field, None)
            };
            let score = sinew_score::score_pair(fixed, moving, sinew_score::Warp::Field(&field))?;
            let landmarks = match landmarks {
                Some((f, m)) => Some(sinew_score::landmark_errors(&field, f, m)?),
                None => None,
            };
            Ok(ScoreResult { score, landmarks, inverted })
        }
        ScoreWarp::Warped(w) => {
            if landmarks.is_some() {
                return Err(input("landmarks: need a field (not warped labels)"));
            }
            let score = sinew_score::score_pair(fixed, moving, sinew_score::Warp::Warped(&w))?;
            Ok(ScoreResult { score, landmarks: None, inverted: None })
        }
    }
}

/// MIND-SSC descriptors of `img` (radius and dilation in voxels), channel-last
/// `(nx, ny, nz, 12)`.
pub fn mind_ssc(img: &Image, radius: usize, dilation: usize) -> Result<Array4<f32>, ApiError> {
    if radius > 8 || dilation > 8 {
        return Err(input(format!("mind_ssc: radius {radius} / dilation {dilation} out of range (0..=8, 1..=8)")));
    }
    let p = sinew_features::MindParams::new(radius, dilation).map_err(|e| input(format!("mind_ssc: {e}")))?;
    let d = sinew_features::mind_ssc(img, &p);
    let [nx, ny, nz] = img.grid.shape();
    Ok(Array4::from_shape_vec((nx, ny, nz, d.channels), d.data).expect("descriptor size matches its grid"))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array3;

    fn blob(shape: [usize; 3], c: [f64; 3]) -> Array3<f32> {
        Array3::from_shape_fn(shape, |(i, j, k)| {
            let r2 = (i as f64 - c[0]).powi(2) + (j as f64 - c[1]).powi(2) + (k as f64 - c[2]).powi(2);
            (100.0 * (-r2 / 30.0).exp()) as f32
        })
    }

    #[test]
    fn params_follow_the_command_line_order() {
        // preset → table → keywords; changing levels resizes the per-level lists.
        let cfg = serde_json::json!({"lambda": 0.5, "iterations": [1, 2, 3, 4]});
        let mut over = Map::new();
        over.insert("lambda_".into(), serde_json::json!(0.25));
        over.insert("levels".into(), serde_json::json!(2));
        let p = resolve_params("fast", Some(&cfg), "config", &over).unwrap();
        assert_eq!(p.lambda, 0.25);
        assert_eq!(p.levels, 2);
        assert_eq!(p.iterations, vec![3, 4]);
        assert_eq!(p.strides.len(), 2);
        let mut bad = Map::new();
        bad.insert("lamda".into(), serde_json::json!(1));
        let e = resolve_params("default", None, "config", &bad).unwrap_err().to_string();
        assert!(e.starts_with("unknown parameter \"lamda\""), "{e}");
        let e = resolve_params("nope", None, "config", &Map::new()).unwrap_err().to_string();
        assert!(e.contains("unknown preset"), "{e}");
        let neg = serde_json::json!({"lambda": -1.0});
        let e = resolve_params("default", Some(&neg), "config", &Map::new()).unwrap_err().to_string();
        assert!(e.starts_with("config: parameters (with the keywords applied): invalid parameter lambda"), "{e}");
    }

    #[test]
    fn register_refuses_bad_inputs_with_one_line_messages() {
        let g = Grid::axis_aligned([12, 10, 8], [2.0; 3], [0.0; 3]);
        let fixed = Image::new(g.clone(), blob([12, 10, 8], [6.0, 5.0, 4.0])).unwrap();
        let mut moving = fixed.clone();
        moving.data[[1, 1, 1]] = f32::NAN;
        let inputs = Inputs { fixed: fixed.clone(), moving, fixed_labels: None, moving_labels: None, mask: None };
        let p = RegParams::preset("fast").unwrap();
        let e = register(inputs, NanPolicy::Refuse, &p, &ScanOptions::default(), Units::Voxel, &mut |_| {})
            .err()
            .unwrap()
            .to_string();
        assert_eq!(
            e,
            "moving: 1 voxels are NaN or infinite; clean the scan first (e.g. replace them by the background value) \
             or choose what to do with them (pad or a value)"
        );
        let inputs = Inputs {
            fixed: fixed.clone(),
            moving: fixed.clone(),
            fixed_labels: None,
            moving_labels: None,
            mask: Some(LabelMap::filled(g, 0)),
        };
        let e = register(inputs, NanPolicy::Refuse, &p, &ScanOptions::default(), Units::Voxel, &mut |_| {})
            .err()
            .unwrap()
            .to_string();
        assert_eq!(e, "mask: the mask is empty (no non-zero voxel)");
    }

    #[test]
    fn scan_keywords_are_the_command_line_flags() {
        // The defaults of `sinew register --working-spacing 2 --initial auto` (anti-aliasing on).
        assert_eq!(scan_options(2.0, "auto", true).unwrap(), ScanOptions::default());
        let o = scan_options(0.0, "axes", false).unwrap();
        assert_eq!((o.working_spacing_mm, o.initial, o.antialias), (0.0, InitialMode::Axes, false));
        let e = scan_options(2.0, "center", true).unwrap_err().to_string();
        assert_eq!(e, "initial: expected \"auto\", \"centres\", \"axes\" or \"off\", got \"center\"");
        let g = Grid::axis_aligned([12, 10, 8], [2.0; 3], [0.0; 3]);
        let fixed = Image::new(g, blob([12, 10, 8], [6.0, 5.0, 4.0])).unwrap();
        let inputs =
            Inputs { fixed: fixed.clone(), moving: fixed, fixed_labels: None, moving_labels: None, mask: None };
        let bad = ScanOptions { working_spacing_mm: -1.0, ..ScanOptions::default() };
        let p = RegParams::preset("fast").unwrap();
        let e = register(inputs, NanPolicy::Refuse, &p, &bad, Units::Voxel, &mut |_| {}).err().unwrap().to_string();
        assert_eq!(e, "working_spacing: -1: must be 0 or a positive number of mm");
    }

    #[test]
    fn field_units_round_trip() {
        // Exact maths: u_mm = M·u_vox with M = diag(2, 3, 4) here, so mm / spacing = voxels.
        let g = Grid::axis_aligned([4, 3, 2], [2.0, 3.0, 4.0], [1.0, 2.0, 3.0]);
        let vox = Array4::from_shape_fn((4, 3, 2, 3), |(i, j, k, d)| (i + j + k + d) as f32 * 0.5);
        let f = field_from_channel_last(g.clone(), vox.view(), Units::Voxel, "field").unwrap();
        let mm = field_to_channel_last(&f, Units::Mm);
        for ((i, j, k, d), v) in mm.indexed_iter() {
            assert_eq!(*v, vox[[i, j, k, d]] * [2.0, 3.0, 4.0][d]);
        }
        let back = field_from_channel_last(g.clone(), mm.view(), Units::Mm, "field").unwrap();
        assert_eq!(field_to_channel_last(&back, Units::Voxel), vox);
        // A non-contiguous view (reversed first axis) is copied, not misread.
        let rev = vox.slice(ndarray::s![..;-1, .., .., ..]);
        let f2 = field_from_channel_last(g, rev, Units::Voxel, "field").unwrap();
        assert_eq!(field_to_channel_last(&f2, Units::Voxel)[[0, 0, 0, 0]], vox[[3, 0, 0, 0]]);
    }
}
