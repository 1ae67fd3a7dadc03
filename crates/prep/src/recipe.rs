//! Recipe files: a preprocessing pipeline as TOML, so that a study's preprocessing is one
//! reproducible file. Every section and key is optional; unknown keys are errors.
//!
//! ```toml
//! [orient]
//! axes = "RAS"                 # any three-letter code: one of R/L, A/P, S/I each
//!
//! [resample]                   # one of the two:
//! spacing = [2.0, 2.0, 2.0]    # mm along i, j, k (after orientation)
//! # shape = [144, 112, 192]    # voxels over the same field of view
//!
//! [crop_pad]
//! shape = [144, 112, 192]      # voxels
//! centre = "body"              # "body" (bounding box of the body mask) or "image"
//! # pad = -1000.0              # image value outside the input (default: image minimum)
//!
//! [body]
//! threshold = -500.0           # HU; voxels above it, largest 6-connected component
//! fill_holes = true            # per axial slice
//!
//! [intensity]
//! window = [-1000.0, 1500.0]   # HU, clip
//! scale = "unit"               # "none", "unit" ([lo, hi] → [0, 1]) or "zscore" (inside the body)
//!
//! [output]
//! mask = true                  # also write the body mask
//! ```

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::intensity::{Scale, Window};
use crate::mask::BodyParams;
use crate::orient::AxisCodes;
use crate::pipeline::{Centre, CropPadStep, Resample, Steps};
use crate::PrepError;

/// A recipe file (see the module doc for the format).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Recipe {
    /// Reorientation.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub orient: Option<OrientSection>,
    /// Resampling.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub resample: Option<ResampleSection>,
    /// Crop/pad.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub crop_pad: Option<CropPadSection>,
    /// Body mask.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub body: Option<BodySection>,
    /// Window and scaling.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub intensity: Option<IntensitySection>,
    /// Extra outputs.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub output: Option<OutputSection>,
}

/// `[orient]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OrientSection {
    /// Target orientation code, e.g. `"RAS"`.
    pub axes: String,
}

/// `[resample]`: exactly one of `spacing` (mm) and `shape` (voxels).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ResampleSection {
    /// Target spacing in mm along i, j, k.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spacing: Option<[f64; 3]>,
    /// Target shape in voxels.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shape: Option<[usize; 3]>,
}

/// `[crop_pad]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CropPadSection {
    /// Output shape in voxels.
    pub shape: [usize; 3],
    /// `"body"` or `"image"` (default `"image"`).
    #[serde(default)]
    pub centre: Centre,
    /// Image value outside the input (default: the image minimum).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pad: Option<f32>,
}

/// `[body]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BodySection {
    /// Threshold in HU (default −500).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub threshold: Option<f32>,
    /// Fill holes per axial slice (default true).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fill_holes: Option<bool>,
}

/// `[intensity]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct IntensitySection {
    /// `[lo, hi]` in HU.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub window: Option<[f32; 2]>,
    /// `"none"`, `"unit"` or `"zscore"` (default `"none"`).
    #[serde(default)]
    pub scale: Scale,
}

/// `[output]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutputSection {
    /// Write the body mask.
    #[serde(default)]
    pub mask: bool,
}

impl Recipe {
    /// Parses recipe text; `path` names the file in errors.
    pub fn parse(text: &str, path: &Path) -> Result<Recipe, PrepError> {
        let r: Recipe = toml::from_str(text).map_err(|e| PrepError::Recipe {
            path: path.to_path_buf(),
            reason: e.message().to_string() + &e.span().map(|s| format!(" (at byte {})", s.start)).unwrap_or_default(),
        })?;
        r.steps().map_err(|e| PrepError::Recipe { path: path.to_path_buf(), reason: e.to_string() })?;
        Ok(r)
    }

    /// Reads and parses a recipe file.
    pub fn load(path: &Path) -> Result<Recipe, PrepError> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| PrepError::Recipe { path: path.to_path_buf(), reason: format!("cannot read: {e}") })?;
        Recipe::parse(&text, path)
    }

    /// The steps this recipe describes (checked: codes, spacing, shapes, window).
    pub fn steps(&self) -> Result<Steps, PrepError> {
        let mut s = Steps::default();
        if let Some(o) = &self.orient {
            s.orient = Some(o.axes.parse::<AxisCodes>()?);
        }
        if let Some(r) = &self.resample {
            s.resample = match (r.spacing, r.shape) {
                (Some(sp), None) => Some(Resample::Spacing(sp)),
                (None, Some(sh)) => Some(Resample::Shape(sh)),
                _ => {
                    return Err(PrepError::Recipe {
                        path: Default::default(),
                        reason: "[resample] needs exactly one of spacing and shape".into(),
                    })
                }
            };
            if let Some(Resample::Spacing(sp)) = s.resample {
                if sp.iter().any(|&v| !(v.is_finite() && v > 0.0)) {
                    return Err(PrepError::BadSpacing { spacing: sp });
                }
            }
        }
        if let Some(c) = &self.crop_pad {
            s.crop_pad = Some(CropPadStep { shape: c.shape, centre: c.centre, pad: c.pad });
        }
        let mut body = BodyParams::default();
        if let Some(b) = &self.body {
            body.threshold = b.threshold.unwrap_or(body.threshold);
            body.fill_holes = b.fill_holes.unwrap_or(body.fill_holes);
        }
        s.body = body;
        if let Some(i) = &self.intensity {
            s.window = i.window.map(|[lo, hi]| Window::new(lo, hi)).transpose()?;
            s.scale = i.scale;
        }
        s.mask = self.output.as_ref().is_some_and(|o| o.mask);
        Ok(s)
    }

    /// The recipe describing `steps` exactly (for logs: the effective pipeline).
    pub fn from_steps(steps: &Steps) -> Recipe {
        Recipe {
            orient: steps.orient.map(|a| OrientSection { axes: a.to_string() }),
            resample: steps.resample.map(|r| match r {
                Resample::Spacing(s) => ResampleSection { spacing: Some(s), shape: None },
                Resample::Shape(n) => ResampleSection { spacing: None, shape: Some(n) },
            }),
            crop_pad: steps.crop_pad.map(|c| CropPadSection { shape: c.shape, centre: c.centre, pad: c.pad }),
            body: Some(BodySection { threshold: Some(steps.body.threshold), fill_holes: Some(steps.body.fill_holes) }),
            intensity: Some(IntensitySection { window: steps.window.map(|w| [w.lo, w.hi]), scale: steps.scale }),
            output: Some(OutputSection { mask: steps.mask }),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_the_documented_format_and_round_trips() {
        let text = r#"
[orient]
axes = "LPS"
[resample]
spacing = [2.0, 2.0, 2.5]
[crop_pad]
shape = [144, 112, 192]
centre = "body"
[intensity]
window = [-1000.0, 1500.0]
scale = "zscore"
"#;
        let r = Recipe::parse(text, Path::new("r.toml")).unwrap();
        let s = r.steps().unwrap();
        assert_eq!(s.orient.unwrap().to_string(), "LPS");
        assert_eq!(s.resample, Some(Resample::Spacing([2.0, 2.0, 2.5])));
        assert_eq!(s.crop_pad.unwrap().centre, Centre::Body);
        assert_eq!(s.scale, Scale::Zscore);
        assert_eq!(s.body, BodyParams::default());
        assert!(s.needs_mask() && !s.mask);
        let again = Recipe::parse(&toml::to_string(&Recipe::from_steps(&s)).unwrap(), Path::new("x")).unwrap();
        assert_eq!(again.steps().unwrap(), s);
    }

    #[test]
    fn rejects_typos_and_bad_values_naming_the_file() {
        for bad in [
            "[orient]\naxes = \"RAX\"",
            "[resample]\nspacing = [1.0, 1.0, 1.0]\nshape = [2, 2, 2]",
            "[resample]\nspacing = [1.0, 0.0, 1.0]",
            "[intensity]\nwindow = [5.0, 1.0]",
            "[intensity]\nscale = \"minmax\"",
            "[crop_pad]\nshape = [2, 2]",
            "[orient]\naxis = \"RAS\"",
        ] {
            let e = Recipe::parse(bad, Path::new("study.toml")).unwrap_err();
            assert!(e.to_string().starts_with("study.toml: "), "{bad}: {e}");
        }
    }
}
