//! Target grids for resampling, and crop/pad by whole voxels.
//!
//! Resampling keeps the centre of the field of view and the axis directions:
//! - to a **shape** `n'`: the voxel corners of the first and last voxels stay where they were
//!   (the field of view is unchanged, [`Grid::with_shape`]); spacing becomes `s·n/n'`;
//! - to a **spacing** `s'` (mm): `n' = max(1, round(n·s/s'))` voxels along each axis, centred
//!   on the old field of view's centre; the field of view changes by less than one new voxel.
//!
//! In both cases new voxel `q` sits at old voxel position `p = c + r·(q − c')` along each axis,
//! with `r = s'/s`, `c = (n − 1)/2` and `c' = (n' − 1)/2`.
//!
//! Crop/pad moves the grid by an integer voxel offset `o`, so no value is interpolated:
//! new voxel `q` is old voxel `q + o`, and the new affine is `A · translate(o)`.

use ndarray::{s, Array3};
use sinew_grid::{Affine, Grid, Volume};

use crate::PrepError;

/// Largest extent a NIfTI-1 file can hold along one axis.
const MAX_EXTENT: usize = i16::MAX as usize;

fn check_shape(shape: [usize; 3]) -> Result<(), PrepError> {
    if shape.iter().any(|&n| n == 0 || n > MAX_EXTENT) {
        return Err(PrepError::BadShape { shape });
    }
    Ok(())
}

/// The grid `p = c + r·(q − c')` (see the module doc) for new shape and per-axis ratio.
fn centred_grid(grid: &Grid, shape: [usize; 3], ratio: [f64; 3]) -> Result<Grid, PrepError> {
    let n = grid.shape();
    let lin = [[ratio[0], 0.0, 0.0], [0.0, ratio[1], 0.0], [0.0, 0.0, ratio[2]]];
    let t = [0, 1, 2].map(|d| (n[d] as f64 - 1.0) / 2.0 - ratio[d] * (shape[d] as f64 - 1.0) / 2.0);
    Ok(Grid::new(shape, grid.affine().compose(&Affine::from_parts(lin, t)))?)
}

/// The grid covering the same field of view with `shape` voxels.
pub fn grid_with_shape(grid: &Grid, shape: [usize; 3]) -> Result<Grid, PrepError> {
    check_shape(shape)?;
    let n = grid.shape();
    centred_grid(grid, shape, [0, 1, 2].map(|d| n[d] as f64 / shape[d] as f64))
}

/// The grid of voxels of `spacing` mm centred on the same field of view (see the module doc).
pub fn grid_with_spacing(grid: &Grid, spacing: [f64; 3]) -> Result<Grid, PrepError> {
    if spacing.iter().any(|&s| !(s.is_finite() && s > 0.0)) {
        return Err(PrepError::BadSpacing { spacing });
    }
    let n = grid.shape();
    let old = grid.spacing();
    let shape = [0, 1, 2].map(|d| ((n[d] as f64 * old[d] / spacing[d]).round() as usize).max(1));
    check_shape(shape)?;
    centred_grid(grid, shape, [0, 1, 2].map(|d| spacing[d] / old[d]))
}

/// A planned crop/pad: new voxel `q` is old voxel `q + offset`.
#[derive(Clone, Debug, PartialEq)]
pub struct CropPad {
    /// Offset in old voxels (negative: padding before the first voxel).
    pub offset: [isize; 3],
    /// The new grid, affine `A · translate(offset)`.
    pub grid: Grid,
}

/// Plans a crop/pad of `grid` to `shape` centred on voxel position `centre`:
/// `offset = ⌊centre − (n' − 1)/2⌋` per axis (for the image centre `(n − 1)/2` this is
/// `⌊(n − n')/2⌋`, so an odd surplus leaves the extra voxel at the end).
pub fn plan_crop_pad(grid: &Grid, shape: [usize; 3], centre: [f64; 3]) -> Result<CropPad, PrepError> {
    check_shape(shape)?;
    let offset = [0, 1, 2].map(|d| (centre[d] - (shape[d] as f64 - 1.0) / 2.0).floor() as isize);
    let t = offset.map(|o| o as f64);
    let grid = Grid::new(shape, grid.affine().compose(&Affine::from_parts(Affine::IDENTITY.linear(), t)))?;
    Ok(CropPad { offset, grid })
}

/// Applies a crop/pad: voxels outside the old grid take `fill`.
///
/// # Panics
/// When the plan's grid does not match `vol`'s affine (a programming error is not
/// detected beyond the shapes; callers plan on the volume's own grid).
pub fn crop_pad<T: Clone>(vol: &Volume<T>, plan: &CropPad, fill: T) -> Volume<T> {
    let n = vol.grid.shape();
    let m = plan.grid.shape();
    let mut out = Array3::from_elem((m[0], m[1], m[2]), fill);
    // Overlap along each axis: new indices [a, b) ↔ old [a + o, b + o).
    let range = |d: usize| {
        let o = plan.offset[d];
        let a = (-o).clamp(0, m[d] as isize);
        let b = (n[d] as isize - o).clamp(a, m[d] as isize);
        (a, b, o)
    };
    let (r0, r1, r2) = (range(0), range(1), range(2));
    if r0.0 < r0.1 && r1.0 < r1.1 && r2.0 < r2.1 {
        out.slice_mut(s![r0.0..r0.1, r1.0..r1.1, r2.0..r2.1]).assign(&vol.data.slice(s![
            r0.0 + r0.2..r0.1 + r0.2,
            r1.0 + r1.2..r1.1 + r1.2,
            r2.0 + r2.2..r2.1 + r2.2
        ]));
    }
    Volume { grid: plan.grid.clone(), data: out }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spacing_grid_keeps_the_centre_and_directions() {
        let a = Affine::from_parts([[0.0, -2.0, 0.0], [3.0, 0.0, 0.0], [0.0, 0.0, 1.0]], [5.0, 6.0, 7.0]);
        let g = Grid::new([10, 9, 31], a).unwrap();
        let h = grid_with_spacing(&g, [2.0, 2.0, 2.0]).unwrap();
        // n' = round(10·3/2) = 15, round(9·2/2) = 9, round(31·1/2) = round(15.5) = 16
        assert_eq!(h.shape(), [15, 9, 16]);
        let sp = h.spacing();
        approx::assert_abs_diff_eq!(sp[..], [2.0; 3][..], epsilon = 1e-12);
        let centre = |g: &Grid| g.voxel_to_world(g.shape().map(|n| (n as f64 - 1.0) / 2.0));
        let (c0, c1) = (centre(&g), centre(&h));
        approx::assert_abs_diff_eq!(c0[..], c1[..], epsilon = 1e-12);
        assert_eq!(h.orientation(), g.orientation());
        assert!(grid_with_spacing(&g, [0.0, 1.0, 1.0]).is_err());
    }

    #[test]
    fn crop_pad_moves_values_by_whole_voxels() {
        let g = Grid::axis_aligned([4, 3, 2], [1.0, 2.0, 3.0], [0.0; 3]);
        let mut v = Volume::filled(g.clone(), 0i32);
        for ((i, j, k), x) in v.data.indexed_iter_mut() {
            *x = (i * 100 + j * 10 + k) as i32 + 1;
        }
        // Crop i to 2 (offset ⌊(4−2)/2⌋ = 1), pad j to 5 (offset ⌊(3−5)/2⌋ = −1), keep k.
        let p = plan_crop_pad(&g, [2, 5, 2], [1.5, 1.0, 0.5]).unwrap();
        assert_eq!(p.offset, [1, -1, 0]);
        let o = crop_pad(&v, &p, -7);
        assert_eq!(o.data[[0, 0, 0]], -7);
        assert_eq!(o.data[[0, 1, 1]], 101 + 1);
        assert_eq!(o.data[[1, 3, 0]], 200 + 20 + 1);
        assert_eq!(o.data[[1, 4, 0]], -7);
        // world position of new voxel q = old voxel q + o
        assert_eq!(p.grid.voxel_to_world([0.0, 1.0, 1.0]), g.voxel_to_world([1.0, 0.0, 1.0]));
    }
}
