//! How the optimised parameters θ produce a displacement field: `u = u₀ + P·θ`.
//!
//! The optimisers work on θ and need only `P` ([`Parametrisation::expand`]) and its adjoint
//! `Pᵀ` ([`Parametrisation::adjoint`]): the gradient w.r.t. θ is `Pᵀ·∂E/∂u` (chain rule).
//! The dense model uses `P = G_σ` (a Gaussian, so each update is smooth; `σ = 0` gives the
//! plain voxel-wise field); the cubic B-spline model uses the tensor-product B-spline basis
//! of a control grid.

/// A linear map `P` from parameters θ to a component-first displacement buffer.
pub trait Parametrisation: Send {
    /// Number of parameters (length of θ).
    fn len(&self) -> usize;
    /// True when there are no parameters.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// `out = P·θ` (`out` is component-first, 3·N values on the field lattice).
    fn expand(&mut self, theta: &[f32], out: &mut [f32]);
    /// `out = Pᵀ·g` (`out` has [`len`](Parametrisation::len) values).
    fn adjoint(&mut self, g: &[f32], out: &mut [f32]);
    /// A penalty on θ itself (e.g. the bending energy of a control grid): returns its
    /// weighted value and adds its gradient to `grad`. None by default.
    fn penalty(&mut self, _theta: &[f32], _grad: &mut [f32]) -> f64 {
        0.0
    }
}

impl<P: Parametrisation + ?Sized> Parametrisation for Box<P> {
    fn len(&self) -> usize {
        (**self).len()
    }
    fn expand(&mut self, theta: &[f32], out: &mut [f32]) {
        (**self).expand(theta, out)
    }
    fn adjoint(&mut self, g: &[f32], out: &mut [f32]) {
        (**self).adjoint(g, out)
    }
    fn penalty(&mut self, theta: &[f32], grad: &mut [f32]) -> f64 {
        (**self).penalty(theta, grad)
    }
}

/// The dense model: `P = G_σ`, a separable Gaussian of σ voxels applied to each component
/// (clamped borders). `G_σ` is symmetric up to the border clamping, so `Pᵀ` is taken as
/// `G_σ` itself (the usual approximation; exact away from the border).
pub struct GaussianDense {
    shape: [usize; 3],
    kernel: Vec<f32>,
}

impl GaussianDense {
    /// For a lattice of `shape` and smoothing σ (voxels); σ = 0 is the identity.
    pub fn new(shape: [usize; 3], sigma: f64) -> GaussianDense {
        GaussianDense { shape, kernel: sinew_grid::smooth::gaussian_kernel(sigma) }
    }

    /// `out = G_σ·src`, component by component.
    fn smooth(&self, src: &[f32], out: &mut [f32]) {
        let n: usize = self.shape.iter().product();
        assert!(src.len() == 3 * n && out.len() == 3 * n, "buffers of 3·N values");
        for (s, o) in src.chunks_exact(n).zip(out.chunks_exact_mut(n)) {
            sinew_grid::smooth::separable_into(s, o, self.shape, &self.kernel);
        }
    }
}

impl Parametrisation for GaussianDense {
    fn len(&self) -> usize {
        3 * self.shape.iter().product::<usize>()
    }

    fn expand(&mut self, theta: &[f32], out: &mut [f32]) {
        self.smooth(theta, out);
    }

    fn adjoint(&mut self, g: &[f32], out: &mut [f32]) {
        self.smooth(g, out);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gaussian_adjoint_matches_the_inner_product_identity_inside() {
        // <P a, b> = <a, Pᵀ b> (definition of the adjoint); exact when both are zero near the
        // border, where the clamping makes G_σ slightly non-symmetric.
        let shape = [12, 11, 10];
        let n = 3 * 12 * 11 * 10;
        let inside = |idx: usize| {
            let v = idx % (12 * 11 * 10);
            let (i, j, k) = (v / 110, (v / 10) % 11, v % 10);
            (4..8).contains(&i) && (4..7).contains(&j) && (4..6).contains(&k)
        };
        let a: Vec<f32> = (0..n).map(|i| if inside(i) { ((i * 7) % 13) as f32 - 6.0 } else { 0.0 }).collect();
        let b: Vec<f32> = (0..n).map(|i| if inside(i) { ((i * 5) % 11) as f32 - 5.0 } else { 0.0 }).collect();
        let mut p = GaussianDense::new(shape, 1.0);
        let mut pa = vec![0.0; n];
        let mut ptb = vec![0.0; n];
        p.expand(&a, &mut pa);
        p.adjoint(&b, &mut ptb);
        let lhs: f64 = pa.iter().zip(&b).map(|(x, y)| (*x as f64) * (*y as f64)).sum();
        let rhs: f64 = a.iter().zip(&ptb).map(|(x, y)| (*x as f64) * (*y as f64)).sum();
        assert!(approx::abs_diff_eq!(lhs, rhs, epsilon = 1e-3 * lhs.abs().max(1.0)), "{lhs} vs {rhs}");
    }
}
