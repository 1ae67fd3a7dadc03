//! The cubic B-spline transform model: `u = u₀ + P·φ` with `P` the tensor-product cubic
//! B-spline basis of a control grid ("Nonrigid registration using free-form deformations:
//! application to breast MR images", IEEE TMI 1999), optionally penalised by the bending
//! energy of the control grid.
//!
//! Control points are every `grid_spacing_mm` along each axis of the level's lattice (at
//! least one lattice voxel apart), so the number of parameters is the same at every level
//! but the lattice they drive gets finer; each level restarts from `φ = 0` on top of the
//! previous level's field `u₀`, so detail accumulates level by level. Control values are in
//! lattice voxels, like `u`.

use sinew_grid::Grid;
use sinew_transform::bspline::{bending_energy, BendingGeometry, BsplineBasis};

use crate::param::Parametrisation;

/// The B-spline model of one level.
pub struct BsplineModel {
    basis: BsplineBasis,
    bending: f32,
    geometry: BendingGeometry,
}

impl BsplineModel {
    /// The model on `lattice` with control points every `grid_spacing_mm` mm (at least one
    /// lattice voxel) and bending weight `bending` (0 = off).
    ///
    /// # Panics
    /// When `grid_spacing_mm` is not positive and finite.
    #[track_caller]
    pub fn new(lattice: &Grid, grid_spacing_mm: f64, bending: f32) -> BsplineModel {
        assert!(grid_spacing_mm.is_finite() && grid_spacing_mm > 0.0, "grid spacing {grid_spacing_mm} mm");
        let h = lattice.spacing();
        let spacing = h.map(|hd| (grid_spacing_mm / hd).max(1.0));
        let basis = BsplineBasis::new(lattice.shape(), spacing);
        let geometry = BendingGeometry { control_mm: std::array::from_fn(|d| spacing[d] * h[d]), value_mm: h };
        BsplineModel { basis, bending, geometry }
    }

    /// The underlying basis (control grid shape, spacing in lattice voxels).
    pub fn basis(&self) -> &BsplineBasis {
        &self.basis
    }
}

impl Parametrisation for BsplineModel {
    fn len(&self) -> usize {
        3 * self.basis.control_len()
    }

    fn expand(&mut self, theta: &[f32], out: &mut [f32]) {
        self.basis.expand(theta, out);
    }

    fn adjoint(&mut self, g: &[f32], out: &mut [f32]) {
        self.basis.adjoint(g, out);
    }

    /// `bending · B(φ)`, with `B` the bending energy of [`sinew_transform::bspline`].
    fn penalty(&mut self, theta: &[f32], grad: &mut [f32]) -> f64 {
        if self.bending == 0.0 {
            return 0.0;
        }
        let b = bending_energy(theta, self.basis.control_shape(), &self.geometry, self.bending, grad);
        self.bending as f64 * b
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::kernel::Problem;
    use crate::testing::{central_difference, Descriptors};

    #[test]
    fn registration_objective_gradient_matches_central_finite_differences() {
        // E(φ) = D(u₀ + P·φ) + λ·R(u₀ + P·φ) + β·B(φ); gradient Pᵀ·∂E/∂u + β·∂B/∂φ.
        // Reference: central differences (E(φ+h) − E(φ−h)) / 2h (a standard numerical check).
        let shape = [14, 11, 13];
        let n = shape.iter().product::<usize>();
        let lattice = Grid::axis_aligned(shape, [2.0, 2.5, 2.0], [0.0; 3]);
        let d = Descriptors::new(shape, 0.5);
        // The data term counts voxels two or more voxels from the border only, so every sample
        // stays inside the moving volume (|u| < 1.2 voxels here), where E is differentiable.
        let mask: Vec<bool> = (0..n)
            .map(|v| {
                let c = [v / (shape[1] * shape[2]), (v / shape[2]) % shape[1], v % shape[2]];
                (0..3).all(|d| c[d] >= 2 && c[d] + 2 < shape[d])
            })
            .collect();
        let p = Problem { mask: Some(&mask), ..d.problem(shape, lattice.spacing(), 1, 0.2) };
        let mut model = BsplineModel::new(&lattice, 7.0, 0.05);
        let u0: Vec<f32> = (0..3 * n).map(|i| 0.3 * ((i as f32) * 0.13).sin()).collect();
        let m = model.len();
        let mut theta: Vec<f32> = (0..m).map(|i| 0.4 * ((i as f32) * 0.71).cos()).collect();
        let mut u = vec![0.0f32; 3 * n];
        let mut gu = vec![0.0f32; 3 * n];
        let mut sums = Vec::new();
        let mut energy = |model: &mut BsplineModel, th: &[f32], g: &mut [f32]| {
            model.expand(th, &mut u);
            u.iter_mut().zip(&u0).for_each(|(a, b)| *a += b);
            let e = p.evaluate(&u, &mut gu, &mut sums).total;
            model.adjoint(&gu, g);
            e + model.penalty(th, g)
        };
        let mut grad = vec![0.0f32; m];
        energy(&mut model, &theta, &mut grad);
        let mut scratch = vec![0.0f32; m];
        let h = 1e-2f32;
        // E is accumulated in f32 rows, so central differences carry an absolute noise of
        // about 1e-6 here: the tolerance is 1 % of the entry plus 0.1 % of the largest entry.
        let gmax = grad.iter().fold(0.0f64, |a, &g| a.max(g.abs() as f64));
        eprintln!("largest gradient entry {gmax:.3e}");
        for idx in [0, 40, 77, 130, m / 3 + 5, m / 2, m - 9] {
            let fd = central_difference(&mut theta, idx, h, |th| energy(&mut model, th, &mut scratch));
            eprintln!("{idx}: fd {fd:.6e} analytic {:.6e}", grad[idx]);
            assert!(
                approx::abs_diff_eq!(fd, grad[idx] as f64, epsilon = 1e-2 * fd.abs() + 1e-3 * gmax),
                "index {idx}: {fd} vs {}",
                grad[idx]
            );
        }
    }
}
