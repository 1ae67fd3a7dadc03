//! Scans as they come, through the `sinew` binary: NaN voxels (`--nan`), the warning when the
//! bodies overlap little, and padding drawn as padding on the QC sheet.
//!
//! The scans are small synthetic blobs written here; what is checked are facts of the inputs
//! (how many voxels were made NaN, which slices the moving scan covers, how far apart the two
//! frames are), and `qc.png` is decoded with the `png` crate.

use std::path::{Path, PathBuf};
use std::process::Output;

use sinew_grid::{Grid, Image, Volume};
use sinew_testkit::Sinew;

const SHAPE: [usize; 3] = [20, 16, 24];

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

/// A smooth blob (a body) on a 4 mm grid with origin `origin`, `nk` slices along k.
fn blob(origin: [f64; 3], nk: usize, shift: f32) -> Image {
    let shape = [SHAPE[0], SHAPE[1], nk];
    let grid = Grid::axis_aligned(shape, [4.0, 4.0, 4.0], origin);
    Volume::new(
        grid,
        ndarray::Array3::from_shape_fn(shape, |(i, j, k)| {
            let r2 = (i as f32 - 10.0 - shift).powi(2) + (j as f32 - 8.0).powi(2) + (k as f32 - 12.0).powi(2);
            -1000.0 + 1100.0 * (-r2 / 40.0).exp() + (i * 3 + j * 5 + k * 7) as f32 % 11.0
        }),
    )
    .unwrap()
}

fn write(dir: &Path, name: &str, img: &Image) -> PathBuf {
    let p = dir.join(name);
    sinew_io::write_image(&p, img).unwrap();
    p
}

fn register(fixed: &Path, moving: &Path, out: &Path, extra: &[&str]) -> Output {
    let mut c = SINEW.cmd();
    c.args(["register", "-q", "-j", "1", "--iterations", "4,4,4,4", "-f"]).arg(fixed).arg("-m").arg(moving).arg("-o");
    c.arg(out).args(extra);
    c.output().unwrap()
}

fn report(out: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(out.join("report.json")).unwrap()).unwrap()
}

#[test]
fn nan_voxels_refused_by_default_padded_or_replaced_on_request() {
    let dir = sinew_testkit::tempdir();
    // The first 3 slices outside the scanned volume, marked NaN as some exports do:
    // 20 × 16 × 3 = 960 voxels.
    let mut fixed = blob([-40.0, -30.0, -46.0], SHAPE[2], 0.0);
    for ((_, _, k), v) in fixed.data.indexed_iter_mut() {
        if k < 3 {
            *v = f32::NAN;
        }
    }
    let f = write(dir.path(), "fixed_nan.nii.gz", &fixed);
    let m = write(dir.path(), "moving.nii.gz", &blob([-40.0, -30.0, -46.0], SHAPE[2], 1.5));

    // Default: refused, exit code 2, one line naming the file, no output left.
    let out = dir.path().join("refused");
    let o = register(&f, &m, &out, &[]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert_eq!(err.trim_end().lines().count(), 1, "one line: {err}");
    assert!(err.contains("fixed_nan.nii.gz") && err.contains("NaN"), "{err}");
    let left = std::fs::read_dir(&out).map(|d| d.count()).unwrap_or(0);
    assert_eq!(left, 0, "no output after a refusal");

    // pad: the voxels become padding (left out of the data term); the count is recorded.
    let out = dir.path().join("pad");
    let o = register(&f, &m, &out, &["--nan", "pad"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let r = report(&out);
    assert_eq!(r["nan"]["policy"], "pad");
    assert_eq!(r["nan"]["fixed_voxels"], 960);
    assert_eq!(r["nan"]["moving_voxels"], 0);
    for name in ["warped.nii.gz", "jacdet.nii.gz"] {
        let img = sinew_io::read_image(&out.join(name)).unwrap();
        assert_eq!(img.count_non_finite(), 0, "{name} is finite");
    }

    // A value: the voxels take it; a negative number is accepted as a value.
    let out = dir.path().join("value");
    let o = register(&f, &m, &out, &["--nan", "-1024"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let r = report(&out);
    assert_eq!(r["nan"]["policy"]["value"], -1024.0);
    assert_eq!(r["nan"]["fixed_voxels"], 960);

    // Anything else is a one-line usage error.
    let o = register(&f, &m, &dir.path().join("bad"), &["--nan", "zero"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("--nan zero"), "{err}");
}

#[test]
fn small_overlap_of_the_bodies_is_warned_about() {
    let dir = sinew_testkit::tempdir();
    let f = write(dir.path(), "fixed.nii.gz", &blob([-40.0, -30.0, -46.0], SHAPE[2], 0.0));
    let near = write(dir.path(), "near.nii.gz", &blob([-40.0, -30.0, -46.0], SHAPE[2], 1.0));
    // The same body 300 mm away in the moving scan's frame (3.75 fields of view of 80 mm),
    // with the initial alignment switched off: the bodies cannot overlap.
    let far = write(dir.path(), "far.nii.gz", &blob([260.0, -30.0, -46.0], SHAPE[2], 1.0));

    let o = register(&f, &near, &dir.path().join("near_out"), &[]);
    assert!(o.status.success());
    assert!(!String::from_utf8_lossy(&o.stderr).contains("warning"), "{}", String::from_utf8_lossy(&o.stderr));

    let out = dir.path().join("far_out");
    let o = register(&f, &far, &out, &["--initial", "off"]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{err}");
    let warning: Vec<&str> = err.lines().filter(|l| l.starts_with("warning:")).collect();
    assert_eq!(warning.len(), 1, "{err}");
    assert!(warning[0].contains("far.nii.gz") && warning[0].contains("overlap only 0 %"), "{err}");
    assert_eq!(report(&out)["initial_alignment"]["overlap_final"], 0.0);
}

/// Pixels of `qc.png` drawn in the padding colour (`sinew_qc::colour::PADDING`).
fn padding_pixels(png_path: &Path) -> usize {
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(png_path).unwrap()));
    let mut reader = decoder.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut buf).unwrap();
    assert_eq!(info.color_type, png::ColorType::Rgb);
    buf[..info.buffer_size()].chunks_exact(3).filter(|p| *p == sinew_qc::colour::PADDING).count()
}

#[test]
fn qc_draws_the_region_outside_the_moving_scan_as_padding() {
    let dir = sinew_testkit::tempdir();
    let f = write(dir.path(), "fixed.nii.gz", &blob([-40.0, -30.0, -46.0], SHAPE[2], 0.0));
    let full = write(dir.path(), "full.nii.gz", &blob([-40.0, -30.0, -46.0], SHAPE[2], 1.0));
    // The moving scan covers only the lower 14 of the fixed scan's 24 slices.
    let half = write(dir.path(), "half.nii.gz", &blob([-40.0, -30.0, -46.0], 14, 1.0));
    let out_full = dir.path().join("full_out");
    assert!(register(&f, &full, &out_full, &["--initial", "off"]).status.success());
    let out_half = dir.path().join("half_out");
    assert!(register(&f, &half, &out_half, &["--initial", "off"]).status.success());
    let (p_full, p_half) = (padding_pixels(&out_full.join("qc.png")), padding_pixels(&out_half.join("qc.png")));
    // The coronal and sagittal "moving (before)" panels show the 10 missing slices (40 mm).
    assert!(p_half > 200, "padding pixels: {p_half}");
    assert!(p_full < p_half / 10, "a moving scan covering the fixed one shows (almost) no padding: {p_full}");
}
