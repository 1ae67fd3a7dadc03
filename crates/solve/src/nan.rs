//! Voxels outside the scanned volume: what to do with NaN or infinite values.
//!
//! Some pipelines export the voxels a scanner did not cover as NaN (or ±∞). The registration
//! needs finite values everywhere, so a scan holding such voxels is refused by default
//! ([`NanPolicy::Refuse`]); the caller may instead treat them as padding ([`NanPolicy::Pad`]:
//! replaced by the scan's finite minimum and, in the fixed scan, left out of the data term
//! through the mask) or replace them by a value ([`NanPolicy::Value`]). The command line
//! (`--nan`) and the Python module (`nan=`) share this module, and both record the choice
//! and the counts ([`NanRecord`]) in their report.

use serde::Serialize;
use sinew_grid::{Image, LabelMap};

use crate::PairScans;

/// What to do with NaN or infinite voxels of a scan.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum NanPolicy {
    /// Refuse the scan (the default).
    Refuse,
    /// Padding: replaced by the scan's finite minimum; in the fixed scan also left out of the
    /// data term.
    Pad,
    /// Replaced by this value (in the scan's units).
    Value(f32),
}

impl Default for NanPolicy {
    /// [`NanPolicy::Refuse`].
    fn default() -> Self {
        NanPolicy::Refuse
    }
}

/// What went wrong with a scan's non-finite voxels (the caller names the scan or file).
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum NanError {
    /// The policy text is none of `refuse`, `pad` or a finite number.
    #[error("{0}: expected refuse, pad or a finite number")]
    Policy(String),
    /// Non-finite voxels under [`NanPolicy::Refuse`].
    #[error("{0} voxels are NaN or infinite; clean the scan first (e.g. replace them by the background value) or choose what to do with them (pad or a value)")]
    Refused(usize),
    /// Not a single finite voxel: there is no minimum to pad with and nothing to register.
    #[error("no voxel holds a finite value")]
    NoFinite,
    /// With [`NanPolicy::Pad`], every voxel the mask kept was non-finite.
    #[error("no finite voxel is left for the data term")]
    NothingLeft,
}

impl NanPolicy {
    /// Parses `refuse`, `pad` or a finite number (case and surrounding spaces ignored).
    pub fn parse(s: &str) -> Result<NanPolicy, NanError> {
        match s.trim().to_ascii_lowercase().as_str() {
            "refuse" => Ok(NanPolicy::Refuse),
            "pad" => Ok(NanPolicy::Pad),
            t => match t.parse::<f32>() {
                Ok(v) if v.is_finite() => Ok(NanPolicy::Value(v)),
                _ => Err(NanError::Policy(s.to_string())),
            },
        }
    }

    /// Applies the policy to one scan in place. Returns which voxels were replaced (one flag
    /// per voxel in the array's order), or `None` when none was. [`NanPolicy::Refuse`] leaves
    /// the scan untouched and fails on the first non-finite voxel count; the replacing
    /// policies fail only when no voxel is finite.
    pub fn apply(self, img: &mut Image) -> Result<Option<Vec<bool>>, NanError> {
        let bad = img.count_non_finite();
        if bad == 0 {
            return Ok(None);
        }
        if self == NanPolicy::Refuse {
            return Err(NanError::Refused(bad));
        }
        let Some((lo, _)) = img.finite_range() else { return Err(NanError::NoFinite) };
        let value = match self {
            NanPolicy::Value(v) => v,
            _ => lo,
        };
        let flags: Vec<bool> = img.as_slice().iter().map(|v| !v.is_finite()).collect();
        img.as_slice_mut().iter_mut().filter(|v| !v.is_finite()).for_each(|v| *v = value);
        Ok(Some(flags))
    }
}

/// The policy used and how many voxels it touched, for reports.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct NanRecord {
    /// The policy.
    pub policy: NanPolicy,
    /// Non-finite voxels replaced in the fixed scan.
    pub fixed_voxels: usize,
    /// Non-finite voxels replaced in the moving scan.
    pub moving_voxels: usize,
}

/// Which of a pair's two scans failed, with the reason.
#[derive(Debug, Clone, PartialEq)]
pub struct PairNanError {
    /// `"fixed"` or `"moving"`.
    pub which: &'static str,
    /// The reason.
    pub error: NanError,
}

/// With [`NanPolicy::Pad`], removes the fixed scan's replaced voxels (`fixed_bad`, as
/// [`NanPolicy::apply`] returned them) from the data term: the mask (all ones when there was
/// none) is set to 0 there. Fails when nothing is left inside it. Other policies leave the
/// mask as it is.
pub fn pad_fixed_mask(
    policy: NanPolicy,
    fixed_bad: Option<&[bool]>,
    mask: &mut Option<LabelMap>,
    fixed: &Image,
) -> Result<(), NanError> {
    let (NanPolicy::Pad, Some(bad)) = (policy, fixed_bad) else { return Ok(()) };
    let m = mask.get_or_insert_with(|| LabelMap::filled(fixed.grid.clone(), 1));
    m.as_slice_mut().iter_mut().zip(bad).filter(|(_, &b)| b).for_each(|(v, _)| *v = 0);
    if m.as_slice().iter().all(|&v| v == 0) {
        return Err(NanError::NothingLeft);
    }
    Ok(())
}

/// Applies `policy` to both scans of `scans` in place (fixed first), then
/// [`pad_fixed_mask`]; returns the record for the report.
pub fn apply_to_pair(policy: NanPolicy, scans: &mut PairScans) -> Result<NanRecord, PairNanError> {
    let fixed_bad = policy.apply(&mut scans.fixed).map_err(|error| PairNanError { which: "fixed", error })?;
    let moving_bad = policy.apply(&mut scans.moving).map_err(|error| PairNanError { which: "moving", error })?;
    pad_fixed_mask(policy, fixed_bad.as_deref(), &mut scans.mask, &scans.fixed)
        .map_err(|error| PairNanError { which: "fixed", error })?;
    Ok(NanRecord { policy, fixed_voxels: count(&fixed_bad), moving_voxels: count(&moving_bad) })
}

/// How many flags are set (0 for `None`).
pub fn count(flags: &Option<Vec<bool>>) -> usize {
    flags.as_ref().map_or(0, |b| b.iter().filter(|&&x| x).count())
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::{Grid, Volume};

    fn row<T: Copy>(values: &[T]) -> Volume<T> {
        let grid = Grid::axis_aligned([values.len(), 1, 1], [1.0; 3], [0.0; 3]);
        Volume::new(grid, ndarray::Array3::from_shape_vec((values.len(), 1, 1), values.to_vec()).unwrap()).unwrap()
    }

    fn scan(values: &[f32]) -> Image {
        row(values)
    }

    #[test]
    fn policies_parse_and_reject_other_words() {
        assert_eq!(NanPolicy::parse(" Pad "), Ok(NanPolicy::Pad));
        assert_eq!(NanPolicy::parse("refuse"), Ok(NanPolicy::Refuse));
        assert_eq!(NanPolicy::parse("-1024"), Ok(NanPolicy::Value(-1024.0)));
        assert_eq!(NanPolicy::parse("zero"), Err(NanError::Policy("zero".into())));
        assert_eq!(NanPolicy::parse("nan"), Err(NanError::Policy("nan".into())));
        assert_eq!(NanPolicy::parse("inf"), Err(NanError::Policy("inf".into())));
    }

    #[test]
    fn each_policy_does_what_it_says() {
        let values = [3.0, f32::NAN, -2.0, f32::INFINITY, 5.0];
        let mut img = scan(&values);
        assert_eq!(NanPolicy::Refuse.apply(&mut img), Err(NanError::Refused(2)));
        assert_eq!(img.count_non_finite(), 2, "refusing leaves the scan as it was");

        let flags = NanPolicy::Pad.apply(&mut img).unwrap().unwrap();
        assert_eq!(flags, [false, true, false, true, false]);
        // Padding takes the finite minimum, -2.
        assert_eq!(img.as_slice(), &[3.0, -2.0, -2.0, -2.0, 5.0]);

        let mut img = scan(&values);
        NanPolicy::Value(7.5).apply(&mut img).unwrap();
        assert_eq!(img.as_slice(), &[3.0, 7.5, -2.0, 7.5, 5.0]);

        let mut clean = scan(&[1.0, 2.0]);
        assert_eq!(NanPolicy::Refuse.apply(&mut clean), Ok(None));
        let mut none = scan(&[f32::NAN, f32::NEG_INFINITY]);
        assert_eq!(NanPolicy::Value(0.0).apply(&mut none), Err(NanError::NoFinite));
    }

    #[test]
    fn padding_leaves_the_fixed_voxels_out_of_the_mask() {
        let mut scans = PairScans {
            fixed: scan(&[1.0, f32::NAN, 3.0]),
            moving: scan(&[f32::NAN, 2.0, 3.0]),
            fixed_labels: None,
            moving_labels: None,
            mask: None,
        };
        let rec = apply_to_pair(NanPolicy::Pad, &mut scans).unwrap();
        assert_eq!((rec.fixed_voxels, rec.moving_voxels), (1, 1));
        assert_eq!(scans.mask.unwrap().as_slice(), &[1, 0, 1]);

        // The mask keeps only the second voxel, which is NaN in the fixed scan.
        let mut all_bad = PairScans {
            fixed: scan(&[1.0, f32::NAN]),
            moving: scan(&[1.0, 2.0]),
            fixed_labels: None,
            moving_labels: None,
            mask: Some(row(&[0u16, 1])),
        };
        let e = apply_to_pair(NanPolicy::Pad, &mut all_bad).unwrap_err();
        assert_eq!((e.which, e.error), ("fixed", NanError::NothingLeft));
    }
}
