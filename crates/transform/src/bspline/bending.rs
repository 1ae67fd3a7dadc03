//! Bending energy of a cubic B-spline displacement, sampled at the knots (control points).
//!
//! At a knot (control point `c`), the 1-D cubic B-spline and its derivatives are exact
//! three-point stencils of the control values (textbook facts of uniform cubic B-splines):
//! ```text
//! value: (φ_{c−1} + 4φ_c + φ_{c+1})/6     first: (φ_{c+1} − φ_{c−1})/(2S)     second: (φ_{c−1} − 2φ_c + φ_{c+1})/S²
//! ```
//! with `S` the control spacing in mm. The 3-D second derivatives are tensor products of
//! these stencils (e.g. `∂²u/∂x∂y = D1_x ⊗ D1_y ⊗ V_z`). The bending energy (the thin-plate
//! functional of the 1999 free-form deformation paper, "Nonrigid registration using free-form
//! deformations: application to breast MR images", IEEE TMI) is sampled at the `K` knots
//! inside the lattice, not integrated (a common discretisation):
//! ```text
//! B = S̄²/K · Σ_knots Σ_d [ u_d,xx² + u_d,yy² + u_d,zz² + 2u_d,xy² + 2u_d,xz² + 2u_d,yz² ]
//! ```
//! with `u_d` in mm, derivatives in mm⁻¹ and `S̄` the mean control spacing in mm, so `B` is
//! dimensionless and the same weight means the same stiffness for any spacing. `B` is
//! quadratic in φ (`B = Σ |L·φ|²`), so its gradient is `2·Lᵀ·L·φ`.

/// Units of a control grid for [`bending_energy`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BendingGeometry {
    /// Control spacing in mm along `i`, `j`, `k`.
    pub control_mm: [f64; 3],
    /// Millimetres per unit of control value, per component (the lattice voxel size when
    /// control values are in lattice voxels).
    pub value_mm: [f64; 3],
}

/// The six second-derivative stencils (3×3×3, index `(dx+1)·9 + (dy+1)·3 + (dz+1)`) with
/// their multiplicities.
fn stencils(control_mm: [f64; 3]) -> [([f64; 27], f64); 6] {
    let v = [1.0 / 6.0, 4.0 / 6.0, 1.0 / 6.0];
    let pairs = [(0, 0, 1.0), (1, 1, 1.0), (2, 2, 1.0), (0, 1, 2.0), (0, 2, 2.0), (1, 2, 2.0)];
    pairs.map(|(a, b, mult)| {
        let op: [[f64; 3]; 3] = std::array::from_fn(|e| {
            let s = control_mm[e];
            if a == e && b == e {
                [1.0 / (s * s), -2.0 / (s * s), 1.0 / (s * s)]
            } else if a == e || b == e {
                [-0.5 / s, 0.0, 0.5 / s]
            } else {
                v
            }
        });
        let mut st = [0.0; 27];
        for (o, w) in st.iter_mut().enumerate() {
            *w = op[0][o / 9] * op[1][(o / 3) % 3] * op[2][o % 3];
        }
        (st, mult)
    })
}

/// Bending energy `B` of the control values `phi` (component-first, `(3, n_cx, n_cy, n_cz)`)
/// as defined in the module docs; adds `weight·∂B/∂φ` to `grad` (same layout) and returns `B`.
///
/// # Panics
/// When the buffers do not hold `3·n_c` values or an axis has fewer than four control points.
#[track_caller]
pub fn bending_energy(
    phi: &[f32],
    control_shape: [usize; 3],
    geom: &BendingGeometry,
    weight: f32,
    grad: &mut [f32],
) -> f64 {
    let [cx, cy, cz] = control_shape;
    let nc = cx * cy * cz;
    assert!(phi.len() == 3 * nc && grad.len() == 3 * nc, "bending buffers must hold 3·n_c values");
    assert!(control_shape.iter().all(|&n| n >= 4), "control grid {control_shape:?} needs 4 points per axis");
    let st = stencils(geom.control_mm);
    let mean_s = geom.control_mm.iter().sum::<f64>() / 3.0;
    // Knots inside the lattice: control indices 1 ..= n_c − 3 per axis.
    let knots = (cx - 3) * (cy - 3) * (cz - 3);
    let scale = mean_s * mean_s / knots as f64;
    let offsets: [usize; 27] = std::array::from_fn(|o| (o / 9) * cy * cz + ((o / 3) % 3) * cz + o % 3);
    let mut total = 0.0f64;
    for d in 0..3 {
        let h2 = geom.value_mm[d] * geom.value_mm[d];
        let comp = &phi[d * nc..(d + 1) * nc];
        let g = &mut grad[d * nc..(d + 1) * nc];
        for i in 1..=cx - 3 {
            for j in 1..=cy - 3 {
                for k in 1..=cz - 3 {
                    // Corner of the 3×3×3 neighbourhood.
                    let base = ((i - 1) * cy + (j - 1)) * cz + (k - 1);
                    for (stencil, mult) in &st {
                        let val: f64 = offsets.iter().zip(stencil).map(|(&o, &w)| w * comp[base + o] as f64).sum();
                        total += scale * h2 * mult * val * val;
                        if weight != 0.0 {
                            let f = weight as f64 * scale * h2 * mult * 2.0 * val;
                            for (&o, &w) in offsets.iter().zip(stencil) {
                                g[base + o] += (f * w) as f32;
                            }
                        }
                    }
                }
            }
        }
    }
    total
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quadratic_displacement_has_the_known_second_derivative() {
        // Exact fact: control values x_c² − S²/3 give the cubic B-spline of f(x) = x² (its
        // value stencil returns x_c², and D2 returns 2), so u_x = a·x² mm has u_xx = 2a
        // everywhere and every other second derivative zero: B = S̄²·(2a)².
        let shape = [7, 6, 8];
        let s = [10.0, 12.0, 9.0];
        let geom = BendingGeometry { control_mm: s, value_mm: [1.0; 3] };
        let nc = 7 * 6 * 8;
        let a = 0.01;
        let mut phi = vec![0.0f32; 3 * nc];
        for (idx, p) in phi[..nc].iter_mut().enumerate() {
            let x = (idx / 48) as f64 * s[0];
            *p = (a * (x * x - s[0] * s[0] / 3.0)) as f32;
        }
        let mut g = vec![0.0f32; 3 * nc];
        let b = bending_energy(&phi, shape, &geom, 0.0, &mut g);
        let mean_s = (10.0 + 12.0 + 9.0) / 3.0;
        let want = mean_s * mean_s * (2.0 * a) * (2.0 * a);
        assert!(approx::abs_diff_eq!(b, want, epsilon = 1e-6 * want), "{b} vs {want}");
    }
}
