//! The three orthogonal planes of a sheet and the map between panel pixels and voxels.
//!
//! # Display convention
//! Each voxel axis is matched to the world axis its affine column points along most
//! (largest absolute component), with that component's sign. A plane is named by the world
//! axis of its normal: axial (normal along z, superior–inferior), coronal (y,
//! anterior–posterior), sagittal (x, right–left). In a panel, up is superior (coronal,
//! sagittal) or anterior (axial); the patient's right is on the viewer's left (radiological
//! convention, common practice for CT) and anterior is on the left of sagittal panels. With
//! NIfTI's RAS+ world, this means: a displayed voxel axis is reversed exactly when it points
//! towards +x, +y or +z.
//!
//! # Pixels and voxels
//! All panels share one pixel size `s` (mm per pixel), so no slice is squashed by anisotropic
//! spacing. Along a displayed axis with `n` voxels of spacing `h` mm the panel has
//! `w = max(1, round(n·h/s))` pixels; pixel column `u` (covering `[u, u+1)`) has its centre at
//! the continuous voxel coordinate `t = (u + 0.5)·n/w − 0.5`, or `n − 1 − t` when the axis is
//! reversed. Nearest-neighbour panels show voxel `round(t)` (half away from zero).

use sinew_grid::Grid;

/// Which orthogonal plane a sheet row shows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PlaneKind {
    /// Normal along the superior–inferior world axis.
    Axial,
    /// Normal along the anterior–posterior world axis.
    Coronal,
    /// Normal along the right–left world axis.
    Sagittal,
}

impl PlaneKind {
    /// Lower-case name.
    pub fn name(self) -> &'static str {
        match self {
            PlaneKind::Axial => "axial",
            PlaneKind::Coronal => "coronal",
            PlaneKind::Sagittal => "sagittal",
        }
    }
}

/// Where one plane's panel sits in voxel space and how big it is in pixels.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PlaneGeometry {
    /// Which plane.
    pub kind: PlaneKind,
    /// Voxel axis normal to the plane (0 = i, 1 = j, 2 = k).
    pub normal_axis: usize,
    /// Voxel index of the plane along `normal_axis`.
    pub index: usize,
    /// Voxel axis shown left to right.
    pub h_axis: usize,
    /// Voxel axis shown top to bottom.
    pub v_axis: usize,
    /// True when the horizontal axis is shown reversed (index decreasing to the right).
    pub h_flip: bool,
    /// True when the vertical axis is shown reversed (index decreasing downwards).
    pub v_flip: bool,
    /// Voxels along the horizontal axis.
    pub n_h: usize,
    /// Voxels along the vertical axis.
    pub n_v: usize,
    /// Panel width in pixels.
    pub width: u32,
    /// Panel height in pixels.
    pub height: u32,
}

/// For each voxel axis: the world axis it points along most, and whether it points to `+`.
fn world_axes(grid: &Grid) -> [(usize, bool); 3] {
    let m = grid.affine().linear();
    let mut out = [(0, true); 3];
    for (d, o) in out.iter_mut().enumerate() {
        let w = (0..3).max_by(|&a, &b| m[a][d].abs().total_cmp(&m[b][d].abs())).expect("three rows");
        *o = (w, m[w][d] >= 0.0);
    }
    let distinct = out[0].0 != out[1].0 && out[1].0 != out[2].0 && out[0].0 != out[2].0;
    if distinct {
        out
    } else {
        // Strongly oblique grid: fall back to voxel axis d ↔ world axis d.
        [(0, m[0][0] >= 0.0), (1, m[1][1] >= 0.0), (2, m[2][2] >= 0.0)]
    }
}

/// The three planes (axial, coronal, sagittal) through voxel `point` with `mm_per_px` mm per
/// pixel (see the [module documentation](self)).
pub fn planes(grid: &Grid, point: [usize; 3], mm_per_px: f64) -> [PlaneGeometry; 3] {
    let axes = world_axes(grid);
    let voxel_axis_of = |w: usize| (0..3).find(|&d| axes[d].0 == w).expect("each world axis has a voxel axis");
    let (x, y, z) = (voxel_axis_of(0), voxel_axis_of(1), voxel_axis_of(2));
    let shape = grid.shape();
    let spacing = grid.spacing();
    let make = |kind, normal: usize, h: usize, v: usize| {
        let px = |d: usize| ((shape[d] as f64 * spacing[d] / mm_per_px).round() as u32).max(1);
        PlaneGeometry {
            kind,
            normal_axis: normal,
            index: point[normal],
            h_axis: h,
            v_axis: v,
            h_flip: axes[h].1,
            v_flip: axes[v].1,
            n_h: shape[h],
            n_v: shape[v],
            width: px(h),
            height: px(v),
        }
    };
    [make(PlaneKind::Axial, z, x, y), make(PlaneKind::Coronal, y, x, z), make(PlaneKind::Sagittal, x, y, z)]
}

/// Continuous voxel coordinate of the centre of pixel `u` along an axis of `n` voxels shown
/// on `w` pixels, reversed when `flip`.
#[inline]
pub fn voxel_coord(u: u32, n: usize, w: u32, flip: bool) -> f64 {
    let t = (u as f64 + 0.5) * n as f64 / w as f64 - 0.5;
    if flip {
        n as f64 - 1.0 - t
    } else {
        t
    }
}

/// Continuous pixel position (pixel `u` covers `[u, u+1)`) of voxel coordinate `t`; the
/// inverse of [`voxel_coord`].
#[inline]
pub fn pixel_coord(t: f64, n: usize, w: u32, flip: bool) -> f64 {
    let t = if flip { n as f64 - 1.0 - t } else { t };
    (t + 0.5) * w as f64 / n as f64
}

impl PlaneGeometry {
    /// Continuous voxel position `(i, j, k)` of the centre of panel pixel `(u, v)`.
    pub fn voxel_at(&self, u: u32, v: u32) -> [f64; 3] {
        let mut p = [0.0; 3];
        p[self.normal_axis] = self.index as f64;
        p[self.h_axis] = voxel_coord(u, self.n_h, self.width, self.h_flip);
        p[self.v_axis] = voxel_coord(v, self.n_v, self.height, self.v_flip);
        p
    }

    /// Panel pixel position (continuous) of in-plane voxel coordinates `(t_h, t_v)`.
    pub fn pixel_of(&self, t_h: f64, t_v: f64) -> [f32; 2] {
        [
            pixel_coord(t_h, self.n_h, self.width, self.h_flip) as f32,
            pixel_coord(t_v, self.n_v, self.height, self.v_flip) as f32,
        ]
    }

    /// Samples `f` at the centre of every pixel, row by row: `out[v·width + u]`.
    pub fn sample<T>(&self, mut f: impl FnMut([f64; 3]) -> T) -> Vec<T> {
        let mut out = Vec::with_capacity(self.width as usize * self.height as usize);
        for v in 0..self.height {
            for u in 0..self.width {
                out.push(f(self.voxel_at(u, v)));
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Affine;

    #[test]
    fn anisotropic_spacing_keeps_proportions_and_ras_axes_are_reversed() {
        // 3 mm slices along k, 1 mm in-plane: the coronal panel is 3× taller per voxel.
        let g = Grid::axis_aligned([100, 80, 40], [1.0, 1.0, 3.0], [0.0; 3]);
        let [ax, co, sa] = planes(&g, [50, 40, 20], 1.0);
        assert_eq!((ax.normal_axis, ax.width, ax.height), (2, 100, 80));
        assert_eq!((co.normal_axis, co.width, co.height), (1, 100, 120));
        assert_eq!((sa.normal_axis, sa.width, sa.height), (0, 80, 120));
        assert!(ax.h_flip && ax.v_flip && co.v_flip);
        // An LPS-like grid (i towards −x, j towards −y) is shown without reversal in-plane.
        let lps = Grid::new(
            [10, 10, 10],
            Affine::from_parts([[-1.0, 0.0, 0.0], [0.0, -1.0, 0.0], [0.0, 0.0, 1.0]], [0.0; 3]),
        )
        .unwrap();
        let [ax, _, _] = planes(&lps, [5, 5, 5], 1.0);
        assert!(!ax.h_flip && !ax.v_flip);
    }

    #[test]
    fn pixel_and_voxel_maps_are_inverse() {
        for &(n, w, flip) in &[(10usize, 25u32, false), (7, 7, true), (33, 12, true)] {
            for u in 0..w {
                let t = voxel_coord(u, n, w, flip);
                assert!((pixel_coord(t, n, w, flip) - (u as f64 + 0.5)).abs() < 1e-9);
            }
        }
        // Exact: with w = n the pixel centres are the voxel centres.
        assert_eq!(voxel_coord(3, 10, 10, false), 3.0);
        assert_eq!(voxel_coord(3, 10, 10, true), 6.0);
    }
}
