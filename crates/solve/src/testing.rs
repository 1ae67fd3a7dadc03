//! Support for the crate's unit tests: smooth test volumes, descriptor pairs and central
//! differences.

use crate::kernel::Problem;

/// A smooth, non-periodic multi-channel volume (`c` channels per voxel, channel fastest):
/// `sin(0.5·i + ch + phase)·cos(0.3·j) + 0.1·sin((0.4 + 0.1·ch)·k)`.
pub(crate) fn smooth_volume(shape: [usize; 3], c: usize, phase: f32) -> Vec<f32> {
    let mut v = Vec::with_capacity(shape.iter().product::<usize>() * c);
    for i in 0..shape[0] {
        for j in 0..shape[1] {
            for k in 0..shape[2] {
                for ch in 0..c {
                    let x = i as f32 * 0.5 + ch as f32 + phase;
                    v.push((x).sin() * (j as f32 * 0.3).cos() + 0.1 * (k as f32 * (0.4 + ch as f32 * 0.1)).sin());
                }
            }
        }
    }
    v
}

/// The central difference `(E(x + h·e_at) − E(x − h·e_at)) / 2h` (a standard numerical check
/// of an analytic gradient); `x[at]` is restored exactly afterwards.
pub(crate) fn central_difference(x: &mut [f32], at: usize, h: f32, mut energy: impl FnMut(&[f32]) -> f64) -> f64 {
    let orig = x[at];
    x[at] = orig + h;
    let ep = energy(x);
    x[at] = orig - h;
    let em = energy(x);
    x[at] = orig;
    (ep - em) / (2.0 * h as f64)
}

/// A fixed and a moving 12-channel descriptor ([`smooth_volume`], phases 0 and `phase`) on one
/// descriptor grid, for objective-kernel tests.
pub(crate) struct Descriptors {
    /// Shape of the descriptor grid.
    pub shape: [usize; 3],
    /// Fixed descriptor, channel-last.
    pub fixed: Vec<f32>,
    /// Moving descriptor, channel-last.
    pub moving: Vec<f32>,
}

impl Descriptors {
    /// Both descriptors on `shape`.
    pub fn new(shape: [usize; 3], phase: f32) -> Self {
        Descriptors { shape, fixed: smooth_volume(shape, 12, 0.0), moving: smooth_volume(shape, 12, phase) }
    }

    /// The objective on a lattice of `shape` points, `stride` descriptor voxels apart, with
    /// lattice spacing `spacing` mm and diffusion weight `lambda`; no mask.
    pub fn problem(&self, shape: [usize; 3], spacing: [f64; 3], stride: usize, lambda: f32) -> Problem<'_> {
        Problem {
            shape,
            spacing,
            stride,
            desc_shape: self.shape,
            channels: 12,
            fixed: &self.fixed,
            moving: &self.moving,
            mask: None,
            lambda,
        }
    }
}
