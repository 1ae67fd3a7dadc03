//! `sinew info` end to end: its JSON is compared with what nibabel 5.3 reads from the
//! nibabel-written fixtures (tests/fixtures/io_nibabel.json, scripts/fixtures.py
//! `make_io_nifti`): shape, datatype, orientation (`nibabel.aff2axcodes`), value range and
//! label counts (from `get_fdata()`).

use std::path::PathBuf;
use std::process::Output;

use serde_json::Value;
use sinew_testkit::Sinew;

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../tests/fixtures").join(name)
}

fn sinew(args: &[&std::ffi::OsStr]) -> Output {
    SINEW.cmd().arg("info").args(args).output().expect("run sinew")
}

fn nibabel() -> Value {
    let text = std::fs::read_to_string(fixture("io_nibabel.json")).expect("run scripts/make_fixtures.py");
    serde_json::from_str::<Value>(&text).unwrap()["files"].clone()
}

fn data(v: &Value) -> Vec<f64> {
    v["data"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

#[test]
fn json_matches_nibabel() {
    let names = [
        "io_dtype_uint8.nii",
        "io_dtype_int16.nii.gz",
        "io_qform_only.nii",
        "io_scaled_int16.nii",
        "io_field5d.nii.gz",
        "io_labels_float.nii",
    ];
    let paths: Vec<PathBuf> = names.iter().map(|n| fixture(n)).collect();
    let out = sinew(
        &[&std::ffi::OsString::from("--json")]
            .into_iter()
            .map(|s| s.as_os_str())
            .chain(paths.iter().map(|p| p.as_os_str()))
            .collect::<Vec<_>>(),
    );
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let doc: Value = serde_json::from_slice(&out.stdout).expect("one JSON document");
    let arr = doc.as_array().expect("an array");
    assert_eq!(arr.len(), names.len());
    let nib = nibabel();
    for (name, got) in names.iter().zip(arr) {
        let exp = &nib[*name];
        assert_eq!(got["shape"], exp["shape"], "{name}");
        assert_eq!(got["datatype"], exp["dtype"], "{name}");
        assert_eq!(got["orientation"], exp["axcodes"], "{name}: nibabel.aff2axcodes");
        let vals = data(exp);
        let lo = vals.iter().cloned().fold(f64::INFINITY, f64::min) as f32;
        let hi = vals.iter().cloned().fold(f64::NEG_INFINITY, f64::max) as f32;
        assert_eq!(got["min"].as_f64().unwrap() as f32, lo, "{name}");
        assert_eq!(got["max"].as_f64().unwrap() as f32, hi, "{name}");
        assert_eq!(got["non_finite"], 0);
        // Spacing: column norms of nibabel's affine.
        let aff: Vec<Vec<f64>> = exp["affine"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect())
            .collect();
        for c in 0..3 {
            let norm = (0..3).map(|r| aff[r][c] * aff[r][c]).sum::<f64>().sqrt();
            assert!(approx::abs_diff_eq!(got["spacing_mm"][c].as_f64().unwrap(), norm, epsilon = 1e-5), "{name}");
        }
    }
    // Integer file: label values with voxel counts, counted from nibabel's data.
    let mut counts = std::collections::BTreeMap::new();
    for v in data(&nib["io_dtype_uint8.nii"]) {
        *counts.entry(v as u64).or_insert(0u64) += 1;
    }
    let labels: Vec<(u64, u64)> = arr[0]["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| (l["label"].as_u64().unwrap(), l["voxels"].as_u64().unwrap()))
        .collect();
    assert_eq!(labels, counts.into_iter().collect::<Vec<_>>());
    // Signed values, scaled files and float files are not label maps.
    assert!(arr[1]["labels"].is_null());
    assert!(arr[3]["labels"].is_null());
    assert_eq!(arr[3]["scaling"], serde_json::json!([0.25, -10.0]));
    assert!(arr[5]["labels"].is_null());
    assert_eq!(arr[2]["affine_source"], "qform");
    assert_eq!(arr[4]["intent_code"], 1006);
    assert!(arr[4]["field_units"].is_null(), "nibabel's field records no sinew units");
}

#[test]
fn counts_non_finite_and_reports_field_units() {
    use sinew_grid::{Field, Grid, Volume};
    let dir = sinew_testkit::tempdir();
    let grid = Grid::axis_aligned([4, 3, 2], [2.0, 2.0, 2.0], [0.0; 3]);
    let mut img = Volume::filled(grid.clone(), 5.0f32);
    img.data[[0, 0, 0]] = f32::NAN;
    img.data[[1, 2, 1]] = f32::INFINITY;
    img.data[[3, 1, 0]] = -7.5;
    let p = dir.path().join("nan.nii.gz");
    sinew_io::write_image(&p, &img).unwrap();
    let f = dir.path().join("f.nii.gz");
    sinew_io::write_field(&f, &Field::zeros(grid), sinew_io::FieldUnits::Voxel).unwrap();
    let out = sinew(&["--json".as_ref(), p.as_os_str(), f.as_os_str()]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let doc: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(doc[0]["non_finite"], 2);
    assert_eq!((doc[0]["min"].as_f64(), doc[0]["max"].as_f64()), (Some(-7.5), Some(5.0)));
    assert_eq!(doc[0]["orientation"], "RAS");
    assert_eq!(doc[1]["field_units"], "voxel");
    assert_eq!(doc[1]["shape"], serde_json::json!([4, 3, 2, 1, 3]));
}

#[test]
fn human_output_is_aligned_text() {
    let p = fixture("io_dtype_uint8.nii");
    let out = sinew(&[p.as_os_str()]);
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert!(lines[0].ends_with("io_dtype_uint8.nii"));
    for key in ["shape", "spacing", "orientation", "values", "labels"] {
        let line = lines.iter().find(|l| l.trim_start().starts_with(key)).unwrap_or_else(|| panic!("no {key} line"));
        assert!(
            line.starts_with("  ") && line[2..15].trim() == key && !line[15..].starts_with(' '),
            "misaligned: {line:?}"
        );
    }
    assert!(text.contains("5 × 4 × 3") && text.contains("1.5 × 2 × 3 mm") && text.contains("RAS"));
}

#[test]
fn bad_files_exit_2_with_one_line_naming_the_file() {
    let dir = sinew_testkit::tempdir();
    let bad = dir.path().join("broken.nii");
    std::fs::write(&bad, vec![7u8; 400]).unwrap();
    let missing = dir.path().join("missing.nii.gz");
    for p in [&bad, &missing] {
        let out = sinew(&[fixture("io_dtype_uint8.nii").as_os_str(), p.as_os_str()]);
        assert_eq!(out.status.code(), Some(2));
        let err = String::from_utf8(out.stderr).unwrap();
        assert_eq!(err.trim_end().lines().count(), 1, "{err}");
        assert!(err.contains(p.file_name().unwrap().to_str().unwrap()), "{err}");
    }
    // No file at all is a usage error from the argument parser.
    let out = sinew(&[]);
    assert!(!out.status.success());
}
