//! Multi-resolution pyramids: Gaussian smoothing then downsampling by two.

use crate::{resample, smooth, Border, Grid, Image, Volume};

/// Which axes to halve when going one level coarser.
///
/// An axis is halved unless its spacing is already at least 1.7 times the smallest spacing
/// of the grid, so that strongly anisotropic scans (thick slices) first become more
/// isotropic instead of losing through-plane resolution (common practice).
pub fn axes_to_keep(grid: &Grid) -> [bool; 3] {
    let s = grid.spacing();
    let min = s.iter().cloned().fold(f64::INFINITY, f64::min);
    [s[0] >= 1.7 * min, s[1] >= 1.7 * min, s[2] >= 1.7 * min]
}

/// One level coarser: smooth with σ = 0.5·(new spacing) mm on halved axes, then sample at the
/// coarse voxel centres (trilinear; the centres sit between fine voxels). An axis with a
/// single voxel is never halved.
pub fn downsample(img: &Image) -> Image {
    let mut keep = axes_to_keep(&img.grid);
    for (k, &n) in keep.iter_mut().zip(&img.grid.shape()) {
        *k |= n < 2;
    }
    let coarse = img.grid.halved(keep);
    let mut data = img.data.clone();
    let kernel = smooth::gaussian_kernel(1.0); // σ = 0.5 coarse voxel = 1 fine voxel
    for (d, &kept) in keep.iter().enumerate() {
        if !kept {
            smooth::convolve_axis(&mut data, d, &kernel);
        }
    }
    let smoothed = Volume { grid: img.grid.clone(), data };
    resample::resample_image(&smoothed, &coarse, Border::Nearest)
}

/// The pyramid of `levels` images, finest first (`levels[0]` is `img` itself).
pub fn build(img: &Image, levels: usize) -> Vec<Image> {
    let mut out = vec![img.clone()];
    for _ in 1..levels.max(1) {
        let next = downsample(out.last().unwrap());
        out.push(next);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pyramid_halves_isotropic_and_spares_thick_axes() {
        let g = Grid::axis_aligned([16, 16, 8], [1.0, 1.0, 4.0], [0.0; 3]);
        let img = Image::filled(g, 2.0);
        let p = build(&img, 3);
        assert_eq!(p[1].grid.shape(), [8, 8, 8]);
        assert_eq!(p[1].grid.spacing(), [2.0, 2.0, 4.0]);
        // level 1 is [2, 2, 4] mm: the 4 mm axis is now thick and is kept
        assert_eq!(p[2].grid.shape(), [4, 4, 8]);
        assert_eq!(p[2].grid.spacing(), [4.0, 4.0, 4.0]);
        for &v in p[2].data.iter() {
            approx::assert_abs_diff_eq!(v, 2.0, epsilon = 1e-5);
        }
    }
}
