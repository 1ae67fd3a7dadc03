//! Intensity descriptors for the data terms that compare intensities rather than MIND-SSC:
//! the intensities themselves (sum of squared differences) and the locally standardised
//! intensities of local normalised cross-correlation.

use sinew_grid::Image;

use crate::{mind_ssc, Descriptor, MindParams};

/// What a data term compares at every voxel, with its settings: the descriptor of each
/// pyramid level is [`DescriptorKind::compute`] of that level's scan.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum DescriptorKind {
    /// MIND-SSC ([`mind_ssc`], 12 channels).
    MindSsc(MindParams),
    /// The intensities ([`intensity_descriptor`], one channel).
    Intensity,
    /// The locally standardised intensities of local NCC ([`local_standardised`], one
    /// channel), with a Gaussian window of `sigma` voxels.
    LocalStandardised {
        /// σ of the Gaussian window, voxels.
        sigma: f64,
    },
}

impl DescriptorKind {
    /// The descriptor of `img`.
    pub fn compute(&self, img: &Image) -> Descriptor {
        match *self {
            DescriptorKind::MindSsc(p) => mind_ssc(img, &p),
            DescriptorKind::Intensity => intensity_descriptor(img),
            DescriptorKind::LocalStandardised { sigma } => local_standardised(img, sigma),
        }
    }
}

/// A one-channel "descriptor" holding the intensities.
pub fn intensity_descriptor(img: &Image) -> Descriptor {
    Descriptor { grid: img.grid.clone(), channels: 1, data: img.as_slice().to_vec() }
}

/// The local-NCC descriptor: `(I − μ)/√(v + ε)` with `μ = G_σ·I` and `v = G_σ·I² − μ²`
/// (Gaussian window of σ voxels), scaled by 1/√2 so that its squared difference is
/// `1 − NCC` for unit-variance windows. `ε` is 1e-3 of the image's mean local variance, so
/// flat regions (noise only) do not blow up.
pub fn local_standardised(img: &Image, sigma: f64) -> Descriptor {
    let sp = [1.0; 3];
    // Standardise globally first (statistics in f64), so that the local moments below are of
    // order one and `E[I²] − μ²` does not cancel catastrophically in f32.
    let s = img.as_slice();
    let n = s.len() as f64;
    let gm = s.iter().map(|&v| v as f64).sum::<f64>() / n;
    let gv = s.iter().map(|&v| (v as f64 - gm).powi(2)).sum::<f64>() / n;
    let gs = if gv > 0.0 { 1.0 / gv.sqrt() } else { 1.0 };
    let z = img.data.mapv(|v| ((v as f64 - gm) * gs) as f32);
    let mut mean = z.clone();
    sinew_grid::smooth::gaussian_smooth(&mut mean, sp, sigma);
    let mut sq = z.mapv(|v| v * v);
    sinew_grid::smooth::gaussian_smooth(&mut sq, sp, sigma);
    let var: Vec<f32> = sq.iter().zip(mean.iter()).map(|(&s, &m)| (s - m * m).max(0.0)).collect();
    let mean_var = var.iter().map(|&v| v as f64).sum::<f64>() / var.len() as f64;
    let eps = (1e-3 * mean_var).max(1e-12) as f32;
    let data = z
        .iter()
        .zip(mean.iter())
        .zip(&var)
        .map(|((&v, &m), &s)| (v - m) / (s + eps).sqrt() * std::f32::consts::FRAC_1_SQRT_2)
        .collect();
    Descriptor { grid: img.grid.clone(), channels: 1, data }
}
