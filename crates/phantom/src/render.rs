//! Rasterising an [`Anatomy`] onto a grid: smooth deformation, bias field, texture, noise.

use std::f64::consts::PI;

use rand_chacha::rand_core::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use sinew_grid::Grid;

use crate::anatomy::Anatomy;
use crate::rng::{Draw, Normal};

/// One separable mode `A · sin(k_x x + φ_x) · sin(k_y y + φ_y) · sin(k_z z + φ_z)` (x, y, z
/// in world mm, k in rad/mm).
#[derive(Clone, Debug)]
struct Mode {
    amp: f64,
    k: [f64; 3],
    phase: [f64; 3],
}

/// A smooth random function of world position: a sum of separable sine modes.
#[derive(Clone, Debug)]
pub(crate) struct Smooth {
    modes: Vec<Mode>,
}

impl Smooth {
    /// `n` modes with amplitudes uniform in `[−amp, amp]` and wavelengths uniform in
    /// `[λ_min, λ_max]` mm along each axis.
    pub(crate) fn draw(rng: &mut ChaCha8Rng, n: usize, amp: f64, wavelength: [f64; 2]) -> Smooth {
        let modes = (0..n)
            .map(|_| Mode {
                amp: rng.sym(amp),
                k: [(); 3].map(|_| 2.0 * PI / rng.range(wavelength[0], wavelength[1])),
                phase: [(); 3].map(|_| rng.range(0.0, 2.0 * PI)),
            })
            .collect();
        Smooth { modes }
    }

    /// Tables of the mode factors at the voxel coordinates of an axis-aligned grid.
    fn tables(&self, coords: &[Vec<f64>; 3]) -> Tables {
        let axis = |d: usize| -> Vec<f64> {
            let mut t = Vec::with_capacity(self.modes.len() * coords[d].len());
            for m in &self.modes {
                t.extend(coords[d].iter().map(|&x| (m.k[d] * x + m.phase[d]).sin()));
            }
            t
        };
        Tables {
            amp: self.modes.iter().map(|m| m.amp).collect(),
            n: [coords[0].len(), coords[1].len(), coords[2].len()],
            t: [axis(0), axis(1), axis(2)],
        }
    }
}

/// Per-axis sine tables of a [`Smooth`], so a voxel costs a few multiplications.
struct Tables {
    amp: Vec<f64>,
    n: [usize; 3],
    t: [Vec<f64>; 3],
}

impl Tables {
    #[inline]
    fn at(&self, i: usize, j: usize, k: usize) -> f64 {
        let mut s = 0.0;
        for (m, a) in self.amp.iter().enumerate() {
            s += a * self.t[0][m * self.n[0] + i] * self.t[1][m * self.n[1] + j] * self.t[2][m * self.n[2] + k];
        }
        s
    }
}

/// The smooth fields of one subject.
#[derive(Clone, Debug)]
pub(crate) struct Fields {
    /// Displacement (mm) from a world point to the template point it shows, per axis.
    pub warp: [Smooth; 3],
    /// Additive intensity bias (HU).
    pub bias: Smooth,
    /// Tissue texture in about `[−1, 1]`.
    pub texture: Smooth,
}

impl Fields {
    /// Draws the fields: a deformation of up to 2 × 3 mm per axis with wavelengths of
    /// 250–600 mm, a bias of up to 2 × 4 HU with wavelengths of 300–800 mm, and a texture
    /// of three modes with wavelengths of 15–50 mm.
    pub(crate) fn draw(rng: &mut ChaCha8Rng, variation: f64) -> Fields {
        Fields {
            warp: [(); 3].map(|_| Smooth::draw(rng, 2, 3.0 * variation, [250.0, 600.0])),
            bias: Smooth::draw(rng, 2, 4.0, [300.0, 800.0]),
            texture: Smooth::draw(rng, 3, 1.0 / 3.0, [15.0, 50.0]),
        }
    }
}

/// World coordinate (mm) of every voxel centre along each axis of an axis-aligned grid.
///
/// # Panics
/// When the grid's affine is not diagonal (the phantom only builds diagonal ones).
#[track_caller]
fn axis_coords(grid: &Grid) -> [Vec<f64>; 3] {
    let m = grid.affine().m;
    assert!((0..3).all(|r| (0..3).all(|c| r == c || m[r][c] == 0.0)), "phantom grids are axis-aligned");
    let s = grid.shape();
    [0, 1, 2].map(|d| (0..s[d]).map(|v| m[d][d] * v as f64 + m[d][3]).collect())
}

/// Image (HU) and labels of `anatomy` with `fields` on `grid`, plus Gaussian noise of
/// standard deviation `noise_hu`.
///
/// Voxel `(i, j, k)` at world point `x` shows the template point `x + u(x)` (the warp), with
/// value `HU(x + u(x)) + bias(x) + noise_hu · z`, `z` standard normal. Slab `i` draws its noise
/// from ChaCha8 stream `i` of `noise_seed`, so the result does not depend on the thread count.
pub(crate) fn render(
    anatomy: &Anatomy,
    fields: &Fields,
    grid: &Grid,
    noise_hu: f32,
    noise_seed: u64,
) -> (Vec<f32>, Vec<u16>) {
    let [_, ny, nz] = grid.shape();
    let coords = axis_coords(grid);
    let warp = [0, 1, 2].map(|d| fields.warp[d].tables(&coords));
    let bias = fields.bias.tables(&coords);
    let texture = fields.texture.tables(&coords);
    let mut image = vec![0.0f32; grid.len()];
    let mut labels = vec![0u16; grid.len()];
    let slab = ny * nz;
    image.par_chunks_mut(slab).zip(labels.par_chunks_mut(slab)).enumerate().for_each(|(i, (img, lab))| {
        let mut rng = ChaCha8Rng::seed_from_u64(noise_seed);
        rng.set_stream(i as u64);
        let mut normal = Normal::new();
        let x = coords[0][i];
        for j in 0..ny {
            let y = coords[1][j];
            let row = j * nz;
            for k in 0..nz {
                let z = coords[2][k];
                let q = [x + warp[0].at(i, j, k), y + warp[1].at(i, j, k), z + warp[2].at(i, j, k)];
                let (l, hu) = anatomy.sample(&q, texture.at(i, j, k) as f32);
                img[row + k] = hu + bias.at(i, j, k) as f32 + noise_hu * normal.next(&mut rng);
                lab[row + k] = l;
            }
        }
    });
    (image, labels)
}

/// Fine tissue texture: Gaussian white noise smoothed with σ = `sigma_mm` (so its
/// correlation length is a few mm whatever the grid), scaled to unit standard deviation.
/// Real CT shows such texture in fat (small vessels, septa) and parenchyma; it gives every
/// region of the phantom structure that a registration can follow. Slab `i` draws from
/// ChaCha8 stream `i` of `seed`, so the result does not depend on the thread count.
pub(crate) fn fine_texture(grid: &Grid, seed: u64, sigma_mm: f64) -> Vec<f32> {
    let [nx, ny, nz] = grid.shape();
    let slab = ny * nz;
    let mut noise = vec![0.0f32; grid.len()];
    noise.par_chunks_mut(slab).enumerate().for_each(|(i, s)| {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(i as u64);
        let mut normal = Normal::new();
        s.iter_mut().for_each(|v| *v = normal.next(&mut rng));
    });
    let mut a = ndarray::Array3::from_shape_vec((nx, ny, nz), noise).expect("buffer matches the grid");
    sinew_grid::smooth::gaussian_smooth(&mut a, grid.spacing(), sigma_mm);
    let mut v = a.into_raw_vec_and_offset().0;
    let n = v.len() as f64;
    let var = v.iter().map(|&x| (x as f64) * (x as f64)).sum::<f64>() / n;
    let scale = if var > 0.0 { (1.0 / var.sqrt()) as f32 } else { 0.0 };
    v.iter_mut().for_each(|x| *x *= scale);
    v
}
