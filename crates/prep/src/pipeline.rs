//! The whole preparation of one scan (and its label map), in the documented order:
//! orient → resample → body mask → crop/pad → window → scale.

use serde::{Deserialize, Serialize};
use sinew_grid::{resample, Border, Grid, Image, LabelMap};

use crate::geometry::{crop_pad, grid_with_shape, grid_with_spacing, plan_crop_pad};
use crate::intensity::{apply_window, scale_unit, zscore, Scale, Window};
use crate::mask::{body_mask, bounding_box, BodyParams};
use crate::orient::{plan, reorient, AxisCodes};
use crate::PrepError;

/// The resampling target.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Resample {
    /// Voxels of this spacing (mm along i, j, k), centred on the same field of view.
    Spacing([f64; 3]),
    /// This many voxels along i, j, k over the same field of view.
    Shape([usize; 3]),
}

/// Where a crop/pad is centred.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Centre {
    /// The centre of the body mask's bounding box.
    Body,
    /// The centre of the image.
    #[default]
    Image,
}

/// A crop/pad step.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CropPadStep {
    /// The output shape (voxels).
    pub shape: [usize; 3],
    /// What the output is centred on.
    pub centre: Centre,
    /// Image value outside the input (default: the image minimum); labels and mask get 0.
    pub pad: Option<f32>,
}

/// The steps to run; every one is optional. The body mask is computed when a step needs it
/// or `mask` is set.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Steps {
    /// Reorient to these codes.
    pub orient: Option<AxisCodes>,
    /// Resample to a spacing or a shape.
    pub resample: Option<Resample>,
    /// Anti-aliasing: smooth the image before resampling along axes that get coarser
    /// (`sinew_grid::resample::resample_image_antialiased`). Off in `Steps::default()` (plain
    /// trilinear, what `scipy.ndimage.map_coordinates(order=1)` gives); `sinew prep` turns it
    /// on unless `--no-antialias`.
    pub antialias: bool,
    /// Crop or pad to a shape.
    pub crop_pad: Option<CropPadStep>,
    /// Clip intensities to a window.
    pub window: Option<Window>,
    /// Scale intensities.
    pub scale: Scale,
    /// Body mask settings.
    pub body: BodyParams,
    /// Return the body mask even when no step needs it.
    pub mask: bool,
}

impl Steps {
    /// True when the body mask will be computed.
    pub fn needs_mask(&self) -> bool {
        self.mask || self.scale == Scale::Zscore || self.crop_pad.is_some_and(|c| c.centre == Centre::Body)
    }
}

/// Shape, spacing, orientation and affine of a grid, for the log.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct GridRecord {
    /// Shape (voxels).
    pub shape: [usize; 3],
    /// Spacing (mm).
    pub spacing_mm: [f64; 3],
    /// Orientation codes.
    pub orientation: String,
    /// Voxel-to-world affine (4×4, mm).
    pub affine: [[f64; 4]; 4],
}

impl From<&Grid> for GridRecord {
    fn from(g: &Grid) -> Self {
        GridRecord {
            shape: g.shape(),
            spacing_mm: g.spacing(),
            orientation: g.orientation(),
            affine: g.affine().to_4x4(),
        }
    }
}

/// What one step did.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[serde(tag = "step", rename_all = "snake_case")]
pub enum StepRecord {
    /// Axes permuted and reversed (no interpolation).
    Orient {
        /// Codes before.
        from: String,
        /// Codes after.
        to: String,
        /// Input axis read by each output axis.
        source_axes: [usize; 3],
        /// Output axes that run backwards.
        flipped: [bool; 3],
        /// Grid after the step.
        grid: GridRecord,
    },
    /// Resampled (trilinear image, nearest labels, edge values repeated outside).
    Resample {
        /// `"spacing"` or `"shape"`.
        target: &'static str,
        /// Anti-aliasing Gaussian σ along each input axis, in input voxels (0 = none).
        antialias_sigma_voxels: [f64; 3],
        /// Grid after the step.
        grid: GridRecord,
    },
    /// Body mask computed (on the intensities before windowing).
    BodyMask {
        /// Threshold (HU).
        threshold: f32,
        /// Holes filled per axial slice.
        fill_holes: bool,
        /// The voxel axis across axial slices.
        axial_axis: usize,
        /// Voxels in the mask.
        voxels: usize,
        /// Volume of the mask (ml).
        volume_ml: f64,
        /// Bounding box, lowest voxel index per axis.
        bbox_lo: [usize; 3],
        /// Bounding box, highest voxel index per axis.
        bbox_hi: [usize; 3],
    },
    /// Cropped and/or padded by a whole-voxel offset.
    CropPad {
        /// What the output is centred on.
        centre: Centre,
        /// The centre (voxels of the grid before the step).
        centre_voxel: [f64; 3],
        /// New voxel `q` is old voxel `q + offset`.
        offset: [isize; 3],
        /// Image value used outside the input.
        pad: f32,
        /// Grid after the step.
        grid: GridRecord,
    },
    /// Intensities clipped.
    Window {
        /// Lower bound.
        lo: f32,
        /// Upper bound.
        hi: f32,
        /// Voxels raised to `lo`.
        raised: usize,
        /// Voxels lowered to `hi`.
        lowered: usize,
    },
    /// `v ← (v − lo)/(hi − lo)`.
    ScaleUnit {
        /// Value mapped to 0.
        lo: f32,
        /// Value mapped to 1.
        hi: f32,
    },
    /// `v ← (v − mean)/std` with the statistics inside the body mask.
    ScaleZscore {
        /// Mean inside the mask.
        mean: f64,
        /// Population standard deviation inside the mask.
        std: f64,
        /// Voxels in the mask.
        voxels: usize,
    },
}

/// The result of [`prepare`].
#[derive(Clone, Debug)]
pub struct Prepared {
    /// The prepared image.
    pub image: Image,
    /// The label map on the same grid, when one was given.
    pub labels: Option<LabelMap>,
    /// The body mask on the same grid (1 inside), when computed.
    pub mask: Option<LabelMap>,
    /// What was done, in order.
    pub steps: Vec<StepRecord>,
}

/// Runs `steps` on `image` (and `labels`, which must lie on the image's grid), in the order
/// orient → resample → body mask → crop/pad → window → scale.
///
/// Every step keeps world positions: reorientation and crop/pad move values by whole voxels
/// with the affine updated exactly; resampling reads the input at the world position of each
/// new voxel centre (`sinew_grid::resample`).
pub fn prepare(mut image: Image, mut labels: Option<LabelMap>, steps: &Steps) -> Result<Prepared, PrepError> {
    if let Some(l) = labels.as_mut() {
        if !l.grid.same_as(&image.grid, 1e-3) {
            let what = if l.grid.shape() != image.grid.shape() { "shapes differ" } else { "affines differ" };
            return Err(PrepError::LabelGridMismatch {
                labels: l.grid.shape(),
                image: image.grid.shape(),
                what: what.into(),
            });
        }
        // The label map takes the image's grid exactly, so both follow the same steps.
        l.grid = image.grid.clone();
    }
    let mut log = Vec::new();
    if let Some(target) = steps.orient {
        let r = plan(&image.grid, target)?;
        if !r.is_identity() {
            image = reorient(&image, &r);
            labels = labels.map(|l| reorient(&l, &r));
        }
        log.push(StepRecord::Orient {
            from: r.from.to_string(),
            to: r.to.to_string(),
            source_axes: r.source,
            flipped: r.flip,
            grid: (&r.grid).into(),
        });
    }
    if let Some(rs) = steps.resample {
        let (grid, target) = match rs {
            Resample::Spacing(s) => (grid_with_spacing(&image.grid, s)?, "spacing"),
            Resample::Shape(n) => (grid_with_shape(&image.grid, n)?, "shape"),
        };
        // A target equal to the current grid (to 1e-9 mm) leaves the values as they are.
        let same = grid.same_as(&image.grid, 1e-9);
        let sigma_voxels =
            if steps.antialias && !same { resample::antialias_sigmas(&image.grid, &grid) } else { [0.0; 3] };
        if !same {
            image = if steps.antialias {
                resample::resample_image_antialiased(&image, &grid, Border::Nearest)
            } else {
                resample::resample_image(&image, &grid, Border::Nearest)
            };
            labels = labels.map(|l| resample::resample_labels(&l, &grid));
        }
        log.push(StepRecord::Resample { target, antialias_sigma_voxels: sigma_voxels, grid: (&grid).into() });
    }
    let mut mask = None;
    if steps.needs_mask() {
        let axial = AxisCodes::of_grid(&image.grid)?.axial_axis();
        let m = body_mask(&image, &steps.body, axial)?;
        let (lo, hi) = bounding_box(&m).expect("a body mask is never empty");
        let voxels = m.as_slice().iter().filter(|&&v| v != 0).count();
        let voxel_ml = image.grid.affine().determinant().abs() / 1000.0;
        log.push(StepRecord::BodyMask {
            threshold: steps.body.threshold,
            fill_holes: steps.body.fill_holes,
            axial_axis: axial,
            voxels,
            volume_ml: voxels as f64 * voxel_ml,
            bbox_lo: lo,
            bbox_hi: hi,
        });
        mask = Some((m, lo, hi));
    }
    if let Some(cp) = steps.crop_pad {
        let centre_voxel = match (cp.centre, &mask) {
            (Centre::Body, Some((_, lo, hi))) => [0, 1, 2].map(|d| (lo[d] + hi[d]) as f64 / 2.0),
            _ => image.grid.shape().map(|n| (n as f64 - 1.0) / 2.0),
        };
        let p = plan_crop_pad(&image.grid, cp.shape, centre_voxel)?;
        let pad = cp.pad.unwrap_or_else(|| image.finite_range().map_or(0.0, |r| r.0));
        image = crop_pad(&image, &p, pad);
        labels = labels.map(|l| crop_pad(&l, &p, 0));
        mask = mask.map(|(m, lo, hi)| (crop_pad(&m, &p, 0), lo, hi));
        log.push(StepRecord::CropPad {
            centre: cp.centre,
            centre_voxel,
            offset: p.offset,
            pad,
            grid: (&p.grid).into(),
        });
    }
    let mask = mask.map(|(m, _, _)| m);
    if let Some(w) = steps.window {
        let (raised, lowered) = apply_window(&mut image, w);
        log.push(StepRecord::Window { lo: w.lo, hi: w.hi, raised, lowered });
    }
    match steps.scale {
        Scale::None => {}
        Scale::Unit => {
            let (lo, hi) = match steps.window {
                Some(w) => (w.lo, w.hi),
                None => image.finite_range().unwrap_or((0.0, 0.0)),
            };
            if lo >= hi {
                return Err(PrepError::ConstantImage { value: lo });
            }
            scale_unit(&mut image, lo, hi);
            log.push(StepRecord::ScaleUnit { lo, hi });
        }
        Scale::Zscore => {
            let m = mask.as_ref().expect("z-score computes the mask");
            let (mean, std, voxels) = zscore(&mut image, m)?;
            log.push(StepRecord::ScaleZscore { mean, std, voxels });
        }
    }
    Ok(Prepared { image, labels, mask: if steps.mask { mask } else { None }, steps: log })
}
