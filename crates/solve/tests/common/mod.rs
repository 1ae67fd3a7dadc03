//! Shared by the recovery tests: a demo subject, a known deformation and the endpoint error.
#![allow(dead_code)]

use sinew_grid::{Border, Field, Image, LabelMap};
use sinew_phantom::{generate, PhantomParams};

/// A moving scan, the fixed scan made from it by a known pull field, the field, and the body
/// labels on the fixed grid.
pub struct Case {
    pub fixed: Image,
    pub moving: Image,
    pub truth: Field,
    pub body: LabelMap,
}

/// Demo subject 0 of cohort 11 pulled through a `max_mm` smooth field.
pub fn known_deformation(max_mm: f64) -> Case {
    let subject = generate(11, 0, &PhantomParams::default());
    let truth = sinew_phantom::known_field(&subject.image.grid, max_mm);
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
