//! The PyO3 bindings: module `sinew._sinew`. The public Python API (keyword handling,
//! nibabel images, dtypes, batches) lives in `python/sinew/__init__.py`; these functions take
//! arrays of exactly the dtype and rank they need, release the GIL for the work
//! ([`Python::detach`]) and raise `ValueError` with the one-line message of an [`ApiError`].

use std::sync::Mutex;

use ndarray::{ArrayView2, ArrayView3, ArrayView4};
use numpy::{IntoPyArray, PyReadonlyArray2, PyReadonlyArray3, PyReadonlyArray4};
use pyo3::exceptions::PyValueError;
use pyo3::prelude::*;
use pyo3::types::PyDict;
use sinew_grid::{Border, Grid, WorldPoint};
use sinew_solve::Stage;

use crate::core::{self, Inputs, ScoreWarp, Units};
use crate::ApiError;

fn value_error(e: ApiError) -> PyErr {
    PyValueError::new_err(e.to_string())
}

/// Runs `f` without the GIL on `threads` workers ([`core::with_threads`]); an error becomes a
/// `ValueError` with its one-line message.
fn detached<T: Send>(
    py: Python<'_>,
    threads: Option<usize>,
    f: impl FnOnce() -> Result<T, ApiError> + Send,
) -> PyResult<T> {
    py.detach(|| core::with_threads(threads, f)).map_err(value_error)
}

fn shape3<T>(a: &ArrayView3<'_, T>) -> [usize; 3] {
    let s = a.shape();
    [s[0], s[1], s[2]]
}

/// A 4×4 matrix from a (4, 4) float64 array.
fn matrix(a: ArrayView2<'_, f64>, what: &str) -> Result<[[f64; 4]; 4], ApiError> {
    if a.shape() != [4, 4] {
        return Err(ApiError::Input(format!("{what}: the affine must be a 4x4 matrix, got shape {:?}", a.shape())));
    }
    let mut m = [[0.0; 4]; 4];
    for ((r, c), v) in a.indexed_iter() {
        m[r][c] = *v;
    }
    Ok(m)
}

fn grid_of(shape: [usize; 3], affine: ArrayView2<'_, f64>, what: &str) -> Result<Grid, ApiError> {
    core::grid(shape, matrix(affine, what)?, what)
}

fn json_value(text: &str, what: &str) -> Result<serde_json::Value, ApiError> {
    serde_json::from_str(text).map_err(|e| ApiError::Parameter(format!("{what}: {e}")))
}

/// Registers `moving` to `fixed` (see `sinew.register`). Returns a dict of arrays and the
/// report as JSON text.
#[pyfunction]
#[pyo3(signature = (fixed, fixed_affine, moving, moving_affine, fixed_labels=None, moving_labels=None,
    mask=None, preset="default", config_json=None, config_name="config", params_json="{}", units="voxel",
    working_spacing=sinew_solve::scans::DEFAULT_WORKING_MM, initial="auto", antialias=true, nan="refuse",
    threads=None, progress=None))]
#[allow(clippy::too_many_arguments)]
fn register<'py>(
    py: Python<'py>,
    fixed: PyReadonlyArray3<'py, f32>,
    fixed_affine: PyReadonlyArray2<'py, f64>,
    moving: PyReadonlyArray3<'py, f32>,
    moving_affine: PyReadonlyArray2<'py, f64>,
    fixed_labels: Option<PyReadonlyArray3<'py, u16>>,
    moving_labels: Option<PyReadonlyArray3<'py, u16>>,
    mask: Option<PyReadonlyArray3<'py, u16>>,
    preset: &str,
    config_json: Option<&str>,
    config_name: &str,
    params_json: &str,
    units: &str,
    working_spacing: f64,
    initial: &str,
    antialias: bool,
    nan: &str,
    threads: Option<usize>,
    progress: Option<Py<PyAny>>,
) -> PyResult<Bound<'py, PyDict>> {
    let (fv, fa, mv, ma) = (fixed.as_array(), fixed_affine.as_array(), moving.as_array(), moving_affine.as_array());
    let flv = fixed_labels.as_ref().map(|a| a.as_array());
    let mlv = moving_labels.as_ref().map(|a| a.as_array());
    let mkv = mask.as_ref().map(|a| a.as_array());
    let callback_error: Mutex<Option<PyErr>> = Mutex::new(None);
    let result = py.detach(|| {
        let units = Units::parse(units, "units")?;
        let scan = core::scan_options(working_spacing, initial, antialias)?;
        let nan = core::NanPolicy::parse(nan).map_err(|e| ApiError::Input(format!("nan: {e}")))?;
        let config = config_json.map(|c| json_value(c, config_name)).transpose()?;
        let overrides = match json_value(params_json, "params")? {
            serde_json::Value::Object(m) => m,
            _ => return Err(ApiError::Parameter("params: expected keyword parameters".into())),
        };
        let params = core::resolve_params(preset, config.as_ref(), config_name, &overrides)?;
        let fixed_grid = grid_of(shape3(&fv), fa, "fixed")?;
        let moving_grid = grid_of(shape3(&mv), ma, "moving")?;
        let on = |l: Option<ArrayView3<'_, u16>>, g: &Grid, what: &str, scan: &str| {
            l.map(|l| {
                if shape3(&l) != g.shape() {
                    return Err(ApiError::Input(format!(
                        "{what}: grid {:?} does not match its scan {scan} ({:?}); resample it onto the scan's grid first",
                        l.shape(),
                        g.shape()
                    )));
                }
                core::labels(g.clone(), l)
            })
            .transpose()
        };
        let inputs = Inputs {
            fixed_labels: on(flv, &fixed_grid, "fixed_labels", "fixed")?,
            moving_labels: on(mlv, &moving_grid, "moving_labels", "moving")?,
            mask: on(mkv, &fixed_grid, "mask", "fixed")?,
            fixed: core::image(fixed_grid, fv)?,
            moving: core::image(moving_grid, mv)?,
        };
        core::with_threads(threads, || {
            let mut observer = |p: sinew_solve::Progress| {
                let Some(cb) = progress.as_ref() else { return };
                let mut slot = callback_error.lock().expect("callback error slot");
                if slot.is_some() {
                    return;
                }
                let stage = match p.stage {
                    Stage::Pyramid => "pyramid",
                    Stage::Descriptors => "descriptors",
                    Stage::Optimise => "optimise",
                    Stage::Jacobian => "jacobian",
                };
                Python::attach(|py| {
                    if let Err(e) = cb.call1(py, (p.level, stage, p.iteration, p.iterations)) {
                        *slot = Some(e);
                    }
                });
            };
            let out = core::register(inputs, nan, &params, &scan, units, &mut observer)?;
            let field = core::field_to_channel_last(&out.field, units);
            let report = serde_json::to_string(&out.report).expect("the report serialises");
            Ok((field, out.warped.data, out.warped_labels.map(|l| l.data), out.jacdet.data, report))
        })
    });
    if let Some(e) = callback_error.into_inner().expect("callback error slot") {
        return Err(e);
    }
    let (field, warped, warped_labels, jacdet, report) = result.map_err(value_error)?;
    let d = PyDict::new(py);
    d.set_item("field", field.into_pyarray(py))?;
    d.set_item("warped", warped.into_pyarray(py))?;
    d.set_item("warped_labels", warped_labels.map(|l| l.into_pyarray(py)))?;
    d.set_item("jacobian_determinant", jacdet.into_pyarray(py))?;
    d.set_item("report_json", report)?;
    Ok(d)
}

fn field_on(
    field: ArrayView4<'_, f32>,
    affine: ArrayView2<'_, f64>,
    units: &str,
) -> Result<sinew_grid::Field, ApiError> {
    let s = field.shape();
    if s.len() != 4 || s[3] != 3 {
        return Err(ApiError::Input(format!("field: expected shape (nx, ny, nz, 3), got {s:?}")));
    }
    let g = grid_of([s[0], s[1], s[2]], affine, "field")?;
    core::field_from_channel_last(g, field, Units::parse(units, "units")?, "field")
}

/// Warps a scan through a pull field: `warped(x) = moving(x + u(x))`, trilinear, outside
/// = `pad` (default the scan's minimum). The result is on the field's grid.
#[pyfunction]
#[pyo3(signature = (moving, moving_affine, field, field_affine, units="voxel", pad=None, threads=None))]
#[allow(clippy::too_many_arguments)]
fn warp<'py>(
    py: Python<'py>,
    moving: PyReadonlyArray3<'py, f32>,
    moving_affine: PyReadonlyArray2<'py, f64>,
    field: PyReadonlyArray4<'py, f32>,
    field_affine: PyReadonlyArray2<'py, f64>,
    units: &str,
    pad: Option<f32>,
    threads: Option<usize>,
) -> PyResult<Bound<'py, numpy::PyArray3<f32>>> {
    let (mv, ma, fv, fa) = (moving.as_array(), moving_affine.as_array(), field.as_array(), field_affine.as_array());
    let out = detached(py, threads, || {
        let f = field_on(fv, fa, units)?;
        let img = core::image(grid_of(shape3(&mv), ma, "moving")?, mv)?;
        core::check_finite(&img, "moving")?;
        if pad.is_some_and(|p| !p.is_finite()) {
            return Err(ApiError::Input("pad: must be a finite number".into()));
        }
        let pad = pad.unwrap_or_else(|| img.finite_range().map_or(0.0, |r| r.0));
        Ok(sinew_transform::warp_image_from(&img, &f, Border::Constant(pad)).data)
    })?;
    Ok(out.into_pyarray(py))
}

/// Warps a label map through a pull field by nearest neighbour (label 0 outside).
#[pyfunction]
#[pyo3(signature = (moving, moving_affine, field, field_affine, units="voxel", threads=None))]
fn warp_labels<'py>(
    py: Python<'py>,
    moving: PyReadonlyArray3<'py, u16>,
    moving_affine: PyReadonlyArray2<'py, f64>,
    field: PyReadonlyArray4<'py, f32>,
    field_affine: PyReadonlyArray2<'py, f64>,
    units: &str,
    threads: Option<usize>,
) -> PyResult<Bound<'py, numpy::PyArray3<u16>>> {
    let (mv, ma, fv, fa) = (moving.as_array(), moving_affine.as_array(), field.as_array(), field_affine.as_array());
    let out = detached(py, threads, || {
        let f = field_on(fv, fa, units)?;
        let l = core::labels(grid_of(shape3(&mv), ma, "moving")?, mv)?;
        Ok(sinew_transform::warp_labels_from(&l, &f).data)
    })?;
    Ok(out.into_pyarray(py))
}

/// Jacobian determinant of `x + u(x)` and its statistics (JSON text).
#[pyfunction]
#[pyo3(signature = (field, affine, units="voxel", threads=None))]
fn jacobian_determinant<'py>(
    py: Python<'py>,
    field: PyReadonlyArray4<'py, f32>,
    affine: PyReadonlyArray2<'py, f64>,
    units: &str,
    threads: Option<usize>,
) -> PyResult<(Bound<'py, numpy::PyArray3<f32>>, String)> {
    let (fv, fa) = (field.as_array(), affine.as_array());
    let (det, stats) = detached(py, threads, || {
        let f = field_on(fv, fa, units)?;
        let det = sinew_transform::jacobian_determinant(&f);
        let stats = sinew_transform::jacobian_stats(&det, None);
        Ok((det.data, serde_json::to_string(&stats).expect("statistics serialise")))
    })?;
    Ok((det.into_pyarray(py), stats))
}

/// MIND-SSC descriptors, channel-last `(nx, ny, nz, 12)`.
#[pyfunction]
#[pyo3(signature = (image, affine, radius=1, dilation=2, threads=None))]
fn mind_ssc<'py>(
    py: Python<'py>,
    image: PyReadonlyArray3<'py, f32>,
    affine: PyReadonlyArray2<'py, f64>,
    radius: usize,
    dilation: usize,
    threads: Option<usize>,
) -> PyResult<Bound<'py, numpy::PyArray4<f32>>> {
    let (iv, ia) = (image.as_array(), affine.as_array());
    let out = detached(py, threads, || {
        let img = core::image(grid_of(shape3(&iv), ia, "image")?, iv)?;
        core::check_finite(&img, "image")?;
        core::mind_ssc(&img, radius, dilation)
    })?;
    Ok(out.into_pyarray(py))
}

fn points(a: Option<ArrayView2<'_, f64>>, what: &str) -> Result<Option<Vec<WorldPoint>>, ApiError> {
    a.map(|a| {
        if a.ndim() != 2 || a.shape()[1] != 3 {
            return Err(ApiError::Input(format!("{what}: expected shape (n, 3) in world mm, got {:?}", a.shape())));
        }
        if a.iter().any(|v| !v.is_finite()) {
            return Err(ApiError::Input(format!("{what}: NaN or infinite coordinates")));
        }
        Ok(a.rows().into_iter().map(|r| [r[0], r[1], r[2]]).collect())
    })
    .transpose()
}

/// Scores one pair (see `sinew.score`); returns JSON text.
#[pyfunction]
#[pyo3(signature = (fixed_labels, fixed_affine, moving_labels, moving_affine, field=None, warped_labels=None,
    units="voxel", push=false, fixed_landmarks=None, moving_landmarks=None, threads=None))]
#[allow(clippy::too_many_arguments)]
fn score<'py>(
    py: Python<'py>,
    fixed_labels: PyReadonlyArray3<'py, u16>,
    fixed_affine: PyReadonlyArray2<'py, f64>,
    moving_labels: PyReadonlyArray3<'py, u16>,
    moving_affine: PyReadonlyArray2<'py, f64>,
    field: Option<PyReadonlyArray4<'py, f32>>,
    warped_labels: Option<PyReadonlyArray3<'py, u16>>,
    units: &str,
    push: bool,
    fixed_landmarks: Option<PyReadonlyArray2<'py, f64>>,
    moving_landmarks: Option<PyReadonlyArray2<'py, f64>>,
    threads: Option<usize>,
) -> PyResult<String> {
    let (fv, fa, mv, ma) =
        (fixed_labels.as_array(), fixed_affine.as_array(), moving_labels.as_array(), moving_affine.as_array());
    let field_v = field.as_ref().map(|a| a.as_array());
    let warped_v = warped_labels.as_ref().map(|a| a.as_array());
    let fl = fixed_landmarks.as_ref().map(|a| a.as_array());
    let ml = moving_landmarks.as_ref().map(|a| a.as_array());
    detached(py, threads, || {
        let fixed = core::labels(grid_of(shape3(&fv), fa, "fixed_labels")?, fv)?;
        let moving = core::labels(grid_of(shape3(&mv), ma, "moving_labels")?, mv)?;
        let warp = match (field_v, warped_v) {
            (Some(f), None) => {
                let s = f.shape();
                if s.len() != 4 || s[..3] != fixed.grid.shape()[..] || s[3] != 3 {
                    let g = fixed.grid.shape();
                    return Err(ApiError::Input(format!(
                        "field: shape {s:?} does not match the fixed labels: expected {:?} (channel-last) or {:?} (channel-first)",
                        [g[0], g[1], g[2], 3],
                        [3, g[0], g[1], g[2]]
                    )));
                }
                let field =
                    core::field_from_channel_last(fixed.grid.clone(), f, Units::parse(units, "units")?, "field")?;
                ScoreWarp::Field { field, push }
            }
            (None, Some(w)) => {
                if shape3(&w) != fixed.grid.shape() {
                    return Err(ApiError::Input(format!(
                        "warped_labels: shape {:?} does not match the fixed labels {:?}",
                        w.shape(),
                        fixed.grid.shape()
                    )));
                }
                ScoreWarp::Warped(core::labels(fixed.grid.clone(), w)?)
            }
            _ => return Err(ApiError::Input("give a field or warped_labels (exactly one)".into())),
        };
        let (f, m) = (points(fl, "fixed_landmarks")?, points(ml, "moving_landmarks")?);
        let lm = match (&f, &m) {
            (Some(f), Some(m)) => Some((f.as_slice(), m.as_slice())),
            (None, None) => None,
            _ => return Err(ApiError::Input("landmarks: give both fixed_landmarks and moving_landmarks".into())),
        };
        let r = core::score(&fixed, &moving, warp, lm)?;
        Ok(serde_json::to_string(&r).expect("scores serialise"))
    })
}

/// The native part of the `sinew` package.
#[pymodule]
fn _sinew(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(register, m)?)?;
    m.add_function(wrap_pyfunction!(warp, m)?)?;
    m.add_function(wrap_pyfunction!(warp_labels, m)?)?;
    m.add_function(wrap_pyfunction!(jacobian_determinant, m)?)?;
    m.add_function(wrap_pyfunction!(mind_ssc, m)?)?;
    m.add_function(wrap_pyfunction!(score, m)?)?;
    m.add("PRESETS", sinew_solve::PRESETS.to_vec())?;
    m.add("PARAMETERS", core::parameter_names())?;
    m.add("CAUTION", core::CAUTION)?;
    m.add("DEFAULT_WORKING_SPACING", sinew_solve::scans::DEFAULT_WORKING_MM)?;
    m.add("WARN_OVERLAP", sinew_solve::frames::WARN_OVERLAP)?;
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    Ok(())
}
