//! Synthetic CT-like abdomens with label maps: the sinew demo cohort.
//!
//! Every subject is drawn from a seeded generator (ChaCha8, seeded per subject from
//! `(seed, subject_index)`), so a cohort is reproducible bit for bit and subject `n` does not
//! depend on how many subjects are generated. No real patient data is involved.
//!
//! # Geometry
//! World space is NIfTI's RAS+ in mm: `i` runs along +x (towards the subject's right), `j`
//! along +y (anterior), `k` along +z (superior). The affine is diagonal with the given
//! spacing and the volume is centred on the world origin, so [`PhantomParams::default`]
//! (144 × 112 × 192 voxels of 2 mm) and [`PhantomParams::small`] (72 × 56 × 96 of 4 mm) both
//! cover 288 × 224 × 384 mm: an abdomen from the liver dome to the pelvis.
//!
//! # Content
//! | label | structure | HU (± subject jitter) |
//! |---|---|---|
//! | 1 | liver (tapered: large right lobe, thin left lobe) | 60 ± 6 |
//! | 2 | spleen | 50 ± 6 |
//! | 3, 4 | right, left kidney (bent ellipsoids, cortex/medulla) | 35 / 25 |
//! | 5 | stomach (40 HU wall, gas cap above fluid) | 40 / −1000 / 10 |
//! | 6 | aorta with common iliac arteries | 150 ± 15 |
//! | 7 | inferior vena cava with iliac veins | 120 ± 15 |
//! | 8 | spine: vertebral bodies (1000 HU shell, 300 HU inside) and arches (700 HU) | |
//! | 9 | bowel: colon and small-bowel loops (20 HU wall, gas or fluid inside) | 20 / −1000 / 10 |
//! | 10 | body: subcutaneous fat (−100), muscle wall and psoas (50), visceral fat (−85 ± 30), discs, spinal canal | |
//!
//! Air outside is −1000 HU. A smooth bias field (up to ±8 HU) and Gaussian noise
//! ([`PhantomParams::noise_hu`]) are added.
//!
//! # Variation between subjects
//! Body width and depth ±12 %; body shifted by up to 2 mm; organ volumes ±20 % (each axis
//! another ±6 %); organ centres jittered by up to ±10 mm (x, z) and ±8 mm (y) plus a
//! breathing shift of the upper abdomen of up to ±10 mm along z; organ shapes perturbed by
//! random low-order polynomial deformations of their radius; bowel loops are random smooth
//! paths; the whole subject is finally deformed by a smooth random field of up to ±6 mm per
//! axis.
#![deny(missing_docs)]

mod anatomy;
mod render;
mod rng;
mod shapes;

use ndarray::Array3;
use rand_chacha::rand_core::RngCore;
use rayon::prelude::*;
use sinew_grid::{Grid, Image, LabelMap, Volume};

use crate::anatomy::Anatomy;
use crate::render::Fields;

/// Label value → structure name of the phantom's label maps (0 is air outside the body).
pub const LABELS: &[(u16, &str)] = &[
    (1, "liver"),
    (2, "spleen"),
    (3, "kidney_right"),
    (4, "kidney_left"),
    (5, "stomach"),
    (6, "aorta"),
    (7, "ivc"),
    (8, "spine"),
    (9, "bowel"),
    (10, "body"),
];

/// The sampling grid and noise of generated subjects.
#[derive(Clone, Debug, PartialEq)]
pub struct PhantomParams {
    /// Grid shape `(nx, ny, nz)` in voxels.
    pub shape: [usize; 3],
    /// Voxel spacing along `i`, `j`, `k` in mm.
    pub spacing: [f64; 3],
    /// Standard deviation of the added Gaussian noise, HU.
    pub noise_hu: f32,
    /// Scale of the differences between subjects: 1 is the demo cohort. It multiplies the
    /// body's width and depth variation, the organ position jitter, the breathing shift, the
    /// whole-subject smooth deformation and the intensity jitter of every tissue, so 2 draws
    /// subjects that differ twice as much (a harder cohort, used to check that settings
    /// chosen on the demo cohort carry over).
    pub variation: f64,
}

impl Default for PhantomParams {
    /// 144 × 112 × 192 voxels of 2 mm (288 × 224 × 384 mm), noise 12 HU.
    fn default() -> Self {
        PhantomParams { shape: [144, 112, 192], spacing: [2.0; 3], noise_hu: 12.0, variation: 1.0 }
    }
}

impl PhantomParams {
    /// 72 × 56 × 96 voxels of 4 mm: the same field of view as the default, 1/8 of the voxels.
    pub fn small() -> Self {
        PhantomParams { shape: [72, 56, 96], spacing: [4.0; 3], noise_hu: 12.0, variation: 1.0 }
    }

    /// The grid of generated subjects: diagonal affine with `spacing`, centred on the world
    /// origin (voxel centre `v` along an axis of `n` voxels sits at `(v − (n−1)/2)·spacing` mm).
    ///
    /// # Panics
    /// When an extent is zero or a spacing is not positive and finite.
    #[track_caller]
    pub fn grid(&self) -> Grid {
        assert!(self.shape.iter().all(|&n| n > 0), "phantom shape {:?} has a zero extent", self.shape);
        assert!(
            self.spacing.iter().all(|s| s.is_finite() && *s > 0.0),
            "phantom spacing {:?} must be positive",
            self.spacing
        );
        let origin = [0, 1, 2].map(|d| -(self.shape[d] as f64 - 1.0) / 2.0 * self.spacing[d]);
        Grid::axis_aligned(self.shape, self.spacing, origin)
    }
}

/// One synthetic subject.
#[derive(Clone, Debug)]
pub struct Subject {
    /// Identifier, `subject_NN` (the subject index, zero-padded to two digits).
    pub id: String,
    /// CT-like intensities in HU.
    pub image: Image,
    /// Label map on the same grid (values of [`LABELS`], 0 outside the body).
    pub labels: LabelMap,
}

/// Everything random about one subject, drawn in a fixed order from its own generator.
struct Draws {
    noise_seed: u64,
    anatomy: Anatomy,
    fields: Fields,
}

fn draws(seed: u64, subject_index: usize, variation: f64) -> Draws {
    let mut rng = rng::subject_rng(seed, subject_index);
    let noise_seed = rng.next_u64();
    let anatomy = Anatomy::draw(&mut rng, variation);
    let fields = Fields::draw(&mut rng, variation);
    Draws { noise_seed, anatomy, fields }
}

/// Generates subject `subject_index` of the cohort `seed` on the grid of `params`.
///
/// The anatomy depends only on `(seed, subject_index)`, so the same subject at
/// [`PhantomParams::small`] and at the default resolution shows the same body; the noise is
/// drawn per grid. The voxel loop runs in parallel over `i` slabs; the result is identical
/// for any number of threads.
///
/// # Panics
/// When `params` has a zero extent, a non-positive spacing or a negative/non-finite noise level.
#[track_caller]
pub fn generate(seed: u64, subject_index: usize, params: &PhantomParams) -> Subject {
    assert!(params.noise_hu.is_finite() && params.noise_hu >= 0.0, "noise_hu {} must be ≥ 0", params.noise_hu);
    let grid = params.grid();
    assert!(params.variation.is_finite() && params.variation >= 0.0, "variation {} must be ≥ 0", params.variation);
    let d = draws(seed, subject_index, params.variation);
    let (mut image, labels) = render::render(&d.anatomy, &d.fields, &grid, params.noise_hu, d.noise_seed);
    let texture = render::fine_texture(&grid, d.noise_seed ^ 0x7e47_u64.rotate_left(40), TEXTURE_SIGMA_MM);
    for ((v, &l), &t) in image.iter_mut().zip(&labels).zip(&texture) {
        *v += texture_amplitude(l) * t;
    }
    let s = grid.shape();
    let image = Array3::from_shape_vec((s[0], s[1], s[2]), image).expect("buffer matches the grid");
    let labels = Array3::from_shape_vec((s[0], s[1], s[2]), labels).expect("buffer matches the grid");
    Subject {
        id: format!("subject_{subject_index:02}"),
        image: Volume::new(grid.clone(), image).expect("shape matches the grid"),
        labels: Volume::new(grid, labels).expect("shape matches the grid"),
    }
}

/// Correlation scale (σ, mm) of the fine tissue texture.
pub const TEXTURE_SIGMA_MM: f64 = 2.0;

/// Amplitude (HU, one standard deviation) of the fine tissue texture by label: strongest in
/// the fat and muscle of the body wall and in bone, weaker in organ parenchyma, none in air.
pub fn texture_amplitude(label: u16) -> f32 {
    match label {
        0 => 0.0,
        8 => 40.0,
        10 => 25.0,
        6 | 7 => 5.0,
        _ => 12.0,
    }
}

/// Subjects `0..n` of cohort `seed`, generated in parallel (one subject per task); identical to
/// calling [`generate`] for each index in turn.
pub fn cohort(seed: u64, n: usize, params: &PhantomParams) -> Vec<Subject> {
    (0..n).into_par_iter().map(|i| generate(seed, i, params)).collect()
}

mod deform;
pub use deform::known_field;
pub use rng::splitmix64;

#[cfg(test)]
mod tests;
