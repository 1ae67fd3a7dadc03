//! `sinew field`: conversion checked against nibabel (scripts/ref/bspline_field_convert.py),
//! inversion and composition through the binary.

use std::path::Path;
use std::process::Command;

use sinew_grid::{Affine, Field, Grid};
use sinew_io::FieldUnits;
use sinew_testkit::Sinew;

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn field(grid: &Grid) -> Field {
    let mut f = Field::zeros(grid.clone());
    f.data.iter_mut().enumerate().for_each(|(n, v)| *v = ((n as f32) * 0.013).sin() * 1.5);
    f
}

#[test]
fn absolute_mm_map_agrees_with_nibabel_apply_affine() {
    // Reference: nibabel.affines.apply_affine on x + u(x), oblique grid.
    let dir = sinew_testkit::tempdir();
    let a = Affine::from_parts([[0.0, -2.0, 0.3], [1.5, 0.0, 0.0], [0.1, 0.0, 2.5]], [10.0, -20.0, 5.0]);
    let g = Grid::new([9, 8, 7], a).unwrap();
    let src = dir.path().join("u.nii.gz");
    sinew_io::write_field(&src, &field(&g), FieldUnits::Mm).unwrap();
    let out = dir.path().join("abs.npy");
    let st = SINEW
        .cmd()
        .args(["field", "convert"])
        .arg(&src)
        .arg("-o")
        .arg(&out)
        .args(["--to", "absolute-mm"])
        .status()
        .unwrap();
    assert!(st.success());
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../scripts/ref/bspline_field_convert.py");
    let r = Command::new("python3").arg(script).arg(&src).arg(&out).output().expect("python3 must be installed");
    eprintln!("{}", String::from_utf8_lossy(&r.stdout));
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
}

#[test]
fn invert_then_compose_gives_the_identity_and_units_round_trip() {
    let dir = sinew_testkit::tempdir();
    let g = Grid::axis_aligned([16, 14, 12], [2.0, 2.0, 2.0], [0.0; 3]);
    let mut u = Field::zeros(g.clone());
    for ((d, i, j, k), v) in u.data.indexed_iter_mut() {
        *v = 0.8 * ((i as f32 * 0.3 + d as f32).sin() * (j as f32 * 0.2).cos() + 0.2 * (k as f32 * 0.25).sin());
    }
    let src = dir.path().join("u.nii.gz");
    sinew_io::write_field(&src, &u, FieldUnits::Mm).unwrap();
    let inv = dir.path().join("v.nii.gz");
    let comp = dir.path().join("c.nii");
    let vox = dir.path().join("u_vox.nii.gz");
    assert!(SINEW.cmd().args(["field", "invert"]).arg(&src).arg("-o").arg(&inv).status().unwrap().success());
    assert!(SINEW
        .cmd()
        .args(["field", "compose"])
        .arg(&inv)
        .arg(&src)
        .arg("-o")
        .arg(&comp)
        .status()
        .unwrap()
        .success());
    let (c, _) = sinew_io::read_field(&comp, Default::default()).unwrap();
    let mean = c.data.iter().map(|v| v.abs() as f64).sum::<f64>() / c.data.len() as f64;
    assert!(mean < 0.05, "mean |v then u| {mean} voxels");
    assert!(SINEW
        .cmd()
        .args(["field", "convert"])
        .arg(&src)
        .arg("-o")
        .arg(&vox)
        .args(["--to", "voxel"])
        .status()
        .unwrap()
        .success());
    let (back, units) = sinew_io::read_field(&vox, Default::default()).unwrap();
    assert_eq!(units, FieldUnits::Voxel);
    for (&a, &b) in back.data.iter().zip(u.data.iter()) {
        approx::assert_abs_diff_eq!(a, b, epsilon = 1e-5);
    }
    // Refuses to overwrite its input.
    assert!(!SINEW.cmd().args(["field", "invert"]).arg(&src).arg("-o").arg(&src).status().unwrap().success());
}
