//! Warping and Jacobian checked against numpy/scipy (fixtures from `scripts/fixtures.py`,
//! functions `make_feat_warp` and `make_feat_jacobian`, reference code in
//! `scripts/ref/feat_warp_jac.py`).

#[path = "../../features/tests/common/npy.rs"]
mod npy;

use sinew_grid::{Affine, Border, Field, Grid, Image};
use sinew_transform::{jacobian_determinant, warp_image, warp_image_from, warp_image_into};

fn shape3(a: &npy::Npy) -> [usize; 3] {
    let s = &a.shape[a.shape.len() - 3..];
    [s[0], s[1], s[2]]
}

fn affine(name: &str) -> Affine {
    let a = npy::read(&npy::fixture(name));
    let m = |r: usize| [a.data[4 * r], a.data[4 * r + 1], a.data[4 * r + 2], a.data[4 * r + 3]];
    Affine { m: [m(0), m(1), m(2)] }
}

fn image(name: &str, affine: Affine) -> Image {
    let a = npy::read(&npy::fixture(name));
    let mut img = Image::filled(Grid::new(shape3(&a), affine).unwrap(), 0.0);
    img.as_slice_mut().iter_mut().zip(&a.data).for_each(|(o, &v)| *o = v as f32);
    img
}

fn field(name: &str, affine: Affine) -> Field {
    let a = npy::read(&npy::fixture(name));
    assert_eq!(a.shape[0], 3);
    let mut f = Field::zeros(Grid::new(shape3(&a), affine).unwrap());
    f.data.iter_mut().zip(&a.data).for_each(|(o, &v)| *o = v as f32);
    f
}

#[track_caller]
fn assert_close(got: &[f32], want_file: &str, tol: f64) {
    let want = npy::read(&npy::fixture(want_file));
    assert_eq!(got.len(), want.data.len());
    for (n, (&g, &w)) in got.iter().zip(&want.data).enumerate() {
        assert!(approx::abs_diff_eq!(g as f64, w, epsilon = tol), "{want_file}: voxel {n}: {g} vs {w}");
    }
}

#[test]
fn warp_matches_scipy_map_coordinates() {
    // Reference: scipy.ndimage.map_coordinates(order=1, mode="nearest" / "grid-constant").
    let aff = affine("feat_warp_aff_fixed.npy");
    let moving = image("feat_warp_moving.npy", aff);
    let f = field("feat_warp_field.npy", aff);
    let near = warp_image(&moving, &f, Border::Nearest).unwrap();
    assert_close(near.as_slice(), "feat_warp_nearest.npy", 1e-4);
    let mut out = Image::filled(f.grid.clone(), 123.0);
    warp_image_into(&moving, &f, Border::Constant(-7.5), &mut out).unwrap();
    assert_close(out.as_slice(), "feat_warp_constant.npy", 1e-4);
    // the field moves some samples outside: the padding value must show up
    assert!(out.as_slice().iter().any(|&v| v < 0.0));
}

#[test]
fn warp_from_another_grid_matches_scipy() {
    // Reference: map_coordinates at A_moving⁻¹·A_fixed·(x + u(x)), mode "grid-constant".
    let f = field("feat_warp_field.npy", affine("feat_warp_aff_fixed.npy"));
    let moving = image("feat_warp_moving_other.npy", affine("feat_warp_aff_moving.npy"));
    let w = warp_image_from(&moving, &f, Border::Constant(-7.5));
    assert_eq!(w.grid, f.grid);
    assert_close(w.as_slice(), "feat_warp_from_constant.npy", 1e-4);
    // the plain variant refuses a moving image on another grid
    assert!(warp_image(&moving, &f, Border::Nearest).is_err());
}

#[test]
fn jacobian_matches_numpy_gradient() {
    // Reference: det(I + numpy.gradient(u, edge_order=1)) via numpy.linalg.det. The fields fold
    // in places (det ≤ 0), so signs are checked too.
    let aff = Affine::from_spacing_origin([2.0, 0.8, 3.0], [0.0; 3]);
    for tag in ["a", "b"] {
        let f = field(&format!("feat_jac_field_{tag}.npy"), aff);
        let det = jacobian_determinant(&f);
        assert_close(det.as_slice(), &format!("feat_jac_det_{tag}.npy"), 1e-4);
    }
}

#[test]
fn labels_from_another_grid_with_zero_field_equal_nearest_resampling() {
    // With u = 0, pulling through the field is plain resampling onto the fixed grid.
    use sinew_grid::{resample::resample_labels, LabelMap};
    use sinew_transform::warp_labels_from;
    let f = Field::zeros(Grid::new([9, 8, 7], affine("feat_warp_aff_fixed.npy")).unwrap());
    let src = image("feat_warp_moving_other.npy", affine("feat_warp_aff_moving.npy"));
    let mut lab = LabelMap::filled(src.grid.clone(), 0);
    lab.as_slice_mut().iter_mut().zip(src.as_slice()).for_each(|(l, &v)| *l = v as u16);
    let got = warp_labels_from(&lab, &f);
    assert_eq!(got, resample_labels(&lab, &f.grid));
    assert!(got.as_slice().iter().any(|&v| v != 0));
}

#[test]
fn results_do_not_depend_on_thread_count() {
    use sinew_transform::jacobian_stats;
    let f = field("feat_jac_field_a.npy", Affine::IDENTITY);
    let run = || {
        let det = jacobian_determinant(&f);
        let stats = jacobian_stats(&det, None);
        (det, stats)
    };
    let one = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap().install(run);
    let three = rayon::ThreadPoolBuilder::new().num_threads(3).build().unwrap().install(run);
    assert_eq!(one, three);
    assert!(one.1.folded_voxels > 0);
}
