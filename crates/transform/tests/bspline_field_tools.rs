//! Field composition and inversion checked against exact facts.

use sinew_grid::{Border, Field, Grid, Image};
use sinew_transform::{compose, invert, warp_image};

/// A smooth field with displacements up to `max_mm` (low-frequency sinusoids).
fn smooth_field(grid: &Grid, max_mm: f64) -> Field {
    let [nx, ny, nz] = grid.shape();
    let sp = grid.spacing();
    let mut f = Field::zeros(grid.clone());
    let tau = std::f64::consts::TAU;
    for (d, &h) in sp.iter().enumerate() {
        let s = (max_mm / 1.5 / h) as f32 / 3f32.sqrt();
        let mut comp = f.data.index_axis_mut(ndarray::Axis(0), d);
        for ((i, j, k), v) in comp.indexed_iter_mut() {
            let (x, y, z) = (i as f64 / nx as f64, j as f64 / ny as f64, k as f64 / nz as f64);
            let val = (tau * x + d as f64).sin() * (tau * 0.5 * y).cos() + 0.5 * (tau * z + 0.3 * d as f64).sin();
            *v = val as f32 * s;
        }
    }
    let k = (max_mm / f.max_norm_mm()) as f32;
    f.data.mapv_inplace(|v| v * k);
    f
}

#[test]
fn a_field_composed_with_its_inverse_is_the_identity_within_a_tenth_of_a_voxel() {
    // Exact fact: φ_v ∘ φ_u = φ_u ∘ φ_v = identity for the inverse v of u. Target from the
    // issue: mean |C| ≤ 0.1 voxel for smooth fields up to 10 mm.
    let g = Grid::axis_aligned([48, 40, 44], [2.0, 2.0, 2.5], [-10.0, 5.0, 0.0]);
    let u = smooth_field(&g, 10.0);
    assert!(approx::abs_diff_eq!(u.max_norm_mm(), 10.0, epsilon = 1e-3), "{}", u.max_norm_mm());
    let (v, report) = invert(&u, 30);
    eprintln!("inverse residual mean {:.4} max {:.4} voxels", report.mean_residual_vox, report.max_residual_vox);
    // Interior (the identity cannot hold where x + u(x) leaves the grid).
    let inside = |idx: usize| {
        let c = [idx / (40 * 44), (idx / 44) % 40, idx % 44];
        (0..3).all(|d| c[d] >= 6 && c[d] + 6 < g.shape()[d])
    };
    for (name, c) in [("v then u", compose(&v, &u)), ("u then v", compose(&u, &v))] {
        let (mut sum, mut count) = (0.0f64, 0usize);
        for idx in (0..g.len()).filter(|&i| inside(i)) {
            sum += (0..3).map(|d| (c.component(d)[idx] as f64).powi(2)).sum::<f64>().sqrt();
            count += 1;
        }
        let mean = sum / count as f64;
        eprintln!("{name}: mean |C| {mean:.4} voxels");
        assert!(mean <= 0.1, "{name}: mean {mean} voxels");
    }
    assert!(report.mean_residual_vox < 0.05);
}

#[test]
fn warping_by_the_composition_equals_warping_twice() {
    // The definition: warp(m, compose(a, b)) = warp(warp(m, b), a); exact for a linear moving
    // image (trilinear interpolation reproduces linear functions) away from the border.
    let g = Grid::axis_aligned([20, 18, 16], [1.0, 1.5, 2.0], [0.0; 3]);
    let mut m = Image::filled(g.clone(), 0.0);
    for ((i, j, k), v) in m.data.indexed_iter_mut() {
        *v = 3.0 * i as f32 - 2.0 * j as f32 + 0.5 * k as f32;
    }
    let a = smooth_field(&g, 3.0);
    let b = smooth_field(&g, 2.0).data.mapv(|v| -v);
    let b = Field::from_voxel_components(g.clone(), b).unwrap();
    let once = warp_image(&m, &compose(&a, &b), Border::Nearest).unwrap();
    let twice = warp_image(&warp_image(&m, &b, Border::Nearest).unwrap(), &a, Border::Nearest).unwrap();
    let mut worst = 0.0f32;
    for ((i, j, k), &v) in once.data.indexed_iter() {
        if (4..16).contains(&i) && (4..14).contains(&j) && (4..12).contains(&k) {
            worst = worst.max((v - twice.data[[i, j, k]]).abs());
        }
    }
    assert!(worst < 1e-3, "{worst}");
}
