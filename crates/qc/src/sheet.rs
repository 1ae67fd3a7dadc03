//! The QC sheet of one registered pair.
//!
//! Rows are the axial, coronal and sagittal planes through one voxel; columns are
//! 1. the fixed scan, 2. the moving scan before registration (on the fixed grid),
//! 3. the warped moving scan, 4. a colour overlay of fixed (magenta) against warped (green),
//!    grey where they agree, 5. the deformation grid over the dimmed fixed scan, and
//! 6. the Jacobian determinant with a colour bar, folds (`det ≤ 0`) in [`FOLD`](crate::colour::FOLD).
//!
//! Columns 1–3 carry the outlines of the fixed labels when they are given, so the eye can check
//! how well the moving anatomy meets them before and after; a legend below the panels gives
//! each label's colour and name. Every panel has orientation letters at its edges (from the
//! affine, see [`PlaneGeometry::edge_letters`](crate::plane::PlaneGeometry::edge_letters)); the
//! Jacobian colour bar has triangles for the values beyond its ends. A title gives the pair
//! and its key figures (mean Dice before → after without the whole-body label and with it,
//! folding share, SDlogJ, determinant range) and the settings (point, window and how it was
//! chosen, pixel size).

use std::collections::BTreeMap;

use sinew_grid::interp::{nearest, trilinear};
use sinew_grid::{Border, Field, Image, LabelMap};
use sinew_transform::{jacobian_stats, JacobianStats};

use crate::canvas::{text_width, Rgb, RgbImage, TextStyle};
use crate::colour::{self, BACKGROUND, FOLD, GRID_LINE, TEXT, TEXT_DIM};
use crate::plane::{planes, PlaneGeometry, PlaneKind};
use crate::QcError;

/// The volumes of one pair, all on the FIXED grid.
pub struct QcInput<'a> {
    /// The fixed scan.
    pub fixed: &'a Image,
    /// The moving scan on the fixed grid before registration (resampled through world
    /// coordinates, or the original when it already is on the fixed grid).
    pub moving_on_fixed: &'a Image,
    /// The moving scan warped by the field.
    pub warped: &'a Image,
    /// The displacement field (voxels, pull convention).
    pub field: &'a Field,
    /// Its Jacobian determinant (from `sinew_transform::jacobian_determinant`).
    pub jacdet: &'a Image,
    /// Fixed labels: outlines in columns 1–3, default point, Dice.
    pub fixed_labels: Option<&'a LabelMap>,
    /// Moving labels on the fixed grid before registration: Dice before.
    pub moving_labels_on_fixed: Option<&'a LabelMap>,
    /// Warped moving labels: Dice after.
    pub warped_labels: Option<&'a LabelMap>,
    /// The first title line, e.g. `"fixed subject_00 ← moving subject_01"`.
    pub title: String,
    /// Label value → structure name (from `labels.json`) for the legend and to find the
    /// whole-body label; labels without a name are shown by number.
    pub label_names: Option<&'a BTreeMap<u16, String>>,
}

/// Intensity window of the grey panels.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Window {
    /// Values `lo..hi` map to black..white (e.g. Hounsfield units for CT).
    Range {
        /// Value shown black.
        lo: f32,
        /// Value shown white.
        hi: f32,
    },
    /// The 1st to 99th percentile of the fixed scan's foreground (see [`resolve_window`]).
    Percentiles,
    /// [`Window::CT_SOFT`] when the fixed scan's values look like Hounsfield units, else
    /// [`Window::Percentiles`] (the rule is written out at [`resolve_window`]). The default.
    Auto,
}

impl Window {
    /// The soft-tissue CT window: −200 to 300 HU (common practice for abdominal CT).
    pub const CT_SOFT: Window = Window::Range { lo: -200.0, hi: 300.0 };
}

/// How the grey window of a sheet was chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum WindowRule {
    /// Given by the user.
    Explicit,
    /// `auto` on a scan in Hounsfield units: the soft-tissue window −200 … 300 HU.
    Hounsfield,
    /// The 1st … 99th percentile of the fixed scan's foreground.
    Percentiles,
}

impl WindowRule {
    /// Lower-case name, as recorded in `report.json` (`explicit`, `hounsfield`, `percentiles`).
    pub fn name(self) -> &'static str {
        match self {
            WindowRule::Explicit => "explicit",
            WindowRule::Hounsfield => "hounsfield",
            WindowRule::Percentiles => "percentiles",
        }
    }
}

/// A grey window resolved for one fixed scan: values `lo … hi` map to black … white.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ResolvedWindow {
    /// Value shown black (in the scan's units).
    pub lo: f32,
    /// Value shown white (in the scan's units).
    pub hi: f32,
    /// How it was chosen.
    pub rule: WindowRule,
}

/// Smallest value a scan must reach for `auto` to take it as Hounsfield units (air is
/// about −1000 HU, so a CT that shows any air or lung goes below it).
pub const HU_MIN_BELOW: f32 = -500.0;
/// Largest value a scan must reach for `auto` to take it as Hounsfield units (bone and
/// contrast lie above it).
pub const HU_MAX_ABOVE: f32 = 300.0;

/// How a sheet is drawn.
#[derive(Clone, Debug, PartialEq)]
pub struct QcOptions {
    /// Voxel `(i, j, k)` the three planes pass through; default: the centre (rounded mean
    /// voxel position) of the fixed labels' non-zero voxels, else the grid centre.
    pub point: Option<[usize; 3]>,
    /// Grey window for columns 1–5.
    pub window: Window,
    /// Pixels along the longest physical extent of the fixed grid (sets the common pixel
    /// size in mm).
    pub panel_px: u32,
    /// Voxels between deformation grid lines.
    pub grid_every: usize,
    /// Jacobian colour scale: `log₂ det` from `−range` (full blue) to `+range` (full red).
    pub jacobian_log2_range: f32,
}

impl Default for QcOptions {
    fn default() -> Self {
        QcOptions { point: None, window: Window::Auto, panel_px: 220, grid_every: 6, jacobian_log2_range: 1.0 }
    }
}

/// Sheet columns, left to right.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Column {
    /// The fixed scan.
    Fixed,
    /// The moving scan before registration.
    Moving,
    /// The warped moving scan.
    Warped,
    /// Colour overlay fixed (magenta) vs warped (green).
    Overlay,
    /// Deformation grid over the fixed scan.
    Grid,
    /// Jacobian determinant.
    Jacobian,
}

impl Column {
    /// All columns in order.
    pub const ALL: [Column; 6] =
        [Column::Fixed, Column::Moving, Column::Warped, Column::Overlay, Column::Grid, Column::Jacobian];

    /// The column header as coloured pieces.
    fn header(self) -> Vec<(&'static str, Rgb)> {
        match self {
            Column::Fixed => vec![("fixed", TEXT)],
            Column::Moving => vec![("moving (before)", TEXT)],
            Column::Warped => vec![("warped (after)", TEXT)],
            Column::Overlay => vec![("fixed", [255, 90, 255]), (" vs ", TEXT), ("warped", [90, 255, 90])],
            Column::Grid => vec![("deformation grid", TEXT)],
            Column::Jacobian => vec![("Jacobian determinant", TEXT)],
        }
    }
}

/// One panel of a sheet.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Panel {
    /// Its column.
    pub column: Column,
    /// Its plane and pixel ↔ voxel map.
    pub plane: PlaneGeometry,
    /// Left edge in sheet pixels.
    pub x: u32,
    /// Top edge in sheet pixels.
    pub y: u32,
}

/// The figures in a sheet's title.
#[derive(Clone, Debug, PartialEq)]
pub struct KeyFigures {
    /// Mean Dice over all the fixed labels before registration.
    pub dice_before: Option<f64>,
    /// Mean Dice over all the fixed labels after registration.
    pub dice_after: Option<f64>,
    /// Number of labels scored.
    pub labels: usize,
    /// The whole-body label (see [`whole_body_label`]), when there is one.
    pub body_label: Option<u16>,
    /// Mean Dice before registration over the labels other than the whole-body label (the
    /// headline figure: the body's large overlap would flatter the mean).
    pub dice_before_without_body: Option<f64>,
    /// Mean Dice after registration without the whole-body label.
    pub dice_after_without_body: Option<f64>,
    /// Jacobian statistics over the whole fixed grid.
    pub jacobian: JacobianStats,
}

/// One entry of a sheet's label legend.
#[derive(Clone, Debug, PartialEq)]
pub struct LegendEntry {
    /// The label value.
    pub label: u16,
    /// The text shown: its name from `labels.json`, else `label N`.
    pub text: String,
    /// Left edge of its colour swatch (sheet pixels).
    pub x: u32,
    /// Top edge of its colour swatch (sheet pixels).
    pub y: u32,
}

/// Side of a legend swatch in pixels.
pub const LEGEND_SWATCH: u32 = 12;

/// Where the Jacobian colour bar sits on a sheet.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ColourBarLayout {
    /// Left edge.
    pub x: u32,
    /// Width in pixels.
    pub width: u32,
    /// First row of the graded bar (`log₂ det = +range`).
    pub top: u32,
    /// One past the last row of the graded bar (`log₂ det = −range`).
    pub bottom: u32,
    /// Height of the triangles above and below the bar that stand for values beyond its
    /// ends (`det > 2^range`: red triangle on top; `0 < det < 2^−range`: blue below).
    pub triangle: u32,
}

/// A rendered sheet with its layout.
#[derive(Clone, Debug)]
pub struct QcSheet {
    /// The picture.
    pub image: RgbImage,
    /// Every panel (3 planes × 6 columns), row by row.
    pub panels: Vec<Panel>,
    /// The voxel the planes pass through.
    pub point: [usize; 3],
    /// The (lo, hi) grey window applied.
    pub window: (f32, f32),
    /// How the window was chosen.
    pub window_rule: WindowRule,
    /// Pixel size in mm.
    pub mm_per_px: f64,
    /// The figures in the title.
    pub figures: KeyFigures,
    /// The label legend (empty without fixed labels).
    pub legend: Vec<LegendEntry>,
    /// The Jacobian colour bar.
    pub colour_bar: ColourBarLayout,
}

impl QcSheet {
    /// The panel of `column` in the row of plane `kind`.
    pub fn panel(&self, kind: PlaneKind, column: Column) -> &Panel {
        self.panels.iter().find(|p| p.plane.kind == kind && p.column == column).expect("every panel is laid out")
    }
}

const MARGIN: u32 = 14;
const ROW_LABEL_W: u32 = 78;
const GAP: u32 = 8;
const TITLE_H: u32 = 58;
const HEADER_H: u32 = 22;
const BAR_W: u32 = 96;

fn style(px: f32, colour: Rgb, bold: bool) -> TextStyle {
    TextStyle { bold, px, colour }
}

fn check_grid(what: &'static str, fixed: &Image, g: &sinew_grid::Grid) -> Result<(), QcError> {
    if fixed.grid.same_as(g, 1e-3) {
        Ok(())
    } else {
        Err(QcError::GridMismatch { what, expected: fixed.grid.shape(), found: g.shape() })
    }
}

/// The whole-body label of a label map: the label named `body`, `whole body` or `body
/// outline` in `names` (any case; `_` and `-` count as spaces), else, when no label is so
/// named, a label without a name in `names` that holds more than half of all non-zero voxels
/// (a mask of the whole body that the organs are cut out of or lie in). `None` otherwise.
pub fn whole_body_label(labels: &LabelMap, names: Option<&BTreeMap<u16, String>>) -> Option<u16> {
    let is_body = |n: &str| {
        let n = n.trim().to_lowercase().replace(['_', '-'], " ");
        matches!(n.as_str(), "body" | "whole body" | "body outline")
    };
    let counts = labels.label_counts();
    let present = |l: u16| counts.iter().any(|&(c, n)| c == l && n > 0);
    if let Some(names) = names {
        if let Some((&l, _)) = names.iter().find(|(&l, n)| l != 0 && is_body(n) && present(l)) {
            return Some(l);
        }
    }
    let total: usize = counts.iter().filter(|c| c.0 != 0).map(|c| c.1).sum();
    counts
        .iter()
        .filter(|&&(l, _)| l != 0 && !names.is_some_and(|m| m.contains_key(&l)))
        .find(|&&(_, n)| 2 * n > total)
        .map(|&(l, _)| l)
}

/// The default point: the rounded mean voxel position of the non-zero labels, else the
/// grid centre `n/2` along each axis.
pub fn default_point(grid: &sinew_grid::Grid, labels: Option<&LabelMap>) -> [usize; 3] {
    let s = grid.shape();
    if let Some(l) = labels {
        let mut sum = [0f64; 3];
        let mut count = 0usize;
        for ((i, j, k), &v) in l.data.indexed_iter() {
            if v != 0 {
                sum[0] += i as f64;
                sum[1] += j as f64;
                sum[2] += k as f64;
                count += 1;
            }
        }
        if count > 0 {
            return [0, 1, 2].map(|d| ((sum[d] / count as f64).round() as usize).min(s[d] - 1));
        }
    }
    [s[0] / 2, s[1] / 2, s[2] / 2]
}

/// Resolves a window against the fixed scan.
///
/// - [`Window::Range`]: as given (finite, `lo < hi`).
/// - [`Window::Auto`]: Hounsfield units are assumed when the scan's finite values reach both
///   `min ≤` [`HU_MIN_BELOW`] (−500) and `max ≥` [`HU_MAX_ABOVE`] (300); then the window is
///   [`Window::CT_SOFT`] (−200 … 300 HU). Otherwise (scans scaled to [0, 1], MR, …) it is
///   the percentile window below.
/// - [`Window::Percentiles`]: the foreground is every finite voxel above
///   `min + 0.02·(max − min)` (this leaves out air or background at the bottom of the range);
///   the window runs from its 1st to its 99th percentile (the value at rank
///   `round(q·(n − 1))` of the sorted values, `q = 0.01, 0.99`). When the foreground holds
///   fewer than 100 voxels all finite voxels are used; a flat result becomes `lo … lo + 1`.
///
/// Errors on an invalid range or a scan without finite voxels.
pub fn resolve_window(w: Window, fixed: &Image) -> Result<ResolvedWindow, QcError> {
    let percentiles = || -> Result<ResolvedWindow, QcError> {
        let (min, max) = fixed
            .finite_range()
            .ok_or_else(|| QcError::BadOption("percentile window of an image with no finite voxel".into()))?;
        let cut = min + 0.02 * (max - min);
        let mut v: Vec<f32> = fixed.as_slice().iter().copied().filter(|x| x.is_finite() && *x > cut).collect();
        if v.len() < 100 {
            v = fixed.as_slice().iter().copied().filter(|x| x.is_finite()).collect();
        }
        v.sort_by(f32::total_cmp);
        let at = |q: f64| v[((v.len() - 1) as f64 * q).round() as usize];
        let (lo, hi) = (at(0.01), at(0.99));
        let hi = if lo < hi { hi } else { lo + 1.0 };
        Ok(ResolvedWindow { lo, hi, rule: WindowRule::Percentiles })
    };
    match w {
        Window::Range { lo, hi } => {
            if !(lo.is_finite() && hi.is_finite() && lo < hi) {
                return Err(QcError::BadOption(format!("window {lo}..{hi}: need finite lo < hi")));
            }
            Ok(ResolvedWindow { lo, hi, rule: WindowRule::Explicit })
        }
        Window::Percentiles => percentiles(),
        Window::Auto => match fixed.finite_range() {
            Some((min, max)) if min <= HU_MIN_BELOW && max >= HU_MAX_ABOVE => {
                Ok(ResolvedWindow { lo: -200.0, hi: 300.0, rule: WindowRule::Hounsfield })
            }
            _ => percentiles(),
        },
    }
}

/// A window value for the title: 4 significant digits, no trailing zeros.
fn window_value(v: f32) -> String {
    let a = v.abs();
    let decimals = if a >= 1000.0 || a == 0.0 { 0 } else { (3 - a.log10().floor() as i32).clamp(0, 6) as usize };
    let s = format!("{v:.decimals$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// Renders the QC sheet of one pair (see the [module documentation](self)).
///
/// Errors when an input is not on the fixed grid, the point lies outside it, or an option is
/// out of range.
pub fn render_qc_sheet(input: &QcInput, opts: &QcOptions) -> Result<QcSheet, QcError> {
    let fixed = input.fixed;
    let grid = &fixed.grid;
    check_grid("moving scan (on the fixed grid)", fixed, &input.moving_on_fixed.grid)?;
    check_grid("warped scan", fixed, &input.warped.grid)?;
    check_grid("field", fixed, &input.field.grid)?;
    check_grid("Jacobian determinant", fixed, &input.jacdet.grid)?;
    for (what, l) in [
        ("fixed labels", input.fixed_labels),
        ("moving labels (on the fixed grid)", input.moving_labels_on_fixed),
        ("warped labels", input.warped_labels),
    ] {
        if let Some(l) = l {
            check_grid(what, fixed, &l.grid)?;
        }
    }
    if opts.panel_px < 16 || opts.panel_px > 4096 {
        return Err(QcError::BadOption(format!("panel size {} px: use 16 to 4096", opts.panel_px)));
    }
    if opts.grid_every == 0 {
        return Err(QcError::BadOption("grid line spacing must be at least one voxel".into()));
    }
    if !(opts.jacobian_log2_range.is_finite() && opts.jacobian_log2_range > 0.0) {
        return Err(QcError::BadOption(format!("Jacobian range {}: must be positive", opts.jacobian_log2_range)));
    }
    let shape = grid.shape();
    let point = opts.point.unwrap_or_else(|| default_point(grid, input.fixed_labels));
    if (0..3).any(|d| point[d] >= shape[d]) {
        return Err(QcError::PointOutside { point, shape });
    }
    let win = resolve_window(opts.window, fixed)?;
    let (lo, hi) = (win.lo, win.hi);
    let figures = key_figures(input)?;

    let spacing = grid.spacing();
    let longest = (0..3).map(|d| shape[d] as f64 * spacing[d]).fold(0.0, f64::max);
    let mm_per_px = longest / opts.panel_px as f64;
    let rows = planes(grid, point, mm_per_px);

    // Layout: column widths are the widest panel of the column; row heights the tallest.
    let col_w = rows.iter().map(|p| p.width).max().expect("three rows").max(120);
    let row_h: Vec<u32> = rows.iter().map(|p| p.height).collect();
    let panels_w = Column::ALL.len() as u32 * col_w + (Column::ALL.len() as u32 - 1) * GAP;
    let width = MARGIN + ROW_LABEL_W + panels_w + BAR_W + MARGIN;
    let top = MARGIN + TITLE_H + HEADER_H;
    let panels_bottom = top + row_h.iter().sum::<u32>() + 2 * GAP;
    let x0 = MARGIN + ROW_LABEL_W;
    let (legend, legend_h) = legend_layout(input, figures.body_label, x0, panels_bottom + 6, panels_w);
    let height = panels_bottom + legend_h + MARGIN + 18;
    let mut img = RgbImage::new(width, height, BACKGROUND);

    draw_title(&mut img, input, &figures, point, win, mm_per_px, opts);
    for (c, col) in Column::ALL.iter().enumerate() {
        let pieces = col.header();
        let cx = x0 + c as u32 * (col_w + GAP);
        let tw: f32 = pieces.iter().map(|&(t, c)| text_width(t, style(13.0, c, false))).sum();
        let mut tx = cx as f32 + ((col_w as f32 - tw) / 2.0).max(0.0);
        for (t, c) in pieces {
            tx += img.text(tx, (MARGIN + TITLE_H) as f32, t, style(13.0, c, false));
        }
    }

    let mut panels = Vec::with_capacity(18);
    let mut y = top;
    for (r, plane) in rows.iter().enumerate() {
        let axis = ["i", "j", "k"][plane.normal_axis];
        img.text(MARGIN as f32, y as f32 + 4.0, plane.kind.name(), style(14.0, TEXT, true));
        img.text(MARGIN as f32, y as f32 + 22.0, &format!("{axis} = {}", plane.index), style(12.0, TEXT_DIM, false));
        let py = y + (row_h[r] - plane.height) / 2;
        let letters = plane.edge_letters(grid);
        for (c, &column) in Column::ALL.iter().enumerate() {
            let px = x0 + c as u32 * (col_w + GAP) + (col_w - plane.width) / 2;
            let tile = render_panel(input, plane, column, (lo, hi), opts);
            img.blit(&tile, px as i64, py as i64);
            draw_edge_letters(&mut img, letters, px, py, plane.width, plane.height);
            panels.push(Panel { column, plane: *plane, x: px, y: py });
        }
        y += row_h[r] + GAP;
    }
    let bar_x = x0 + panels_w + 14;
    let colour_bar = draw_colour_bar(&mut img, bar_x, top, panels_bottom, opts.jacobian_log2_range);
    draw_legend(&mut img, &legend);
    let foot = "letters: R/L right/left, A/P anterior/posterior, S/I superior/inferior (from the NIfTI affine); \
                patient's right on the left, anterior/superior up (radiological)";
    img.text(x0 as f32, (height - MARGIN - 14) as f32, foot, style(11.0, TEXT_DIM, false));

    Ok(QcSheet {
        image: img,
        panels,
        point,
        window: (lo, hi),
        window_rule: win.rule,
        mm_per_px,
        figures,
        legend,
        colour_bar,
    })
}

const LEGEND_ROW: u32 = 20;

/// The legend entries (one per fixed label, ascending; the whole-body label `body` marked as
/// left out of the headline Dice) laid out left to right from `(x0, y0)` and wrapped at
/// `width` pixels; returns them with the legend's height.
fn legend_layout(input: &QcInput, body: Option<u16>, x0: u32, y0: u32, width: u32) -> (Vec<LegendEntry>, u32) {
    let Some(f) = input.fixed_labels else { return (Vec::new(), 0) };
    let st = style(12.0, TEXT, false);
    let (mut x, mut y) = (x0, y0);
    let mut out = Vec::new();
    for l in f.labels() {
        let mut text = match input.label_names.and_then(|m| m.get(&l)) {
            Some(n) => format!("{l} {n}"),
            None => format!("label {l}"),
        };
        if Some(l) == body {
            text += " (not in the headline Dice)";
        }
        let w = LEGEND_SWATCH + 5 + text_width(&text, st).ceil() as u32 + 16;
        if x > x0 && x + w > x0 + width {
            x = x0;
            y += LEGEND_ROW;
        }
        out.push(LegendEntry { label: l, text, x, y });
        x += w;
    }
    let h = if out.is_empty() { 0 } else { y + LEGEND_ROW - y0 };
    (out, h)
}

/// Draws the legend: each label's outline colour as a filled swatch, then its text.
fn draw_legend(img: &mut RgbImage, legend: &[LegendEntry]) {
    for e in legend {
        img.fill_rect(e.x as i64, e.y as i64, LEGEND_SWATCH, LEGEND_SWATCH, colour::label_colour(e.label));
        img.text((e.x + LEGEND_SWATCH + 5) as f32, e.y as f32 - 2.0, &e.text, style(12.0, TEXT, false));
    }
}

/// Colour of the orientation letters on the panels.
pub const LETTER: Rgb = [255, 196, 64];

/// The orientation letters at the middle of each edge of a panel at `(x, y)`, `w × h` pixels.
fn draw_edge_letters(img: &mut RgbImage, l: crate::plane::EdgeLetters, x: u32, y: u32, w: u32, h: u32) {
    let st = style(11.0, LETTER, true);
    let put = |img: &mut RgbImage, c: char, fx: f32, fy: f32| {
        let t = c.to_string();
        let tw = text_width(&t, st);
        img.text(fx - tw / 2.0, fy, &t, st);
    };
    let (xf, yf, wf, hf) = (x as f32, y as f32, w as f32, h as f32);
    put(img, l.left, xf + 6.0, yf + hf / 2.0 - 7.0);
    put(img, l.right, xf + wf - 6.0, yf + hf / 2.0 - 7.0);
    put(img, l.top, xf + wf / 2.0, yf + 1.0);
    put(img, l.bottom, xf + wf / 2.0, yf + hf - 14.0);
}

fn key_figures(input: &QcInput) -> Result<KeyFigures, QcError> {
    let jacobian = jacobian_stats(input.jacdet, None);
    let mut k = KeyFigures {
        dice_before: None,
        dice_after: None,
        labels: 0,
        body_label: None,
        dice_before_without_body: None,
        dice_after_without_body: None,
        jacobian,
    };
    if let Some(f) = input.fixed_labels {
        let ls = f.labels();
        k.labels = ls.len();
        k.body_label = whole_body_label(f, input.label_names);
        let means = |other: Option<&LabelMap>| -> Result<(Option<f64>, Option<f64>), QcError> {
            match other {
                Some(o) => {
                    let d = sinew_score::dice_per_label(f, o, &ls).map_err(|e| QcError::BadOption(e.to_string()))?;
                    let without: Vec<_> = d.iter().filter(|x| Some(x.0) != k.body_label).copied().collect();
                    Ok((sinew_score::mean_dice(&d), sinew_score::mean_dice(&without)))
                }
                None => Ok((None, None)),
            }
        };
        (k.dice_before, k.dice_before_without_body) = means(input.moving_labels_on_fixed)?;
        (k.dice_after, k.dice_after_without_body) = means(input.warped_labels)?;
    }
    Ok(k)
}

fn draw_title(
    img: &mut RgbImage,
    input: &QcInput,
    f: &KeyFigures,
    point: [usize; 3],
    window: ResolvedWindow,
    mm_per_px: f64,
    opts: &QcOptions,
) {
    let x = MARGIN as f32;
    // A long title (a pair's note) is set smaller so that it fits the sheet's width.
    let room = img.width().saturating_sub(2 * MARGIN) as f32;
    let natural = text_width(&input.title, style(17.0, TEXT, true));
    let px = if natural > room { (17.0 * room / natural).max(10.0) } else { 17.0 };
    img.text(x, MARGIN as f32 - 2.0, &input.title, style(px, TEXT, true));
    let fmt = |d: Option<f64>| d.map_or("–".to_string(), |v| format!("{v:.3}"));
    let j = &f.jacobian;
    let mut line = String::new();
    if f.labels > 0 {
        match f.body_label {
            Some(b) if f.labels > 1 => {
                line += &format!(
                    "mean Dice without the body (label {b}) {} → {} ({} labels); with it {} → {}   ·   ",
                    fmt(f.dice_before_without_body),
                    fmt(f.dice_after_without_body),
                    f.labels - 1,
                    fmt(f.dice_before),
                    fmt(f.dice_after)
                )
            }
            _ => {
                line +=
                    &format!("mean Dice {} → {} ({} labels)   ·   ", fmt(f.dice_before), fmt(f.dice_after), f.labels)
            }
        }
    }
    line += &format!(
        "folding {:.3} % ({} voxels)   ·   SDlogJ {:.3}   ·   det {:.2} … {:.2}",
        100.0 * j.folding_fraction,
        j.folded_voxels,
        j.sd_log_j,
        j.min,
        j.max
    );
    img.text(x, MARGIN as f32 + 20.0, &line, style(14.0, TEXT, false));
    let settings = format!(
        "planes through voxel ({}, {}, {})   ·   window {} … {} ({})   ·   {:.2} mm per pixel   ·   grid every {} voxels",
        point[0],
        point[1],
        point[2],
        window_value(window.lo),
        window_value(window.hi),
        match window.rule {
            WindowRule::Explicit => "given",
            WindowRule::Hounsfield => "HU soft tissue",
            WindowRule::Percentiles => "1st–99th percentile",
        },
        mm_per_px,
        opts.grid_every
    );
    img.text(x, MARGIN as f32 + 38.0, &settings, style(12.0, TEXT_DIM, false));
}

/// Trilinear sample of an image at a continuous voxel position (edge values repeated).
#[inline]
fn at(img: &Image, p: [f64; 3]) -> f32 {
    trilinear(img.as_slice(), img.grid.shape(), [p[0] as f32, p[1] as f32, p[2] as f32], Border::Nearest)
}

/// Nearest-neighbour sample (half away from zero), `outside` beyond the grid.
#[inline]
fn at_nearest<T: Copy>(data: &[T], shape: [usize; 3], p: [f64; 3], outside: T) -> T {
    nearest(data, shape, [p[0] as f32, p[1] as f32, p[2] as f32], outside)
}

fn render_panel(input: &QcInput, plane: &PlaneGeometry, column: Column, win: (f32, f32), opts: &QcOptions) -> RgbImage {
    let (w, h) = (plane.width, plane.height);
    let mut tile = RgbImage::new(w, h, [0, 0, 0]);
    let grey_of = |img: &Image| plane.sample(|p| colour::window(at(img, p), win.0, win.1));
    let paint = |tile: &mut RgbImage, colours: Vec<Rgb>| {
        for (n, c) in colours.into_iter().enumerate() {
            tile.put((n as u32 % w) as i64, (n as u32 / w) as i64, c);
        }
    };
    match column {
        Column::Fixed | Column::Moving | Column::Warped => {
            let img = match column {
                Column::Fixed => input.fixed,
                Column::Moving => input.moving_on_fixed,
                _ => input.warped,
            };
            // NaN marks padding (outside the moving scan): drawn as padding, not as tissue.
            paint(
                &mut tile,
                grey_of(img).into_iter().map(|g| if g.is_nan() { colour::PADDING } else { colour::grey(g) }).collect(),
            );
            if let Some(l) = input.fixed_labels {
                draw_contours(&mut tile, plane, l);
            }
        }
        Column::Overlay => {
            let f = grey_of(input.fixed);
            let m = grey_of(input.warped);
            let cols = f.iter().zip(&m).map(|(&a, &b)| {
                let (a, b) = ((a * 255.0).round() as u8, (b * 255.0).round() as u8);
                [a, b, a]
            });
            paint(&mut tile, cols.collect());
        }
        Column::Grid => {
            paint(&mut tile, grey_of(input.fixed).into_iter().map(|g| colour::grey(0.15 + 0.55 * g)).collect());
            draw_grid(&mut tile, plane, input.field, opts.grid_every);
        }
        Column::Jacobian => {
            let det = input.jacdet;
            let s = det.grid.shape();
            let vals = plane.sample(|p| at_nearest(det.as_slice(), s, p, f32::NAN));
            paint(&mut tile, vals.into_iter().map(|d| colour::jacobian_colour(d, opts.jacobian_log2_range)).collect());
        }
    }
    tile
}

/// One-pixel outlines of the labels: a pixel whose (nearest) label is non-zero and differs
/// from one of its four neighbours (or lies on the panel edge) takes the label's colour.
fn draw_contours(tile: &mut RgbImage, plane: &PlaneGeometry, labels: &LabelMap) {
    let s = labels.grid.shape();
    let lab = plane.sample(|p| at_nearest(labels.as_slice(), s, p, 0u16));
    let (w, h) = (plane.width as usize, plane.height as usize);
    for v in 0..h {
        for u in 0..w {
            let l = lab[v * w + u];
            if l == 0 {
                continue;
            }
            let edge = u == 0
                || v == 0
                || u + 1 == w
                || v + 1 == h
                || lab[v * w + u - 1] != l
                || lab[v * w + u + 1] != l
                || lab[(v - 1) * w + u] != l
                || lab[(v + 1) * w + u] != l;
            if edge {
                tile.put(u as i64, v as i64, colour::label_colour(l));
            }
        }
    }
}

/// The deformed grid: the lines `t_v = const` and `t_h = const` every `every` voxels, each
/// point `x` moved to `x + u(x)` with the in-plane components of the field (sampled
/// trilinearly, half-voxel steps), so the picture shows where each fixed grid point samples
/// the moving scan.
fn draw_grid(tile: &mut RgbImage, plane: &PlaneGeometry, field: &Field, every: usize) {
    let s = field.grid.shape();
    let comp = |d: usize, p: [f64; 3]| {
        trilinear(field.component(d), s, [p[0] as f32, p[1] as f32, p[2] as f32], Border::Nearest) as f64
    };
    let point = |t_h: f64, t_v: f64| {
        let mut p = [0.0; 3];
        p[plane.normal_axis] = plane.index as f64;
        p[plane.h_axis] = t_h;
        p[plane.v_axis] = t_v;
        plane.pixel_of(t_h + comp(plane.h_axis, p), t_v + comp(plane.v_axis, p))
    };
    let offset_h = (plane.n_h - 1) % every / 2;
    let offset_v = (plane.n_v - 1) % every / 2;
    for (fixed_n, along_n, offset, horizontal) in
        [(plane.n_v, plane.n_h, offset_v, true), (plane.n_h, plane.n_v, offset_h, false)]
    {
        for line in (offset..fixed_n).step_by(every) {
            let steps = 2 * (along_n - 1);
            let mut prev: Option<[f32; 2]> = None;
            for s in 0..=steps {
                let t = s as f64 * 0.5;
                let q = if horizontal { point(t, line as f64) } else { point(line as f64, t) };
                if let Some(p) = prev {
                    tile.line(p, q, GRID_LINE, 0.9);
                }
                prev = Some(q);
            }
        }
    }
}

fn draw_colour_bar(img: &mut RgbImage, x: u32, y0: u32, y1: u32, range: f32) -> ColourBarLayout {
    let st = style(12.0, TEXT, false);
    img.text(x as f32 - 4.0, y0 as f32 - 18.0, "det", st);
    let fold_h = 18;
    let tri = 10;
    let bar_top = y0 + 4 + tri;
    let bar_bottom = y1.saturating_sub(fold_h + 30 + tri).max(bar_top + 20);
    let bar_w = 16;
    let n = bar_bottom - bar_top;
    for r in 0..n {
        // Top = +range (expansion), bottom = −range (compression).
        let t = range * (1.0 - 2.0 * (r as f32 + 0.5) / n as f32);
        let c = colour::jacobian_colour(t.exp2(), range);
        img.fill_rect(x as i64, (bar_top + r) as i64, bar_w, 1, c);
    }
    img.stroke_rect(x as i64 - 1, bar_top as i64 - 1, bar_w + 2, n + 2, TEXT_DIM);
    // Triangles beyond the ends: values past ±range take the end colours (the map clamps).
    let (hi_c, lo_c) =
        (colour::jacobian_colour((2.0 * range).exp2(), range), colour::jacobian_colour((-2.0 * range).exp2(), range));
    for r in 0..tri {
        // Row r from the tip: the width grows linearly to the bar's width at the base.
        let w = ((r + 1) as f32 / tri as f32 * bar_w as f32).round().max(1.0) as u32;
        let xl = x as i64 + (bar_w - w) as i64 / 2;
        img.fill_rect(xl, (bar_top - 1 - tri + r) as i64, w, 1, hi_c);
        img.fill_rect(xl, (bar_bottom + tri - r) as i64, w, 1, lo_c);
    }
    let ticks = [-range, -range / 2.0, 0.0, range / 2.0, range];
    for t in ticks {
        let r = ((range - t) / (2.0 * range) * n as f32).round() as i64;
        let yy = bar_top as i64 + r.min(n as i64 - 1);
        img.fill_rect(x as i64 + bar_w as i64, yy, 5, 1, TEXT);
        let v = t.exp2();
        let label = if (v - v.round()).abs() < 1e-3 { format!("{:.0}", v) } else { format!("{v:.2}") };
        img.text((x + bar_w + 8) as f32, yy as f32 - 7.0, &label, st);
    }
    let fy = bar_bottom + tri + 14;
    img.fill_rect(x as i64, fy as i64, bar_w, fold_h, FOLD);
    img.stroke_rect(x as i64 - 1, fy as i64 - 1, bar_w + 2, fold_h + 2, TEXT_DIM);
    img.text((x + bar_w + 6) as f32, fy as f32 + 1.0, "≤ 0", st);
    img.text(x as f32 - 4.0, (fy + fold_h + 4) as f32, "(fold)", style(11.0, TEXT_DIM, false));
    ColourBarLayout { x, width: bar_w, top: bar_top, bottom: bar_bottom, triangle: tri }
}
