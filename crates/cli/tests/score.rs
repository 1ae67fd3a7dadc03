//! `sinew score` end to end: fields in every accepted form (NIfTI mm, .npy channel-last and
//! channel-first, push), landmarks, CSV, and HD95 against a scipy reference run at test time.

use std::process::{Command, Output};

use ndarray::Array4;
use serde_json::Value;
use sinew_grid::{Field, Grid, LabelMap};
use sinew_io::FieldUnits;
use sinew_testkit::{p, Sinew};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn sinew(args: &[&str]) -> Output {
    SINEW.cmd().arg("score").args(args).output().expect("run sinew")
}

fn json(out: &Output) -> Value {
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).expect("JSON on stdout")
}

/// A box `[lo, hi)` of `label` on a zero map.
fn boxed(grid: &Grid, lo: [usize; 3], hi: [usize; 3], label: u16) -> LabelMap {
    let mut m = LabelMap::filled(grid.clone(), 0);
    for i in lo[0]..hi[0] {
        for j in lo[1]..hi[1] {
            for k in lo[2]..hi[2] {
                m.data[[i, j, k]] = label;
            }
        }
    }
    m
}

/// A constant field of `shift` voxels.
fn shift_field(grid: &Grid, shift: [f32; 3]) -> Field {
    let mut f = Field::zeros(grid.clone());
    for (d, s) in shift.iter().enumerate() {
        f.data.index_axis_mut(ndarray::Axis(0), d).fill(*s);
    }
    f
}

#[test]
fn every_field_form_recovers_a_known_shift() {
    let tmp = sinew_testkit::tempdir();
    let d = tmp.path();
    // 2 × 1.5 × 3 mm voxels; the moving box is the fixed box moved by +2 voxels along i.
    let grid = Grid::axis_aligned([16, 12, 10], [2.0, 1.5, 3.0], [-10.0, 4.0, 0.0]);
    let fixed = boxed(&grid, [4, 3, 2], [10, 8, 6], 3);
    let moving = boxed(&grid, [6, 3, 2], [12, 8, 6], 3);
    sinew_io::write_labels(&d.join("f.nii.gz"), &fixed).unwrap();
    sinew_io::write_labels(&d.join("m.nii.gz"), &moving).unwrap();
    // Pull field: warped(x) = moving(x + 2 e_i) = fixed(x) exactly.
    let pull = shift_field(&grid, [2.0, 0.0, 0.0]);
    sinew_io::write_field(&d.join("pull_mm.nii.gz"), &pull, FieldUnits::Mm).unwrap();
    sinew_io::write_npy_field(&d.join("pull_last.npy"), &pull).unwrap();
    // Push field (moving → fixed): y ↦ y − 2 e_i.
    sinew_io::write_field(&d.join("push.nii.gz"), &shift_field(&grid, [-2.0, 0.0, 0.0]), FieldUnits::Voxel).unwrap();
    // A channel-first .npy in mm written by numpy (an outside writer): (3, nx, ny, nz), x = 4 mm.
    let py = Command::new("python3")
        .args([
            "-c",
            "import sys, numpy as np; a = np.zeros((3, 16, 12, 10), np.float64); a[0] = 4.0; np.save(sys.argv[1], a)",
        ])
        .arg(d.join("pull_first_mm.npy"))
        .status()
        .expect("python3 with numpy is required for this test");
    assert!(py.success());
    // Landmarks (world mm): moving = fixed + 4 mm along x (2 voxels of 2 mm along i).
    std::fs::write(d.join("lf.csv"), "name,x,y,z\na,0.0,10.0,9.0\nb,4.5,12.5,15.0\n").unwrap();
    std::fs::write(d.join("lm.csv"), "# moving\n4.0,10.0,9.0\n8.5,12.5,15.0\n").unwrap();

    let (f, m) = (d.join("f.nii.gz"), d.join("m.nii.gz"));
    let base = ["--fixed-labels", p(&f), "--moving-labels", p(&m)];
    let lf = d.join("lf.csv");
    let lm = d.join("lm.csv");
    let cases: Vec<(Vec<String>, &str)> = vec![
        (vec!["--field".into(), p(&d.join("pull_mm.nii.gz")).into()], "nifti mm"),
        (vec!["--field".into(), p(&d.join("pull_last.npy")).into()], "npy channel-last voxel"),
        (
            vec![
                "--field".into(),
                p(&d.join("pull_first_mm.npy")).into(),
                "--layout".into(),
                "channel-first".into(),
                "--units".into(),
                "mm".into(),
            ],
            "npy channel-first mm",
        ),
        (vec!["--field".into(), p(&d.join("push.nii.gz")).into(), "--direction".into(), "push".into()], "push"),
    ];
    for (extra, what) in cases {
        let mut args: Vec<String> = base.iter().map(|s| s.to_string()).collect();
        args.extend(extra);
        args.extend(["--fixed-landmarks", p(&lf), "--moving-landmarks", p(&lm)].map(String::from));
        let v = json(&sinew(&args.iter().map(String::as_str).collect::<Vec<_>>()));
        let l = &v["score"]["labels"][0];
        // Closed form before: boxes of 6·5·4 = 120 voxels overlapping in 4·5·4 = 80: Dice 2/3.
        assert!(approx::abs_diff_eq!(l["dice_before"].as_f64().unwrap(), 2.0 / 3.0, epsilon = 1e-12), "{what}");
        // After: the exact inverse shift, so Dice 1 and all surface distances 0 (exact).
        assert_eq!(l["dice"].as_f64(), Some(1.0), "{what}");
        assert_eq!(l["surface"]["hd95_mm"].as_f64(), Some(0.0), "{what}");
        // A constant field has det J = 1 (exact): no folding, SDlogJ 0.
        assert_eq!(v["score"]["jacobian"]["folded_voxels"], 0, "{what}");
        assert!(
            approx::abs_diff_eq!(v["score"]["jacobian"]["sd_log_j"].as_f64().unwrap(), 0.0, epsilon = 1e-6),
            "{what}"
        );
        // Landmarks: exact mapping after, 4 mm apart before.
        assert!(v["landmarks"]["max_mm"].as_f64().unwrap() < 1e-5, "{what}");
        assert!(
            approx::abs_diff_eq!(v["landmarks"]["mean_before_mm"].as_f64().unwrap(), 4.0, epsilon = 1e-9),
            "{what}"
        );
        assert_eq!(v["field"]["direction"], if what == "push" { "push" } else { "pull" });
        assert_eq!(v["field"]["inverted"].is_null(), what != "push", "{what}");
        if what == "push" {
            assert!(v["field"]["inverted"]["residual_max_mm"].as_f64().unwrap() < 1e-5);
        }
        assert!(v["caution"].as_str().unwrap().starts_with("Research use only"));
    }
}

#[test]
fn hd95_and_csv_agree_with_scipy_on_a_warped_pair() {
    let tmp = sinew_testkit::tempdir();
    let d = tmp.path();
    let grid = Grid::axis_aligned([20, 18, 14], [1.2, 0.9, 2.5], [0.0; 3]);
    // Two labels; the field leaves a residual shift, so surface distances are not trivial.
    let mut fixed = boxed(&grid, [3, 4, 2], [12, 14, 9], 1);
    let mut moving = boxed(&grid, [5, 2, 3], [15, 13, 11], 1);
    for i in 13..18 {
        for j in 2..9 {
            fixed.data[[i, j, 10]] = 2;
            fixed.data[[i, j, 11]] = 2;
            moving.data[[i - 1, j + 2, 9]] = 2;
        }
    }
    sinew_io::write_labels(&d.join("f.nii.gz"), &fixed).unwrap();
    sinew_io::write_labels(&d.join("m.nii.gz"), &moving).unwrap();
    let field = shift_field(&grid, [1.0, -1.0, 0.0]);
    sinew_io::write_field(&d.join("u.nii.gz"), &field, FieldUnits::Mm).unwrap();
    // Pulled through the whole-voxel shift u = (1, −1, 0): warped(i, j, k) = moving(i + 1,
    // j − 1, k), written out here (exact; the boxes keep off the faces, so beyond them is 0).
    let mut warped = LabelMap::filled(grid.clone(), 0);
    for ((i, j, k), v) in warped.data.indexed_iter_mut() {
        if i + 1 < 20 && j >= 1 {
            *v = moving.data[[i + 1, j - 1, k]];
        }
    }
    sinew_io::write_labels(&d.join("w.nii.gz"), &warped).unwrap();
    let (f, m, u, w) = (d.join("f.nii.gz"), d.join("m.nii.gz"), d.join("u.nii.gz"), d.join("w.nii.gz"));
    let v = json(&sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&m), "--field", p(&u)]));
    // The same pair from the warped labels: same Dice and distances, no Jacobian.
    let vw = json(&sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&m), "--warped-labels", p(&w)]));
    assert_eq!(v["score"]["labels"], vw["score"]["labels"]);
    assert!(vw["score"]["jacobian"].is_null());

    // Reference: scipy.ndimage.distance_transform_edt(sampling=spacing) + np.percentile on the
    // files as nibabel reads them (scripts/ref/score_surface.py).
    let script = r#"
import sys, json, importlib.util, nibabel as nib, numpy as np
spec = importlib.util.spec_from_file_location("ref", sys.argv[1]); ref = importlib.util.module_from_spec(spec); spec.loader.exec_module(ref)
a = np.asarray(nib.load(sys.argv[2]).dataobj); b = np.asarray(nib.load(sys.argv[3]).dataobj)
sp = nib.load(sys.argv[2]).header.get_zooms()[:3]
out = {}
for l in (1, 2):
    r = ref.surface_distances(a, b, l, sp)
    dice = 2.0 * np.sum((a == l) & (b == l)) / (np.sum(a == l) + np.sum(b == l))
    out[str(l)] = {"hd95": r[0], "hd": r[1], "assd": r[2], "dice": float(dice)}
print(json.dumps(out))
"#;
    let ref_py = concat!(env!("CARGO_MANIFEST_DIR"), "/../../scripts/ref/score_surface.py");
    let out = Command::new("python3")
        .args(["-c", script, ref_py, p(&f), p(&w)])
        .output()
        .expect("python3 with numpy, scipy and nibabel is required for this test");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let reference: Value = serde_json::from_slice(&out.stdout).unwrap();
    for l in v["score"]["labels"].as_array().unwrap() {
        let r = &reference[l["label"].to_string()];
        for (ours, theirs) in [("hd95_mm", "hd95"), ("hd_mm", "hd"), ("assd_mm", "assd")] {
            let (a, b) = (l["surface"][ours].as_f64().unwrap(), r[theirs].as_f64().unwrap());
            assert!(approx::abs_diff_eq!(a, b, epsilon = 0.01), "label {}: {ours} {a} vs scipy {b}", l["label"]);
        }
        approx::assert_abs_diff_eq!(l["dice"].as_f64().unwrap(), r["dice"].as_f64().unwrap(), epsilon = 1e-12);
    }
    assert!(v["score"]["labels"][0]["surface"]["hd95_mm"].as_f64().unwrap() > 0.5, "a non-trivial case");

    // CSV: the header and one row per label, atomically into --out.
    let csv = d.join("s.csv");
    let o = sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&m), "--field", p(&u), "--csv", "--out", p(&csv)]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = std::fs::read_to_string(&csv).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert!(lines[0].starts_with("label,name,dice_before,dice,hd95_mm"));
    assert_eq!(lines.len(), 3);
    let hd95: f64 = lines[1].split(',').nth(4).unwrap().parse().unwrap();
    assert_eq!(hd95, v["score"]["labels"][0]["surface"]["hd95_mm"].as_f64().unwrap());
}

#[test]
fn bad_inputs_are_refused() {
    let tmp = sinew_testkit::tempdir();
    let d = tmp.path();
    let grid = Grid::axis_aligned([6, 6, 6], [1.0; 3], [0.0; 3]);
    let l = boxed(&grid, [1, 1, 1], [4, 4, 4], 1);
    sinew_io::write_labels(&d.join("f.nii.gz"), &l).unwrap();
    let f = d.join("f.nii.gz");
    // neither --field nor --warped-labels: a usage error (exit code 2)
    let o = sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&f)]);
    assert_eq!(o.status.code(), Some(2));
    // a field with NaN
    let mut nan = Array4::<f32>::zeros((6, 6, 6, 3));
    nan[[1, 1, 1, 0]] = f32::NAN;
    let field = Field::from_voxel_channel_last(grid.clone(), &nan).unwrap();
    sinew_io::write_npy_field(&d.join("nan.npy"), &field).unwrap();
    let o = sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&f), "--field", p(&d.join("nan.npy"))]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("NaN"));
    // a .npy field of the wrong shape
    let small = Field::zeros(Grid::axis_aligned([5, 6, 6], [1.0; 3], [0.0; 3]));
    sinew_io::write_npy_field(&d.join("small.npy"), &small).unwrap();
    let o = sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&f), "--field", p(&d.join("small.npy"))]);
    assert_eq!(o.status.code(), Some(2));
    // --out onto an input
    let o = sinew(&["--fixed-labels", p(&f), "--moving-labels", p(&f), "--warped-labels", p(&f), "--out", p(&f)]);
    assert_eq!(o.status.code(), Some(2));
}
