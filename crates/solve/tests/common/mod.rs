//! Shared by the recovery tests: a demo subject, a known deformation and the endpoint error.
#![allow(dead_code)]

use sinew_grid::{Border, Field, Grid, Image, LabelMap};
use sinew_phantom::{generate, PhantomParams};

/// A moving scan, the fixed scan made from it by a known pull field, the field, and the body
/// labels on the fixed grid.
pub struct Case {
    pub fixed: Image,
    pub moving: Image,
    pub truth: Field,
    pub body: LabelMap,
}

/// A smooth field whose largest displacement is `max_mm`: low-frequency sinusoids per
/// component (the construction of the root `tests/recovery.rs`).
pub fn smooth_field(grid: &Grid, max_mm: f64) -> Field {
    let [nx, ny, nz] = grid.shape();
    let sp = grid.spacing();
    let mut f = Field::zeros(grid.clone());
    let tau = std::f64::consts::TAU;
    for d in 0..3 {
        let mut comp = f.data.index_axis_mut(ndarray::Axis(0), d);
        for ((i, j, k), v) in comp.indexed_iter_mut() {
            let (x, y, z) = (i as f64 / nx as f64, j as f64 / ny as f64, k as f64 / nz as f64);
            let ph = d as f64 * 1.3;
            let mm = (tau * x + ph).sin() * (tau * 0.5 * y + 0.4).cos() * (tau * 0.7 * z + ph).sin()
                + 0.5 * (tau * 1.2 * z + 0.3 * ph).cos() * (tau * 0.8 * x).sin();
            *v = mm as f32;
        }
    }
    let mut peak = 0.0f64;
    for n in 0..grid.len() {
        let l2: f64 = (0..3).map(|d| (f.component(d)[n] as f64).powi(2)).sum();
        peak = peak.max(l2.sqrt());
    }
    let scale = max_mm / peak;
    for d in 0..3 {
        let s = (scale / sp[d]) as f32;
        f.data.index_axis_mut(ndarray::Axis(0), d).mapv_inplace(|v| v * s);
    }
    f
}

/// Demo subject 0 of cohort 11 pulled through a `max_mm` smooth field.
pub fn known_deformation(max_mm: f64) -> Case {
    let subject = generate(11, 0, &PhantomParams::default());
    let truth = smooth_field(&subject.image.grid, max_mm);
    let fixed = sinew_transform::warp_image(&subject.image, &truth, Border::Nearest).unwrap();
    let body = sinew_transform::warp_labels(&subject.labels, &truth).unwrap();
    Case { fixed, moving: subject.image, truth, body }
}

/// Mean and 95th percentile of |u − u*| in mm over voxels with a non-zero label.
pub fn endpoint_error(u: &Field, truth: &Field, body: &LabelMap) -> (f64, f64) {
    let sp = u.grid.spacing();
    let mut errs: Vec<f64> = Vec::new();
    for (n, &l) in body.as_slice().iter().enumerate() {
        if l != 0 {
            let e2: f64 = (0..3).map(|d| ((u.component(d)[n] - truth.component(d)[n]) as f64 * sp[d]).powi(2)).sum();
            errs.push(e2.sqrt());
        }
    }
    let mean = errs.iter().sum::<f64>() / errs.len() as f64;
    errs.sort_by(|a, b| a.partial_cmp(b).unwrap());
    (mean, errs[(errs.len() as f64 * 0.95) as usize])
}
