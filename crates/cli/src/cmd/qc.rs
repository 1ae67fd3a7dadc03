//! `sinew qc`: the quality-control sheet (PNG) of any fixed/moving/field triple, and
//! [`qc_for_pair`], which `register` uses to put `qc.png` beside a pair's outputs.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use clap::Args;
use sinew_grid::{resample, Border, Field, Image, LabelMap};
use sinew_io::{FieldReadOptions, FieldUnits};
use sinew_qc::{QcInput, QcOptions, Window};

use crate::cmd::common::{Inputs, NanPolicy, PairScans};
use crate::cmd::register::UnitsArg;

/// Arguments of `sinew qc`.
#[derive(Args, Debug)]
#[command(after_long_help = "Examples:
  sinew qc -f fixed.nii.gz -m moving.nii.gz --field out/field.nii.gz -o out/qc.png
  sinew qc -f fixed.nii.gz -m moving.nii.gz --field net_field.nii.gz --units voxel \\
      --fixed-labels fixed_labels.nii.gz --moving-labels moving_labels.nii.gz \\
      --point 70,60,96 --window -150,250 -o qc.png

The sheet shows the axial, coronal and sagittal planes through one voxel (default: the
centre of the fixed labels, else of the grid). Columns: fixed, moving before, warped after,
fixed (magenta) vs warped (green), the deformation grid over the fixed scan, and the
Jacobian determinant (blue = compression, red = expansion, yellow = fold, det <= 0).
The field must follow sinew's conventions: on the FIXED grid, pulling:
warped(x) = moving(x + u(x)).")]
pub struct QcArgs {
    /// The fixed scan (NIfTI): the field's grid.
    #[arg(long, short = 'f', value_name = "NII")]
    pub fixed: PathBuf,
    /// The moving scan (NIfTI, any grid).
    #[arg(long, short = 'm', value_name = "NII")]
    pub moving: PathBuf,
    /// The displacement field (NIfTI (nx, ny, nz, 1, 3) or (nx, ny, nz, 3)) on the fixed grid.
    #[arg(long, value_name = "NII")]
    pub field: PathBuf,
    /// The output PNG.
    #[arg(long, short = 'o', value_name = "PNG")]
    pub out: PathBuf,
    /// Fixed label map: outlines, the default point, Dice in the title.
    #[arg(long, value_name = "NII")]
    pub fixed_labels: Option<PathBuf>,
    /// Moving label map: Dice before and after in the title.
    #[arg(long, value_name = "NII")]
    pub moving_labels: Option<PathBuf>,
    /// Voxel (i,j,k) of the fixed grid the three planes pass through.
    #[arg(long, value_name = "I,J,K", value_delimiter = ',')]
    pub point: Option<Vec<usize>>,
    /// Grey window `lo,hi` in the fixed scan's units, or `auto`: -200,300 (soft tissue) when
    /// the fixed scan is in Hounsfield units (its values reach <= -500 and >= 300), else the
    /// 1st to 99th percentile of its foreground.
    #[arg(long, value_name = "LO,HI|auto", default_value = "auto", allow_hyphen_values = true, value_parser = window_arg)]
    pub window: Window,
    /// Units of the field's vectors when the file does not say (files written by sinew do).
    #[arg(long, value_enum)]
    pub units: Option<UnitsArg>,
    /// Pixels along the longest physical side of a panel.
    #[arg(long, default_value_t = 220, value_name = "PX")]
    pub panel_px: u32,
    /// Voxels between deformation grid lines.
    #[arg(long, default_value_t = 6, value_name = "N")]
    pub grid_every: usize,
    /// Label names for the legend: a JSON object `{"1": "liver", ...}` (default: `labels.json`
    /// beside --fixed-labels when there is one; else labels are shown by number).
    #[arg(long, value_name = "JSON")]
    pub label_names: Option<PathBuf>,
    /// Title (default: the file names of the pair).
    #[arg(long)]
    pub title: Option<String>,
}

/// Parses a grey window (`--window` of `qc`, `--qc-window` of `register`, `cohort`, `demo`):
/// `lo,hi` in the scan's units, or `auto` (see [`sinew_qc::resolve_window`]).
pub fn parse_window(s: &str) -> Result<Window, String> {
    if s.trim().eq_ignore_ascii_case("auto") {
        return Ok(Window::Auto);
    }
    let parts: Vec<&str> = s.split(',').map(str::trim).collect();
    let [lo, hi] = parts[..] else { return Err(format!("{s}: expected lo,hi (e.g. -200,300) or auto")) };
    let num = |t: &str| t.parse::<f32>().map_err(|_| format!("{s}: {t} is not a number"));
    let (lo, hi) = (num(lo)?, num(hi)?);
    if !(lo.is_finite() && hi.is_finite() && lo < hi) {
        return Err(format!("{s}: need finite lo < hi"));
    }
    Ok(Window::Range { lo, hi })
}

/// clap's value parser for window options.
pub fn window_arg(s: &str) -> Result<Window, String> {
    parse_window(s)
}

/// A short name for a scan: its file name without `.nii` / `.nii.gz`.
pub fn scan_name(p: &Path) -> String {
    let n = p.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    n.trim_end_matches(".gz").trim_end_matches(".nii").to_string()
}

/// Runs `sinew qc`.
pub fn run(args: QcArgs) -> anyhow::Result<()> {
    let mut inputs_list: Vec<&Path> = vec![&args.fixed, &args.moving, &args.field];
    inputs_list.extend(args.fixed_labels.as_deref());
    inputs_list.extend(args.moving_labels.as_deref());
    sinew_io::atomic::ensure_not_input(&args.out, &inputs_list)?;
    let inputs = Inputs::load(
        &args.fixed,
        &args.moving,
        args.fixed_labels.as_deref(),
        args.moving_labels.as_deref(),
        None,
        NanPolicy::Refuse,
    )?
    .scans;
    let fopts = FieldReadOptions { units: args.units.map(FieldUnits::from), ..Default::default() };
    let (field, _) = sinew_io::read_field(&args.field, fopts)?;
    if !field.is_finite() {
        bail!("{}: the field holds NaN or infinite vectors", args.field.display());
    }
    if !field.grid.same_as(&inputs.fixed.grid, 1e-3) {
        bail!(
            "{}: the field's grid {:?} is not the fixed scan's grid {:?} (a field lives on the fixed grid)",
            args.field.display(),
            field.grid.shape(),
            inputs.fixed.grid.shape()
        );
    }
    let point = match args.point.as_deref() {
        Some([i, j, k]) => Some([*i, *j, *k]),
        Some(_) => bail!("--point needs three voxel indices i,j,k"),
        None => None,
    };
    let opts = QcOptions {
        point,
        window: args.window,
        panel_px: args.panel_px,
        grid_every: args.grid_every,
        ..QcOptions::default()
    };
    let title = args.title.clone().unwrap_or_else(|| pair_title(&args.fixed, &args.moving));
    let moving_on_fixed = on_fixed_grid(&inputs.moving, &inputs.fixed);
    let pad = inputs.moving.finite_range().map_or(0.0, |r| r.0);
    let warped = sinew_transform::warp_image_from(&inputs.moving, &field, Border::Constant(pad));
    let warped_labels = inputs.moving_labels.as_ref().map(|l| sinew_transform::warp_labels_from(l, &field));
    let jacdet = sinew_transform::jacobian_determinant(&field);
    let names = sinew_cohort::label_names_for(args.label_names.as_deref(), args.fixed_labels.as_deref())?;
    let sheet =
        render(&inputs, &moving_on_fixed, &warped, &field, &jacdet, warped_labels.as_ref(), &names, title, &opts)?;
    sinew_qc::write_png(&args.out, &sheet.image)?;
    println!(
        "wrote {} ({}×{} px, planes through voxel {:?}, window {} … {} ({}))",
        args.out.display(),
        sheet.image.width(),
        sheet.image.height(),
        sheet.point,
        sheet.window.0,
        sheet.window.1,
        sheet.window_rule.name()
    );
    Ok(())
}

/// "fixed A ← moving B".
fn pair_title(fixed: &Path, moving: &Path) -> String {
    format!("fixed {}  ←  moving {}", scan_name(fixed), scan_name(moving))
}

/// The moving scan on the fixed grid (the original when it already is on it).
fn on_fixed_grid(moving: &Image, fixed: &Image) -> Image {
    if moving.grid.same_as(&fixed.grid, 1e-3) {
        moving.clone()
    } else {
        resample::resample_image(moving, &fixed.grid, Border::Nearest)
    }
}

#[allow(clippy::too_many_arguments)]
fn render(
    inputs: &PairScans,
    moving_on_fixed: &Image,
    warped: &Image,
    field: &Field,
    jacdet: &Image,
    warped_labels: Option<&LabelMap>,
    names: &BTreeMap<u16, String>,
    title: String,
    opts: &QcOptions,
) -> anyhow::Result<sinew_qc::QcSheet> {
    let moving_labels_on_fixed =
        inputs.moving_labels.as_ref().map(|l| resample::resample_labels(l, &inputs.fixed.grid));
    let input = QcInput {
        fixed: &inputs.fixed,
        moving_on_fixed,
        warped,
        field,
        jacdet,
        fixed_labels: inputs.fixed_labels.as_ref(),
        moving_labels_on_fixed: moving_labels_on_fixed.as_ref(),
        warped_labels,
        title,
        label_names: Some(names),
    };
    Ok(sinew_qc::render_qc_sheet(&input, opts)?)
}

/// What `report.json` records about a pair's QC sheet.
#[derive(serde::Serialize, Clone, Debug)]
pub struct QcRecord {
    /// The sheet's file.
    pub path: String,
    /// The grey window `[lo, hi]` of columns 1–5, in the fixed scan's units.
    pub window: [f32; 2],
    /// How it was chosen: `explicit`, `hounsfield` (auto on a scan in HU) or `percentiles`
    /// (auto otherwise: 1st to 99th percentile of the fixed scan's foreground).
    pub window_rule: &'static str,
}

/// Writes `DIR/qc.png` for a registered pair with the default options and the grey `window`,
/// and returns what the report records of it.
///
/// `fixed` and `moving` are the input paths (for the title); `input` the panels (all on one
/// grid: `register` draws them on its working grid); `note` is appended to the title
/// (register puts the initial alignment there).
pub fn qc_for_pair<'a>(
    out_dir: &Path,
    fixed: &Path,
    moving: &Path,
    mut input: QcInput<'a>,
    note: Option<&str>,
    window: Window,
    names: &'a BTreeMap<u16, String>,
) -> anyhow::Result<QcRecord> {
    let path = out_dir.join("qc.png");
    let opts = QcOptions { window, ..QcOptions::default() };
    let mut title = pair_title(fixed, moving);
    if let Some(n) = note {
        title = format!("{title}   ·   {n}");
    }
    input.title = title;
    input.label_names = Some(names);
    let sheet = sinew_qc::render_qc_sheet(&input, &opts)
        .with_context(|| format!("{}: drawing the QC sheet", path.display()))?;
    sinew_qc::write_png(&path, &sheet.image)?;
    Ok(QcRecord {
        path: path.display().to_string(),
        window: [sheet.window.0, sheet.window.1],
        window_rule: sheet.window_rule.name(),
    })
}
