//! `sinew register`: one pair, from files to field, warped scans, Jacobian and report.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context};
use clap::{Args, ValueEnum};
use serde::Serialize;
use sinew_grid::{Border, Image, LabelMap};
use sinew_io::FieldUnits;
use sinew_solve::{InitialMode, Optimiser, PairScans, RegParams, ScanOptions, ScanRegistration, Similarity, Stage};

use crate::cmd::common::{self, Inputs};
use crate::ui;

/// Units of the displacement vectors in written field files.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum UnitsArg {
    /// Millimetres along the world (scanner) axes: the NIfTI convention.
    Mm,
    /// Voxels along the array axes i, j, k: what most Python code expects.
    Voxel,
}

impl From<UnitsArg> for FieldUnits {
    fn from(u: UnitsArg) -> Self {
        match u {
            UnitsArg::Mm => FieldUnits::Mm,
            UnitsArg::Voxel => FieldUnits::Voxel,
        }
    }
}

/// Arguments of `sinew register`.
#[derive(Args, Debug, Clone)]
#[command(after_long_help = REGISTER_EXAMPLES)]
pub struct RegisterArgs {
    /// The fixed scan (NIfTI): the field lives on its grid.
    #[arg(long, short = 'f', value_name = "NII")]
    pub fixed: PathBuf,
    /// The moving scan (NIfTI), on any grid and in any world frame (see --initial).
    #[arg(long, short = 'm', value_name = "NII")]
    pub moving: PathBuf,
    /// Output folder (created if needed); existing outputs in it are replaced atomically.
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: PathBuf,
    /// Label map of the fixed scan: enables Dice before/after in the report.
    #[arg(long, value_name = "NII")]
    pub fixed_labels: Option<PathBuf>,
    /// Label map of the moving scan: warped into `warped_labels.nii.gz`.
    #[arg(long, value_name = "NII")]
    pub moving_labels: Option<PathBuf>,
    /// Mask on the fixed grid (non-zero = inside): only voxels inside drive the data term.
    #[arg(long, value_name = "NII")]
    pub mask: Option<PathBuf>,
    /// Units of the vectors in `field.nii.gz`.
    #[arg(long, value_enum, default_value_t = UnitsArg::Mm)]
    pub field_units: UnitsArg,
    /// Also write `field.npy` ((nx, ny, nz, 3) float32, voxel units).
    #[arg(long)]
    pub npy: bool,
    /// File format of the image outputs: nii.gz (gzip level 1, compressed in parallel) or nii
    /// (uncompressed: larger files, faster to write on native-resolution grids).
    #[arg(long, value_enum, default_value_t = OutFormat::NiiGz)]
    pub out_format: OutFormat,
    /// Preset, config file and the flags over them.
    #[command(flatten)]
    pub params: ParamArgs,
    /// Working grid, initial alignment, anti-aliasing and NaN voxels.
    #[command(flatten)]
    pub scan: ScanArgs,
    /// Worker threads (default: all cores).
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
    /// Do not draw the quality-control sheet `qc.png`.
    #[arg(long)]
    pub no_qc: bool,
    /// Grey window of qc.png: `lo,hi` in the fixed scan's units, or `auto` (-200,300 when the
    /// fixed scan is in Hounsfield units, i.e. its values reach <= -500 and >= 300; else the
    /// 1st to 99th percentile of its foreground). The window used is recorded in report.json.
    #[arg(long, value_name = "LO,HI|auto", default_value = "auto", allow_hyphen_values = true, value_parser = crate::cmd::qc::window_arg)]
    pub qc_window: sinew_qc::Window,
    /// Label names for the QC sheet's legend: a JSON object `{"1": "liver", ...}` (default:
    /// `labels.json` beside --fixed-labels when there is one; else labels are shown by number).
    #[arg(long, value_name = "JSON")]
    pub label_names: Option<PathBuf>,
    /// No progress bar and no summary.
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

const REGISTER_EXAMPLES: &str = "Examples:
  sinew register -f demo-data/subject_00_image.nii.gz -m demo-data/subject_01_image.nii.gz \\
      --fixed-labels demo-data/subject_00_labels.nii.gz \\
      --moving-labels demo-data/subject_01_labels.nii.gz -o out/pair_00_01
  sinew register -f a.nii.gz -m b.nii.gz -o out --preset accurate --diffeomorphic
  sinew register -f a.nii.gz -m b.nii.gz -o out --config params.toml --field-units voxel
  sinew register -f a_unit.nii.gz -m b_unit.nii.gz -o out --qc-window 0.3,0.6

Outputs in DIR: field.nii.gz (displacement, pull: warped(x) = moving(x + u(x))),
warped.nii.gz, warped_labels.nii.gz (with --moving-labels), jacdet.nii.gz (.nii with
--out-format nii), qc.png (unless --no-qc),
affine.json (when a linear map was used: --affine rigid|affine, or the initial alignment of
scans in different frames; the 4x4 world-mm matrix, fixed point x -> moving A.x),
report.json (written last: its presence marks a complete folder).";

/// The registration parameters of `sinew register`: a preset, a TOML file over it, and the
/// flags over both.
#[derive(Args, Debug, Clone)]
pub struct ParamArgs {
    /// Parameter preset: fast, default or accurate.
    #[arg(long, default_value = "default", value_parser = clap::builder::PossibleValuesParser::new(sinew_solve::PRESETS))]
    pub preset: String,
    /// A TOML file of parameters (any field of the preset; unknown keys are errors). Applied
    /// over the preset; the flags below are applied over both.
    #[arg(long, value_name = "TOML")]
    pub config: Option<PathBuf>,
    /// Diffusion weight λ (smoothness; larger = smoother field).
    #[arg(long)]
    pub lambda: Option<f32>,
    /// Iterations per optimised level, coarsest first, one number per level (e.g. `80,60,40,20`
    /// for the 4 levels of the presets).
    #[arg(long, value_delimiter = ',')]
    pub iterations: Option<Vec<usize>>,
    /// Number of pyramid levels.
    #[arg(long)]
    pub levels: Option<usize>,
    /// Finest optimised level (0 = full resolution, 1 = half resolution then upsampled).
    #[arg(long)]
    pub finest_level: Option<usize>,
    /// Optimiser: adam or lbfgs.
    #[arg(long, value_enum)]
    pub optimiser: Option<OptimiserArg>,
    /// Data term: mind-ssc (any contrast), lncc (local NCC: contrast changes that are locally
    /// affine) or ssd (same contrast only).
    #[arg(long, value_enum)]
    pub similarity: Option<SimilarityArg>,
    /// Keep the map free of folds: optimise a stationary velocity field and integrate it by
    /// scaling and squaring.
    #[arg(long)]
    pub diffeomorphic: bool,
    /// Transform model of the deformable stage: dense (a vector per lattice point) or
    /// bspline (a cubic B-spline control grid every --grid-spacing mm).
    #[arg(long, value_enum)]
    pub model: Option<ModelArg>,
    /// B-spline control point spacing in mm.
    #[arg(long, value_name = "MM")]
    pub grid_spacing: Option<f64>,
    /// Linear pre-alignment before the deformable stage: body (default: scale and shift from
    /// the body masks' moments, milliseconds), rigid (6 parameters) or affine (12), both
    /// optimised on MIND-SSC (seconds), or none; its matrix is written to affine.json and
    /// included in field.nii.gz.
    #[arg(long, value_enum)]
    pub affine: Option<AffineArg>,
}

impl ParamArgs {
    /// Only a preset, a config file and iterations (the other flags unset): the parameters
    /// `cohort` and `tune` take.
    pub fn base(preset: &PresetArgs, diffeomorphic: bool) -> ParamArgs {
        ParamArgs {
            preset: preset.preset.clone(),
            config: preset.config.clone(),
            lambda: None,
            iterations: preset.iterations.clone(),
            levels: None,
            finest_level: None,
            optimiser: None,
            similarity: None,
            diffeomorphic,
            model: None,
            grid_spacing: None,
            affine: None,
        }
    }
}

/// The parameter options of `sinew cohort` and `sinew tune`: a preset, a TOML file over it,
/// and the iterations.
#[derive(Args, Debug, Clone)]
pub struct PresetArgs {
    /// Parameter preset for the registrations: fast, default or accurate.
    #[arg(long, default_value = "default", value_parser = clap::builder::PossibleValuesParser::new(sinew_solve::PRESETS))]
    pub preset: String,
    /// A TOML file of parameters applied over the preset (as for `sinew register`).
    #[arg(long, value_name = "TOML")]
    pub config: Option<PathBuf>,
    /// Iterations per optimised level, coarsest first, one number per level (e.g. `40,30,20,10`
    /// for the 4 levels of the presets).
    #[arg(long, value_delimiter = ',')]
    pub iterations: Option<Vec<usize>>,
}

/// How scans on their own grids and in their own world frames are brought together; shared
/// by `register`, `cohort` and `demo`.
#[derive(Args, Debug, Clone)]
pub struct ScanArgs {
    /// Spacing (mm) of the internal working grid the registration runs on; axes finer than
    /// 0.8 times this are resampled to it, thicker ones (thick slices) are kept. 0 = register
    /// on the fixed scan's own grid. Outputs are always on the fixed scan's grid.
    #[arg(long, value_name = "MM", default_value_t = sinew_solve::scans::DEFAULT_WORKING_MM)]
    pub working_spacing: f64,
    /// Initial alignment of scans in different world frames, from their body masks: auto
    /// (when the bodies overlap little or their centres lie far apart), centres, axes
    /// (centres and principal axes) or off.
    #[arg(long, value_enum, default_value_t = InitialArg::Auto)]
    pub initial: InitialArg,
    /// Do not smooth (anti-alias) a scan before bringing it to a coarser working grid.
    #[arg(long)]
    pub no_antialias: bool,
    /// NaN or infinite voxels (outside the scanned volume in some exports): refuse (default),
    /// pad (moving: the image minimum; fixed: the minimum, and left out of the data term) or a
    /// number to put in their place.
    #[arg(long, value_name = "refuse|pad|VALUE", default_value = "refuse", allow_hyphen_values = true)]
    pub nan: String,
}

impl Default for ScanArgs {
    fn default() -> Self {
        ScanArgs {
            working_spacing: sinew_solve::scans::DEFAULT_WORKING_MM,
            initial: InitialArg::Auto,
            no_antialias: false,
            nan: "refuse".into(),
        }
    }
}

impl ScanArgs {
    /// The solver's options.
    pub fn options(&self) -> anyhow::Result<ScanOptions> {
        if !(self.working_spacing.is_finite() && self.working_spacing >= 0.0) {
            anyhow::bail!("--working-spacing {}: must be 0 or a positive number of mm", self.working_spacing);
        }
        Ok(ScanOptions {
            working_spacing_mm: self.working_spacing,
            initial: match self.initial {
                InitialArg::Auto => InitialMode::Auto,
                InitialArg::Centres => InitialMode::Centres,
                InitialArg::Axes => InitialMode::Axes,
                InitialArg::Off => InitialMode::Off,
            },
            antialias: !self.no_antialias,
        })
    }

    /// The NaN policy.
    pub fn nan_policy(&self) -> anyhow::Result<common::NanPolicy> {
        common::parse_nan(&self.nan)
    }
}

/// `--initial` values.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum InitialArg {
    /// When the frames disagree (bodies overlap below 0.7 or centres over 30 mm apart).
    Auto,
    /// Always: translate by the body centres.
    Centres,
    /// Always: body centres and principal axes.
    Axes,
    /// Never: trust the world frames.
    Off,
}

/// `--out-format` values.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum OutFormat {
    /// gzip-compressed NIfTI-1 (`.nii.gz`).
    #[value(name = "nii.gz")]
    NiiGz,
    /// Uncompressed NIfTI-1 (`.nii`).
    #[value(name = "nii")]
    Nii,
}

impl OutFormat {
    /// The file name extension.
    pub fn extension(self) -> &'static str {
        match self {
            OutFormat::NiiGz => "nii.gz",
            OutFormat::Nii => "nii",
        }
    }
}

/// `--optimiser` values.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum OptimiserArg {
    /// Adam (default).
    Adam,
    /// L-BFGS through argmin.
    Lbfgs,
}

/// `--model` values.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum ModelArg {
    /// A displacement vector per lattice point.
    Dense,
    /// A cubic B-spline control grid.
    Bspline,
}

/// `--affine` values.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum AffineArg {
    /// No linear stage.
    None,
    /// Rotation and translation.
    Rigid,
    /// General affine map.
    Affine,
    /// Scale and shift from the two body masks' moments (no optimisation; the default).
    Body,
}

/// `--similarity` values.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum SimilarityArg {
    /// MIND-SSC descriptors.
    MindSsc,
    /// Intensity SSD.
    Ssd,
    /// Local normalised cross-correlation (squared-difference form).
    Lncc,
}

impl ParamArgs {
    /// The parameters: preset, then config file, then flags.
    pub fn params(&self) -> anyhow::Result<RegParams> {
        let mut p = RegParams::preset(&self.preset).context("unknown preset")?;
        if let Some(path) = &self.config {
            let text = std::fs::read_to_string(path).with_context(|| format!("{}: cannot read", path.display()))?;
            let base = toml::Value::try_from(&p).context("serialising the preset")?;
            let over: toml::Value = toml::from_str(&text).map_err(|e: toml::de::Error| {
                // One line: the position and the parser's message (its own text draws the line).
                let at = e.span().map_or_else(String::new, |s| {
                    let before = text.get(..s.start).unwrap_or(&text);
                    let line = before.matches('\n').count() + 1;
                    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
                    format!(" at line {line}, column {column}")
                });
                anyhow::anyhow!("{}: not valid TOML{at}: {}", path.display(), e.message().trim().replace('\n', " "))
            })?;
            let merged = merge_toml(base, over);
            p = merged.try_into().map_err(|e: toml::de::Error| {
                anyhow::anyhow!("{}: {}", path.display(), e.message().replace('\n', " "))
            })?;
        }
        if let Some(l) = self.levels {
            p.levels = l;
        }
        if let Some(f) = self.finest_level {
            p.finest_level = f;
        }
        if self.levels.is_some() || self.finest_level.is_some() {
            // Keep per-level lists consistent with a changed level count. The presets' lists
            // are never empty, so an empty one came from the config file.
            let n = p.optimised_levels();
            let from_config = || self.config.as_ref().map_or_else(|| "parameters".into(), |c| c.display().to_string());
            for (name, ok) in [
                // `--iterations` replaces the list below.
                ("iterations", self.iterations.is_some() || resize_last(&mut p.iterations, n)),
                ("step_size", resize_last(&mut p.step_size, n)),
                ("strides", resize_last(&mut p.strides, n)),
                // An empty factor list means 1 at every level.
                ("lambda_scale", p.lambda_scale.is_empty() || resize_last(&mut p.lambda_scale, n)),
            ] {
                if !ok {
                    bail!(
                        "{}: `{name}` is empty, so it cannot be stretched to the {n} levels that \
                         --levels/--finest-level ask for (give one value per level)",
                        from_config()
                    );
                }
            }
        }
        if self.diffeomorphic {
            p.make_diffeomorphic();
        }
        if let Some(l) = self.lambda {
            p.lambda = l;
        }
        if let Some(it) = &self.iterations {
            p.iterations = it.clone();
        }
        if let Some(o) = self.optimiser {
            p.optimiser = match o {
                OptimiserArg::Adam => Optimiser::Adam,
                OptimiserArg::Lbfgs => Optimiser::Lbfgs,
            };
        }
        if let Some(s) = self.similarity {
            p.similarity = match s {
                SimilarityArg::MindSsc => Similarity::MindSsc,
                SimilarityArg::Ssd => Similarity::Ssd,
                SimilarityArg::Lncc => Similarity::Lncc,
            };
        }
        if let Some(m) = self.model {
            p.model = match m {
                ModelArg::Dense => sinew_solve::Model::Dense,
                ModelArg::Bspline => sinew_solve::Model::Bspline,
            };
        }
        if let Some(g) = self.grid_spacing {
            p.grid_spacing_mm = g;
        }
        if let Some(a) = self.affine {
            p.affine = match a {
                AffineArg::None => sinew_solve::AffineMode::None,
                AffineArg::Rigid => sinew_solve::AffineMode::Rigid,
                AffineArg::Affine => sinew_solve::AffineMode::Affine,
                AffineArg::Body => sinew_solve::AffineMode::Body,
            };
        }
        match &self.config {
            Some(c) => p.validate().with_context(|| format!("{}: parameters (with the flags applied)", c.display()))?,
            None => p.validate().context("parameters")?,
        }
        Ok(p)
    }
}

/// Brings a per-level list (coarsest level first) to `n` entries: pads it at the coarse end by
/// repeating its first (coarsest) value, or truncates it from the front (dropping the coarsest
/// levels). Returns `false`, leaving `v` as it is, when `v` is empty and `n > 0` (nothing to
/// repeat).
fn resize_last<T: Clone>(v: &mut Vec<T>, n: usize) -> bool {
    let Some(coarsest) = v.first().cloned() else { return n == 0 };
    while v.len() > n {
        v.remove(0);
    }
    while v.len() < n {
        v.insert(0, coarsest.clone());
    }
    true
}

fn merge_toml(base: toml::Value, over: toml::Value) -> toml::Value {
    match (base, over) {
        (toml::Value::Table(mut b), toml::Value::Table(o)) => {
            for (k, v) in o {
                let merged = match b.remove(&k) {
                    Some(old) => merge_toml(old, v),
                    None => v,
                };
                b.insert(k, merged);
            }
            toml::Value::Table(b)
        }
        (_, o) => o,
    }
}

/// The JSON report of one registration.
#[derive(Serialize)]
pub struct Report {
    /// Always first: how to use (and not use) the result.
    pub caution: &'static str,
    /// sinew's version.
    pub sinew_version: &'static str,
    /// Inputs with their SHA-256.
    pub inputs: Vec<common::InputRecord>,
    /// The parameters used.
    pub params: RegParams,
    /// Working grid, initial alignment mode and anti-aliasing.
    pub scan: ScanOptions,
    /// What was done with NaN or infinite voxels.
    pub nan: common::NanRecord,
    /// Units of the vectors in field.nii.gz.
    pub field_units: UnitsArg,
    /// Worker threads.
    pub threads: usize,
    /// Whether the moving scan lies on another grid than the fixed scan.
    pub moving_resampled: bool,
    /// The fixed scan's working grid (the registration's grid).
    pub working_grid: sinew_solve::scans::GridSummary,
    /// The moving scan's own working grid.
    pub moving_working_grid: sinew_solve::scans::GridSummary,
    /// True when the registration ran on the fixed scan's own grid.
    pub working_is_fixed_grid: bool,
    /// The initial alignment between the world frames (always computed; `applied` says
    /// whether it was used) and the body overlap before and after.
    pub initial_alignment: sinew_solve::frames::InitialAlignment,
    /// The whole linear part of the map (4×4 world mm, fixed point ↦ moving point):
    /// initial alignment then rigid/affine stage; the identity when neither ran.
    pub linear_map: [[f64; 4]; 4],
    /// The rigid/affine stage, when one ran (its `matrix` is the whole linear map).
    pub linear: Option<sinew_solve::affine::AffineEstimate>,
    /// Stage timings in seconds.
    pub timings: sinew_solve::Timings,
    /// Per-level reports (coarsest first).
    pub levels: Vec<sinew_solve::LevelReport>,
    /// Jacobian statistics of the final field on the fixed grid.
    pub jacobian: sinew_transform::JacobianStats,
    /// Dice per label before and after (with both label maps).
    pub dice: Option<common::DiceReport>,
    /// The QC sheet and its grey window (absent with --no-qc).
    pub qc: Option<crate::cmd::qc::QcRecord>,
    /// Files written.
    pub outputs: Vec<String>,
}

/// One registration as `register` and `cohort` ask for it: the files, the outputs and how the
/// scans are brought together, with every option already parsed and checked.
#[derive(Debug, Clone)]
pub struct PairRequest {
    /// The fixed scan (the field lives on its grid).
    pub fixed: PathBuf,
    /// The moving scan.
    pub moving: PathBuf,
    /// Output folder (created if needed).
    pub out: PathBuf,
    /// Label map of the fixed scan (Dice before/after in the report).
    pub fixed_labels: Option<PathBuf>,
    /// Label map of the moving scan (warped into `warped_labels`).
    pub moving_labels: Option<PathBuf>,
    /// Mask on the fixed grid (non-zero = inside the data term).
    pub mask: Option<PathBuf>,
    /// Units of the vectors in the field file.
    pub field_units: UnitsArg,
    /// Also write `field.npy`.
    pub npy: bool,
    /// File format of the image outputs.
    pub out_format: OutFormat,
    /// Working grid, initial alignment and anti-aliasing.
    pub scan: ScanOptions,
    /// What to do with NaN or infinite voxels.
    pub nan: common::NanPolicy,
    /// Draw `qc.png`.
    pub qc: bool,
    /// Grey window of `qc.png`.
    pub qc_window: sinew_qc::Window,
    /// Label names for the QC sheet's legend (JSON), else `labels.json` beside the fixed labels.
    pub label_names: Option<PathBuf>,
    /// No progress bar and no summary.
    pub quiet: bool,
}

impl RegisterArgs {
    /// The request these arguments make (the working-grid and NaN options checked).
    pub fn request(&self) -> anyhow::Result<PairRequest> {
        Ok(PairRequest {
            fixed: self.fixed.clone(),
            moving: self.moving.clone(),
            out: self.out.clone(),
            fixed_labels: self.fixed_labels.clone(),
            moving_labels: self.moving_labels.clone(),
            mask: self.mask.clone(),
            field_units: self.field_units,
            npy: self.npy,
            out_format: self.out_format,
            scan: self.scan.options()?,
            nan: self.scan.nan_policy()?,
            qc: !self.no_qc,
            qc_window: self.qc_window,
            label_names: self.label_names.clone(),
            quiet: self.quiet,
        })
    }
}

/// Runs `sinew register`.
pub fn run(args: RegisterArgs) -> anyhow::Result<()> {
    let params = args.params.params()?;
    let request = args.request()?;
    common::with_threads(args.threads, || run_pair(&request, &params).map(|_| ()))
}

/// Registers one pair and writes its outputs; returns the report (used by `cohort` too).
pub fn run_pair(args: &PairRequest, params: &RegParams) -> anyhow::Result<Report> {
    let t_all = Instant::now();
    let scan_opts = &args.scan;
    let inputs = Inputs::load(
        &args.fixed,
        &args.moving,
        args.fixed_labels.as_deref(),
        args.moving_labels.as_deref(),
        args.mask.as_deref(),
        args.nan,
    )?;
    let scans = &inputs.scans;
    let mut timings = sinew_solve::Timings { load_s: Some(t_all.elapsed().as_secs_f64()), ..Default::default() };
    let mut out_paths =
        OutPaths::new(&args.out, args.moving_labels.is_some(), args.npy, args.qc, args.out_format.extension());
    out_paths.affine = Some(args.out.join("affine.json"));
    common::prepare_out_dir(&args.out, &out_paths.all(), &inputs.paths())?;
    let moving_resampled = !scans.fixed.grid.same_as(&scans.moving.grid, 1e-3);

    let reg = register_with_progress(&scans.fixed, &scans.moving, scans.mask.as_ref(), params, scan_opts, args)?;
    timings.record(&reg);
    timings.register_s = t_all.elapsed().as_secs_f64();
    let linear_map = sinew_grid::Affine::from_4x4(reg.linear_map);
    let has_linear = linear_map != sinew_grid::Affine::IDENTITY || reg.linear.is_some();
    if !has_linear {
        out_paths.affine = None;
    }
    if let Some(o) = reg.initial.overlap_final.filter(|&o| o < sinew_solve::frames::WARN_OVERLAP) {
        eprintln!(
            "warning: {} and {}: the bodies overlap only {:.0} % after the initial alignment; check that both scans show the same part of the body (qc.png)",
            args.fixed.display(),
            args.moving.display(),
            100.0 * o
        );
    }

    // The warped scan and labels and the Jacobian determinant on the fixed native grid,
    // from the native field evaluated slab by slab (never held whole).
    let (native, jacobian) = reg.native_results(&scans.moving, scans.moving_labels.as_ref(), &mut timings);

    let dice = match (&scans.fixed_labels, &scans.moving_labels, &native.warped_labels) {
        (Some(f), Some(m), Some(w)) => Some(common::dice_report(f, m, w)?),
        _ => None,
    };

    let t = Instant::now();
    // A stale report would mark a folder of mixed old and new outputs complete: remove it
    // first (and a stale affine.json that this run does not write); if any write fails (full
    // disk, ...), remove this run's outputs so that no partial set is left behind.
    remove_files([&out_paths.report]);
    if out_paths.affine.is_none() {
        remove_files([args.out.join("affine.json")]);
    }
    // The stage ran after the initial alignment; the file holds the whole linear map.
    let linear = reg.linear_record();
    let written = (|| -> anyhow::Result<Report> {
        // The QC sheet is drawn and the inputs hashed while the outputs are written.
        let (written, (qc, records)) = rayon::join(
            || write_outputs(&out_paths, &reg.field, args.field_units.into(), &native),
            || (out_paths.qc.as_ref().map(|_| draw_qc(args, scans, &reg, &native)).transpose(), inputs.records()),
        );
        written?;
        let qc = qc?;
        if let Some(path) = &out_paths.affine {
            common::write_json(path, &LinearRecord { matrix: reg.linear_map, initial: &reg.initial, stage: &linear })?;
        }
        timings.write_s = Some(t.elapsed().as_secs_f64());
        timings.total_s = t_all.elapsed().as_secs_f64();
        timings.peak_rss_mb = common::peak_rss_mb();
        let report = Report {
            caution: common::CAUTION,
            sinew_version: env!("CARGO_PKG_VERSION"),
            inputs: records?,
            params: params.clone(),
            scan: scan_opts.clone(),
            nan: inputs.nan,
            field_units: args.field_units,
            threads: rayon::current_num_threads(),
            moving_resampled,
            working_grid: reg.working.clone(),
            moving_working_grid: reg.moving_working.clone(),
            working_is_fixed_grid: reg.working_is_fixed_grid,
            initial_alignment: reg.initial.clone(),
            linear_map: reg.linear_map,
            linear,
            timings,
            levels: reg.levels.clone(),
            jacobian,
            dice,
            qc,
            outputs: out_paths.all().iter().map(|p| p.display().to_string()).collect(),
        };
        // The report is written last: its presence marks a complete output folder.
        common::write_json(&out_paths.report, &report)?;
        Ok(report)
    })();
    let report = written.inspect_err(|_| remove_files(out_paths.all()))?;
    if !args.quiet {
        print_summary(&args.out, &report);
    }
    Ok(report)
}

/// `affine.json`: the whole linear part of the map and where it came from.
#[derive(Serialize)]
struct LinearRecord<'a> {
    /// 4×4 world mm: fixed point `x` ↦ moving point `A·x` (initial alignment, then stage).
    matrix: [[f64; 4]; 4],
    /// The initial alignment.
    initial: &'a sinew_solve::frames::InitialAlignment,
    /// The rigid/affine stage (its `matrix` is the whole map too).
    stage: &'a Option<sinew_solve::affine::AffineEstimate>,
}

/// One line for the QC sheet: the initial alignment and the body overlap.
fn initial_line(reg: &ScanRegistration) -> String {
    let i = &reg.initial;
    let t = sinew_grid::Affine::from_4x4(reg.linear_map).apply(i.fixed_body.centre_mm);
    let shift: Vec<String> = (0..3).map(|d| format!("{:.0}", t[d] - i.fixed_body.centre_mm[d])).collect();
    format!(
        "initial alignment {} ({}); body centre moved ({}) mm; body overlap {:.2} -> {:.2}",
        if i.applied { "applied" } else { "not needed" },
        match i.mode {
            InitialMode::Auto => "auto",
            InitialMode::Centres => "centres",
            InitialMode::Axes => "axes",
            InitialMode::Off => "off",
        },
        shift.join(", "),
        i.overlap_identity,
        i.overlap_final.unwrap_or(i.overlap_initial)
    )
}

fn register_with_progress(
    fixed: &Image,
    moving: &Image,
    mask: Option<&LabelMap>,
    params: &RegParams,
    scan: &ScanOptions,
    args: &PairRequest,
) -> anyhow::Result<ScanRegistration> {
    // The driver drops the coarsest levels of coarse scans (`RegParams::for_spacing`): the
    // bar's length is the plan it reports with every event.
    let pb = ui::progress(params.planned_iterations() as u64, "registering", args.quiet);
    let mut done_before = 0usize;
    let mut last_level = usize::MAX;
    let mut level_iters = 0usize;
    let reg = sinew_solve::register_scans(fixed, moving, mask, params, scan, &mut |p| {
        pb.set_length(p.planned_iterations as u64);
        if p.level != last_level && p.stage == Stage::Descriptors {
            done_before += level_iters;
            level_iters = 0;
            last_level = p.level;
        }
        let stage = match p.stage {
            Stage::Pyramid => "pyramid",
            Stage::Descriptors => "descriptors",
            Stage::Optimise => {
                level_iters = p.iterations;
                pb.set_position((done_before + p.iteration) as u64);
                "optimise"
            }
            Stage::Jacobian => "jacobian",
        };
        pb.set_message(format!("level {} {}", p.level, stage));
    })
    .with_context(|| format!("registering {} to {}", args.moving.display(), args.fixed.display()))?;
    pb.finish_and_clear();
    Ok(reg)
}

struct OutPaths {
    field: PathBuf,
    npy: Option<PathBuf>,
    warped: PathBuf,
    warped_labels: Option<PathBuf>,
    jacdet: PathBuf,
    qc: Option<PathBuf>,
    affine: Option<PathBuf>,
    report: PathBuf,
}

impl OutPaths {
    fn new(dir: &Path, labels: bool, npy: bool, qc: bool, ext: &str) -> OutPaths {
        OutPaths {
            field: dir.join(format!("field.{ext}")),
            npy: npy.then(|| dir.join("field.npy")),
            warped: dir.join(format!("warped.{ext}")),
            warped_labels: labels.then(|| dir.join(format!("warped_labels.{ext}"))),
            jacdet: dir.join(format!("jacdet.{ext}")),
            qc: qc.then(|| dir.join("qc.png")),
            affine: None,
            report: dir.join("report.json"),
        }
    }

    fn all(&self) -> Vec<PathBuf> {
        let mut v = vec![self.field.clone()];
        v.extend(self.npy.clone());
        v.push(self.warped.clone());
        v.extend(self.warped_labels.clone());
        v.push(self.jacdet.clone());
        v.extend(self.qc.clone());
        v.extend(self.affine.clone());
        v.push(self.report.clone());
        v
    }
}

/// Removes those of `paths` that exist (best effort: this runs on the way out of an error).
fn remove_files<P: AsRef<Path>>(paths: impl IntoIterator<Item = P>) {
    for p in paths {
        let _ = std::fs::remove_file(p);
    }
}

fn write_outputs(
    p: &OutPaths,
    field: &sinew_solve::NativeField,
    units: FieldUnits,
    native: &sinew_solve::NativeOutputs,
) -> anyhow::Result<()> {
    // The files are independent: the field on one side, the volumes on the other (each
    // writer's bytes do not depend on what runs beside it).
    let (field_written, volumes_written) = rayon::join(
        || -> anyhow::Result<()> {
            write_native_field(&p.field, field, units)?;
            if let Some(npy) = &p.npy {
                // `.npy` is channel-last: the whole field is formed once (3 × 4 bytes per voxel).
                sinew_io::write_npy_field(npy, &field.to_field())?;
            }
            Ok(())
        },
        || -> anyhow::Result<()> {
            sinew_io::write_image(&p.warped, &native.warped)?;
            if let (Some(path), Some(l)) = (&p.warped_labels, &native.warped_labels) {
                sinew_io::write_labels(path, l)?;
            }
            sinew_io::write_image(&p.jacdet, &native.jacdet)?;
            Ok(())
        },
    );
    field_written.and(volumes_written)
}

/// Writes the native field block by block of `k` planes (about 4 M voxels each), as
/// `sinew_io::write_field` would write the whole field: component 0 on every plane, then 1,
/// then 2, each in `units` (mm: `u_mm = M·u_vox` with `M` the fixed grid's linear part).
fn write_native_field(path: &Path, field: &sinew_solve::NativeField, units: FieldUnits) -> anyhow::Result<()> {
    if let Some(whole) = field.as_full() {
        // Held whole (the registration ran on the fixed grid): read it where it lies.
        sinew_io::write_field(path, whole, units)?;
        return Ok(());
    }
    let grid = field.grid();
    let [nx, ny, nz] = grid.shape();
    let step = ((4usize << 20) / (nx * ny)).clamp(1, nz);
    let n = nx * ny * step;
    let mut vox = [vec![0.0f32; n], vec![0.0f32; n], vec![0.0f32; n]];
    let mut mm = vec![0.0f32; if units == FieldUnits::Mm { n } else { 0 }];
    let lin = grid.affine().linear();
    let mut w = sinew_io::field_plane_writer(path, grid, units)?;
    for c in 0..3 {
        for k0 in (0..nz).step_by(step) {
            let len = nx * ny * step.min(nz - k0);
            let [a, b, d] = &mut vox;
            field.fill_planes(k0, [&mut a[..len], &mut b[..len], &mut d[..len]]);
            match units {
                FieldUnits::Voxel => w.write_f32(&vox[c][..len])?,
                FieldUnits::Mm => {
                    // As Field::to_world_mm: in f64, rounded once.
                    let r = lin[c];
                    for (t, o) in mm[..len].iter_mut().enumerate() {
                        let v = [vox[0][t] as f64, vox[1][t] as f64, vox[2][t] as f64];
                        *o = (r[0] * v[0] + r[1] * v[1] + r[2] * v[2]) as f32;
                    }
                    w.write_f32(&mm[..len])?
                }
            }
        }
    }
    w.finish()?;
    Ok(())
}

/// `qc.png`, drawn on the working grid (the registration's grid: about 2 mm, enough for a
/// sheet of three planes): the fixed scan, the moving scan after the linear part of the map
/// (NaN = padding outside the moving scan), and the moving scan and labels warped by the whole
/// map at working resolution, with that field and its Jacobian. When the registration ran on
/// the fixed grid itself, the native outputs are drawn.
fn draw_qc(
    args: &PairRequest,
    inputs: &PairScans,
    reg: &ScanRegistration,
    native: &sinew_solve::NativeOutputs,
) -> anyhow::Result<crate::cmd::qc::QcRecord> {
    let wgrid = &reg.fixed_working.grid;
    let on_w = |l: &LabelMap| sinew_grid::resample::resample_labels(l, wgrid);
    let moving_labels_w = inputs.moving_labels.as_ref().map(on_w);
    let note = initial_line(reg);
    let names = sinew_cohort::label_names_for(args.label_names.as_deref(), args.fixed_labels.as_deref())?;
    if let Some(field) = reg.field.as_full() {
        let input = sinew_qc::QcInput {
            fixed: &reg.fixed_working,
            moving_on_fixed: &reg.moving_before,
            warped: &native.warped,
            field,
            jacdet: &native.jacdet,
            fixed_labels: inputs.fixed_labels.as_ref(),
            moving_labels_on_fixed: moving_labels_w.as_ref(),
            warped_labels: native.warped_labels.as_ref(),
            title: String::new(),
            label_names: None,
        };
        return crate::cmd::qc::qc_for_pair(
            &args.out,
            &args.fixed,
            &args.moving,
            input,
            Some(&note),
            args.qc_window,
            &names,
        );
    }
    let field = reg.field.on_working_grid();
    let pad = inputs.moving.finite_range().map_or(0.0, |r| r.0);
    let warped = sinew_transform::warp_image_from(&inputs.moving, &field, Border::Constant(pad));
    let warped_labels = inputs.moving_labels.as_ref().map(|l| sinew_transform::warp_labels_from(l, &field));
    let jacdet = sinew_transform::jacobian_determinant(&field);
    let fixed_labels = inputs.fixed_labels.as_ref().map(on_w);
    let input = sinew_qc::QcInput {
        fixed: &reg.fixed_working,
        moving_on_fixed: &reg.moving_before,
        warped: &warped,
        field: &field,
        jacdet: &jacdet,
        fixed_labels: fixed_labels.as_ref(),
        moving_labels_on_fixed: moving_labels_w.as_ref(),
        warped_labels: warped_labels.as_ref(),
        title: String::new(),
        label_names: None,
    };
    crate::cmd::qc::qc_for_pair(&args.out, &args.fixed, &args.moving, input, Some(&note), args.qc_window, &names)
}

fn print_summary(out: &Path, r: &Report) {
    let j = &r.jacobian;
    println!(
        "registered in {:.2} s (total {:.2} s, {} threads); folding {:.4} % ({} voxels), SDlogJ {:.3}, det [{:.3}, {:.3}]",
        r.timings.register_s,
        r.timings.total_s,
        r.threads,
        100.0 * j.folding_fraction,
        j.folded_voxels,
        j.sd_log_j,
        j.min,
        j.max
    );
    if let Some(d) = &r.dice {
        println!("mean Dice {:.3} -> {:.3} over {} labels", d.mean_before, d.mean_after, d.labels.len());
    }
    println!("outputs in {}", out.display());
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_empty_iteration_list_is_an_error_not_a_panic() {
        // A config file's `iterations = []` leaves nothing to stretch to the level count that
        // --levels asks for: an error naming the file (the binary exits with 2), with or
        // without --levels.
        let dir = tempfile::tempdir().unwrap();
        let cfg = dir.path().join("params.toml");
        std::fs::write(&cfg, "iterations = []\n").unwrap();
        let preset = PresetArgs { preset: "default".into(), config: Some(cfg), iterations: None };
        for levels in [Some(3), None] {
            let mut a = ParamArgs::base(&preset, false);
            a.levels = levels;
            let e = format!("{:#}", a.params().unwrap_err());
            assert!(e.contains("params.toml") && e.contains("iterations"), "{levels:?}: {e}");
        }
    }
}
