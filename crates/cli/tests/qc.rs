//! `sinew qc` end to end on the small demo cohort with a constructed field: the PNG it
//! writes (size read from the PNG header as the PNG specification lays it out) and its
//! refusals of bad input.

use std::path::Path;

use sinew_grid::Field;
use sinew_testkit::{text, Sinew};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

/// Width and height from a PNG file: 8-byte signature, then the IHDR chunk (length, "IHDR",
/// width and height as big-endian u32) (PNG specification, ISO/IEC 15948, section 11.2.2).
fn png_size(p: &Path) -> (u32, u32) {
    let b = std::fs::read(p).unwrap();
    assert_eq!(&b[..8], b"\x89PNG\r\n\x1a\n", "PNG signature");
    assert_eq!(&b[12..16], b"IHDR");
    (u32::from_be_bytes(b[16..20].try_into().unwrap()), u32::from_be_bytes(b[20..24].try_into().unwrap()))
}

/// Two small demo subjects and a smooth field on subject 0's grid (voxel units).
fn setup(dir: &Path) -> (String, String, String, String, String) {
    SINEW.demo(&dir.join("data"), 2, &[]);
    let s = |n: &str| dir.join("data").join(n).to_str().unwrap().to_string();
    let fixed = sinew_io::read_image(Path::new(&s("subject_00_image.nii.gz"))).unwrap();
    let mut f = Field::zeros(fixed.grid.clone());
    let [nx, ny, nz] = fixed.grid.shape();
    for (n, v) in f.components_mut()[2].iter_mut().enumerate() {
        let (i, j) = (n / (ny * nz), (n / nz) % ny);
        *v = 1.5 * ((i as f32 / nx as f32) * std::f32::consts::PI).sin() * ((j as f32 / ny as f32) * 3.0).cos();
    }
    let field = dir.join("field.nii.gz");
    sinew_io::write_field(&field, &f, sinew_io::FieldUnits::Voxel).unwrap();
    (
        s("subject_00_image.nii.gz"),
        s("subject_01_image.nii.gz"),
        s("subject_00_labels.nii.gz"),
        s("subject_01_labels.nii.gz"),
        field.to_str().unwrap().to_string(),
    )
}

#[test]
fn writes_a_sheet_and_refuses_bad_input() {
    let tmp = sinew_testkit::tempdir();
    let (fixed, moving, fl, ml, field) = setup(tmp.path());
    let png = tmp.path().join("qc.png");
    let p = png.to_str().unwrap();
    let base = ["qc", "-f", &fixed, "-m", &moving, "--field", &field];
    let out = SINEW.run([&base[..], &["--fixed-labels", &fl, "--moving-labels", &ml, "-o", p]].concat());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let (w, h) = png_size(&png);
    // Six panels of at least 120 px side by side, three rows: a sheet, not a thumbnail.
    assert!(w > 6 * 120 && h > 3 * 100, "{w}×{h}");
    // The demo grid is 72×56×96 at 4 mm; the labelled centre is near the middle.
    assert!(text(&out.stdout).contains("planes through voxel"), "{}", text(&out.stdout));

    // A chosen point and window, without labels.
    let png2 = tmp.path().join("qc2.png");
    let out =
        SINEW.run([&base[..], &["--point", "10,20,30", "--window", "-100,200", "-o", png2.to_str().unwrap()]].concat());
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(text(&out.stdout).contains("[10, 20, 30]"));
    // The same grid gives the same width; without labels there is no legend row below.
    let (w2, h2) = png_size(&png2);
    assert!(w2 == w && h2 < h, "{w2}×{h2} against {w}×{h} with labels");

    // Refusals: exit code 2, one line naming the problem, nothing written.
    let bad = tmp.path().join("bad.png");
    let b = bad.to_str().unwrap();
    for (extra, needle) in [
        (vec!["--point", "10,20,500"], "outside"),
        (vec!["--window", "300,-200"], "lo < hi"),
        (vec!["--window", "a,b"], "not a number"),
    ] {
        let out = SINEW.run([&base[..], &extra[..], &["-o", b]].concat());
        assert_eq!(out.status.code(), Some(2), "{extra:?}");
        assert!(text(&out.stderr).contains(needle), "{extra:?}: {}", text(&out.stderr));
        assert!(!bad.exists());
    }
    // A field on another grid (the moving scan's field would be, for a different shape).
    let other = tmp.path().join("other_field.nii.gz");
    let g = sinew_grid::Grid::axis_aligned([10, 10, 10], [4.0; 3], [0.0; 3]);
    sinew_io::write_field(&other, &Field::zeros(g), sinew_io::FieldUnits::Voxel).unwrap();
    let out = SINEW.run(["qc", "-f", &fixed, "-m", &moving, "--field", other.to_str().unwrap(), "-o", b]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("fixed grid"), "{}", text(&out.stderr));
    // Never overwrite an input.
    let out = SINEW.run(["qc", "-f", &fixed, "-m", &moving, "--field", &field, "-o", &moving]);
    assert_eq!(out.status.code(), Some(2));
}

/// The scan of `src` mapped by the README's prep recipe (−1000 … 1500 HU to [0, 1]).
fn unit_scaled(src: &str, dst: &Path) -> String {
    let mut img = sinew_io::read_image(Path::new(src)).unwrap();
    img.as_slice_mut().iter_mut().for_each(|v| *v = ((*v + 1000.0) / 2500.0).clamp(0.0, 1.0));
    sinew_io::write_image(dst, &img).unwrap();
    dst.to_str().unwrap().to_string()
}

fn qc_record(dir: &Path) -> serde_json::Value {
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("report.json")).unwrap()).unwrap();
    r["qc"].clone()
}

#[test]
fn qc_window_of_register_cohort_and_demo() {
    let tmp = sinew_testkit::tempdir();
    let (fixed, moving, _, _, _) = setup(tmp.path());
    let run = |args: &[&str]| {
        let out = SINEW.run(args);
        assert!(out.status.success(), "{args:?}: {}", text(&out.stderr));
    };
    let fast = ["--preset", "fast", "-q"];
    // HU scans: auto keeps the soft-tissue window.
    let hu = tmp.path().join("hu");
    run(&[&["register", "-f", &fixed, "-m", &moving, "-o", hu.to_str().unwrap()][..], &fast].concat());
    let q = qc_record(&hu);
    assert_eq!(
        (q["window"].clone(), q["window_rule"].as_str()),
        (serde_json::json!([-200.0, 300.0]), Some("hounsfield"))
    );
    // Scaled to [0, 1]: auto takes the foreground's percentiles, inside [0, 1] and not flat.
    let (f1, m1) =
        (unit_scaled(&fixed, &tmp.path().join("f1.nii.gz")), unit_scaled(&moving, &tmp.path().join("m1.nii.gz")));
    let unit = tmp.path().join("unit");
    run(&[&["register", "-f", &f1, "-m", &m1, "-o", unit.to_str().unwrap()][..], &fast].concat());
    let q = qc_record(&unit);
    assert_eq!(q["window_rule"], "percentiles");
    let (lo, hi) = (q["window"][0].as_f64().unwrap(), q["window"][1].as_f64().unwrap());
    // Soft tissue (about 0 … 100 HU, i.e. 0.4 … 0.44) lies inside the window.
    assert!(0.0 < lo && lo < 0.4 && 0.44 < hi && hi <= 1.0, "window {lo} … {hi}");
    // An explicit window through cohort, which passes it to every pair.
    let coh = tmp.path().join("cohort");
    let data = tmp.path().join("data");
    run(&[
        &["cohort", "--all-pairs", data.to_str().unwrap(), "-o", coh.to_str().unwrap(), "--qc-window=-100,250"][..],
        &fast,
    ]
    .concat());
    let q = qc_record(&coh.join("pairs/subject_00__subject_01"));
    assert_eq!(
        (q["window"].clone(), q["window_rule"].as_str()),
        (serde_json::json!([-100.0, 250.0]), Some("explicit"))
    );
    // Refusals name the option and the problem, for all three commands.
    for cmd in [
        vec!["register", "-f", &fixed, "-m", &moving, "-o", "never", "--qc-window", "300,-200"],
        vec!["cohort", "--all-pairs", data.to_str().unwrap(), "-o", "never", "--qc-window", "a,b"],
        vec!["demo", "--out", "never", "--qc-window", "1,2,3"],
    ] {
        let out = SINEW.run(&cmd);
        assert_eq!(out.status.code(), Some(2), "{cmd:?}");
        assert!(text(&out.stderr).contains("--qc-window"), "{cmd:?}: {}", text(&out.stderr));
        assert!(!Path::new("never").exists());
    }
}
