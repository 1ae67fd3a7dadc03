//! The sampling grid of a 3-D scan: shape plus voxel-to-world affine.

use crate::{Affine, GridError};

/// A continuous voxel position `(i, j, k)` along the array axes, in voxels.
pub type VoxelPoint = [f64; 3];
/// A point in NIfTI world space, in millimetres.
pub type WorldPoint = [f64; 3];

/// The grid a volume is sampled on.
///
/// Array axes follow the NIfTI voxel index order `(i, j, k)`; the in-memory shape is
/// `(nx, ny, nz)` and arrays are stored in standard (row-major) order, so `k` is the
/// fastest-varying index. `affine` maps voxel centres `(i, j, k)` to world mm.
#[derive(Clone, Debug, PartialEq)]
pub struct Grid {
    shape: [usize; 3],
    affine: Affine,
    inverse: Affine,
}

impl Grid {
    /// A grid of `shape` voxels with voxel-to-world map `affine`.
    ///
    /// Fails when an extent is zero or the affine is singular or not finite.
    pub fn new(shape: [usize; 3], affine: Affine) -> Result<Grid, GridError> {
        if shape.contains(&0) {
            return Err(GridError::EmptyShape { shape });
        }
        let inverse = match (affine.is_finite(), affine.inverse()) {
            (true, Some(inv)) => inv,
            _ => return Err(GridError::SingularAffine { det: affine.determinant() }),
        };
        Ok(Grid { shape, affine, inverse })
    }

    /// An axis-aligned grid with the given spacing (mm) and origin (world mm of voxel 0,0,0).
    ///
    /// # Panics
    /// When an extent is zero or a spacing is zero or not finite (a programming error).
    #[track_caller]
    pub fn axis_aligned(shape: [usize; 3], spacing: [f64; 3], origin: [f64; 3]) -> Grid {
        Grid::new(shape, Affine::from_spacing_origin(spacing, origin)).expect("valid axis-aligned grid")
    }

    /// Shape `(nx, ny, nz)` in voxels.
    #[inline]
    pub fn shape(&self) -> [usize; 3] {
        self.shape
    }

    /// Number of voxels `nx·ny·nz`.
    #[inline]
    pub fn len(&self) -> usize {
        self.shape.iter().product()
    }

    /// Always false: a grid has at least one voxel.
    #[inline]
    pub fn is_empty(&self) -> bool {
        false
    }

    /// The voxel-to-world affine.
    #[inline]
    pub fn affine(&self) -> &Affine {
        &self.affine
    }

    /// The world-to-voxel affine.
    #[inline]
    pub fn inverse_affine(&self) -> &Affine {
        &self.inverse
    }

    /// Voxel spacing in mm along `i`, `j`, `k` (the column norms of the affine).
    pub fn spacing(&self) -> [f64; 3] {
        self.affine.column_norms()
    }

    /// World position (mm) of a voxel position.
    #[inline]
    pub fn voxel_to_world(&self, p: VoxelPoint) -> WorldPoint {
        self.affine.apply(p)
    }

    /// Voxel position of a world point (mm).
    #[inline]
    pub fn world_to_voxel(&self, w: WorldPoint) -> VoxelPoint {
        self.inverse.apply(w)
    }

    /// Orientation codes (nibabel's `aff2axcodes` rule), e.g. `"RAS"`.
    pub fn orientation(&self) -> String {
        self.affine.axis_codes().iter().collect()
    }

    /// True when both grids have the same shape and affines equal within `tol_mm`
    /// (entry-wise, in mm per voxel and mm).
    pub fn same_as(&self, other: &Grid, tol_mm: f64) -> bool {
        self.shape == other.shape
            && self.affine.m.iter().flatten().zip(other.affine.m.iter().flatten()).all(|(a, b)| (a - b).abs() <= tol_mm)
    }

    /// Checks that `other` is the same grid (tolerance 1e-3 mm), naming the difference.
    pub fn ensure_same(&self, other: &Grid) -> Result<(), GridError> {
        if self.shape != other.shape {
            return Err(GridError::GridMismatch { what: format!("shape {:?} vs {:?}", self.shape, other.shape) });
        }
        if !self.same_as(other, 1e-3) {
            return Err(GridError::GridMismatch { what: "voxel-to-world affines differ".into() });
        }
        Ok(())
    }

    /// The grid downsampled by two along the axes not listed in `keep`.
    ///
    /// Halved axes get shape `ceil(n/2)` and twice the spacing; coarse voxel `c` sits at fine
    /// voxel position `2c + 0.5`, so the first coarse centre is the mean of fine voxels 0 and 1
    /// and the coarse grid covers the same field of view.
    pub fn halved(&self, keep: [bool; 3]) -> Grid {
        let mut shape = self.shape;
        let mut scale = [1.0; 3];
        let mut offset = [0.0; 3];
        for d in 0..3 {
            if !keep[d] {
                shape[d] = self.shape[d].div_ceil(2);
                scale[d] = 2.0;
                offset[d] = 0.5;
            }
        }
        let coarse_to_fine =
            Affine::from_parts([[scale[0], 0.0, 0.0], [0.0, scale[1], 0.0], [0.0, 0.0, scale[2]]], offset);
        Grid::new(shape, self.affine.compose(&coarse_to_fine)).expect("halving keeps a valid grid")
    }

    /// The lattice of every `s`-th voxel: point `c` sits on voxel `s·c`, so the shape is
    /// `(n − 1)/s + 1` per axis (the last point stays inside) and the spacing is `s` times
    /// larger. `s = 1` gives the grid itself.
    ///
    /// # Panics
    /// When `s` is zero.
    #[track_caller]
    pub fn strided(&self, s: usize) -> Grid {
        assert!(s >= 1, "stride must be at least 1");
        let shape = self.shape.map(|n| (n - 1) / s + 1);
        let f = s as f64;
        let scale = Affine::from_parts([[f, 0.0, 0.0], [0.0, f, 0.0], [0.0, 0.0, f]], [0.0; 3]);
        Grid::new(shape, self.affine.compose(&scale)).expect("a strided grid stays valid")
    }

    /// A grid with the same field of view as `self`, but `shape` voxels: voxel corners
    /// (not centres) of the first and last voxels coincide, as in image resizing.
    pub fn with_shape(&self, shape: [usize; 3]) -> Result<Grid, GridError> {
        let mut scale = [0.0; 3];
        let mut offset = [0.0; 3];
        for d in 0..3 {
            if shape[d] == 0 {
                return Err(GridError::EmptyShape { shape });
            }
            scale[d] = self.shape[d] as f64 / shape[d] as f64;
            offset[d] = 0.5 * scale[d] - 0.5;
        }
        let new_to_old = Affine::from_parts([[scale[0], 0.0, 0.0], [0.0, scale[1], 0.0], [0.0, 0.0, scale[2]]], offset);
        Grid::new(shape, self.affine.compose(&new_to_old))
    }

    /// Linear index of voxel `(i, j, k)` in standard order.
    #[inline]
    pub fn index(&self, i: usize, j: usize, k: usize) -> usize {
        (i * self.shape[1] + j) * self.shape[2] + k
    }

    /// World positions (mm) of the eight corner voxel centres, for checks and reports.
    pub fn corners_world(&self) -> [WorldPoint; 8] {
        let mut out = [[0.0; 3]; 8];
        for (c, o) in out.iter_mut().enumerate() {
            let p = [0, 1, 2].map(|d| if c >> d & 1 == 1 { (self.shape[d] - 1) as f64 } else { 0.0 });
            *o = self.voxel_to_world(p);
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn halved_grid_covers_same_field_of_view() {
        let g = Grid::axis_aligned([10, 9, 4], [2.0, 1.0, 3.0], [-5.0, 3.0, 7.0]);
        let h = g.halved([false, false, true]);
        assert_eq!(h.shape(), [5, 5, 4]);
        assert_eq!(h.spacing(), [4.0, 2.0, 3.0]);
        // coarse voxel 0 sits halfway between fine voxels 0 and 1
        let w = h.voxel_to_world([0.0, 0.0, 0.0]);
        assert_eq!(w, [-5.0 + 1.0, 3.0 + 0.5, 7.0]);
    }

    #[test]
    fn strided_lattice_points_sit_on_voxels() {
        let g = Grid::axis_aligned([9, 8, 1], [2.0, 1.0, 3.0], [1.0, 2.0, 3.0]);
        let s = g.strided(2);
        assert_eq!(s.shape(), [5, 4, 1]);
        assert_eq!(s.voxel_to_world([4.0, 3.0, 0.0]), g.voxel_to_world([8.0, 6.0, 0.0]));
    }

    #[test]
    fn rejects_bad_grids() {
        assert!(matches!(Grid::new([0, 2, 2], Affine::IDENTITY), Err(GridError::EmptyShape { .. })));
        let sing = Affine::from_spacing_origin([1.0, 0.0, 1.0], [0.0; 3]);
        assert!(matches!(Grid::new([2, 2, 2], sing), Err(GridError::SingularAffine { .. })));
        let nan = Affine::from_spacing_origin([1.0, f64::NAN, 1.0], [0.0; 3]);
        assert!(Grid::new([2, 2, 2], nan).is_err());
    }
}
