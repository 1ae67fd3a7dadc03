//! `sinew prep` end to end: demo scans rewritten in other orientations and spacings by
//! nibabel/scipy (`scripts/ref/prep_rewrite.py`) are brought onto one grid by one recipe,
//! then checked with `scripts/ref/prep_reference.py` (nibabel axis codes and apply_affine,
//! scipy.ndimage.affine_transform) and voxel by voxel against the original demo scans.
//! Also the bad-input rules: one-line error naming the file, exit 2, no partial output.
//!
//! python3 with numpy, scipy and nibabel is required: these tests fail without it.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use sha2::{Digest, Sha256};
use sinew_grid::{Image, LabelMap};
use sinew_testkit::{p as s, text, Sinew};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn ref_script(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../scripts/ref").join(name)
}

fn python(script: &str, args: &[&str]) -> String {
    let out = Command::new("python3")
        .arg(ref_script(script))
        .args(args)
        .output()
        .expect("python3 with numpy, scipy and nibabel is required");
    assert!(out.status.success(), "{script} failed: {}", text(&out.stderr));
    text(&out.stdout)
}

fn check(input: &Path, output: &Path, kind: &str, window: Option<[f32; 2]>) -> serde_json::Value {
    let mut args = vec!["check".to_string(), s(input).into(), s(output).into(), kind.into()];
    if let Some([lo, hi]) = window {
        args.extend([lo.to_string(), hi.to_string()]);
    }
    let a: Vec<&str> = args.iter().map(String::as_str).collect();
    serde_json::from_str(&python("prep_reference.py", &a)).unwrap()
}

/// The demo cohort (2 small subjects) and its rewritten copies in `raw/`.
fn setup(tmp: &Path) -> (PathBuf, PathBuf) {
    let demo = tmp.join("demo");
    let out = SINEW.run(["demo", "--small", "--subjects", "2", "--quiet", "--out", s(&demo)]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let raw = tmp.join("raw");
    let said = python("prep_rewrite.py", &[s(&demo), s(&raw)]);
    assert!(said.contains("scan_a PIL (56, 96, 72)") && said.contains("scan_b ILA"), "{said}");
    (demo, raw)
}

const RECIPE: &str = r#"
[orient]
axes = "RAS"
[resample]
spacing = [4.0, 4.0, 4.0]
[crop_pad]
shape = [72, 56, 96]
centre = "body"
[body]
threshold = -500.0
fill_holes = true
[intensity]
window = [-1000.0, 1500.0]
scale = "unit"
[output]
mask = true
"#;

fn sha256(p: &Path) -> String {
    Sha256::digest(std::fs::read(p).unwrap()).iter().map(|b| format!("{b:02x}")).collect()
}

/// For every voxel of `out`, the voxel of `src` at the same world point, which must be a whole
/// voxel (|fraction| < 1e-3); `None` outside `src`.
fn same_world_voxel(out: &sinew_grid::Grid, src: &sinew_grid::Grid, q: [usize; 3]) -> Option<[usize; 3]> {
    let p = src.world_to_voxel(out.voxel_to_world(q.map(|v| v as f64)));
    let r = p.map(f64::round);
    assert!(approx::abs_diff_eq!(p[..], r[..], epsilon = 1e-3), "voxel {q:?} falls between source voxels: {p:?}");
    let n = src.shape();
    (0..3).all(|d| r[d] >= 0.0 && r[d] < n[d] as f64).then(|| r.map(|v| v as usize))
}

#[test]
fn one_recipe_brings_differently_oriented_and_spaced_scans_onto_one_grid() {
    let tmp = sinew_testkit::tempdir();
    let (demo, raw) = setup(tmp.path());
    let recipe = tmp.path().join("recipe.toml");
    std::fs::write(&recipe, RECIPE).unwrap();
    let outdir = tmp.path().join("prepped");
    let out = SINEW.run(["prep", s(&raw), "--recipe", s(&recipe), "--out", s(&outdir)]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(text(&out.stdout).contains("prepared 2 scans"), "{}", text(&out.stdout));

    let window = Some([-1000.0f32, 1500.0]);
    for name in ["scan_a", "scan_b"] {
        let (ri, rl) = (raw.join(format!("{name}_image.nii.gz")), raw.join(format!("{name}_labels.nii.gz")));
        let (oi, ol) = (outdir.join(format!("{name}_image.nii.gz")), outdir.join(format!("{name}_labels.nii.gz")));
        // nibabel: one grid for all (RAS, 72×56×96, 4 mm).
        let ci = check(&ri, &oi, "image", window);
        assert_eq!(ci["axcodes"], "RAS", "{name}");
        assert_eq!(ci["shape"], serde_json::json!([72, 56, 96]), "{name}");
        for sp in ci["spacing"].as_array().unwrap() {
            assert!(approx::abs_diff_eq!(sp.as_f64().unwrap(), 4.0, epsilon = 1e-5), "{name}: spacing {sp}");
        }
        // scipy.ndimage.affine_transform (order 1) + closed-form window/unit scaling: the
        // output holds the input at the world position of each voxel centre.
        assert!(ci["n_interior"].as_u64().unwrap() > 72 * 56 * 96 / 2, "{name}: {ci}");
        let diff = ci["max_abs_diff"].as_f64().unwrap();
        assert!(diff < 1e-4, "{name}: max |sinew − scipy| = {diff}");
        let cl = check(&rl, &ol, "labels", None);
        assert_eq!(cl["n_mismatch"], 0, "{name}: labels differ from scipy order 0: {cl}");
        let mask = sinew_io::read_labels(&outdir.join(format!("{name}_image_mask.nii.gz"))).unwrap();
        assert!(mask.as_slice().iter().filter(|&&v| v == 1).count() > 10_000, "{name}: mask too small");
    }

    // scan_a was only reoriented: the output overlays the demo scan voxel for voxel
    // (whole-voxel offsets, exact values; unit window by its closed form).
    let d_img = sinew_io::read_image(&demo.join("subject_00_image.nii.gz")).unwrap();
    let d_lab = sinew_io::read_labels(&demo.join("subject_00_labels.nii.gz")).unwrap();
    let o_img: Image = sinew_io::read_image(&outdir.join("scan_a_image.nii.gz")).unwrap();
    let o_lab: LabelMap = sinew_io::read_labels(&outdir.join("scan_a_labels.nii.gz")).unwrap();
    let mut overlap = 0;
    for ((i, j, k), &v) in o_img.data.indexed_iter() {
        if let Some([a, b, c]) = same_world_voxel(&o_img.grid, &d_img.grid, [i, j, k]) {
            let want = (d_img.data[[a, b, c]].clamp(-1000.0, 1500.0) as f64 + 1000.0) / 2500.0;
            assert!(approx::abs_diff_eq!(v as f64, want, epsilon = 1e-6), "({i},{j},{k}): {v} vs {want}");
            assert_eq!(o_lab.data[[i, j, k]], d_lab.data[[a, b, c]]);
            overlap += 1;
        } else {
            assert_eq!(o_lab.data[[i, j, k]], 0, "padding holds label 0");
        }
    }
    assert!(overlap > 72 * 56 * 96 * 9 / 10, "overlap {overlap}");

    // scan_b was resampled twice (to 3.5×5×4.5 mm and back to 4 mm): its labels still overlay
    // the demo's at the same world points (nearest voxel), organ by organ.
    let d_lab = sinew_io::read_labels(&demo.join("subject_01_labels.nii.gz")).unwrap();
    let o_lab = sinew_io::read_labels(&outdir.join("scan_b_labels.nii.gz")).unwrap();
    let back = sinew_grid::resample::resample_labels(&o_lab, &d_lab.grid);
    let dice = sinew_score::dice_per_label(&d_lab, &back, &d_lab.labels()).unwrap();
    for (l, d) in &dice {
        let d = d.unwrap();
        assert!(d > 0.7, "label {l}: Dice {d} after two resamplings");
    }
    eprintln!("scan_b Dice vs demo after two resamplings: {dice:?}");
    assert!(sinew_score::mean_dice(&dice).unwrap() > 0.85, "{dice:?}");

    // The log: every file with its checksum, grids before/after and the steps in order.
    let log: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(outdir.join("prep_log.json")).unwrap()).unwrap();
    assert_eq!(log["order"], "orient -> resample -> body mask -> crop/pad -> window -> scale");
    let files = log["files"].as_array().unwrap();
    assert_eq!(files.len(), 2);
    for f in files {
        let input = PathBuf::from(f["input"].as_str().unwrap());
        assert_eq!(f["sha256"], sha256(&input));
        assert_eq!(f["labels"]["sha256"], sha256(Path::new(f["labels"]["input"].as_str().unwrap())));
        let steps: Vec<&str> = f["steps"].as_array().unwrap().iter().map(|s| s["step"].as_str().unwrap()).collect();
        assert_eq!(steps, ["orient", "resample", "body_mask", "crop_pad", "window", "scale_unit"]);
        assert_eq!(f["after"]["shape"], serde_json::json!([72, 56, 96]));
    }
    assert_eq!(files[0]["before"]["orientation"], "PIL");
    assert_eq!(files[1]["before"]["orientation"], "ILA");
    // Nothing but the outputs and the log (no staging folder, no temporary file).
    let mut names: Vec<String> =
        std::fs::read_dir(&outdir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    names.sort();
    assert_eq!(names.len(), 7, "{names:?}");
}

#[test]
fn flags_alone_keep_the_field_of_view_and_override_a_recipe() {
    let tmp = sinew_testkit::tempdir();
    let (_demo, raw) = setup(tmp.path());
    let b = raw.join("scan_b_image.nii.gz");

    // Orient + resample to a shape, no crop/pad: the field-of-view corners (voxel corners,
    // nibabel.affines.apply_affine) are the same eight world points to 1e-4 mm.
    let o1 = tmp.path().join("o1");
    let out = SINEW.run(["prep", s(&b), "--orient", "RAS", "--shape", "72,56,96", "--out", s(&o1), "-q"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let c = check(&b, &o1.join("scan_b_image.nii.gz"), "image", None);
    let corners = |k: &str| {
        let mut v: Vec<[f64; 3]> = serde_json::from_value(c[k].clone()).unwrap();
        v.sort_by(|a, b| a.partial_cmp(b).unwrap());
        v
    };
    for (x, y) in corners("corners_in").iter().zip(&corners("corners_out")) {
        approx::assert_abs_diff_eq!(x[..], y[..], epsilon = 1e-4);
    }
    let range: Vec<f64> = serde_json::from_value(c["range_out"].clone()).unwrap();
    assert!((c["max_abs_diff"].as_f64().unwrap()) < 1e-4 * (range[1] - range[0]), "{c}");

    // A recipe with flags over it: --scale none and another window win.
    let recipe = tmp.path().join("r.toml");
    std::fs::write(&recipe, RECIPE).unwrap();
    let o2 = tmp.path().join("o2");
    let out = SINEW.run([
        "prep",
        s(&b),
        "--recipe",
        s(&recipe),
        "--scale",
        "none",
        "--window=-200,300",
        "--out",
        s(&o2),
        "-q",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let img = sinew_io::read_image(&o2.join("scan_b_image.nii.gz")).unwrap();
    assert_eq!(img.finite_range(), Some((-200.0, 300.0)));
    assert!(o2.join("scan_b_image_mask.nii.gz").is_file(), "the recipe's mask output stays");
    let log: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(o2.join("prep_log.json")).unwrap()).unwrap();
    assert_eq!(log["pipeline"]["intensity"]["scale"], "none");
    assert_eq!(log["pipeline"]["intensity"]["window"], serde_json::json!([-200.0, 300.0]));
}

fn assert_refused(out: &Output, names: &str) {
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert_eq!(err.trim_end().lines().count(), 1, "one line: {err}");
    assert!(err.contains(names), "{err}");
}

#[test]
fn bad_inputs_are_refused_before_anything_is_written() {
    let tmp = sinew_testkit::tempdir();
    let (_demo, raw) = setup(tmp.path());
    let a = raw.join("scan_a_image.nii.gz");

    // A damaged file among good ones: nothing written, not even the folder.
    let mixed = tmp.path().join("mixed");
    std::fs::create_dir(&mixed).unwrap();
    std::fs::copy(&a, mixed.join("a_image.nii.gz")).unwrap();
    std::fs::write(mixed.join("z_image.nii.gz"), b"not a nifti file").unwrap();
    let o = tmp.path().join("o_mixed");
    assert_refused(&SINEW.run(["prep", s(&mixed), "--out", s(&o), "--orient", "LPS"]), "z_image.nii.gz");
    assert!(!o.exists());

    // The output folder holds an input; an output would overwrite an input.
    assert_refused(&SINEW.run(["prep", s(&a), "--out", s(&raw)]), "holds this input");

    // The same scan twice.
    assert_refused(&SINEW.run(["prep", s(&raw), s(&a), "--out", s(&o)]), "given twice");

    // A label map on another grid than its image.
    let o = tmp.path().join("o_lab");
    let wrong = raw.join("scan_b_labels.nii.gz");
    assert_refused(&SINEW.run(["prep", s(&a), "--labels", s(&wrong), "--out", s(&o)]), "scan_b_labels.nii.gz");
    assert!(!o.exists());

    // A label map without its image, by the naming rule.
    let orphan = tmp.path().join("orphan");
    std::fs::create_dir(&orphan).unwrap();
    std::fs::copy(&a, orphan.join("x_image.nii.gz")).unwrap();
    std::fs::copy(raw.join("scan_a_labels.nii.gz"), orphan.join("y_labels.nii.gz")).unwrap();
    assert_refused(&SINEW.run(["prep", s(&orphan), "--out", s(&o)]), "y_labels.nii.gz");

    // A step that fails on the second file (no voxel above the threshold after the first
    // succeeded): no partial output — the folder holds nothing afterwards.
    let o = tmp.path().join("o_fail");
    let hot = tmp.path().join("hot");
    std::fs::create_dir(&hot).unwrap();
    std::fs::copy(&a, hot.join("a_image.nii.gz")).unwrap();
    let mut cold = sinew_io::read_image(&a).unwrap();
    cold.as_slice_mut().iter_mut().enumerate().for_each(|(n, v)| *v = -1000.0 + (n % 7) as f32);
    sinew_io::write_image(&hot.join("b_image.nii.gz"), &cold).unwrap();
    let out = SINEW.run(["prep", s(&hot), "--scale", "zscore", "--body-threshold", "-900", "--out", s(&o)]);
    assert_refused(&out, "b_image.nii.gz");
    assert!(text(&out.stderr).contains("body threshold"), "{}", text(&out.stderr));
    assert_eq!(std::fs::read_dir(&o).unwrap().count(), 0, "partial output left behind");

    // Bad flags: exit 2 with the value named.
    assert_refused(&SINEW.run(["prep", s(&a), "--orient", "RAR", "--out", s(&o)]), "RAR");
    assert_refused(&SINEW.run(["prep", s(&a), "--window=5,1", "--out", s(&o)]), "window");
}
