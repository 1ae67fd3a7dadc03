//! Surface distances per label: HD95, Hausdorff distance (HD) and average symmetric surface
//! distance (ASSD), in mm.
//!
//! # Definitions
//! - **Surface** of label `l` in a map: the voxels of `l` with at least one of their six face
//!   neighbours not in `l`; a neighbour outside the volume counts as not in `l`. (This equals
//!   `mask & ~scipy.ndimage.binary_erosion(mask, structure=<6-connectivity>, border_value=0)`.)
//! - **Directed surface distances** `d(S_A → S_B)`: for each surface voxel of `A`, the Euclidean
//!   distance in mm between its centre and the nearest surface-voxel centre of `B`, computed
//!   with the exact distance transform of [`squared_distance_transform`](crate::squared_distance_transform)
//!   on the grid's spacing.
//! - **Symmetric surface distances**: the multiset union `d(S_A → S_B) ∪ d(S_B → S_A)` (one
//!   value per surface voxel of either map; a voxel on both surfaces contributes 0 twice).
//! - **HD95** = the 95th percentile of the symmetric surface distances with linear
//!   interpolation between order statistics ([`percentile_linear`](crate::percentile_linear),
//!   numpy's default `np.percentile(d, 95)`); **HD** = their maximum; **ASSD** = their mean.
//!
//! Some tools instead report `max(P95(d(S_A → S_B)), P95(d(S_B → S_A)))`; sinew pools both
//! directions as above. A label whose surface is empty in either map has no surface distance
//! (`None`): the distance to an empty set is undefined.

use ndarray::Array3;
use serde::{Deserialize, Serialize};
use sinew_grid::LabelMap;

use crate::{percentile_linear, squared_distance_transform, ScoreError};

/// Surface distances of one label between two maps (mm).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SurfaceDistances {
    /// 95th percentile (linear interpolation) of the symmetric surface distances, mm.
    pub hd95_mm: f64,
    /// Largest symmetric surface distance (Hausdorff distance), mm.
    pub hd_mm: f64,
    /// Mean of the symmetric surface distances (ASSD), mm.
    pub assd_mm: f64,
    /// Surface voxels in the first (fixed) and second (warped) map.
    pub surface_voxels: [usize; 2],
}

/// Surface distances of each label in `labels` between `fixed` and `warped` (same grid:
/// same shape, affines within 1e-3 mm), in the given order; `None` for a label whose surface
/// is empty in either map. See the module documentation for the definitions.
///
/// Work per label is restricted to the bounding box of the label in both maps (exact: every
/// surface voxel lies in it, and a neighbour outside it is not in the label).
pub fn surface_distances(
    fixed: &LabelMap,
    warped: &LabelMap,
    labels: &[u16],
) -> Result<Vec<(u16, Option<SurfaceDistances>)>, ScoreError> {
    fixed.grid.ensure_same(&warped.grid)?;
    let spacing = fixed.grid.spacing();
    let boxes = bounding_boxes(fixed, warped);
    Ok(labels
        .iter()
        .map(|&l| {
            let Some((lo, hi)) = boxes[l as usize] else { return (l, None) };
            let sa = surface_in_box(fixed, l, lo, hi);
            let sb = surface_in_box(warped, l, lo, hi);
            (l, symmetric(&sa, &sb, spacing))
        })
        .collect())
}

/// Per label value, the inclusive bounding box `(lo, hi)` of its voxels in either map.
fn bounding_boxes(a: &LabelMap, b: &LabelMap) -> Vec<Option<([usize; 3], [usize; 3])>> {
    let mut boxes: Vec<Option<([usize; 3], [usize; 3])>> = vec![None; 1 << 16];
    let [_, ny, nz] = a.grid.shape();
    for map in [a, b] {
        for (n, &l) in map.as_slice().iter().enumerate() {
            let p = [n / (ny * nz), (n / nz) % ny, n % nz];
            let e = boxes[l as usize].get_or_insert((p, p));
            for (d, &x) in p.iter().enumerate() {
                e.0[d] = e.0[d].min(x);
                e.1[d] = e.1[d].max(x);
            }
        }
    }
    boxes
}

/// The surface of label `l` of `map` inside the inclusive box `lo..=hi` (which must contain
/// every voxel of `l`), as a boolean array of the box's shape.
fn surface_in_box(map: &LabelMap, l: u16, lo: [usize; 3], hi: [usize; 3]) -> Array3<bool> {
    let shape = [hi[0] - lo[0] + 1, hi[1] - lo[1] + 1, hi[2] - lo[2] + 1];
    let full = map.grid.shape();
    let data = &map.data;
    let inside = |p: [isize; 3]| {
        (0..3).all(|d| p[d] >= 0 && (p[d] as usize) < full[d])
            && data[[p[0] as usize, p[1] as usize, p[2] as usize]] == l
    };
    Array3::from_shape_fn((shape[0], shape[1], shape[2]), |(i, j, k)| {
        let p = [(lo[0] + i) as isize, (lo[1] + j) as isize, (lo[2] + k) as isize];
        if !inside(p) {
            return false;
        }
        (0..3).any(|d| {
            let (mut m, mut q) = (p, p);
            m[d] -= 1;
            q[d] += 1;
            !inside(m) || !inside(q)
        })
    })
}

/// Pooled surface distances of two surfaces on the same box, or `None` if either is empty.
fn symmetric(sa: &Array3<bool>, sb: &Array3<bool>, spacing: [f64; 3]) -> Option<SurfaceDistances> {
    let na = sa.iter().filter(|&&s| s).count();
    let nb = sb.iter().filter(|&&s| s).count();
    if na == 0 || nb == 0 {
        return None;
    }
    let to_b = squared_distance_transform(sb.view(), spacing);
    let to_a = squared_distance_transform(sa.view(), spacing);
    let mut d: Vec<f64> = Vec::with_capacity(na + nb);
    d.extend(sa.iter().zip(to_b.iter()).filter(|(&s, _)| s).map(|(_, &d2)| d2.sqrt()));
    d.extend(sb.iter().zip(to_a.iter()).filter(|(&s, _)| s).map(|(_, &d2)| d2.sqrt()));
    // Sum in index order before sorting: deterministic, and the mean does not need the sort.
    let assd = d.iter().sum::<f64>() / d.len() as f64;
    d.sort_by(f64::total_cmp);
    Some(SurfaceDistances {
        hd95_mm: percentile_linear(&d, 95.0),
        hd_mm: *d.last().expect("non-empty"),
        assd_mm: assd,
        surface_voxels: [na, nb],
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    /// A ball of `radius` mm around the grid centre, label `l`, on `map`.
    fn ball(map: &mut LabelMap, radius: f64, l: u16) {
        let s = map.grid.spacing();
        let c = map.grid.shape().map(|n| (n as f64 - 1.0) / 2.0);
        for ((i, j, k), v) in map.data.indexed_iter_mut() {
            let r2 = [i, j, k].iter().enumerate().map(|(d, &x)| ((x as f64 - c[d]) * s[d]).powi(2)).sum::<f64>();
            if r2 <= radius * radius {
                *v = l;
            }
        }
    }

    #[test]
    fn concentric_balls_are_r2_minus_r1_apart() {
        // Exact geometry: every point of a sphere of radius r1 is r2 − r1 from the concentric
        // sphere of radius r2 and vice versa, so all surface distances, hence HD95, are r2 − r1
        // up to the voxelisation of the two spheres (within one voxel, as the check allows).
        for (shape, spacing, r1, r2) in
            [([41, 41, 41], [1.0, 1.0, 1.0], 8.0, 15.0), ([50, 36, 24], [0.8, 1.1, 1.7], 6.0, 13.5)]
        {
            let g = Grid::axis_aligned(shape, spacing, [0.0; 3]);
            let mut a = LabelMap::filled(g.clone(), 0);
            let mut b = LabelMap::filled(g, 0);
            ball(&mut a, r1, 2);
            ball(&mut b, r2, 2);
            let s = surface_distances(&a, &b, &[2]).unwrap()[0].1.clone().unwrap();
            let voxel = spacing.iter().copied().fold(0.0, f64::max);
            assert!(approx::abs_diff_eq!(s.hd95_mm, (r2 - r1), epsilon = voxel), "hd95 {} vs {}", s.hd95_mm, r2 - r1);
            assert!(approx::abs_diff_eq!(s.assd_mm, (r2 - r1), epsilon = voxel), "assd {}", s.assd_mm);
            assert!(s.hd_mm >= s.hd95_mm && s.hd95_mm >= 0.0);
        }
    }

    #[test]
    fn identical_maps_have_zero_distance_and_missing_labels_none() {
        // Exact fact: a surface is at distance 0 from itself.
        let g = Grid::axis_aligned([6, 7, 8], [1.0, 2.0, 0.5], [0.0; 3]);
        let mut a = LabelMap::filled(g.clone(), 0);
        a.data[[2, 3, 4]] = 1;
        a.data[[2, 3, 5]] = 1;
        let b = LabelMap::filled(g, 0);
        let r = surface_distances(&a, &a, &[1, 5]).unwrap();
        assert_eq!(r[0].1.as_ref().unwrap().hd_mm, 0.0);
        assert_eq!(r[0].1.as_ref().unwrap().surface_voxels, [2, 2]);
        assert_eq!(r[1].1, None);
        assert_eq!(surface_distances(&a, &b, &[1]).unwrap()[0].1, None);
    }

    #[test]
    fn single_voxels_are_their_centre_distance_apart() {
        // Exact: two one-voxel labels 3 voxels apart along j with 2 mm spacing are 6 mm apart
        // in both directions.
        let g = Grid::axis_aligned([3, 8, 3], [1.0, 2.0, 1.0], [0.0; 3]);
        let mut a = LabelMap::filled(g.clone(), 0);
        let mut b = LabelMap::filled(g, 0);
        a.data[[1, 1, 1]] = 4;
        b.data[[1, 4, 1]] = 4;
        let s = surface_distances(&a, &b, &[4]).unwrap()[0].1.clone().unwrap();
        assert_eq!((s.hd95_mm, s.hd_mm, s.assd_mm), (6.0, 6.0, 6.0));
    }
}
