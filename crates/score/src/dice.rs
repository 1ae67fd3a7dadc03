//! Dice overlap per label.
//!
//! `Dice(l) = 2·|A_l ∩ B_l| / (|A_l| + |B_l|)`, with `A_l`, `B_l` the voxel sets of label `l`
//! in the fixed and the warped label map ("Measures of the amount of ecologic association
//! between species", Ecology 26(3), 1945). It is undefined when the label is absent from both
//! maps; sinew reports `None` then, rather than NaN or an arbitrary 0 or 1.

use sinew_grid::LabelMap;

use crate::ScoreError;

/// Dice of each label in `labels`, in the given order, between `fixed` and `warped` (which
/// must be on the same grid: same shape, affines within 1e-3 mm). `None` for a label that
/// neither map contains; `Some(0.0)` when only one contains it.
pub fn dice_per_label(
    fixed: &LabelMap,
    warped: &LabelMap,
    labels: &[u16],
) -> Result<Vec<(u16, Option<f64>)>, ScoreError> {
    fixed.grid.ensure_same(&warped.grid)?;
    // counts[l] = (|A_l|, |B_l|, |A_l ∩ B_l|) for every label value; integer sums are exact.
    let mut counts = vec![[0usize; 3]; 1 << 16];
    for (&a, &b) in fixed.as_slice().iter().zip(warped.as_slice()) {
        counts[a as usize][0] += 1;
        counts[b as usize][1] += 1;
        if a == b {
            counts[a as usize][2] += 1;
        }
    }
    Ok(labels
        .iter()
        .map(|&l| {
            let [na, nb, both] = counts[l as usize];
            let dice = (na + nb > 0).then(|| 2.0 * both as f64 / (na + nb) as f64);
            (l, dice)
        })
        .collect())
}

/// Mean of the defined Dice values (labels with `None` are skipped); `None` when no value is
/// defined.
pub fn mean_dice(per_label: &[(u16, Option<f64>)]) -> Option<f64> {
    let values: Vec<f64> = per_label.iter().filter_map(|&(_, d)| d).collect();
    (!values.is_empty()).then(|| values.iter().sum::<f64>() / values.len() as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::Grid;

    /// A label map with the box `[lo, hi)` (voxel indices) set to `label`.
    fn boxed(lo: [usize; 3], hi: [usize; 3], label: u16, into: &mut LabelMap) {
        for i in lo[0]..hi[0] {
            for j in lo[1]..hi[1] {
                for k in lo[2]..hi[2] {
                    into.data[[i, j, k]] = label;
                }
            }
        }
    }

    #[test]
    fn two_boxes_match_the_closed_form() {
        // Closed form: boxes of 4×5×6 = 120 voxels, shifted by (1, 2, 0), overlap 3·3·6 = 54,
        // so Dice = 2·54 / (120 + 120) = 0.45.
        let g = Grid::axis_aligned([10, 10, 10], [1.0, 2.0, 3.0], [0.0; 3]);
        let mut a = LabelMap::filled(g.clone(), 0);
        let mut b = LabelMap::filled(g.clone(), 0);
        boxed([1, 1, 2], [5, 6, 8], 3, &mut a);
        boxed([2, 3, 2], [6, 8, 8], 3, &mut b);
        // label 7: 2×2×2 = 8 voxels in A, 1×2×2 = 4 in B inside it: Dice = 2·4/12 = 2/3
        boxed([7, 7, 7], [9, 9, 9], 7, &mut a);
        boxed([7, 7, 7], [8, 9, 9], 7, &mut b);
        // label 9 only in B: Dice 0; label 11 in neither: undefined
        boxed([0, 0, 0], [1, 1, 1], 9, &mut b);
        let d = dice_per_label(&a, &b, &[3, 7, 9, 11]).unwrap();
        approx::assert_abs_diff_eq!(d[0].1.unwrap(), 0.45, epsilon = 1e-15);
        approx::assert_abs_diff_eq!(d[1].1.unwrap(), 2.0 / 3.0, epsilon = 1e-15);
        assert_eq!(d[2], (9, Some(0.0)));
        assert_eq!(d[3], (11, None));
        let m = mean_dice(&d).unwrap();
        approx::assert_abs_diff_eq!(m, (0.45 + 2.0 / 3.0) / 3.0, epsilon = 1e-15);
        assert_eq!(mean_dice(&[(1, None)]), None);
        // identical maps: Dice 1 (exact fact)
        assert_eq!(dice_per_label(&a, &a, &[3]).unwrap(), vec![(3, Some(1.0))]);
    }

    #[test]
    fn different_grids_are_an_error() {
        let a = LabelMap::filled(Grid::axis_aligned([3, 3, 3], [1.0; 3], [0.0; 3]), 0);
        let b = LabelMap::filled(Grid::axis_aligned([3, 3, 3], [1.0; 3], [5.0, 0.0, 0.0]), 0);
        assert!(matches!(dice_per_label(&a, &b, &[1]), Err(ScoreError::GridMismatch(_))));
    }
}

/// Dice per label before (moving labels resampled onto the fixed grid, identity map) and
/// after registration; the labels scored are those of the fixed map.
#[derive(serde::Serialize, Clone, Debug)]
pub struct DiceReport {
    /// Labels scored: those present in the fixed label map.
    pub labels: Vec<u16>,
    /// Dice before registration, by label.
    pub before: std::collections::BTreeMap<u16, Option<f64>>,
    /// Dice after registration, by label.
    pub after: std::collections::BTreeMap<u16, Option<f64>>,
    /// Mean over labels before (NaN when no label is defined).
    pub mean_before: f64,
    /// Mean over labels after (NaN when no label is defined).
    pub mean_after: f64,
}

/// Dice of the moving labels before (resampled onto the fixed grid, nearest label) and
/// after warping (`warped` on the fixed grid), for the labels of `fixed`.
pub fn dice_report(fixed: &LabelMap, moving: &LabelMap, warped: &LabelMap) -> Result<DiceReport, ScoreError> {
    let labels = fixed.labels();
    let before_map = sinew_grid::resample::resample_labels(moving, &fixed.grid);
    let before = dice_per_label(fixed, &before_map, &labels)?;
    let after = dice_per_label(fixed, warped, &labels)?;
    Ok(DiceReport {
        mean_before: mean_dice(&before).unwrap_or(f64::NAN),
        mean_after: mean_dice(&after).unwrap_or(f64::NAN),
        before: before.into_iter().collect(),
        after: after.into_iter().collect(),
        labels,
    })
}
