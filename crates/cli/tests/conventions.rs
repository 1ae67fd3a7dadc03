//! Fields saved the way training code saves them (batch axis, float16, .npz, reversed
//! components, normalised sampling grids in both corner conventions, half resolution): each
//! written by numpy with the documented snippets (`docs/snippets/training_fields.py`, run
//! here) and scored with the documented flags must give back the known displacement; a
//! missing flag must not.

use std::path::Path;
use std::process::{Command, Output};

use serde_json::Value;
use sinew_grid::{Grid, LabelMap};
use sinew_testkit::Sinew;

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn score(args: &[&str]) -> Output {
    SINEW.cmd().arg("score").args(args).output().expect("run sinew")
}

fn boxed(grid: &Grid, lo: [usize; 3], hi: [usize; 3]) -> LabelMap {
    let mut m = LabelMap::filled(grid.clone(), 0);
    for (i, j, k) in ndarray::indices(grid.shape()) {
        if (lo[0]..hi[0]).contains(&i) && (lo[1]..hi[1]).contains(&j) && (lo[2]..hi[2]).contains(&k) {
            m.data[[i, j, k]] = 5;
        }
    }
    m
}

#[test]
fn training_code_fields_give_back_the_known_shift() {
    let tmp = sinew_testkit::tempdir();
    let d = tmp.path();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../docs/snippets/training_fields.py");
    let py = Command::new("python3").arg(&script).arg(d).output().expect("python3 with numpy is required");
    assert!(py.status.success(), "{}", String::from_utf8_lossy(&py.stderr));
    // The snippets' grid (16, 12, 10) and pull shift u = (2, −1, 3) voxels: the moving box is
    // the fixed box moved by u, so warped(x) = moving(x + u) = fixed(x) exactly.
    let grid = Grid::axis_aligned([16, 12, 10], [2.0, 1.5, 3.0], [-10.0, 4.0, 0.0]);
    let (f, m) = (d.join("f.nii.gz"), d.join("m.nii.gz"));
    sinew_io::write_labels(&f, &boxed(&grid, [4, 4, 2], [10, 9, 6])).unwrap();
    sinew_io::write_labels(&m, &boxed(&grid, [6, 3, 5], [12, 8, 9])).unwrap();
    // Landmarks in world mm (origin + spacing · voxel): fixed voxels (1, 1, 1) and (14, 10, 8),
    // moving = fixed + u voxels. The landmark error reads the field between voxels, so it sees
    // sub-voxel differences that the overlap of whole-voxel boxes cannot.
    let (lf, lm) = (d.join("lf.csv"), d.join("lm.csv"));
    std::fs::write(&lf, "-8,5.5,3\n18,19,24\n").unwrap();
    std::fs::write(&lm, "-4,4,12\n22,17.5,33\n").unwrap();
    let marks = ["--fixed-landmarks", lf.to_str().unwrap(), "--moving-landmarks", lm.to_str().unwrap()];
    let cases: [(&str, &[&str], [&str; 3]); 8] = [
        ("batch_channel_first.npy", &[], ["true", "channel-first", "1"]),
        ("float16.npy", &[], ["true", "channel-first", "1"]),
        ("flow.npz", &["--npz-key", "flow"], ["false", "channel-last", "1"]),
        ("reversed.npy", &["--channel-order", "kji"], ["true", "channel-first", "1"]),
        (
            "grid_align_corners_true.npy",
            &["--units", "norm-corners", "--values", "positions", "--channel-order", "kji"],
            ["true", "channel-last", "1"],
        ),
        (
            "grid_align_corners_false.npy",
            &["--units", "norm-edges", "--values", "positions", "--channel-order", "kji"],
            ["true", "channel-last", "1"],
        ),
        ("half_resolution.npy", &[], ["false", "channel-first", "2"]),
        // An explicit --layout gives the same reading as the detection (recorded as not detected).
        ("float16.npy", &["--layout", "channel-first"], ["true", "channel-first", "1"]),
    ];
    for (file, flags, [batch, layout, factor]) in cases {
        let field = d.join(file);
        let mut args = vec!["--fixed-labels", f.to_str().unwrap(), "--moving-labels", m.to_str().unwrap()];
        args.extend(["--field", field.to_str().unwrap()]);
        args.extend(flags);
        args.extend(marks);
        let out = score(&args);
        assert!(out.status.success(), "{file} {flags:?}: {}", String::from_utf8_lossy(&out.stderr));
        let v: Value = serde_json::from_slice(&out.stdout).unwrap();
        let l = &v["score"]["labels"][0];
        // Exact: the shift is whole voxels, so nearest-neighbour warping reproduces the fixed box.
        assert_eq!(l["dice"].as_f64(), Some(1.0), "{file} {flags:?}");
        assert_eq!(l["surface"]["hd95_mm"].as_f64(), Some(0.0), "{file} {flags:?}");
        assert!(v["landmarks"]["max_mm"].as_f64().unwrap() < 1e-3, "{file} {flags:?}: {}", v["landmarks"]);
        let imp = &v["field"]["import"];
        assert_eq!(imp["batch_axis_dropped"].to_string(), batch, "{file}");
        assert_eq!(imp["layout"], layout, "{file}");
        assert_eq!(imp["resolution_factor"].to_string(), factor, "{file}");
        let dtype = if file == "float16.npy" { "float16" } else { "float32" };
        assert_eq!(v["field"]["dtype"], dtype, "{file}");
    }
    // Without the flags the same files are read differently: the landmarks are missed (by
    // 0.2 to 1.1 mm when only the corner convention is wrong: the two differ by up to half a
    // voxel at the ends of each axis).
    for (file, flags) in [
        ("reversed.npy", &[][..]),
        ("grid_align_corners_true.npy", &["--units", "norm-corners", "--channel-order", "kji"][..]),
        (
            "grid_align_corners_true.npy",
            &["--units", "norm-edges", "--values", "positions", "--channel-order", "kji"][..],
        ),
    ] {
        let field = d.join(file);
        let mut args = vec!["--fixed-labels", f.to_str().unwrap(), "--moving-labels", m.to_str().unwrap()];
        args.extend(["--field", field.to_str().unwrap()]);
        args.extend(flags);
        args.extend(marks);
        let v: Value = serde_json::from_slice(&score(&args).stdout).unwrap();
        assert!(v["landmarks"]["max_mm"].as_f64().unwrap() > 0.1, "{file} {flags:?}: {}", v["landmarks"]);
    }
    // A .npz of two arrays needs --npz-key; the error names the file and the arrays.
    let field = d.join("flow.npz");
    let out = score(&[
        "--fixed-labels",
        f.to_str().unwrap(),
        "--moving-labels",
        m.to_str().unwrap(),
        "--field",
        field.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("flow.npz") && err.contains("--npz-key") && err.lines().count() == 1, "{err}");
}
