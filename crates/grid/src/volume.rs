//! Volumes (scalar images, label maps) and displacement fields on a [`Grid`].

use ndarray::{Array3, Array4, Axis};

use crate::{Grid, GridError};

/// A scalar volume sampled on a grid; `data` has shape `(nx, ny, nz)` in standard order.
#[derive(Clone, Debug, PartialEq)]
pub struct Volume<T> {
    /// The sampling grid.
    pub grid: Grid,
    /// Voxel values, shape `grid.shape()`, standard (row-major) layout.
    pub data: Array3<T>,
}

/// A float image (intensities, e.g. Hounsfield units for CT).
pub type Image = Volume<f32>;
/// An integer label map (0 = background).
pub type LabelMap = Volume<u16>;

impl<T: Clone> Volume<T> {
    /// Wraps `data` on `grid`; the array is made standard-layout if it is not.
    pub fn new(grid: Grid, data: Array3<T>) -> Result<Self, GridError> {
        if data.shape() != grid.shape() {
            return Err(GridError::ShapeMismatch { expected: grid.shape().to_vec(), found: data.shape().to_vec() });
        }
        let data = if data.is_standard_layout() { data } else { data.as_standard_layout().into_owned() };
        Ok(Volume { grid, data })
    }

    /// A volume filled with `value`.
    pub fn filled(grid: Grid, value: T) -> Self {
        let shape = grid.shape();
        Volume { grid, data: Array3::from_elem((shape[0], shape[1], shape[2]), value) }
    }

    /// The values as one contiguous slice in standard order.
    #[inline]
    pub fn as_slice(&self) -> &[T] {
        self.data.as_slice().expect("volumes are kept in standard layout")
    }

    /// The values as one contiguous mutable slice in standard order.
    #[inline]
    pub fn as_slice_mut(&mut self) -> &mut [T] {
        self.data.as_slice_mut().expect("volumes are kept in standard layout")
    }
}

impl Image {
    /// Minimum and maximum over finite voxels, or `None` when no voxel is finite.
    pub fn finite_range(&self) -> Option<(f32, f32)> {
        let mut lo = f32::INFINITY;
        let mut hi = f32::NEG_INFINITY;
        for &v in self.as_slice() {
            if v.is_finite() {
                lo = lo.min(v);
                hi = hi.max(v);
            }
        }
        (lo <= hi).then_some((lo, hi))
    }

    /// Number of voxels that are NaN or infinite.
    pub fn count_non_finite(&self) -> usize {
        self.as_slice().iter().filter(|v| !v.is_finite()).count()
    }
}

impl LabelMap {
    /// The label values present with their voxel counts, ascending by label (0 included).
    pub fn label_counts(&self) -> Vec<(u16, usize)> {
        let mut counts = vec![0usize; 65536];
        for &v in self.as_slice() {
            counts[v as usize] += 1;
        }
        counts.into_iter().enumerate().filter(|&(_, c)| c > 0).map(|(l, c)| (l as u16, c)).collect()
    }

    /// The non-zero labels present, ascending.
    pub fn labels(&self) -> Vec<u16> {
        self.label_counts().into_iter().map(|(l, _)| l).filter(|&l| l != 0).collect()
    }
}

/// A dense displacement field on the FIXED grid, pull convention:
/// `warped(x) = moving(x + u(x))`.
///
/// In memory the displacements are in **voxels along the array axes** `(i, j, k)` of `grid`,
/// stored component-first: `data` has shape `(3, nx, ny, nz)`, so each component is one
/// contiguous block. Conversion to world millimetres uses the linear part `M` of the
/// affine: `u_mm = M · u_vox`.
#[derive(Clone, Debug, PartialEq)]
pub struct Field {
    /// The fixed grid the field lives on.
    pub grid: Grid,
    /// Displacements in voxels, shape `(3, nx, ny, nz)`.
    pub data: Array4<f32>,
}

impl Field {
    /// The zero field (identity map) on `grid`.
    pub fn zeros(grid: Grid) -> Field {
        let [nx, ny, nz] = grid.shape();
        Field { grid, data: Array4::zeros((3, nx, ny, nz)) }
    }

    /// Wraps component-first voxel displacements `(3, nx, ny, nz)`.
    pub fn from_voxel_components(grid: Grid, data: Array4<f32>) -> Result<Field, GridError> {
        let s = grid.shape();
        if data.shape() != [3, s[0], s[1], s[2]] {
            return Err(GridError::ShapeMismatch { expected: vec![3, s[0], s[1], s[2]], found: data.shape().to_vec() });
        }
        let data = if data.is_standard_layout() { data } else { data.as_standard_layout().into_owned() };
        Ok(Field { grid, data })
    }

    /// From channel-last displacements `(nx, ny, nz, 3)` in world mm (the NIfTI file convention).
    pub fn from_world_mm(grid: Grid, mm: &Array4<f32>) -> Result<Field, GridError> {
        let s = grid.shape();
        if mm.shape() != [s[0], s[1], s[2], 3] {
            return Err(GridError::ShapeMismatch { expected: vec![s[0], s[1], s[2], 3], found: mm.shape().to_vec() });
        }
        let inv = grid.inverse_affine().linear();
        let mut f = Field::zeros(grid);
        for (i, j, k) in ndarray::indices((s[0], s[1], s[2])) {
            let w = [mm[[i, j, k, 0]] as f64, mm[[i, j, k, 1]] as f64, mm[[i, j, k, 2]] as f64];
            for (d, row) in inv.iter().enumerate() {
                f.data[[d, i, j, k]] = (row[0] * w[0] + row[1] * w[1] + row[2] * w[2]) as f32;
            }
        }
        Ok(f)
    }

    /// From channel-last displacements `(nx, ny, nz, 3)` in voxels along the array axes.
    pub fn from_voxel_channel_last(grid: Grid, vox: &Array4<f32>) -> Result<Field, GridError> {
        let s = grid.shape();
        if vox.shape() != [s[0], s[1], s[2], 3] {
            return Err(GridError::ShapeMismatch { expected: vec![s[0], s[1], s[2], 3], found: vox.shape().to_vec() });
        }
        let data = vox.view().permuted_axes([3, 0, 1, 2]).as_standard_layout().into_owned();
        Ok(Field { grid, data })
    }

    /// Channel-last displacements `(nx, ny, nz, 3)` in world mm: `u_mm = M · u_vox`.
    pub fn to_world_mm(&self) -> Array4<f32> {
        let lin = self.grid.affine().linear();
        let s = self.grid.shape();
        let mut out = Array4::<f32>::zeros((s[0], s[1], s[2], 3));
        let (ux, uy, uz) = (self.component(0), self.component(1), self.component(2));
        for (n, o) in out.as_slice_mut().unwrap().chunks_exact_mut(3).enumerate() {
            let v = [ux[n] as f64, uy[n] as f64, uz[n] as f64];
            for d in 0..3 {
                o[d] = (lin[d][0] * v[0] + lin[d][1] * v[1] + lin[d][2] * v[2]) as f32;
            }
        }
        out
    }

    /// Channel-last displacements `(nx, ny, nz, 3)` in voxels (the `.npy` convention).
    pub fn to_voxel_channel_last(&self) -> Array4<f32> {
        self.data.view().permuted_axes([1, 2, 3, 0]).as_standard_layout().into_owned()
    }

    /// Component `d` (0 = i, 1 = j, 2 = k) as a contiguous slice in standard order.
    #[inline]
    pub fn component(&self, d: usize) -> &[f32] {
        let n = self.grid.len();
        &self.data.as_slice().expect("standard layout")[d * n..(d + 1) * n]
    }

    /// All three components as contiguous mutable slices.
    pub fn components_mut(&mut self) -> [&mut [f32]; 3] {
        let n = self.grid.len();
        let s = self.data.as_slice_mut().expect("standard layout");
        let (a, rest) = s.split_at_mut(n);
        let (b, c) = rest.split_at_mut(n);
        [a, b, c]
    }

    /// Runs `f(i, [x, y, z])` once for every `i` slab, in parallel over `i` (rayon): `x`, `y`,
    /// `z` are the `ny·nz` values of the three components at that `i` (index `j·nz + k`). The one
    /// way a field is filled slab by slab; see [`par_component_slabs_mut`].
    pub fn par_slabs_mut<F>(&mut self, f: F)
    where
        F: Fn(usize, [&mut [f32]; 3]) + Send + Sync,
    {
        let shape = self.grid.shape();
        par_component_slabs_mut(self.data.as_slice_mut().expect("standard layout"), shape, f);
    }

    /// Component views as 3-D arrays.
    pub fn component_view(&self, d: usize) -> ndarray::ArrayView3<'_, f32> {
        self.data.index_axis(Axis(0), d)
    }

    /// Largest displacement length in mm over the grid.
    pub fn max_norm_mm(&self) -> f64 {
        let lin = self.grid.affine().linear();
        let (ux, uy, uz) = (self.component(0), self.component(1), self.component(2));
        let mut m = 0.0f64;
        for n in 0..self.grid.len() {
            let v = [ux[n] as f64, uy[n] as f64, uz[n] as f64];
            let w: f64 = (0..3).map(|d| (lin[d][0] * v[0] + lin[d][1] * v[1] + lin[d][2] * v[2]).powi(2)).sum();
            m = m.max(w.sqrt());
        }
        m
    }

    /// True when every displacement is finite.
    pub fn is_finite(&self) -> bool {
        self.data.iter().all(|v| v.is_finite())
    }
}

/// Splits `data`, laid out like a [`Field`]'s components (`(3, nx, ny, nz)` in standard order),
/// into its three components and runs `f(i, [x, y, z])` for every `i` slab in parallel (rayon),
/// where `x`, `y`, `z` are the `ny·nz` values of each component at that `i`. For buffers that
/// are shaped like a field without being one (a gradient, a workspace).
///
/// # Panics
/// When `data.len() != 3·nx·ny·nz`.
#[track_caller]
pub fn par_component_slabs_mut<F>(data: &mut [f32], shape: [usize; 3], f: F)
where
    F: Fn(usize, [&mut [f32]; 3]) + Send + Sync,
{
    // A vector of `()` never allocates.
    par_component_slabs_collect(data, shape, &mut Vec::new(), f);
}

/// [`par_component_slabs_mut`] whose `f` returns a value per slab: `out` is set to the `nx`
/// values in slab order (its allocation is reused), for sums that are then added in that order
/// so that they do not depend on the thread count.
///
/// # Panics
/// When `data.len() != 3·nx·ny·nz`.
#[track_caller]
pub fn par_component_slabs_collect<R, F>(data: &mut [f32], shape: [usize; 3], out: &mut Vec<R>, f: F)
where
    R: Send,
    F: Fn(usize, [&mut [f32]; 3]) -> R + Send + Sync,
{
    use rayon::prelude::*;
    let [nx, ny, nz] = shape;
    let n = nx * ny * nz;
    assert_eq!(data.len(), 3 * n, "a field-shaped buffer of shape {shape:?} holds 3·{n} values");
    let plane = ny * nz;
    if plane == 0 {
        out.clear();
        return;
    }
    let (a, rest) = data.split_at_mut(n);
    let (b, c) = rest.split_at_mut(n);
    a.par_chunks_mut(plane)
        .zip(b.par_chunks_mut(plane))
        .zip(c.par_chunks_mut(plane))
        .enumerate()
        .map(|(i, ((x, y), z))| f(i, [x, y, z]))
        .collect_into_vec(out);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slabs_walk_every_component_value_once_at_its_index() {
        // Each value written through its slab must land at [d, i, j, k] of the array.
        let g = Grid::axis_aligned([5, 3, 4], [1.0; 3], [0.0; 3]);
        let mut f = Field::zeros(g);
        f.par_slabs_mut(|i, comps| {
            for (d, c) in comps.into_iter().enumerate() {
                for (t, v) in c.iter_mut().enumerate() {
                    *v += (1000 * d + 100 * i + t) as f32;
                }
            }
        });
        for ((d, i, j, k), &v) in f.data.indexed_iter() {
            assert_eq!(v, (1000 * d + 100 * i + j * 4 + k) as f32, "[{d}, {i}, {j}, {k}]");
        }
    }
    use crate::Affine;

    #[test]
    fn mm_and_voxel_round_trip() {
        let a = Affine::from_parts([[0.0, -2.0, 0.0], [1.5, 0.0, 0.0], [0.0, 0.0, 3.0]], [1.0, 2.0, 3.0]);
        let g = Grid::new([3, 4, 2], a).unwrap();
        let mut f = Field::zeros(g.clone());
        for (n, v) in f.data.iter_mut().enumerate() {
            *v = (n as f32 * 0.37).sin();
        }
        let mm = f.to_world_mm();
        // u_mm = M·u_vox: x = -2·u_j, y = 1.5·u_i, z = 3·u_k
        approx::assert_abs_diff_eq!(mm[[1, 2, 1, 0]], (-2.0 * f.data[[1, 1, 2, 1]]), epsilon = 1e-6);
        approx::assert_abs_diff_eq!(mm[[1, 2, 1, 1]], (1.5 * f.data[[0, 1, 2, 1]]), epsilon = 1e-6);
        let back = Field::from_world_mm(g, &mm).unwrap();
        for (x, y) in back.data.iter().zip(f.data.iter()) {
            approx::assert_abs_diff_eq!(x, y, epsilon = 1e-5);
        }
        let cl = f.to_voxel_channel_last();
        assert_eq!(cl[[2, 3, 1, 2]], f.data[[2, 2, 3, 1]]);
    }
}
