//! Cubic B-spline free-form deformations: a control grid evaluated to a dense displacement
//! field, the exact transpose of that evaluation, and the bending energy of the spline.
//!
//! Reference: "Nonrigid registration using free-form deformations: application to breast MR
//! images", IEEE Transactions on Medical Imaging, 1999.
//!
//! # Layout
//! A dense lattice of `n_d` points per axis (voxels of the field's grid) is covered by control
//! points every `s_d` lattice voxels (`s_d` may be fractional). Control index `c` sits at the
//! lattice position `(c − 1)·s_d`, so there is one control point before the first lattice
//! point and `n_c = ⌊(n − 1)/s⌋ + 4` control points per axis (the usual one-point margin on
//! each side plus the cubic support). Lattice point `x` sees control points `ℓ … ℓ+3` with
//! `ℓ = ⌊x/s⌋` and weights `B_a(t)`, `t = x/s − ℓ`:
//! ```text
//! B_0(t) = (1 − t)³/6              B_1(t) = (3t³ − 6t² + 4)/6
//! B_2(t) = (−3t³ + 3t² + 3t + 1)/6  B_3(t) = t³/6
//! u(x, y, z) = Σ_{a,b,c} B_a(t_x)·B_b(t_y)·B_c(t_z) · φ[ℓ_x + a, ℓ_y + b, ℓ_z + c]
//! ```
//! The weights sum to one (partition of unity) and `Σ_a B_a(t)·(ℓ − 1 + a) = ℓ + t` (linear
//! precision), so control points sampled from an affine map reproduce it exactly.
//!
//! Evaluation is separable: three 1-D passes (`k`, then `j`, then `i`) with weight tables
//! built once per axis; the adjoint runs the transposed tables in the opposite order, so
//! `<P·a, b> = <a, Pᵀ·b>` holds up to rounding. Every pass is a gather, parallel over `i`
//! slabs, so results do not depend on the thread count.

mod basis;
mod bending;

pub use basis::{cubic_weights, BsplineBasis};
pub use bending::{bending_energy, BendingGeometry};
