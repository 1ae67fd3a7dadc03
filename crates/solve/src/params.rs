//! Registration parameters, presets and their TOML form.

use serde::{Deserialize, Serialize};

use crate::SolveError;

/// The optimiser of the dense field.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Optimiser {
    /// Adam ("Adam: A Method for Stochastic Optimization", ICLR 2015); fast and robust.
    Adam,
    /// Limited-memory BFGS with a More–Thuente line search, through the argmin crate.
    Lbfgs,
}

/// The data term's image features.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Similarity {
    /// Sum of squared differences of MIND-SSC descriptors (12 channels): works across
    /// contrasts and modalities.
    MindSsc,
    /// Sum of squared differences of intensities, after scaling both images by the fixed
    /// image's standard deviation: for scans of the same contrast only.
    Ssd,
    /// Local normalised cross-correlation, in its squared-difference form: each image is
    /// standardised within a Gaussian window (σ = `ncc_sigma` voxels of each level),
    /// `Î = (I − μ_σ)/√(σ²_σ + ε)`, and the data term is the SSD of `Î`. For unit-variance
    /// windows `(Î_f − Î_m)² = 2·(1 − NCC)`, so this is local NCC with the normalisation
    /// computed before warping (the usual approximation that keeps the cost of SSD);
    /// invariant to a local affine change of intensities.
    Lncc,
}

/// The transform model of the deformable stage.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Model {
    /// A displacement vector per lattice point (updates smoothed by `update_sigma`).
    Dense,
    /// A cubic B-spline control grid every `grid_spacing_mm` ("Nonrigid registration using
    /// free-form deformations: application to breast MR images", IEEE TMI 1999).
    Bspline,
}

/// The linear stage run before the deformable one.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum AffineMode {
    /// No linear stage: the deformable stage starts from the identity.
    None,
    /// Rotation and translation (6 parameters).
    Rigid,
    /// A general affine map (12 parameters).
    Affine,
    /// The map of the two body masks' moments: per world axis, the ratio of the bodies'
    /// standard deviations as a scale and the shift of their centres
    /// ([`crate::affine::body_map`]); no optimisation, a few milliseconds. Captures the
    /// difference in body size between two people, which the coarse deformable levels
    /// otherwise have to bend towards.
    Body,
}

/// Every setting of a registration. Levels are counted from the finest (0 = the input grid).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RegParams {
    /// Number of pyramid levels (each halves the resolution); the coarsest is `levels − 1`.
    pub levels: usize,
    /// The finest level that is optimised; 1 means the field is optimised at half
    /// resolution and then upsampled to the input grid (faster; the field is smooth anyway).
    pub finest_level: usize,
    /// Lattice stride of the field per optimised level, coarsest first: 2 puts one field
    /// vector on every second voxel of the level along each axis, each compared through the
    /// level's full-resolution descriptors (an eighth of the cost of stride 1; the field is
    /// upsampled at the end).
    pub strides: Vec<usize>,
    /// The voxel spacing (mm) the strides are meant for; 0 = use them as given. For a
    /// coarser scan each stride is divided by `ratio = mean spacing / strides_for_mm`
    /// (rounded, at least 1), so the lattice keeps about the same spacing in mm: a 4 mm scan
    /// runs stride 1 where a 2 mm scan runs stride 2. Scans finer than this keep the strides.
    pub strides_for_mm: f64,
    /// The voxel spacing (mm) the pyramid depth is meant for; 0 = use `levels` as given. A
    /// coarser scan runs `drop = round(log2(mean spacing / levels_for_mm))` fewer levels (at
    /// least one optimised level remains): the coarsest levels go, together with their
    /// entries in `strides`, `iterations` and `step_size`, so the coarsest level keeps about
    /// the same spacing in mm. A 4 mm scan starts at 32 mm voxels with 4 levels but at
    /// 16 mm with 3, as a 2 mm scan does with 4 (measured on the 4 mm tuning split, seed 7,
    /// 6 pairs: mean Dice 0.804 with 4 levels, 0.810 with 3; see [`RegParams::for_spacing`]).
    /// Scans finer than this keep `levels`.
    pub levels_for_mm: f64,
    /// Iterations per optimised level, coarsest first.
    pub iterations: Vec<usize>,
    /// Adam step size per optimised level, coarsest first, in voxels of that level.
    pub step_size: Vec<f32>,
    /// Diffusion weight λ of the finest optimised level (dimensionless: the regulariser is
    /// the squared mm/mm gradient). The one knob that trades overlap against smoothness.
    pub lambda: f32,
    /// Factor on λ per optimised level, coarsest first (empty = 1 everywhere). The list is
    /// aligned at its finest end: with fewer optimised levels than entries the coarsest
    /// entries are unused, with more the first entry repeats. Flexible coarse levels capture
    /// large organ shifts that a stiff field cannot reach; the finest level sets the
    /// smoothness of the result.
    pub lambda_scale: Vec<f32>,
    /// Weight μ of the folding penalty `μ·P(u)`, `P(u) = 1/N · Σ_x max(0, τ − det J(x))²`
    /// with `J` the Jacobian of `x ↦ x + u(x)` (central differences, spacing-aware) and
    /// `τ = fold_threshold`: it pushes determinants away from zero where folds would form,
    /// so a smaller λ (more Dice) keeps the field free of folds. 0 = off.
    pub fold_weight: f32,
    /// Threshold τ of the folding penalty (a determinant below it is penalised).
    pub fold_threshold: f32,
    /// Weight κ (mm²) of the curvature penalty `κ/N · Σ_x Σ_d (Δ u_d(x))²` on the
    /// displacement in mm (Laplacian in 1/mm; see [`crate::curvature`]), at every level and
    /// for both models. It keeps smooth displacements from being flattened where the images
    /// carry little contrast, so a small diffusion weight can follow organ boundaries without
    /// losing the smooth part of the warp. 0 = off.
    pub curvature: f32,
    /// The optimiser.
    pub optimiser: Optimiser,
    /// The data term.
    pub similarity: Similarity,
    /// MIND-SSC patch radius r (voxels of each level).
    pub mind_radius: usize,
    /// MIND-SSC neighbourhood dilation d (voxels of each level).
    pub mind_dilation: usize,
    /// Local NCC window: Gaussian σ in voxels of each level.
    pub ncc_sigma: f64,
    /// Stop a level early when the best total energy has not improved by this fraction for
    /// `patience` iterations in a row (Adam; L-BFGS uses it as its own tolerance).
    pub tolerance: f64,
    /// Iterations without an improvement of `tolerance` before a level stops early (Adam).
    pub patience: usize,
    /// Optimise a stationary velocity field and integrate it by scaling and squaring, so the
    /// final map is free of folds (invertible).
    pub diffeomorphic: bool,
    /// Gaussian smoothing (σ in voxels of each level) of the field after each level; 0 = off.
    pub field_sigma: f32,
    /// Adam only: σ (voxels of each level) of the Gaussian that smooths each update
    /// (the field is `init + G_σ·θ`); 0 = plain per-voxel Adam.
    pub update_sigma: f32,
    /// The transform model of the deformable stage.
    pub model: Model,
    /// B-spline model: control point spacing in mm (the same at every level).
    pub grid_spacing_mm: f64,
    /// B-spline model: weight of the bending energy of the control grid (0 = off).
    pub bending: f32,
    /// The linear stage before the deformable one.
    pub affine: AffineMode,
}

impl Default for RegParams {
    fn default() -> Self {
        RegParams::preset("default").expect("the default preset exists")
    }
}

/// Names of the built-in presets.
pub const PRESETS: &[&str] = &["fast", "default", "accurate"];

impl RegParams {
    /// A built-in preset: `fast`, `default` or `accurate`.
    pub fn preset(name: &str) -> Option<RegParams> {
        let base = RegParams {
            levels: 4,
            finest_level: 0,
            strides: vec![1, 1, 2, 2],
            strides_for_mm: 2.0,
            levels_for_mm: 2.0,
            iterations: vec![80, 60, 40, 40],
            step_size: vec![1.0, 0.8, 0.5, 0.3],
            lambda: 0.015,
            lambda_scale: vec![0.1, 0.2, 0.4, 1.0],
            fold_weight: 20.0,
            fold_threshold: 0.1,
            curvature: 1.0,
            optimiser: Optimiser::Adam,
            similarity: Similarity::MindSsc,
            mind_radius: 1,
            mind_dilation: 1,
            ncc_sigma: 2.0,
            tolerance: 1e-4,
            patience: 10,
            diffeomorphic: false,
            field_sigma: 0.0,
            update_sigma: 1.0,
            model: Model::Dense,
            grid_spacing_mm: 20.0,
            bending: 0.0,
            affine: AffineMode::Body,
        };
        match name {
            "default" => Some(base),
            "fast" => Some(RegParams { iterations: vec![60, 40, 20, 20], ..base }),
            "accurate" => Some(RegParams {
                strides: vec![1, 1, 1, 1],
                iterations: vec![100, 80, 60, 30],
                tolerance: 1e-5,
                ..base
            }),
            _ => None,
        }
    }

    /// Switches to the diffeomorphic mode with the settings it is accurate with: λ = 0.1 at
    /// every level, MIND-SSC dilation 2, the earlier step sizes, and no folding penalty
    /// (the exponential of a velocity field cannot fold, and the penalty's gradient through
    /// the exponential is only approximate), no curvature penalty (measured with these
    /// settings, not tuned with it). Measured on a 25 mm known warp: mean endpoint
    /// error 1.34 mm and no folds with these, 2.38 mm and 0.1 % folded voxels with the dense
    /// defaults, whose flexible coarse levels give a velocity too rough to integrate.
    pub fn make_diffeomorphic(&mut self) {
        self.diffeomorphic = true;
        self.lambda = 0.1;
        self.lambda_scale.clear();
        self.mind_dilation = 2;
        self.fold_weight = 0.0;
        self.curvature = 0.0;
        self.step_size = self.step_size.iter().map(|s| s.min(0.5)).collect();
    }

    /// The diffusion weight of optimised level `step` (0 = coarsest): `λ` times the entry of
    /// `lambda_scale` as far from its finest end as `step` is from the finest optimised level.
    pub fn lambda_at(&self, step: usize) -> f32 {
        let from_finest = self.optimised_levels().saturating_sub(1 + step);
        let k = self.lambda_scale.len();
        let factor = if k == 0 { 1.0 } else { self.lambda_scale[k.saturating_sub(1 + from_finest).min(k - 1)] };
        self.lambda * factor
    }

    /// The lattice stride of optimised level `step` (0 = coarsest) for a scan of voxel
    /// `spacing` mm: `strides[step]`, divided by `mean(spacing) / strides_for_mm` when that
    /// ratio exceeds 1 (rounded to the nearest integer, at least 1).
    pub fn stride_for(&self, step: usize, spacing: [f64; 3]) -> usize {
        let s = self.strides[step];
        if self.strides_for_mm <= 0.0 {
            return s;
        }
        let ratio = spacing.iter().sum::<f64>() / 3.0 / self.strides_for_mm;
        if ratio <= 1.0 {
            return s;
        }
        ((s as f64 / ratio).round() as usize).max(1)
    }

    /// The parameters for a scan of voxel `spacing` mm: `self` with the
    /// `drop = round(log2(mean(spacing) / levels_for_mm))` coarsest levels removed (see
    /// [`RegParams::levels_for_mm`]; `drop` is 0 for scans no coarser than `levels_for_mm`
    /// and at most `optimised_levels() − 1`). The per-level lists lose their first (coarsest)
    /// `drop` entries; `lambda_scale` is aligned at its finest end already and stays.
    pub fn for_spacing(&self, spacing: [f64; 3]) -> RegParams {
        let mut p = self.clone();
        if self.levels_for_mm <= 0.0 {
            return p;
        }
        let ratio = spacing.iter().sum::<f64>() / 3.0 / self.levels_for_mm;
        if ratio <= 1.0 {
            return p;
        }
        let drop = (ratio.log2().round() as usize).min(self.optimised_levels().saturating_sub(1));
        if drop == 0 {
            return p;
        }
        p.levels -= drop;
        for list in [&mut p.strides, &mut p.iterations] {
            list.drain(..drop.min(list.len()));
        }
        p.step_size.drain(..drop.min(p.step_size.len()));
        p
    }

    /// Iterations planned over all optimised levels: the sum of `iterations` (for a scan,
    /// apply [`RegParams::for_spacing`] first, as the driver does).
    pub fn planned_iterations(&self) -> usize {
        self.iterations.iter().sum()
    }

    /// Number of optimised levels: `levels − finest_level`.
    pub fn optimised_levels(&self) -> usize {
        self.levels.saturating_sub(self.finest_level)
    }

    /// Checks ranges and lengths, naming the first problem.
    pub fn validate(&self) -> Result<(), SolveError> {
        let bad = |name, why: String| Err(SolveError::Parameter { name, why });
        if self.levels == 0 || self.levels > 8 {
            return bad("levels", format!("{} is outside 1..=8", self.levels));
        }
        if self.finest_level >= self.levels {
            return bad("finest_level", format!("{} must be below levels ({})", self.finest_level, self.levels));
        }
        let n = self.optimised_levels();
        if self.strides.len() != n || self.strides.iter().any(|s| !(1..=4).contains(s)) {
            return bad(
                "strides",
                format!("needs {n} values in 1..=4 (one per optimised level), got {:?}", self.strides),
            );
        }
        if self.iterations.len() != n {
            return bad(
                "iterations",
                format!("needs {n} values (one per optimised level), got {}", self.iterations.len()),
            );
        }
        if self.step_size.len() != n || self.step_size.iter().any(|s| !(s.is_finite() && *s > 0.0)) {
            return bad("step_size", format!("needs {n} positive values, got {:?}", self.step_size));
        }
        if !(self.lambda.is_finite() && self.lambda >= 0.0) {
            return bad("lambda", format!("{} must be finite and ≥ 0", self.lambda));
        }
        if self.lambda_scale.len() > 8 || self.lambda_scale.iter().any(|l| !(l.is_finite() && *l >= 0.0)) {
            return bad("lambda_scale", format!("needs at most 8 finite values ≥ 0, got {:?}", self.lambda_scale));
        }
        if !(self.fold_weight.is_finite() && self.fold_weight >= 0.0) {
            return bad("fold_weight", format!("{} must be finite and ≥ 0", self.fold_weight));
        }
        if !(self.fold_threshold.is_finite() && (0.0..=1.0).contains(&self.fold_threshold)) {
            return bad("fold_threshold", format!("{} is outside [0, 1]", self.fold_threshold));
        }
        if self.patience == 0 {
            return bad("patience", "must be at least 1".into());
        }
        if self.mind_dilation == 0 || self.mind_dilation > 8 || self.mind_radius > 8 {
            return bad("mind", format!("radius {} / dilation {} out of range", self.mind_radius, self.mind_dilation));
        }
        if !(self.ncc_sigma.is_finite() && self.ncc_sigma > 0.0 && self.ncc_sigma <= 16.0) {
            return bad("ncc_sigma", format!("{} is outside (0, 16]", self.ncc_sigma));
        }
        if !(self.tolerance.is_finite() && self.tolerance >= 0.0) {
            return bad("tolerance", format!("{} must be ≥ 0", self.tolerance));
        }
        if self.diffeomorphic && self.optimiser != Optimiser::Adam {
            return bad("diffeomorphic", "needs the adam optimiser".into());
        }
        if !(self.update_sigma.is_finite() && self.update_sigma >= 0.0) {
            return bad("update_sigma", format!("{} must be ≥ 0", self.update_sigma));
        }
        if !(self.field_sigma.is_finite() && self.field_sigma >= 0.0) {
            return bad("field_sigma", format!("{} must be ≥ 0", self.field_sigma));
        }
        if !(self.grid_spacing_mm.is_finite() && self.grid_spacing_mm > 0.0) {
            return bad("grid_spacing_mm", format!("{} must be a positive length", self.grid_spacing_mm));
        }
        if !(self.curvature.is_finite() && self.curvature >= 0.0) {
            return bad("curvature", format!("{} must be finite and ≥ 0 (mm²)", self.curvature));
        }
        if !(self.strides_for_mm.is_finite() && self.strides_for_mm >= 0.0) {
            return bad("strides_for_mm", format!("{} must be a spacing in mm ≥ 0", self.strides_for_mm));
        }
        if !(self.levels_for_mm.is_finite() && self.levels_for_mm >= 0.0) {
            return bad("levels_for_mm", format!("{} must be a spacing in mm ≥ 0", self.levels_for_mm));
        }
        if !(self.bending.is_finite() && self.bending >= 0.0) {
            return bad("bending", format!("{} must be finite and ≥ 0", self.bending));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lambda_scale_is_aligned_at_the_finest_level() {
        let mut p = RegParams { lambda: 2.0, lambda_scale: vec![0.1, 0.2, 0.4, 1.0], ..RegParams::default() };
        assert_eq!((0..4).map(|s| p.lambda_at(s)).collect::<Vec<_>>(), [0.2, 0.4, 0.8, 2.0]);
        p.finest_level = 1; // three optimised levels: the coarsest entry is unused
        assert_eq!((0..3).map(|s| p.lambda_at(s)).collect::<Vec<_>>(), [0.4, 0.8, 2.0]);
        p.finest_level = 0;
        p.levels = 6; // six levels: the first entry repeats at the coarser ones
        assert_eq!((0..6).map(|s| p.lambda_at(s)).collect::<Vec<_>>(), [0.2, 0.2, 0.2, 0.4, 0.8, 2.0]);
    }

    #[test]
    fn strides_follow_the_spacing_they_are_meant_for() {
        let p = RegParams::default(); // strides [1, 1, 2, 2] for 2 mm
        let at = |h: [f64; 3]| (0..4).map(|s| p.stride_for(s, h)).collect::<Vec<_>>();
        assert_eq!(at([2.0; 3]), [1, 1, 2, 2]);
        assert_eq!(at([1.0; 3]), [1, 1, 2, 2]); // finer scans keep them
        assert_eq!(at([4.0; 3]), [1, 1, 1, 1]); // 2 / 2 = 1
        assert_eq!(at([1.14, 1.14, 5.0]), [1, 1, 2, 2]); // mean 2.43 mm: 2 / 1.21 rounds to 2
        let off = RegParams { strides_for_mm: 0.0, ..RegParams::default() };
        assert_eq!((0..4).map(|s| off.stride_for(s, [4.0; 3])).collect::<Vec<_>>(), [1, 1, 2, 2]);
    }

    #[test]
    fn coarse_scans_drop_the_coarsest_levels() {
        let p = RegParams::default(); // 4 levels, lists coarsest first, meant for 2 mm
        assert_eq!(p.for_spacing([2.0; 3]), p);
        assert_eq!(p.for_spacing([1.0; 3]), p); // finer scans keep every level
        assert_eq!(p.for_spacing([1.14, 1.14, 5.0]), p); // log2(2.43 / 2) = 0.28 rounds to 0
        let q = p.for_spacing([4.0; 3]); // log2(4 / 2) = 1: one level fewer
        assert_eq!(q.levels, 3);
        assert_eq!(q.iterations, p.iterations[1..]);
        assert_eq!(q.step_size, p.step_size[1..]);
        assert_eq!(q.strides, p.strides[1..]);
        q.validate().unwrap();
        // The finest three levels keep their λ (the list is aligned at its finest end).
        assert_eq!(
            (0..3).map(|s| q.lambda_at(s)).collect::<Vec<_>>(),
            (1..4).map(|s| p.lambda_at(s)).collect::<Vec<_>>()
        );
        // A 64 mm scan would drop 5 levels: at least one optimised level stays.
        let r = p.for_spacing([64.0; 3]);
        assert_eq!((r.levels, r.iterations.len()), (1, 1));
        r.validate().unwrap();
        let off = RegParams { levels_for_mm: 0.0, ..RegParams::default() };
        assert_eq!(off.for_spacing([4.0; 3]), off);
    }

    #[test]
    fn presets_are_valid() {
        for p in PRESETS {
            RegParams::preset(p).unwrap().validate().unwrap();
        }
        let mut p = RegParams::default();
        p.iterations.pop();
        assert!(p.validate().is_err());
    }
}
