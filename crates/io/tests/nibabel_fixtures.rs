//! Reads the NIfTI files written by nibabel (scripts/fixtures.py `make_io_nifti`) and compares
//! with what nibabel itself reads back from them (tests/fixtures/io_nibabel.json).
//! Source of every expected value: nibabel 5.3 (`img.affine`, `get_fdata()`, header fields).

use std::path::PathBuf;

use approx::assert_relative_eq;
use serde_json::Value;
use sinew_io::*;

fn fixtures() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../tests/fixtures")
}

fn sidecar() -> serde_json::Map<String, Value> {
    let text = std::fs::read_to_string(fixtures().join("io_nibabel.json")).expect("run scripts/make_fixtures.py");
    let v: Value = serde_json::from_str(&text).unwrap();
    assert!(v["source"].as_str().unwrap().starts_with("nibabel 5.3"));
    v["files"].as_object().unwrap().clone()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

fn affine_rows(v: &Value) -> Vec<Vec<f64>> {
    v.as_array().unwrap().iter().map(f64s).collect()
}

#[test]
fn headers_and_affines_match_nibabel() {
    let files = sidecar();
    assert!(files.len() >= 19, "fixture list shrank: {}", files.len());
    for (name, exp) in &files {
        let h = read_header(&fixtures().join(name)).unwrap_or_else(|e| panic!("{e}"));
        let shape: Vec<usize> = exp["shape"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as usize).collect();
        assert_eq!(h.dims, shape, "{name}");
        assert_eq!(h.datatype.name(), exp["dtype"].as_str().unwrap(), "{name}");
        assert_eq!(h.little_endian, exp["little_endian"].as_bool().unwrap(), "{name}");
        assert_eq!(h.intent_code as i64, exp["intent_code"].as_i64().unwrap(), "{name}");
        let ours = h.grid.affine().m;
        let sform = exp["sform_code"].as_i64().unwrap();
        let qform = exp["qform_code"].as_i64().unwrap();
        if sform > 0 || qform > 0 {
            let expected = if sform > 0 { AffineSource::Sform } else { AffineSource::Qform };
            assert_eq!(h.affine_source, expected, "{name}");
            for (r, row) in affine_rows(&exp["affine"]).iter().enumerate() {
                for c in 0..4 {
                    assert!(
                        approx::abs_diff_eq!(ours[r][c], row[c], epsilon = 1e-5),
                        "{name}: affine[{r}][{c}] {} vs nibabel {}",
                        ours[r][c],
                        row[c]
                    );
                }
            }
        } else {
            // Neither code set: we use NIfTI-1 "method 1", diag(pixdim) with zero origin (nifti1.h
            // comments). nibabel instead falls back to its own centred, x-flipped base affine, so
            // only the spacing (column norms) can be compared with nibabel here.
            assert_eq!(h.affine_source, AffineSource::Pixdim, "{name}");
            let pix = f64s(&exp["pixdim"]);
            let diag = [[pix[1], 0.0, 0.0, 0.0], [0.0, pix[2], 0.0, 0.0], [0.0, 0.0, pix[3], 0.0]];
            assert_eq!(ours, diag, "{name}");
            let r = affine_rows(&exp["affine"]);
            let norms: [f64; 3] = std::array::from_fn(|c| (0..3).map(|i| r[i][c] * r[i][c]).sum::<f64>().sqrt());
            assert_eq!(h.grid.spacing(), norms, "{name}");
        }
    }
}

#[test]
fn qform_only_fixture_is_oblique_and_mirrored() {
    // Guard that the fixture exercises what it claims (qfac −1, rotation off the axes).
    let h = read_header(&fixtures().join("io_qform_only.nii")).unwrap();
    assert_eq!(h.pixdim[0], -1.0);
    assert!(h.grid.affine().determinant() < 0.0);
    assert!(h.grid.affine().m[0][1].abs() > 0.1);
}

#[test]
fn image_values_match_nibabel_get_fdata() {
    for (name, exp) in &sidecar() {
        if name.starts_with("io_labels_") || name.starts_with("io_field") {
            continue;
        }
        let img = read_image(&fixtures().join(name)).unwrap_or_else(|e| panic!("{e}"));
        let want = f64s(&exp["data"]);
        assert_eq!(img.as_slice().len(), want.len(), "{name}");
        // Our standard layout (k fastest) is numpy's C order of (i, j, k); values are f32 of
        // nibabel's float64 scaled values (slope·raw + inter).
        for (n, (&a, &b)) in img.as_slice().iter().zip(&want).enumerate() {
            assert_eq!(a, b as f32, "{name} at flat index {n}");
        }
    }
}

#[test]
fn labels_accept_integral_floats_and_reject_others() {
    let files = sidecar();
    let lab = read_labels(&fixtures().join("io_labels_float.nii")).unwrap();
    let want = f64s(&files["io_labels_float.nii"]["data"]);
    assert!(lab.as_slice().iter().zip(&want).all(|(&a, &b)| a as f64 == b));
    assert!(lab.labels().contains(&300));
    let e = read_labels(&fixtures().join("io_labels_fraction.nii")).unwrap_err();
    assert!(
        e.to_string().contains("labels are not integers") && e.to_string().contains("io_labels_fraction.nii"),
        "{e}"
    );
    let e = read_labels(&fixtures().join("io_labels_negative.nii")).unwrap_err();
    assert!(e.to_string().contains("negative label"), "{e}");
    // Integer datatypes work as label maps too.
    let u8s = read_labels(&fixtures().join("io_dtype_uint8.nii")).unwrap();
    assert!(u8s.as_slice().iter().zip(&f64s(&files["io_dtype_uint8.nii"]["data"])).all(|(&a, &b)| a as f64 == b));
    let e = read_labels(&fixtures().join("io_dtype_int8.nii")).unwrap_err();
    assert!(e.to_string().contains("negative label"), "{e}");
}

#[test]
fn field_5d_matches_nibabel() {
    let files = sidecar();
    let want = f64s(&files["io_field5d.nii.gz"]["data"]); // C order of (i, j, k, 1, c)
    let path = fixtures().join("io_field5d.nii.gz");
    // No sinew intent_name in a nibabel file: default is mm, and we say so.
    let (f, units) = read_field(&path, FieldReadOptions::default()).unwrap();
    assert_eq!(units, FieldUnits::Mm);
    // In memory the field is in voxels along (i, j, k), component-first: numpy solved the
    // file's mm vectors against nibabel's affine for the same values (scripts/fixtures.py).
    let vox = f64s(&files["io_field5d.nii.gz"]["voxels_cijk"]);
    assert_eq!(f.data.len(), vox.len());
    for (a, b) in f.data.iter().zip(&vox) {
        assert_relative_eq!(*a as f64, *b, epsilon = 1e-5, max_relative = 1e-5);
    }
    let mm = f.to_world_mm();
    assert_eq!(mm.len(), want.len());
    for (a, b) in mm.iter().zip(&want) {
        assert_relative_eq!(*a as f64, *b, epsilon = 1e-5, max_relative = 1e-5);
    }
    // Read as voxels: the file's values as they are, component c of voxel n at n·3 + c.
    let (f, units) =
        read_field(&path, FieldReadOptions { units: Some(FieldUnits::Voxel), ..Default::default() }).unwrap();
    assert_eq!(units, FieldUnits::Voxel);
    assert_eq!(f.grid.len() * 3, want.len());
    for n in 0..f.grid.len() {
        for c in 0..3 {
            assert_eq!(f.component(c)[n], want[n * 3 + c] as f32, "voxel {n} component {c}");
        }
    }
}
