//! Scoring one registered pair: every figure of a cohort table for one (fixed, moving) pair.

use serde::{Deserialize, Serialize};
use sinew_grid::{resample, Field, LabelMap};

use crate::{dice_per_label, mean, surface_distances, ScoreError, SurfaceDistances};

/// How the moving labels reach the fixed grid.
#[derive(Clone, Copy, Debug)]
pub enum Warp<'a> {
    /// A pull displacement field on the fixed grid; the moving labels are warped through it
    /// by nearest neighbour ([`sinew_transform::warp_labels_from`]), and its Jacobian is scored.
    Field(&'a Field),
    /// Moving labels already warped onto the fixed grid (no Jacobian then).
    Warped(&'a LabelMap),
}

/// The scores of one label.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LabelScore {
    /// Label value.
    pub label: u16,
    /// Dice before registration: moving labels resampled onto the fixed grid through world
    /// coordinates (identity map), nearest neighbour.
    pub dice_before: Option<f64>,
    /// Dice after registration.
    pub dice: Option<f64>,
    /// Surface distances after registration (HD95, HD, ASSD in mm).
    pub surface: Option<SurfaceDistances>,
}

/// Every score of one pair.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PairScore {
    /// Per label, ascending: the non-zero labels of the fixed map.
    pub labels: Vec<LabelScore>,
    /// Mean of the defined Dice values before registration.
    pub mean_dice_before: Option<f64>,
    /// Mean of the defined Dice values after.
    pub mean_dice: Option<f64>,
    /// Mean of the defined HD95 values after, mm.
    pub mean_hd95_mm: Option<f64>,
    /// Jacobian statistics of the field over the whole fixed grid (with a field only).
    pub jacobian: Option<JacobianScore>,
}

/// Jacobian determinant statistics of a field (from [`sinew_transform::JacobianStats`]), with
/// undefined values as `None` so that they round-trip through JSON.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct JacobianScore {
    /// Voxels with a finite determinant.
    pub voxels: usize,
    /// Share of those voxels with `det ≤ 0`.
    pub folding_fraction: f64,
    /// Number of voxels with `det ≤ 0`.
    pub folded_voxels: usize,
    /// Population standard deviation of `ln det` over voxels with `det > 0`.
    pub sd_log_j: Option<f64>,
    /// Voxels left out of SDlogJ because `det ≤ 0`.
    pub excluded_from_sdlogj: usize,
    /// Voxels whose determinant is NaN or infinite (left out of everything else).
    pub non_finite: usize,
    /// Smallest determinant.
    pub min: Option<f64>,
    /// Largest determinant.
    pub max: Option<f64>,
}

impl From<&sinew_transform::JacobianStats> for JacobianScore {
    fn from(j: &sinew_transform::JacobianStats) -> JacobianScore {
        let finite = |v: f64| v.is_finite().then_some(v);
        JacobianScore {
            voxels: j.voxels,
            folding_fraction: j.folding_fraction,
            folded_voxels: j.folded_voxels,
            sd_log_j: finite(j.sd_log_j),
            excluded_from_sdlogj: j.excluded_from_sdlogj,
            non_finite: j.non_finite,
            min: finite(j.min),
            max: finite(j.max),
        }
    }
}

/// Scores the pair: Dice before and after, surface distances after, and the field's Jacobian
/// statistics ([`sinew_transform::jacobian_stats`] of
/// [`sinew_transform::jacobian_determinant`]: folding = share of voxels with det ≤ 0; SDlogJ =
/// population standard deviation of ln det over voxels with det > 0, the others excluded
/// and counted). The scored labels are the non-zero labels of `fixed`.
///
/// `fixed` and the field (or warped labels) must share a grid; `moving` may be on any grid.
pub fn score_pair(fixed: &LabelMap, moving: &LabelMap, warp: Warp<'_>) -> Result<PairScore, ScoreError> {
    let labels = fixed.labels();
    let (warped, jacobian) = match warp {
        Warp::Field(f) => {
            fixed.grid.ensure_same(&f.grid)?;
            let det = sinew_transform::jacobian_determinant(f);
            (
                sinew_transform::warp_labels_from(moving, f),
                Some(JacobianScore::from(&sinew_transform::jacobian_stats(&det, None))),
            )
        }
        Warp::Warped(w) => (w.clone(), None),
    };
    let before_map = resample::resample_labels(moving, &fixed.grid);
    let before = dice_per_label(fixed, &before_map, &labels)?;
    let after = dice_per_label(fixed, &warped, &labels)?;
    let surf = surface_distances(fixed, &warped, &labels)?;
    let rows: Vec<LabelScore> = labels
        .iter()
        .enumerate()
        .map(|(n, &label)| LabelScore { label, dice_before: before[n].1, dice: after[n].1, surface: surf[n].1.clone() })
        .collect();
    let defined = |f: &dyn Fn(&LabelScore) -> Option<f64>| mean(&rows.iter().filter_map(f).collect::<Vec<_>>());
    Ok(PairScore {
        mean_dice_before: defined(&|r| r.dice_before),
        mean_dice: defined(&|r| r.dice),
        mean_hd95_mm: defined(&|r| r.surface.as_ref().map(|s| s.hd95_mm)),
        labels: rows,
        jacobian,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    #[test]
    fn identity_field_scores_like_the_unwarped_labels() {
        // Exact: the zero field leaves the labels as they are, so Dice after = Dice before,
        // and its Jacobian is 1 everywhere (no folding, SDlogJ 0).
        let g = Grid::axis_aligned([8, 9, 10], [1.0, 1.5, 2.0], [0.0; 3]);
        let mut a = LabelMap::filled(g.clone(), 0);
        let mut b = LabelMap::filled(g.clone(), 0);
        for i in 2..6 {
            for j in 2..7 {
                a.data[[i, j, 3]] = 1;
                b.data[[i + 1, j, 3]] = 1;
            }
        }
        let f = Field::zeros(g);
        let s = score_pair(&a, &b, Warp::Field(&f)).unwrap();
        assert_eq!(s.labels.len(), 1);
        assert_eq!(s.labels[0].dice, s.labels[0].dice_before);
        // 20 voxels each, overlap 3·5 = 15 → Dice 0.75 (closed form)
        assert_eq!(s.labels[0].dice, Some(0.75));
        let j = s.jacobian.unwrap();
        assert_eq!((j.folded_voxels, j.sd_log_j, j.min, j.max), (0, Some(0.0), Some(1.0), Some(1.0)));
        let w = score_pair(&a, &b, Warp::Warped(&b)).unwrap();
        assert_eq!(w.labels, s.labels);
        assert_eq!(w.jacobian, None);
    }
}
