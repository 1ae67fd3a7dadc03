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

/// The anatomical letter of a world direction `v` in NIfTI's RAS+ world (nifti1.h: +x =
/// Right, +y = Anterior, +z = Superior): the world axis of the largest `|v_a|` names it, `+`
/// gives R, A or S and `−` gives L, P or I. For the voxel axes (affine columns) these are the
/// letters `nibabel.aff2axcodes` gives.
pub fn direction_letter(v: [f64; 3]) -> char {
    let a = (0..3).max_by(|&a, &b| v[a].abs().total_cmp(&v[b].abs())).expect("three components");
    let (plus, minus) = [('R', 'L'), ('A', 'P'), ('S', 'I')][a];
    if v[a] >= 0.0 {
        plus
    } else {
        minus
    }
}

/// The letters at the four edges of a panel: the anatomical direction one meets going off
/// the panel that way.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct EdgeLetters {
    /// Left edge.
    pub left: char,
    /// Right edge.
    pub right: char,
    /// Top edge.
    pub top: char,
    /// Bottom edge.
    pub bottom: char,
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

    /// The edge letters of this panel on `grid` (the grid it was laid out for): increasing
    /// pixel `u` runs along voxel axis `h_axis` (against it when `h_flip`), so its world
    /// direction is the affine's column `h_axis` times `±1`; the right edge takes that
    /// direction's [`direction_letter`], the left edge the opposite one, and likewise
    /// bottom/top with `v_axis`.
    pub fn edge_letters(&self, grid: &Grid) -> EdgeLetters {
        let m = grid.affine().linear();
        let dir = |axis: usize, flip: bool| {
            let s = if flip { -1.0 } else { 1.0 };
            [s * m[0][axis], s * m[1][axis], s * m[2][axis]]
        };
        let neg = |v: [f64; 3]| v.map(|x| -x);
        let (u, v) = (dir(self.h_axis, self.h_flip), dir(self.v_axis, self.v_flip));
        EdgeLetters {
            left: direction_letter(neg(u)),
            right: direction_letter(u),
            top: direction_letter(neg(v)),
            bottom: direction_letter(v),
        }
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

    /// The letters of each voxel axis (affine column) as `nibabel.orientations.aff2axcodes`
    /// gives them (nibabel 5.3.2, run when this test was written): diag(1, 1, 1) → RAS,
    /// diag(−1, −1, 1) → LPS, [[0, 0, −2], [1, 0, 0], [0, −3, 0]] → AIL.
    #[test]
    fn voxel_axis_letters_follow_the_nifti_ras_convention() {
        let cases: [([[f64; 3]; 3], [char; 3]); 3] = [
            ([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]], ['R', 'A', 'S']),
            ([[-1.0, 0.0, 0.0], [0.0, -1.0, 0.0], [0.0, 0.0, 1.0]], ['L', 'P', 'S']),
            ([[0.0, 0.0, -2.0], [1.0, 0.0, 0.0], [0.0, -3.0, 0.0]], ['A', 'I', 'L']),
        ];
        for (m, want) in cases {
            let got: Vec<char> = (0..3).map(|d| direction_letter([m[0][d], m[1][d], m[2][d]])).collect();
            assert_eq!(got, want, "{m:?}");
        }
    }

    #[test]
    fn panels_show_the_same_anatomy_letters_for_flipped_affines() {
        // Radiological display: patient's right on the viewer's left, anterior up (axial),
        // superior up (coronal, sagittal), anterior on the left of sagittal panels. A grid
        // stored with flipped axes (LPS-like, or k towards inferior) must show the same.
        let e = |l: &str| {
            let c: Vec<char> = l.chars().collect();
            EdgeLetters { left: c[0], right: c[1], top: c[2], bottom: c[3] }
        };
        let want = [e("RLAP"), e("RLSI"), e("APSI")];
        for diag in [[1.0, 1.0, 1.0], [-1.0, -1.0, 1.0], [1.0, -1.0, -1.0], [-2.0, 1.5, -3.0]] {
            let lin = [[diag[0], 0.0, 0.0], [0.0, diag[1], 0.0], [0.0, 0.0, diag[2]]];
            let g = Grid::new([10, 12, 14], Affine::from_parts(lin, [0.0; 3])).unwrap();
            let got = planes(&g, [5, 6, 7], 1.0).map(|p| p.edge_letters(&g));
            assert_eq!(got, want, "diagonal {diag:?}");
        }
        // A permuted grid (voxel axes A, I, L as above): the letters still match the display.
        let g = Grid::new(
            [10, 12, 14],
            Affine::from_parts([[0.0, 0.0, -2.0], [1.0, 0.0, 0.0], [0.0, -3.0, 0.0]], [0.0; 3]),
        )
        .unwrap();
        assert_eq!(planes(&g, [5, 6, 7], 1.0).map(|p| p.edge_letters(&g)), want);
    }

    #[test]
    fn pixel_and_voxel_maps_are_inverse() {
        for &(n, w, flip) in &[(10usize, 25u32, false), (7, 7, true), (33, 12, true)] {
            for u in 0..w {
                let t = voxel_coord(u, n, w, flip);
                approx::assert_abs_diff_eq!(pixel_coord(t, n, w, flip), (u as f64 + 0.5), epsilon = 1e-9);
            }
        }
        // Exact: with w = n the pixel centres are the voxel centres.
        assert_eq!(voxel_coord(3, 10, 10, false), 3.0);
        assert_eq!(voxel_coord(3, 10, 10, true), 6.0);
    }
}
