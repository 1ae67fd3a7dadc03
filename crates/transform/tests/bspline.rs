//! Cubic B-spline evaluation, adjoint and bending energy checked against exact facts and
//! against scipy (fixture `make_bspline_eval` in `scripts/fixtures.py`, reference code in
//! `scripts/ref/bspline_eval.py`).

#[path = "../../features/tests/common/npy.rs"]
mod npy;

use sinew_grid::Affine;
use sinew_transform::bspline::{bending_energy, BendingGeometry, BsplineBasis};

/// A deterministic pseudo-random sequence in [−1, 1) (a fixed LCG, value-stable).
fn noise(n: usize, seed: u64) -> Vec<f32> {
    let mut s = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
    (0..n)
        .map(|_| {
            s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            ((s >> 40) as f64 / (1u64 << 24) as f64 * 2.0 - 1.0) as f32
        })
        .collect()
}

fn lattice_index(shape: [usize; 3], n: usize) -> [f64; 3] {
    [(n / (shape[1] * shape[2])) as f64, ((n / shape[2]) % shape[1]) as f64, (n % shape[2]) as f64]
}

#[test]
fn control_grid_from_an_affine_map_evaluates_to_that_map_everywhere() {
    // Textbook facts: cubic B-splines form a partition of unity and reproduce linear
    // functions exactly (linear precision), so φ(c) = A·p_c − p_c evaluates to A·x − x.
    let a = Affine::from_parts([[1.05, 0.1, -0.03], [-0.08, 0.96, 0.12], [0.02, -0.1, 1.01]], [2.5, -3.0, 1.25]);
    for (shape, spacing) in
        [([17, 13, 21], [4.0, 4.0, 4.0]), ([20, 9, 15], [3.3, 2.0, 5.7]), ([6, 5, 4], [1.0, 1.0, 1.0])]
    {
        let mut b = BsplineBasis::new(shape, spacing);
        let phi = b.control_from_affine(&a);
        let n: usize = shape.iter().product();
        let mut u = vec![0.0f32; 3 * n];
        b.expand(&phi, &mut u);
        let mut worst = 0.0f64;
        for v in 0..n {
            let x = lattice_index(shape, v);
            let q = a.apply(x);
            for d in 0..3 {
                worst = worst.max((u[d * n + v] as f64 - (q[d] - x[d])).abs());
            }
        }
        // f32 arithmetic on displacements of a few voxels.
        assert!(worst < 1e-4, "{shape:?} / {spacing:?}: worst error {worst} voxels");
    }
}

#[test]
fn adjoint_satisfies_the_inner_product_identity() {
    // Definition of the adjoint: <P a, b> = <a, Pᵀ b> for all a, b.
    for (shape, spacing) in [([23, 18, 27], [5.0, 4.0, 6.0]), ([12, 31, 9], [2.5, 7.25, 1.5])] {
        let mut p = BsplineBasis::new(shape, spacing);
        let nc = p.control_len();
        let n: usize = shape.iter().product();
        let a = noise(3 * nc, 1);
        let bvec = noise(3 * n, 2);
        let mut pa = vec![0.0f32; 3 * n];
        let mut ptb = vec![0.0f32; 3 * nc];
        p.expand(&a, &mut pa);
        p.adjoint(&bvec, &mut ptb);
        let lhs: f64 = pa.iter().zip(&bvec).map(|(x, y)| *x as f64 * *y as f64).sum();
        let rhs: f64 = a.iter().zip(&ptb).map(|(x, y)| *x as f64 * *y as f64).sum();
        let scale: f64 = pa.iter().zip(&bvec).map(|(x, y)| (*x as f64 * *y as f64).abs()).sum();
        assert!(approx::abs_diff_eq!(lhs, rhs, epsilon = 1e-5 * scale), "{shape:?}: {lhs} vs {rhs} (scale {scale})");
    }
}

#[test]
fn evaluation_does_not_depend_on_the_thread_count() {
    let shape = [19, 14, 22];
    let mut p = BsplineBasis::new(shape, [3.0, 3.5, 4.0]);
    let phi = noise(3 * p.control_len(), 5);
    let n: usize = shape.iter().product();
    let run = |threads: usize, p: &mut BsplineBasis| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        let mut u = vec![0.0f32; 3 * n];
        let mut back = vec![0.0f32; phi.len()];
        pool.install(|| {
            p.expand(&phi, &mut u);
            p.adjoint(&u, &mut back);
        });
        (u, back)
    };
    assert_eq!(run(1, &mut p), run(3, &mut p));
}

#[test]
fn bending_energy_vanishes_on_affine_maps_and_its_gradient_matches_finite_differences() {
    let shape = [15, 12, 17];
    let basis = BsplineBasis::new(shape, [4.0, 3.0, 5.0]);
    let geom = BendingGeometry { control_mm: [8.0, 6.0, 10.0], value_mm: [2.0, 2.0, 2.0] };
    let cs = basis.control_shape();
    // Exact fact: an affine map has no second derivatives.
    let a = Affine::from_parts([[1.1, 0.2, 0.0], [0.0, 0.9, 0.1], [-0.1, 0.0, 1.0]], [1.0, 2.0, 3.0]);
    let phi_aff = basis.control_from_affine(&a);
    let mut g = vec![0.0f32; phi_aff.len()];
    let b_aff = bending_energy(&phi_aff, cs, &geom, 1.0, &mut g);
    assert!(b_aff < 1e-8, "bending of an affine map {b_aff}");
    // Reference: central differences (B(φ+h) − B(φ−h)) / 2h (a standard numerical check);
    // B is quadratic, so they are exact up to rounding.
    let mut phi = noise(phi_aff.len(), 9);
    let mut grad = vec![0.0f32; phi.len()];
    bending_energy(&phi, cs, &geom, 0.7, &mut grad);
    let mut scratch = vec![0.0f32; phi.len()];
    let h = 1e-2f32;
    for idx in [0, 17, 333, 1000, phi.len() / 2, phi.len() - 5] {
        let orig = phi[idx];
        phi[idx] = orig + h;
        let ep = bending_energy(&phi, cs, &geom, 0.0, &mut scratch);
        phi[idx] = orig - h;
        let em = bending_energy(&phi, cs, &geom, 0.0, &mut scratch);
        phi[idx] = orig;
        let fd = 0.7 * (ep - em) / (2.0 * h as f64);
        assert!(
            approx::abs_diff_eq!(fd, grad[idx] as f64, epsilon = 1e-3 * fd.abs().max(1e-6)),
            "index {idx}: {fd} vs {}",
            grad[idx]
        );
    }
}

#[test]
fn evaluation_matches_scipy_bspline() {
    // Reference: scipy.interpolate.BSpline (degree 3, uniform knots (j − 3)·s), tensor product.
    let phi = npy::read(&npy::fixture("bspline_eval_phi.npy"));
    let want = npy::read(&npy::fixture("bspline_eval_dense.npy"));
    let shape = [want.shape[1], want.shape[2], want.shape[3]];
    let mut b = BsplineBasis::new(shape, [3.0, 2.5, 4.0]);
    assert_eq!(b.control_shape(), [phi.shape[1], phi.shape[2], phi.shape[3]]);
    let phi: Vec<f32> = phi.data.iter().map(|&v| v as f32).collect();
    let mut u = vec![0.0f32; want.data.len()];
    b.expand(&phi, &mut u);
    for (n, (&g, &w)) in u.iter().zip(&want.data).enumerate() {
        assert!(approx::abs_diff_eq!(g as f64, w, epsilon = 1e-5), "value {n}: {g} vs {w}");
    }
}
