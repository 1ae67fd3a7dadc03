//! Warping images (trilinear) and label maps (nearest neighbour) through a displacement field.
//!
//! For every fixed voxel `x = (i, j, k)`, the sample position is `x + u(x)` (voxels). The plain
//! functions require the moving volume on the field's grid; the `_from` variants take a moving
//! volume on any grid and map the position through world space:
//! `p_moving = A_moving⁻¹ · A_fixed · (x + u(x))`.

use rayon::prelude::*;
use sinew_grid::interp::{nearest, trilinear};
use sinew_grid::resample::voxel_map;
use sinew_grid::{Border, Field, Image, LabelMap, Volume};

use crate::error::{ensure_on_field_grid, TransformError};

/// `warped(x) = moving(x + u(x))` with trilinear interpolation; `moving` must be on the
/// field's grid (same shape and affine within 1e-3 mm).
///
/// `border` decides what samples outside `moving` see ([`Border::Nearest`] repeats the edge,
/// [`Border::Constant`] blends in a padding value, like
/// `scipy.ndimage.map_coordinates(order=1, mode="grid-constant")`).
pub fn warp_image(moving: &Image, field: &Field, border: Border) -> Result<Image, TransformError> {
    let mut out = Image::filled(field.grid.clone(), 0.0);
    warp_image_into(moving, field, border, &mut out)?;
    Ok(out)
}

/// [`warp_image`] writing into `out`, which must be on the field's grid.
pub fn warp_image_into(moving: &Image, field: &Field, border: Border, out: &mut Image) -> Result<(), TransformError> {
    ensure_on_field_grid(&field.grid, &moving.grid, "moving image")?;
    ensure_on_field_grid(&field.grid, &out.grid, "output image")?;
    let (data, shape) = (moving.as_slice(), moving.grid.shape());
    pull(field, out.as_slice_mut(), cast, |p| trilinear(data, shape, p, border));
    Ok(())
}

/// `warped(x) = moving(A_moving⁻¹ · A_fixed · (x + u(x)))`, trilinear: warps a moving image on
/// any grid without resampling it first. The result is on the field's (fixed) grid.
pub fn warp_image_from(moving: &Image, field: &Field, border: Border) -> Image {
    let mut out = Image::filled(field.grid.clone(), 0.0);
    let (data, shape) = (moving.as_slice(), moving.grid.shape());
    let m = voxel_map(&field.grid, &moving.grid);
    pull(field, out.as_slice_mut(), |q| cast(m.apply(q)), |p| trilinear(data, shape, p, border));
    out
}

/// Label map pulled through the field by nearest neighbour (rounding half away from zero);
/// label 0 outside `moving`. `moving` must be on the field's grid.
pub fn warp_labels(moving: &LabelMap, field: &Field) -> Result<LabelMap, TransformError> {
    ensure_on_field_grid(&field.grid, &moving.grid, "moving label map")?;
    let mut out = LabelMap::filled(field.grid.clone(), 0);
    let (data, shape) = (moving.as_slice(), moving.grid.shape());
    pull(field, out.as_slice_mut(), cast, |p| nearest(data, shape, p, 0u16));
    Ok(out)
}

/// [`warp_labels`] for a moving label map on any grid (positions mapped through world space as
/// in [`warp_image_from`]).
pub fn warp_labels_from(moving: &LabelMap, field: &Field) -> LabelMap {
    let mut out: LabelMap = Volume::filled(field.grid.clone(), 0);
    let (data, shape) = (moving.as_slice(), moving.grid.shape());
    let m = voxel_map(&field.grid, &moving.grid);
    pull(field, out.as_slice_mut(), |q| cast(m.apply(q)), |p| nearest(data, shape, p, 0u16));
    out
}

/// A voxel position in `f32`, as the samplers take it.
#[inline]
fn cast(q: [f64; 3]) -> [f32; 3] {
    [q[0] as f32, q[1] as f32, q[2] as f32]
}

/// The pull kernel: `out[x] = sample(to_moving(x + u(x)))`, parallel over `i` slabs. The
/// position `x + u(x)` is formed in `f64`.
fn pull<T, P, S>(field: &Field, out: &mut [T], to_moving: P, sample: S)
where
    T: Copy + Send,
    P: Fn([f64; 3]) -> [f32; 3] + Sync,
    S: Fn([f32; 3]) -> T + Sync,
{
    let [_, ny, nz] = field.grid.shape();
    let (ux, uy, uz) = (field.component(0), field.component(1), field.component(2));
    let plane = ny * nz;
    out.par_chunks_mut(plane).enumerate().for_each(|(i, slab)| {
        let base = i * plane;
        for j in 0..ny {
            let row = &mut slab[j * nz..(j + 1) * nz];
            for (k, o) in row.iter_mut().enumerate() {
                let n = base + j * nz + k;
                let q = [i as f64 + ux[n] as f64, j as f64 + uy[n] as f64, k as f64 + uz[n] as f64];
                *o = sample(to_moving(q));
            }
        }
    });
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    #[test]
    fn integer_shift_moves_labels_exactly_and_pads_with_zero() {
        // Exact fact: u ≡ (1, 0, −2) voxels gives warped(i, j, k) = moving(i + 1, j, k − 2).
        let g = Grid::axis_aligned([5, 4, 6], [1.0, 2.0, 3.0], [0.0; 3]);
        let mut lab = LabelMap::filled(g.clone(), 0);
        for (n, v) in lab.as_slice_mut().iter_mut().enumerate() {
            *v = (n % 7) as u16 + 1;
        }
        let mut f = Field::zeros(g.clone());
        f.components_mut()[0].fill(1.0);
        f.components_mut()[2].fill(-2.0);
        let w = warp_labels(&lab, &f).unwrap();
        for ((i, j, k), &v) in w.data.indexed_iter() {
            let want = if i + 1 < 5 && k >= 2 { lab.data[[i + 1, j, k - 2]] } else { 0 };
            assert_eq!(v, want, "{i} {j} {k}");
        }
        let other = Grid::axis_aligned([5, 4, 5], [1.0, 2.0, 3.0], [0.0; 3]);
        assert!(matches!(
            warp_labels(&LabelMap::filled(other, 0), &f),
            Err(TransformError::NotOnFieldGrid { what: "moving label map", .. })
        ));
    }

    #[test]
    fn from_variant_equals_plain_warp_on_the_same_grid() {
        let g = Grid::axis_aligned([6, 5, 4], [1.5, 1.0, 2.0], [3.0, -1.0, 0.5]);
        let mut img = Image::filled(g.clone(), 0.0);
        img.as_slice_mut().iter_mut().enumerate().for_each(|(n, v)| *v = (n as f32 * 0.71).sin());
        let mut f = Field::zeros(g.clone());
        f.data.iter_mut().enumerate().for_each(|(n, v)| *v = (n as f32 * 0.37).cos() * 1.3);
        let a = warp_image(&img, &f, Border::Constant(-3.0)).unwrap();
        let b = warp_image_from(&img, &f, Border::Constant(-3.0));
        let worst = a.as_slice().iter().zip(b.as_slice()).map(|(x, y)| (x - y).abs()).fold(0.0, f32::max);
        assert!(worst < 1e-5, "{worst}");
    }
}
