//! QC sheet checks: size and proportions, every panel drawn, folds marked exactly.

use approx::{assert_abs_diff_eq, assert_relative_eq};
use sinew_grid::{Border, Field, Grid, Image, LabelMap};
use sinew_qc::colour::{jacobian_colour, label_colour, BACKGROUND, FOLD};
use sinew_qc::sheet::{LEGEND_SWATCH, LETTER};
use sinew_qc::{render_qc_sheet, whole_body_label, Column, PlaneKind, QcInput, QcOptions, QcSheet, Window, WindowRule};

const SHAPE: [usize; 3] = [40, 32, 48];
const SPACING: [f64; 3] = [2.0, 2.5, 3.0];
// The fold box: i0 < i < i1, j in J, k in K.
const I0: usize = 14;
const I1: usize = 19;
const J: std::ops::Range<usize> = 10..20;
const K: std::ops::Range<usize> = 20..30;

fn grid() -> Grid {
    Grid::axis_aligned(SHAPE, SPACING, [0.0; 3])
}

/// A CT-like ellipsoid (100 HU inside, −900 outside) with a denser core (300 HU), centred at `c`.
fn phantom(c: [f64; 3]) -> Image {
    let mut img = Image::filled(grid(), -900.0);
    for ((i, j, k), v) in img.data.indexed_iter_mut() {
        let r = [(i as f64 - c[0]) / 14.0, (j as f64 - c[1]) / 11.0, (k as f64 - c[2]) / 17.0];
        let q = r.iter().map(|x| x * x).sum::<f64>();
        if q < 1.0 {
            *v = if q < 0.2 { 300.0 } else { 100.0 };
        }
    }
    img
}

fn labels_of(img: &Image) -> LabelMap {
    let mut l = LabelMap::filled(img.grid.clone(), 0);
    for (o, &v) in l.as_slice_mut().iter_mut().zip(img.as_slice()) {
        *o = if v > 200.0 {
            2
        } else if v > 0.0 {
            1
        } else {
            0
        };
    }
    l
}

/// u = (s(i)·m(j, k), 0, 0) with s(i) = −1.5·(clamp(i, I0, I1) − I0) and m the indicator of
/// J × K. Only ∂u_i/∂i enters det(I + ∇u) (the other rows of ∇u are zero), so with the
/// central difference of a piecewise-linear s (exact fact):
/// det = 1 − 1.5 = −0.5 for I0 < i < I1 inside J × K, det = 1 − 0.75 = 0.25 at i = I0 and
/// i = I1 there, det = 1 elsewhere. So the folded voxels are exactly (I0, I1) × J × K.
fn folding_field() -> Field {
    let mut f = Field::zeros(grid());
    let [_, ny, nz] = SHAPE;
    let ui = &mut f.components_mut()[0];
    for (n, v) in ui.iter_mut().enumerate() {
        let (i, j, k) = (n / (ny * nz), (n / nz) % ny, n % nz);
        if J.contains(&j) && K.contains(&k) {
            *v = (-1.5 * (i.clamp(I0, I1) - I0) as f64) as f32;
        }
    }
    f
}

fn folded(i: usize, j: usize, k: usize) -> bool {
    i > I0 && i < I1 && J.contains(&j) && K.contains(&k)
}

/// The phantom pair (the moving ellipsoid shifted by (2, −1, 2) voxels), every intensity
/// mapped by `map`, with `field`, the moving scan warped by it and, when `labelled`, the label
/// maps of both scans and the warped moving labels.
struct Pair {
    fixed: Image,
    moving: Image,
    warped: Image,
    field: Field,
    jacdet: Image,
    labels: Option<[LabelMap; 3]>,
}

impl Pair {
    fn new(map: impl Fn(f32) -> f32, field: Field, labelled: bool) -> Pair {
        let mapped = |mut img: Image| {
            img.as_slice_mut().iter_mut().for_each(|v| *v = map(*v));
            img
        };
        let (f, m) = (phantom([20.0, 16.0, 24.0]), phantom([22.0, 15.0, 26.0]));
        let labels = labelled.then(|| {
            let (fl, ml) = (labels_of(&f), labels_of(&m));
            let wl = sinew_transform::warp_labels(&ml, &field).unwrap();
            [fl, ml, wl]
        });
        let (fixed, moving) = (mapped(f), mapped(m));
        let warped = sinew_transform::warp_image(&moving, &field, Border::Constant(map(-900.0))).unwrap();
        let jacdet = sinew_transform::jacobian_determinant(&field);
        Pair { fixed, moving, warped, field, jacdet, labels }
    }

    fn input<'a>(&'a self, label_names: Option<&'a std::collections::BTreeMap<u16, String>>) -> QcInput<'a> {
        let l = self.labels.as_ref();
        QcInput {
            fixed: &self.fixed,
            moving_on_fixed: &self.moving,
            warped: &self.warped,
            field: &self.field,
            jacdet: &self.jacdet,
            fixed_labels: l.map(|l| &l[0]),
            moving_labels_on_fixed: l.map(|l| &l[1]),
            warped_labels: l.map(|l| &l[2]),
            title: "fixed a ← moving b".into(),
            label_names,
        }
    }
}

/// The labelled pair with the folding field.
fn folding_pair() -> Pair {
    Pair::new(|v| v, folding_field(), true)
}

fn render(point: Option<[usize; 3]>) -> QcSheet {
    render_qc_sheet(&folding_pair().input(None), &QcOptions { point, ..QcOptions::default() }).unwrap()
}

#[test]
fn folded_voxels_are_exactly_the_constructed_box() {
    // The library's determinant agrees with the closed form above at every voxel.
    let det = sinew_transform::jacobian_determinant(&folding_field());
    for ((i, j, k), &d) in det.data.indexed_iter() {
        assert_eq!(d <= 0.0, folded(i, j, k), "voxel ({i}, {j}, {k}) det {d}");
    }
}

#[test]
fn sheet_has_the_expected_size_proportions_and_non_empty_panels() {
    // Through the fold box, so the Jacobian panels are not uniform either.
    let sheet = render(Some([I0 + 2, 15, 25]));
    let img = &sheet.image;
    assert_eq!(sheet.panels.len(), 18);
    // Common pixel size: the longest extent (48 · 3 mm = 144 mm) over 220 px.
    assert_relative_eq!(sheet.mm_per_px, 144.0 / 220.0, max_relative = 1e-12);
    for p in &sheet.panels {
        let g = &p.plane;
        // Spacing respected: each side is n·spacing/pixel size, rounded.
        let want_w = (g.n_h as f64 * SPACING[g.h_axis] / sheet.mm_per_px).round() as u32;
        let want_h = (g.n_v as f64 * SPACING[g.v_axis] / sheet.mm_per_px).round() as u32;
        assert_eq!((g.width, g.height), (want_w, want_h), "{:?} {:?}", g.kind, p.column);
        assert!(p.x + g.width <= img.width() && p.y + g.height <= img.height());
        // Non-empty: the panel is not one flat colour.
        let first = img.pixel(p.x, p.y);
        let distinct = (0..g.height)
            .flat_map(|v| (0..g.width).map(move |u| (u, v)))
            .filter(|&(u, v)| img.pixel(p.x + u, p.y + v) != first)
            .count();
        assert!(
            distinct > (g.width * g.height / 100) as usize,
            "{:?} {:?}: {distinct} pixels differ",
            g.kind,
            p.column
        );
    }
    // The rows are the three planes; axial is the i–j plane for this axis-aligned grid.
    let ax = sheet.panel(PlaneKind::Axial, Column::Fixed).plane;
    assert_eq!((ax.normal_axis, ax.h_axis, ax.v_axis), (2, 0, 1));
    // Width: margins, row labels, six columns of the widest panel and the colour bar.
    let col_w = sheet.panels.iter().map(|p| p.plane.width).max().unwrap().max(120);
    assert_eq!(img.width(), 14 + 78 + 6 * col_w + 5 * 8 + 96 + 14);
    // Key figures: the fold box is counted, and a 2-voxel shift lowers the overlap: the
    // figures are the mean Dice of labels 1 and 2, counted here voxel by voxel.
    let f = &sheet.figures;
    assert_eq!(f.labels, 2);
    assert_eq!(f.jacobian.folded_voxels, (I1 - I0 - 1) * J.len() * K.len());
    let [fl, ml, wl] = folding_pair().labels.unwrap();
    let mean_dice = |b: &LabelMap| (dice_by_count(&fl, b, 1) + dice_by_count(&fl, b, 2)) / 2.0;
    assert_abs_diff_eq!(f.dice_before.unwrap(), mean_dice(&ml), epsilon = 1e-12);
    assert_abs_diff_eq!(f.dice_after.unwrap(), mean_dice(&wl), epsilon = 1e-12);
    assert!(f.dice_before.unwrap() < 0.9, "the shifted ellipsoids overlap in part: {:?}", f.dice_before);
}

#[test]
fn default_point_is_the_centre_of_the_labelled_region() {
    // The fixed ellipsoid is symmetric about (20, 16, 24), so its labelled voxels average there.
    assert_eq!(render(None).point, [20, 16, 24]);
}

#[test]
fn jacobian_panel_marks_exactly_the_folded_voxels() {
    let point = [I0 + 2, 15, 25];
    let sheet = render(Some(point));
    for kind in [PlaneKind::Axial, PlaneKind::Coronal, PlaneKind::Sagittal] {
        let p = sheet.panel(kind, Column::Jacobian);
        let g = &p.plane;
        // RAS grid (positive diagonal affine): every displayed axis is reversed (radiological
        // display, superior/anterior up); see sinew_qc::plane.
        assert!(g.h_flip && g.v_flip);
        let (mut marked, mut mismatches) = (0, 0);
        for v in 0..g.height {
            for u in 0..g.width {
                // The voxel under the pixel centre, by the documented map:
                // t = (u + 0.5)·n/w − 0.5, reversed t → n − 1 − t, nearest = round.
                let coord = |u: u32, n: usize, w: u32| n as f64 - 1.0 - ((u as f64 + 0.5) * n as f64 / w as f64 - 0.5);
                let mut vox = [0usize; 3];
                vox[g.normal_axis] = g.index;
                vox[g.h_axis] = coord(u, g.n_h, g.width).round() as usize;
                vox[g.v_axis] = coord(v, g.n_v, g.height).round() as usize;
                let is_fold = sheet.image.pixel(p.x + u, p.y + v) == FOLD;
                marked += is_fold as usize;
                mismatches += (is_fold != folded(vox[0], vox[1], vox[2])) as usize;
            }
        }
        assert_eq!(mismatches, 0, "{kind:?}: {mismatches} pixels disagree with the folded voxels");
        assert!(marked > 0, "{kind:?}: the plane cuts the fold box, so some pixels must be marked");
    }
}

#[test]
fn sheet_png_is_written_atomically_and_decodes() {
    let sheet = render(None);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("qc.png");
    sinew_qc::write_png(&path, &sheet.image).unwrap();
    // Reference decoder: the `png` crate reads back the same pixels.
    let dec = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(&path).unwrap()));
    let mut r = dec.read_info().unwrap();
    let mut buf = vec![0; r.output_buffer_size().unwrap()];
    let info = r.next_frame(&mut buf).unwrap();
    assert_eq!((info.width, info.height), (sheet.image.width(), sheet.image.height()));
    assert_eq!(&buf[..info.buffer_size()], sheet.image.as_raw());
    let names: Vec<_> = std::fs::read_dir(dir.path()).unwrap().map(|e| e.unwrap().file_name()).collect();
    assert_eq!(names.len(), 1, "no temporary file left: {names:?}");
    if let Ok(dir) = std::env::var("SINEW_QC_KEEP") {
        sinew_qc::write_png(&std::path::Path::new(&dir).join("test_sheet.png"), &sheet.image).unwrap();
    }
}

/// The sheet of the phantom pair with every image mapped by `f` (labels left out, so panel
/// pixels are grey levels only) and the given window.
fn render_mapped(f: impl Fn(f32) -> f32, window: Window) -> QcSheet {
    let pair = Pair::new(f, Field::zeros(grid()), false);
    render_qc_sheet(&pair.input(None), &QcOptions { point: Some([20, 16, 24]), window, ..QcOptions::default() })
        .unwrap()
}

/// Population variance of the grey levels over the fixed axial panel (its grey pixels: the
/// orientation letters are coloured).
fn fixed_panel_variance(sheet: &QcSheet) -> f64 {
    let p = sheet.panel(PlaneKind::Axial, Column::Fixed);
    let vals: Vec<f64> = (0..p.plane.height)
        .flat_map(|v| (0..p.plane.width).map(move |u| (u, v)))
        .map(|(u, v)| sheet.image.pixel(p.x + u, p.y + v))
        .filter(|c| c[0] == c[1] && c[1] == c[2])
        .map(|c| c[0] as f64)
        .collect();
    assert!(vals.len() > (p.plane.width * p.plane.height) as usize * 9 / 10, "mostly grey pixels");
    let mean = vals.iter().sum::<f64>() / vals.len() as f64;
    vals.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / vals.len() as f64
}

/// The README's prep recipe maps −1000 … 1500 HU to [0, 1].
fn unit_scaled(v: f32) -> f32 {
    ((v + 1000.0) / 2500.0).clamp(0.0, 1.0)
}

#[test]
fn auto_window_keeps_hounsfield_units() {
    // The phantom runs from −900 to 300 HU: both ends of the documented rule are reached.
    let sheet = render_mapped(|v| v, Window::Auto);
    assert_eq!((sheet.window, sheet.window_rule), ((-200.0, 300.0), WindowRule::Hounsfield));
}

#[test]
fn auto_window_shows_a_unit_scaled_scan() {
    // The fixed scan takes 3 values: air 0.04, tissue 0.44, core 0.52. With the HU window
    // every one of them lies below −200, so the panel is one flat black.
    let flat = render_mapped(unit_scaled, Window::CT_SOFT);
    assert_eq!(fixed_panel_variance(&flat), 0.0);
    let auto = render_mapped(unit_scaled, Window::Auto);
    assert_eq!(auto.window_rule, WindowRule::Percentiles);
    // Foreground = above 0.04 + 0.02·0.48: tissue and core; the window is their 1st … 99th
    // percentile, so tissue is black and the core white.
    assert_eq!(auto.window, (unit_scaled(100.0), unit_scaled(300.0)));
    let var = fixed_panel_variance(&auto);
    // Air and tissue black, the core (a fifth of the ellipsoid's radius² ) white: a variance
    // of thousands of grey levels², where the flat sheet has none.
    assert!(var > 1000.0, "variance {var}");
}

#[test]
fn explicit_window_is_honoured() {
    let sheet = render_mapped(unit_scaled, Window::Range { lo: 0.3, hi: 0.5 });
    assert_eq!((sheet.window, sheet.window_rule), ((0.3, 0.5), WindowRule::Explicit));
    // Tissue (0.44) shows at (0.44 − 0.3)/(0.5 − 0.3) = 0.7 of white (definition of a linear
    // window), the core (0.52) white, air (0.04) black.
    let p = sheet.panel(PlaneKind::Axial, Column::Fixed);
    // 0.7 · 255 = 178.5: float rounding may give either neighbour.
    let count = |levels: std::ops::RangeInclusive<u8>| {
        (0..p.plane.height)
            .flat_map(|v| (0..p.plane.width).map(move |u| (u, v)))
            .filter(|&(u, v)| {
                let c = sheet.image.pixel(p.x + u, p.y + v);
                c[0] == c[1] && c[1] == c[2] && levels.contains(&c[0])
            })
            .count()
    };
    for levels in [0..=0, 178..=179, 255..=255] {
        assert!(count(levels.clone()) > 100, "grey levels {levels:?}: {} pixels", count(levels.clone()));
    }
}

#[test]
fn percentile_window_follows_its_definition() {
    // Background 0 and the values 1 … 10000 once each. Foreground: above 0 + 0.02·10000 = 200,
    // i.e. 201 … 10000 (n = 9800). Ranks round(0.01·9799) = 98 and round(0.99·9799) = 9701
    // hold 299 and 9902 (numpy.percentile(x, [1, 99], method="nearest") picks the same ranks;
    // from memory of its documentation).
    let mut img = Image::filled(grid(), 0.0);
    for (n, v) in img.as_slice_mut().iter_mut().take(10000).enumerate() {
        *v = ((n * 7919) % 10000 + 1) as f32;
    }
    let w = sinew_qc::resolve_window(Window::Percentiles, &img).unwrap();
    assert_eq!((w.lo, w.hi, w.rule), (299.0, 9902.0, WindowRule::Percentiles));
    // Not Hounsfield units (no value ≤ −500): auto takes the same window.
    assert_eq!(sinew_qc::resolve_window(Window::Auto, &img).unwrap(), w);
    // A scan that reaches −500 and 300 is taken as HU.
    img.as_slice_mut()[20000] = -500.0;
    assert_eq!(sinew_qc::resolve_window(Window::Auto, &img).unwrap().rule, WindowRule::Hounsfield);
}

/// The phantom pair with labels (1 = tissue shell, 2 = core), a zero field and the given
/// label names; also the fixed and moving label maps.
fn render_named(names: Option<&std::collections::BTreeMap<u16, String>>) -> (QcSheet, LabelMap, LabelMap) {
    let pair = Pair::new(|v| v, Field::zeros(grid()), true);
    let sheet = render_qc_sheet(&pair.input(names), &QcOptions::default()).unwrap();
    let [fl, ml, _] = pair.labels.unwrap();
    (sheet, fl, ml)
}

/// Dice by its definition 2|A ∩ B| / (|A| + |B|), counted here voxel by voxel.
fn dice_by_count(a: &LabelMap, b: &LabelMap, l: u16) -> f64 {
    let (mut na, mut nb, mut both) = (0usize, 0usize, 0usize);
    for (&x, &y) in a.as_slice().iter().zip(b.as_slice()) {
        na += (x == l) as usize;
        nb += (y == l) as usize;
        both += (x == l && y == l) as usize;
    }
    2.0 * both as f64 / (na + nb) as f64
}

#[test]
fn legend_shows_each_label_in_its_outline_colour_with_its_name() {
    let names: std::collections::BTreeMap<u16, String> = [(1, "shell".to_string()), (2, "core".to_string())].into();
    let (sheet, _, _) = render_named(Some(&names));
    let texts: Vec<(u16, &str)> = sheet.legend.iter().map(|e| (e.label, e.text.as_str())).collect();
    assert_eq!(texts, [(1, "1 shell"), (2, "2 core")]);
    for e in &sheet.legend {
        // The whole swatch is the label's outline colour.
        for (dx, dy) in [(0, 0), (LEGEND_SWATCH - 1, LEGEND_SWATCH - 1), (LEGEND_SWATCH / 2, LEGEND_SWATCH / 2)] {
            assert_eq!(sheet.image.pixel(e.x + dx, e.y + dy), label_colour(e.label), "label {}", e.label);
        }
        // Below the panels.
        assert!(sheet.panels.iter().all(|p| e.y >= p.y + p.plane.height));
    }
    // Without names the labels are shown by number.
    let (sheet, _, _) = render_named(None);
    let texts: Vec<&str> = sheet.legend.iter().map(|e| e.text.as_str()).collect();
    assert_eq!(texts[1], "label 2");
}

#[test]
fn headline_dice_leaves_out_the_whole_body_label() {
    let names: std::collections::BTreeMap<u16, String> = [(1, "Body".to_string()), (2, "core".to_string())].into();
    let (sheet, fl, ml) = render_named(Some(&names));
    let f = &sheet.figures;
    assert_eq!(f.body_label, Some(1));
    let (d1, d2) = (dice_by_count(&fl, &ml, 1), dice_by_count(&fl, &ml, 2));
    assert_abs_diff_eq!(f.dice_after_without_body.unwrap(), d2, epsilon = 1e-12);
    assert_abs_diff_eq!(f.dice_after.unwrap(), (d1 + d2) / 2.0, epsilon = 1e-12);
    // The legend says which label is left out.
    assert!(sheet.legend[0].text.contains("not in the headline Dice"), "{}", sheet.legend[0].text);
    // Without names: label 1 holds most labelled voxels (the shell around the core), so it is
    // taken as the body; named labels that are not "body" are never taken by size.
    let counts = fl.label_counts();
    assert!(counts.iter().find(|c| c.0 == 1).unwrap().1 > counts.iter().find(|c| c.0 == 2).unwrap().1);
    assert_eq!(whole_body_label(&fl, None), Some(1));
    let organs: std::collections::BTreeMap<u16, String> = [(1, "liver".to_string()), (2, "core".to_string())].into();
    assert_eq!(whole_body_label(&fl, Some(&organs)), None);
}

#[test]
fn colour_bar_has_triangles_for_values_beyond_its_ends() {
    let sheet = render(None);
    let b = sheet.colour_bar;
    let mid = b.x + b.width / 2;
    // Above the bar: the colour of det > 2^range (the map's red end, RdBu's 178, 24, 43);
    // below: the blue end (33, 102, 172).
    assert_eq!(sheet.image.pixel(mid, b.top - 3), jacobian_colour(8.0, 1.0));
    assert_eq!(jacobian_colour(8.0, 1.0), [178, 24, 43]);
    assert_eq!(sheet.image.pixel(mid, b.bottom + 3), [33, 102, 172]);
    // Triangles, not boxes: near the tips the corners are background.
    assert_eq!(sheet.image.pixel(b.x, b.top - b.triangle), BACKGROUND);
    assert_eq!(sheet.image.pixel(b.x + b.width - 1, b.bottom + b.triangle), BACKGROUND);
}

#[test]
fn orientation_letters_are_drawn_on_every_panel() {
    let sheet = render(None);
    for p in &sheet.panels {
        // The left-edge letter sits in the panel's left 12 pixels, around the middle row.
        let (h, mid) = (p.plane.height, p.plane.height / 2);
        let letter = (mid.saturating_sub(9)..(mid + 9).min(h))
            .flat_map(|v| (0..12).map(move |u| (u, v)))
            .filter(|&(u, v)| sheet.image.pixel(p.x + u, p.y + v) == LETTER)
            .count();
        assert!(letter > 3, "{:?} {:?}: {letter} letter pixels", p.plane.kind, p.column);
    }
}
