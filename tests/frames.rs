//! Real scans as they come: known-warp recovery on a real chest CT, with the moving scan in
//! the same world frame, in another frame (voxel axes flipped, 177 mm away), and on another
//! grid; thick (5 mm) slices throughout.
//!
//! Source of the scan: `chest_ct_a.nii.gz` in the shared real-CT folder (an open chest CT,
//! 512×512×48 at 0.57×0.57×5 mm, from the `data/` folder of the pyradiomics 3.1.0 source
//! distribution, BSD-3-Clause; see that folder's README). Read in place, never copied. The
//! folder is `/work/shared/data/real-ct` unless `SINEW_REAL_CT` names another.
//!
//! Construction (the usual synthetic-deformation protocol): a smooth known pull field `u*` of
//! at most 10 mm on the fixed grid, `fixed(x) = moving(x + u*(x))`. The check is the mean
//! endpoint error in mm, in world coordinates, over the body of the fixed scan (> −500 HU)
//! where the true endpoint lies inside the moving scan's slices; the target (1.5 mm with
//! default options in either frame) is the design notes' quality bar.

use std::path::PathBuf;

use sinew_grid::{resample, Affine, Border, Field, Grid, Image};
use sinew_solve::{register_scans, RegParams, ScanOptions};
use sinew_testkit::{endpoint_errors_where, mean};

fn real_ct(name: &str) -> Image {
    let dir = std::env::var("SINEW_REAL_CT").unwrap_or_else(|_| "/work/shared/data/real-ct".into());
    let path = PathBuf::from(dir).join(name);
    assert!(path.exists(), "{}: the real-CT test scan is missing (set SINEW_REAL_CT to its folder)", path.display());
    sinew_io::read_image(&path).expect("readable real CT")
}

/// `chest_ct_a` brought to 256×256×48 (1.14×1.14×5 mm), the grid the tests register on.
fn scan_a_half() -> (Image, Image) {
    let native = real_ct("chest_ct_a.nii.gz");
    let g = native.grid.with_shape([256, 256, 48]).unwrap();
    let half = resample::resample_image_antialiased(&native, &g, Border::Nearest);
    (native, half)
}

/// The array flipped along i and j, with the header moved so that every voxel's anatomy sits
/// `shift` mm away in world space: a scan of the same body in another frame.
fn other_frame(img: &Image, shift: [f64; 3]) -> Image {
    let [nx, ny, _] = img.grid.shape();
    let flip = Affine::from_parts(
        [[-1.0, 0.0, 0.0], [0.0, -1.0, 0.0], [0.0, 0.0, 1.0]],
        [(nx - 1) as f64, (ny - 1) as f64, 0.0],
    );
    let t = Affine::from_parts([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]], shift);
    let grid = Grid::new(img.grid.shape(), t.compose(&img.grid.affine().compose(&flip))).unwrap();
    let mut data = img.data.clone();
    data.invert_axis(ndarray::Axis(0));
    data.invert_axis(ndarray::Axis(1));
    Image { grid, data: data.as_standard_layout().into_owned() }
}

/// Mean endpoint error (mm): `|G_f·(x + u(x)) − (G_t·(x + u*(x)) + shift)|` over fixed body
/// voxels whose true endpoint lies inside the moving slices (`G_t` = the truth's frame), and
/// the number of those voxels.
fn endpoint_error(u: &Field, truth: &Field, fixed: &Image, shift: [f64; 3]) -> (f64, usize) {
    let g = &u.grid;
    let nz = g.shape()[2];
    let errs = endpoint_errors_where(g, |n, x| {
        let ut: [f64; 3] = std::array::from_fn(|d| x[d] + truth.component(d)[n] as f64);
        if fixed.as_slice()[n] <= -500.0 || ut[2] < 0.5 || ut[2] > nz as f64 - 1.5 {
            return None;
        }
        let got = g.voxel_to_world(std::array::from_fn(|d| x[d] + u.component(d)[n] as f64));
        let want = truth.grid.voxel_to_world(ut);
        Some(std::array::from_fn(|d| got[d] - want[d] - shift[d]))
    });
    (mean(&errs), errs.len())
}

fn run(fixed: &Image, moving: &Image) -> sinew_solve::ScanRegistration {
    register_scans(fixed, moving, None, &RegParams::default(), &ScanOptions::default(), &mut |_| {}).unwrap()
}

#[test]
fn real_ct_known_warp_in_the_same_and_in_another_frame() {
    let (_, moving) = scan_a_half();
    let truth = sinew_phantom::known_field(&moving.grid, 10.0);
    let fixed = sinew_transform::warp_image(&moving, &truth, Border::Nearest).unwrap();

    let same = run(&fixed, &moving);
    let (epe, n) = endpoint_error(&same.field.to_field(), &truth, &fixed, [0.0; 3]);
    eprintln!(
        "same frame: EPE {epe:.3} mm over {n} voxels; initial applied {} ({})",
        same.initial.applied, same.initial.reason
    );
    assert!(!same.initial.applied, "one frame needs no initial alignment");
    assert!(same.working.spacing_mm[2] == 5.0, "thick slices are kept: {:?}", same.working);
    assert!(epe <= 1.5, "same frame: mean endpoint error {epe:.3} mm > 1.5 mm");

    let shift = [140.0, -60.0, 90.0];
    let moved = other_frame(&moving, shift);
    let other = run(&fixed, &moved);
    let (epe2, n2) = endpoint_error(&other.field.to_field(), &truth, &fixed, shift);
    eprintln!(
        "other frame: EPE {epe2:.3} mm over {n2} voxels; initial {:?} overlap {:.2} -> {:.2} -> {:.2?}",
        other.initial.centre_shift_mm,
        other.initial.overlap_identity,
        other.initial.overlap_initial,
        other.initial.overlap_final
    );
    assert!(other.initial.applied && other.initial.overlap_identity < 0.3, "{:?}", other.initial.reason);
    assert!(other.initial.overlap_initial > 0.9 && other.initial.overlap_final.unwrap() > 0.8);
    assert!(epe2 <= 1.5, "other frame: mean endpoint error {epe2:.3} mm > 1.5 mm");
}

#[test]
fn real_ct_known_warp_with_moving_scan_on_its_native_grid() {
    // Fixed: 1.14 mm in-plane, pulled through u* from the native 0.57 mm moving scan; the
    // moving scan is given at its native grid (four times the voxels), in another frame.
    let (native, half) = scan_a_half();
    let truth = sinew_phantom::known_field(&half.grid, 10.0);
    let fixed = sinew_transform::warp_image_from(&native, &truth, Border::Nearest);
    let shift = [-35.0, 80.0, -120.0];
    let moved = other_frame(&native, shift);
    let reg = run(&fixed, &moved);
    assert_eq!(reg.field.grid(), &fixed.grid, "the field lives on the fixed native grid");
    assert_eq!(reg.moving_working.shape, [146, 146, 48]);
    let (epe, n) = endpoint_error(&reg.field.to_field(), &truth, &fixed, shift);
    eprintln!("native moving grid, other frame: EPE {epe:.3} mm over {n} voxels");
    assert!(epe <= 1.5, "mean endpoint error {epe:.3} mm > 1.5 mm");
}
