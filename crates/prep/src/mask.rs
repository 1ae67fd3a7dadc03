//! Body mask: threshold, largest 6-connected component, optional hole filling per axial slice.
//!
//! 1. foreground = voxels with value `> threshold` (HU);
//! 2. keep the largest component under 6-connectivity (voxels sharing a face; ties go to the
//!    component whose first voxel comes first in standard order);
//! 3. optionally, in every slice across the axial axis (the voxel axis pointing S or I), fill
//!    holes: background pixels not 4-connected to the slice border become foreground.

use sinew_grid::{Image, LabelMap, Volume};

use crate::PrepError;

/// Settings of the body mask.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BodyParams {
    /// Voxels strictly above this value (HU) are candidates.
    pub threshold: f32,
    /// Fill holes in each axial slice.
    pub fill_holes: bool,
}

impl Default for BodyParams {
    /// Threshold −500 HU (between air, −1000, and fat, about −100; common practice), holes filled.
    fn default() -> Self {
        BodyParams { threshold: -500.0, fill_holes: true }
    }
}

/// The body mask of `img` (1 inside, 0 outside); `axial_axis` is the voxel axis across axial
/// slices (used only when filling holes).
///
/// Fails with [`PrepError::EmptyMask`] when no voxel exceeds the threshold.
pub fn body_mask(img: &Image, p: &BodyParams, axial_axis: usize) -> Result<LabelMap, PrepError> {
    let shape = img.grid.shape();
    let mut m: Vec<u8> = img.as_slice().iter().map(|&v| u8::from(v > p.threshold)).collect();
    if !m.contains(&1) {
        let (min, max) = img.finite_range().unwrap_or((f32::NAN, f32::NAN));
        return Err(PrepError::EmptyMask { threshold: p.threshold, min, max });
    }
    keep_largest_component(&mut m, shape);
    if p.fill_holes {
        fill_holes_in_slices(&mut m, shape, axial_axis);
    }
    let data = ndarray::Array3::from_shape_vec(shape, m.into_iter().map(u16::from).collect()).expect("same shape");
    Ok(Volume { grid: img.grid.clone(), data })
}

/// Keeps only the largest 6-connected component of the non-zero voxels of `m` (standard order,
/// shape `shape`); returns its size in voxels.
pub fn keep_largest_component(m: &mut [u8], shape: [usize; 3]) -> usize {
    let [nx, ny, nz] = shape;
    assert_eq!(m.len(), nx * ny * nz, "mask length");
    // comp[v] = 0 unvisited, else component number (1-based).
    let mut comp = vec![0u32; m.len()];
    let mut stack: Vec<usize> = Vec::new();
    let (mut best, mut best_size, mut next) = (0u32, 0usize, 0u32);
    let (sx, sy) = (ny * nz, nz);
    for start in 0..m.len() {
        if m[start] == 0 || comp[start] != 0 {
            continue;
        }
        next += 1;
        comp[start] = next;
        stack.push(start);
        let mut size = 0usize;
        while let Some(v) = stack.pop() {
            size += 1;
            let (i, j, k) = (v / sx, v / sy % ny, v % nz);
            let mut visit = |w: usize| {
                if m[w] != 0 && comp[w] == 0 {
                    comp[w] = next;
                    stack.push(w);
                }
            };
            if i > 0 {
                visit(v - sx);
            }
            if i + 1 < nx {
                visit(v + sx);
            }
            if j > 0 {
                visit(v - sy);
            }
            if j + 1 < ny {
                visit(v + sy);
            }
            if k > 0 {
                visit(v - 1);
            }
            if k + 1 < nz {
                visit(v + 1);
            }
        }
        if size > best_size {
            best = next;
            best_size = size;
        }
    }
    for (x, &c) in m.iter_mut().zip(&comp) {
        *x = u8::from(c != 0 && c == best);
    }
    best_size
}

/// Fills holes in every 2-D slice across `axis`: background pixels not 4-connected to the
/// slice border become 1 (`scipy.ndimage.binary_fill_holes` on each slice does the same).
pub fn fill_holes_in_slices(m: &mut [u8], shape: [usize; 3], axis: usize) {
    assert!(axis < 3, "axis");
    let strides = [shape[1] * shape[2], shape[2], 1];
    let (a, b) = match axis {
        0 => (1, 2),
        1 => (0, 2),
        _ => (0, 1),
    };
    let (na, nb) = (shape[a], shape[b]);
    let mut outside = vec![false; na * nb];
    let mut stack: Vec<(usize, usize)> = Vec::new();
    for s in 0..shape[axis] {
        let base = s * strides[axis];
        let at = |u: usize, v: usize| base + u * strides[a] + v * strides[b];
        outside.iter_mut().for_each(|o| *o = false);
        for u in 0..na {
            for v in 0..nb {
                if (u == 0 || v == 0 || u + 1 == na || v + 1 == nb) && m[at(u, v)] == 0 && !outside[u * nb + v] {
                    outside[u * nb + v] = true;
                    stack.push((u, v));
                }
            }
        }
        while let Some((u, v)) = stack.pop() {
            let mut visit = |u2: usize, v2: usize| {
                if m[at(u2, v2)] == 0 && !outside[u2 * nb + v2] {
                    outside[u2 * nb + v2] = true;
                    stack.push((u2, v2));
                }
            };
            if u > 0 {
                visit(u - 1, v);
            }
            if u + 1 < na {
                visit(u + 1, v);
            }
            if v > 0 {
                visit(u, v - 1);
            }
            if v + 1 < nb {
                visit(u, v + 1);
            }
        }
        for u in 0..na {
            for v in 0..nb {
                if !outside[u * nb + v] {
                    m[at(u, v)] = 1;
                }
            }
        }
    }
}

/// Lowest and highest voxel index along each axis of the non-zero voxels, or `None` when
/// the mask is empty.
pub fn bounding_box(mask: &LabelMap) -> Option<([usize; 3], [usize; 3])> {
    let mut lo = [usize::MAX; 3];
    let mut hi = [0; 3];
    for ((i, j, k), &v) in mask.data.indexed_iter() {
        if v != 0 {
            for (d, x) in [i, j, k].into_iter().enumerate() {
                lo[d] = lo[d].min(x);
                hi[d] = hi[d].max(x);
            }
        }
    }
    (lo[0] != usize::MAX).then_some((lo, hi))
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    #[test]
    fn largest_component_and_holes() {
        // Two blobs: a 3x3x3 hollow cube (26 voxels) and a separate 2-voxel bar; diagonal
        // contact does not connect under 6-connectivity.
        let shape = [7, 7, 7];
        let g = Grid::axis_aligned(shape, [1.0; 3], [0.0; 3]);
        let mut img = Image::filled(g, -1000.0);
        for i in 1..4 {
            for j in 1..4 {
                for k in 1..4 {
                    if (i, j, k) != (2, 2, 2) {
                        img.data[[i, j, k]] = 40.0;
                    }
                }
            }
        }
        img.data[[4, 4, 4]] = 40.0; // touches (3,3,3) only at a corner
        img.data[[6, 6, 6]] = 40.0;
        img.data[[6, 6, 5]] = 40.0;
        let open = body_mask(&img, &BodyParams { threshold: -500.0, fill_holes: false }, 2).unwrap();
        assert_eq!(open.as_slice().iter().filter(|&&v| v == 1).count(), 26);
        assert_eq!(open.data[[2, 2, 2]], 0);
        assert_eq!(open.data[[4, 4, 4]], 0);
        let filled = body_mask(&img, &BodyParams::default(), 2).unwrap();
        assert_eq!(filled.data[[2, 2, 2]], 1, "the hole is closed in its axial slice");
        assert_eq!(bounding_box(&filled), Some(([1, 1, 1], [3, 3, 3])));
        let none = body_mask(&img, &BodyParams { threshold: 100.0, fill_holes: false }, 2);
        assert!(matches!(none, Err(PrepError::EmptyMask { .. })));
    }
}
