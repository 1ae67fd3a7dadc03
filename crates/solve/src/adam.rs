//! Adam, a first-order optimiser with per-parameter step sizes.
//!
//! Reference: "Adam: A Method for Stochastic Optimization", ICLR 2015. With gradient `g_t`:
//! ```text
//! m_t = β1·m_{t−1} + (1−β1)·g_t          v_t = β2·v_{t−1} + (1−β2)·g_t²
//! m̂ = m_t/(1−β1^t)    v̂ = v_t/(1−β2^t)    θ_t = θ_{t−1} − α·m̂/(√v̂ + ε)
//! ```
//! Here θ is a displacement field in voxels, so the step size α is in voxels.

use rayon::prelude::*;
use sinew_grid::simd::with_avx2;

/// Adam state for one parameter vector; buffers are allocated once per pyramid level.
pub struct Adam {
    /// Step size α (voxels per iteration, at most).
    pub lr: f32,
    /// First-moment decay β1.
    pub beta1: f32,
    /// Second-moment decay β2.
    pub beta2: f32,
    /// ε in the denominator.
    pub eps: f32,
    m: Vec<f32>,
    v: Vec<f32>,
    t: i32,
}

impl Adam {
    /// Adam for `len` parameters with step size `lr` and the paper's defaults
    /// β1 = 0.9, β2 = 0.999, ε = 1e−8.
    pub fn new(len: usize, lr: f32) -> Adam {
        Adam { lr, beta1: 0.9, beta2: 0.999, eps: 1e-8, m: vec![0.0; len], v: vec![0.0; len], t: 0 }
    }

    /// One update of `theta` in place from `grad` (the loop runs in AVX2 when present:
    /// [`with_avx2`], the same values bit for bit).
    pub fn step(&mut self, theta: &mut [f32], grad: &[f32]) {
        assert!(theta.len() == self.m.len() && grad.len() == self.m.len(), "Adam buffers sized for another problem");
        self.t += 1;
        let (b1, b2, eps) = (self.beta1, self.beta2, self.eps);
        let step = self.lr / (1.0 - b1.powi(self.t));
        let corr2 = 1.0 / (1.0 - b2.powi(self.t));
        const CHUNK: usize = 1 << 14;
        theta
            .par_chunks_mut(CHUNK)
            .zip(grad.par_chunks(CHUNK))
            .zip(self.m.par_chunks_mut(CHUNK))
            .zip(self.v.par_chunks_mut(CHUNK))
            .for_each(|(((th, g), m), v)| {
                with_avx2(
                    #[inline(always)]
                    || {
                        let len = th.len();
                        let (g, m, v) = (&g[..len], &mut m[..len], &mut v[..len]);
                        for n in 0..len {
                            let gn = g[n];
                            m[n] = b1 * m[n] + (1.0 - b1) * gn;
                            v[n] = b2 * v[n] + (1.0 - b2) * gn * gn;
                            th[n] -= step * m[n] / ((v[n] * corr2).sqrt() + eps);
                        }
                    },
                )
            });
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn minimises_a_quadratic() {
        // f(θ) = Σ a_n (θ_n − c_n)², minimum at c (exact).
        let a = [1.0f32, 10.0, 0.1];
        let c = [3.0f32, -2.0, 0.5];
        let mut th = vec![0.0f32; 3];
        let mut opt = Adam::new(3, 0.05);
        for _ in 0..3000 {
            let g: Vec<f32> = (0..3).map(|n| 2.0 * a[n] * (th[n] - c[n])).collect();
            opt.step(&mut th, &g);
        }
        for n in 0..3 {
            assert!(approx::abs_diff_eq!(th[n], c[n], epsilon = 1e-2), "{th:?}");
        }
    }
}
