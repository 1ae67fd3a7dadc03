//! sinew-prep against outside references, through `scripts/ref/prep_reference.py`:
//! - reorientation vs nibabel.orientations (io_orientation / ornt_transform /
//!   apply_orientation / inv_ornt_aff): same array, same affine;
//! - resampling vs scipy.ndimage.affine_transform (order 1 images, order 0 labels), interior;
//! - field-of-view corners through nibabel.affines.apply_affine;
//! - body mask vs scipy.ndimage.label (6-connected) + binary_fill_holes per slice.
//!
//! python3 with numpy, scipy and nibabel is required: these tests fail without it.

use std::path::{Path, PathBuf};
use std::process::Command;

use sinew_grid::{Affine, Grid, Image, LabelMap, Volume};
use sinew_prep::mask::{body_mask, BodyParams};
use sinew_prep::orient::{plan, reorient};
use sinew_prep::{prepare, AxisCodes, Resample, Steps};
use sinew_testkit::{matmul3, rotation};

fn script() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../scripts/ref/prep_reference.py")
}

fn python(args: &[&str]) -> serde_json::Value {
    let out = Command::new("python3")
        .arg(script())
        .args(args)
        .output()
        .expect("python3 with numpy, scipy and nibabel is required for the reference checks");
    assert!(out.status.success(), "reference script failed: {}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).expect("JSON from the reference script")
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Test affines: axis-aligned, permuted with flips, oblique (rotations 20° and −12°) with a
/// mirrored axis, and a sheared one.
fn affines() -> Vec<Affine> {
    vec![
        Affine::from_spacing_origin([2.0, 3.0, 4.0], [-10.0, 20.0, 5.0]),
        Affine::from_parts([[0.0, 0.0, -3.0], [2.0, 0.0, 0.0], [0.0, -1.5, 0.0]], [40.0, -20.0, 15.0]),
        Affine::from_parts(
            matmul3(
                matmul3(rotation(2, 20.0), rotation(0, -12.0)),
                [[1.5, 0.0, 0.0], [0.0, -2.0, 0.0], [0.0, 0.0, 2.5]],
            ),
            [12.5, -30.0, 8.0],
        ),
        // sheared (sform only in practice): nibabel orthogonalises before choosing axes
        Affine::from_parts(
            matmul3(rotation(1, 15.0), [[1.0, 0.25, 0.0], [0.0, 1.1, 0.1], [0.0, 0.0, 2.5]]),
            [-100.0, 50.0, -20.0],
        ),
    ]
}

/// All 48 orientation codes.
fn all_codes() -> Vec<String> {
    let letters = [['R', 'L'], ['A', 'P'], ['S', 'I']];
    let perms = [[0, 1, 2], [0, 2, 1], [1, 0, 2], [1, 2, 0], [2, 0, 1], [2, 1, 0]];
    let mut v = Vec::new();
    for p in perms {
        for signs in 0..8 {
            v.push(p.iter().enumerate().map(|(d, &w)| letters[w][(signs >> d) & 1]).collect());
        }
    }
    v
}

fn pattern(grid: Grid) -> Image {
    let mut img = Image::filled(grid, 0.0);
    for ((i, j, k), v) in img.data.indexed_iter_mut() {
        *v = (i * 100 + j * 10 + k) as f32;
    }
    img
}

#[test]
fn reorientation_agrees_with_nibabel_for_all_48_codes() {
    let dir = tempfile::tempdir().unwrap();
    let codes = all_codes();
    assert_eq!(codes.len(), 48);
    for (n, a) in affines().into_iter().enumerate() {
        let path = dir.path().join(format!("in{n}.nii"));
        sinew_io::write_image(&path, &pattern(Grid::new([5, 6, 7], a).unwrap())).unwrap();
        // Read back: both sides then start from the same (float32-stored) affine.
        let img = sinew_io::read_image(&path).unwrap();
        let mut args = vec!["orient", s(&path)];
        args.extend(codes.iter().map(String::as_str));
        let reference = python(&args);
        for code in &codes {
            let r = plan(&img.grid, code.parse::<AxisCodes>().unwrap()).unwrap();
            let out = reorient(&img, &r);
            let want = &reference[code];
            let shape: Vec<usize> = serde_json::from_value(want["shape"].clone()).unwrap();
            assert_eq!(out.grid.shape().to_vec(), shape, "affine {n}, {code}");
            let data: Vec<f32> = serde_json::from_value(want["data"].clone()).unwrap();
            assert_eq!(out.as_slice(), &data[..], "affine {n}, {code}: values differ from apply_orientation");
            let aff: Vec<Vec<f64>> = serde_json::from_value(want["affine"].clone()).unwrap();
            let got = out.grid.affine().to_4x4();
            for r in 0..4 {
                for c in 0..4 {
                    assert!(
                        approx::abs_diff_eq!(got[r][c], aff[r][c], epsilon = 1e-9),
                        "affine {n}, {code}: {got:?} vs {aff:?}"
                    );
                }
            }
            assert_eq!(out.grid.orientation(), *code);
        }
    }
}

/// A smooth image in [−1, 1] and a blocky label map on an oblique grid.
fn smooth_pair() -> (Image, LabelMap) {
    let a = affines()[2];
    let g = Grid::new([20, 17, 23], a).unwrap();
    let mut img = Image::filled(g.clone(), 0.0);
    for ((i, j, k), v) in img.data.indexed_iter_mut() {
        let (x, y, z) = (i as f32, j as f32, k as f32);
        *v = (0.31 * x + 0.2 * y).sin() * (0.17 * z - 0.4 * x).cos() + 0.05 * (0.7 * y * z / 10.0).sin();
    }
    let mut lab: LabelMap = Volume::filled(g, 0);
    for ((i, j, k), v) in lab.data.indexed_iter_mut() {
        *v = ((i / 5) + 4 * (j / 6) + 12 * (k / 7)) as u16 % 11;
    }
    (img, lab)
}

fn sorted_corners(v: &serde_json::Value) -> Vec<[f64; 3]> {
    let mut c: Vec<[f64; 3]> = serde_json::from_value(v.clone()).unwrap();
    c.sort_by(|a, b| a.partial_cmp(b).unwrap());
    c
}

#[test]
fn resampling_agrees_with_scipy_and_keeps_the_field_of_view() {
    let dir = tempfile::tempdir().unwrap();
    let (img, lab) = smooth_pair();
    let (ip, lp) = (dir.path().join("img.nii"), dir.path().join("lab.nii"));
    sinew_io::write_image(&ip, &img).unwrap();
    sinew_io::write_labels(&lp, &lab).unwrap();
    let (img, lab) = (sinew_io::read_image(&ip).unwrap(), sinew_io::read_labels(&lp).unwrap());
    let cases: Vec<(&str, Steps, bool)> = vec![
        ("orient", Steps { orient: Some("PIL".parse().unwrap()), ..Default::default() }, true),
        ("shape", Steps { resample: Some(Resample::Shape([31, 12, 17])), ..Default::default() }, true),
        (
            "orient_shape",
            Steps {
                orient: Some("RAS".parse().unwrap()),
                resample: Some(Resample::Shape([13, 29, 40])),
                ..Default::default()
            },
            true,
        ),
        ("spacing", Steps { resample: Some(Resample::Spacing([1.1, 2.7, 1.9])), ..Default::default() }, false),
    ];
    for (name, steps, same_fov) in cases {
        let p = prepare(img.clone(), Some(lab.clone()), &steps).unwrap();
        let (oi, ol) = (dir.path().join(format!("{name}_img.nii")), dir.path().join(format!("{name}_lab.nii")));
        sinew_io::write_image(&oi, &p.image).unwrap();
        sinew_io::write_labels(&ol, p.labels.as_ref().unwrap()).unwrap();

        // scipy.ndimage.affine_transform, order 1, interior: within 1e-4 (values in [−1, 1]).
        let ci = python(&["check", s(&ip), s(&oi), "image"]);
        let n_in = ci["n_interior"].as_u64().unwrap() as usize;
        assert!(n_in * 2 > p.image.grid.len(), "{name}: interior too small ({n_in})");
        let diff = ci["max_abs_diff"].as_f64().unwrap();
        assert!(diff < 1e-4, "{name}: max |sinew − scipy| = {diff}");

        // order 0 for labels: identical away from rounding ties.
        let cl = python(&["check", s(&lp), s(&ol), "labels"]);
        assert!(cl["n_compared"].as_u64().unwrap() > 0);
        assert_eq!(cl["n_mismatch"].as_u64().unwrap(), 0, "{name}: labels differ from scipy order 0: {cl}");

        // nibabel.affines.apply_affine on the field-of-view corners: the same 8 world points
        // when the whole field of view is kept; otherwise the same centre.
        let (a, b) = (sorted_corners(&ci["corners_in"]), sorted_corners(&ci["corners_out"]));
        if same_fov {
            for (x, y) in a.iter().zip(&b) {
                assert!(approx::abs_diff_eq!(x[..], y[..], epsilon = 1e-4), "{name}: corner {x:?} vs {y:?}");
            }
        }
        let centre = |c: &[[f64; 3]]| [0, 1, 2].map(|d| c.iter().map(|p| p[d]).sum::<f64>() / 8.0);
        let (ca, cb) = (centre(&a), centre(&b));
        assert!(approx::abs_diff_eq!(ca[..], cb[..], epsilon = 1e-4), "{name}: centre {ca:?} vs {cb:?}");
        if name == "orient" {
            // Values are copied exactly (see the nibabel test); the scipy side interpolates at
            // positions off by the float32 rounding of the stored affines.
            assert!(diff < 1e-5, "reorientation: {diff}");
        }
    }
}

#[test]
fn body_mask_agrees_with_scipy_label_and_fill_holes() {
    let dir = tempfile::tempdir().unwrap();
    let subject = sinew_phantom::generate(7, 1, &sinew_phantom::PhantomParams::small());
    // Also on a reoriented copy, so the axial axis is not the last one.
    let r = plan(&subject.image.grid, "SPR".parse().unwrap()).unwrap();
    let turned = reorient(&subject.image, &r);
    for (name, img) in [("ras", &subject.image), ("spr", &turned)] {
        let path = dir.path().join(format!("{name}.nii"));
        sinew_io::write_image(&path, img).unwrap();
        let axial = AxisCodes::of_grid(&img.grid).unwrap().axial_axis();
        let cases = [(-500.0f32, true), (-500.0, false), (0.0, true), (0.0, false)];
        let keys: Vec<String> = cases.iter().map(|(t, f)| format!("{t}:{}", u8::from(*f))).collect();
        let mut args = vec!["mask", s(&path)];
        let axis = axial.to_string();
        args.push(&axis);
        args.extend(keys.iter().map(String::as_str));
        let want = python(&args);
        for ((threshold, fill), key) in cases.into_iter().zip(&keys) {
            let ours = body_mask(img, &BodyParams { threshold, fill_holes: fill }, axial).unwrap();
            let data: Vec<u16> = want[key].as_str().unwrap().bytes().map(|b| u16::from(b == b'1')).collect();
            assert_eq!(data.len(), ours.grid.len());
            let n = data.iter().filter(|&&v| v == 1).count();
            assert!(n > 1000, "{name} {threshold}: reference mask nearly empty");
            let differ = ours.as_slice().iter().zip(&data).filter(|(a, b)| a != b).count();
            assert_eq!(differ, 0, "{name}, threshold {threshold}, fill {fill}: {differ} voxels differ from scipy");
        }
    }
}
