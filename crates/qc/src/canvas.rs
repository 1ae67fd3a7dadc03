//! A plain 8-bit RGB raster with the few drawing operations the sheets need (rectangles,
//! anti-aliased lines, text), PNG encoding through the `png` crate and text through
//! `ab_glyph` with the embedded DejaVu Sans font.
//!
//! Why lines are drawn here rather than by a drawing crate: the deformed grid of the field
//! panel is made of segments whose ends lie between pixels (grid nodes moved by the field,
//! scaled by the panel's mm per pixel), and `line` keeps those fractions. The two candidates
//! take whole-pixel ends: the plotters bitmap backend (already in the tree, for the report's
//! plots) draws through `DrawingBackend::draw_line(from, to, …)` with `BackendCoord =
//! (i32, i32)` (plotters-backend 0.3.7), and imageproc's `draw_antialiased_line_segment_mut`
//! takes `start: (i32, i32), end: (i32, i32)` (imageproc is not in the tree; it would also
//! bring the `image` crate). Rounding the ends moves each segment by up to half a pixel, a
//! third of a millimetre on the QC test sheet (0.65 mm per pixel), which is the size of the
//! sub-voxel motion the panel is meant to show. Text already goes through `ab_glyph` (glyph
//! outlines and coverage); only the pen advance with kerning is written here, as both
//! candidates also do on top of `ab_glyph`. `blend` is the one-line "over" rule those lines
//! and glyphs need.

use std::path::Path;
use std::sync::OnceLock;

use ab_glyph::{point, Font, FontRef, PxScale, ScaleFont};

use crate::QcError;

/// An RGB colour, 8 bits per channel.
pub type Rgb = [u8; 3];

/// An 8-bit RGB image, rows top to bottom, pixels left to right, 3 bytes per pixel.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct RgbImage {
    width: u32,
    height: u32,
    data: Vec<u8>,
}

impl RgbImage {
    /// A `width × height` image filled with `background`.
    pub fn new(width: u32, height: u32, background: Rgb) -> RgbImage {
        let mut data = Vec::with_capacity(width as usize * height as usize * 3);
        for _ in 0..width as usize * height as usize {
            data.extend_from_slice(&background);
        }
        RgbImage { width, height, data }
    }

    /// Width in pixels.
    pub fn width(&self) -> u32 {
        self.width
    }

    /// Height in pixels.
    pub fn height(&self) -> u32 {
        self.height
    }

    /// The raw bytes (`R, G, B` per pixel, row-major).
    pub fn as_raw(&self) -> &[u8] {
        &self.data
    }

    /// The colour at `(x, y)`.
    ///
    /// # Panics
    /// When `(x, y)` lies outside the image.
    #[track_caller]
    pub fn pixel(&self, x: u32, y: u32) -> Rgb {
        assert!(x < self.width && y < self.height, "pixel ({x}, {y}) outside {}×{}", self.width, self.height);
        let o = (y as usize * self.width as usize + x as usize) * 3;
        [self.data[o], self.data[o + 1], self.data[o + 2]]
    }

    /// Sets `(x, y)` to `c`; pixels outside the image are ignored.
    #[inline]
    pub fn put(&mut self, x: i64, y: i64, c: Rgb) {
        if x >= 0 && y >= 0 && (x as u32) < self.width && (y as u32) < self.height {
            let o = (y as usize * self.width as usize + x as usize) * 3;
            self.data[o..o + 3].copy_from_slice(&c);
        }
    }

    /// Blends `c` over `(x, y)` with opacity `alpha` in `[0, 1]`:
    /// `out = (1 − alpha)·old + alpha·c`; pixels outside the image are ignored.
    #[inline]
    pub fn blend(&mut self, x: i64, y: i64, c: Rgb, alpha: f32) {
        if x >= 0 && y >= 0 && (x as u32) < self.width && (y as u32) < self.height {
            let a = alpha.clamp(0.0, 1.0);
            let o = (y as usize * self.width as usize + x as usize) * 3;
            for (px, &cd) in self.data[o..o + 3].iter_mut().zip(c.iter()) {
                let old = *px as f32;
                *px = (old + a * (cd as f32 - old)).round() as u8;
            }
        }
    }

    /// Fills the rectangle with corner `(x, y)` and size `w × h` (clipped to the image).
    pub fn fill_rect(&mut self, x: i64, y: i64, w: u32, h: u32, c: Rgb) {
        for yy in y..y + h as i64 {
            for xx in x..x + w as i64 {
                self.put(xx, yy, c);
            }
        }
    }

    /// Draws the 1-pixel outline of a rectangle.
    pub fn stroke_rect(&mut self, x: i64, y: i64, w: u32, h: u32, c: Rgb) {
        let (x1, y1) = (x + w as i64 - 1, y + h as i64 - 1);
        for xx in x..=x1 {
            self.put(xx, y, c);
            self.put(xx, y1, c);
        }
        for yy in y..=y1 {
            self.put(x, yy, c);
            self.put(x1, yy, c);
        }
    }

    /// An anti-aliased line of width one pixel between two points given in pixel units
    /// (pixel `(x, y)` covers `[x, x+1) × [y, y+1)`), by Xiaolin Wu's coverage rule ("An
    /// efficient antialiasing technique", SIGGRAPH Computer Graphics 25(4), 1991): each
    /// step along the major axis splits the line's intensity between the two nearest pixels.
    pub fn line(&mut self, p0: [f32; 2], p1: [f32; 2], c: Rgb, alpha: f32) {
        let (mut x0, mut y0) = (p0[0] - 0.5, p0[1] - 0.5);
        let (mut x1, mut y1) = (p1[0] - 0.5, p1[1] - 0.5);
        if !(x0.is_finite() && y0.is_finite() && x1.is_finite() && y1.is_finite()) {
            return;
        }
        let steep = (y1 - y0).abs() > (x1 - x0).abs();
        if steep {
            std::mem::swap(&mut x0, &mut y0);
            std::mem::swap(&mut x1, &mut y1);
        }
        if x0 > x1 {
            std::mem::swap(&mut x0, &mut x1);
            std::mem::swap(&mut y0, &mut y1);
        }
        let dx = x1 - x0;
        let gradient = if dx.abs() < 1e-6 { 0.0 } else { (y1 - y0) / dx };
        let start = x0.round() as i64;
        let end = x1.round() as i64;
        for x in start..=end {
            let y = y0 + gradient * (x as f32 - x0);
            let yf = y.floor();
            let frac = y - yf;
            let (a, b) =
                if steep { ((yf as i64, x), (yf as i64 + 1, x)) } else { ((x, yf as i64), (x, yf as i64 + 1)) };
            self.blend(a.0, a.1, c, alpha * (1.0 - frac));
            self.blend(b.0, b.1, c, alpha * frac);
        }
    }

    /// Copies `src` with its top-left corner at `(x, y)` (clipped).
    pub fn blit(&mut self, src: &RgbImage, x: i64, y: i64) {
        for sy in 0..src.height {
            for sx in 0..src.width {
                self.put(x + sx as i64, y + sy as i64, src.pixel(sx, sy));
            }
        }
    }

    /// Encodes the image as an 8-bit RGB PNG.
    pub fn encode_png(&self) -> Result<Vec<u8>, png::EncodingError> {
        let mut out = Vec::new();
        {
            let mut enc = png::Encoder::new(&mut out, self.width, self.height);
            enc.set_color(png::ColorType::Rgb);
            enc.set_depth(png::BitDepth::Eight);
            enc.set_compression(png::Compression::Fast);
            enc.set_filter(png::Filter::Adaptive);
            let mut w = enc.write_header()?;
            w.write_image_data(&self.data)?;
            w.finish()?;
        }
        Ok(out)
    }
}

/// Writes `img` as a PNG file atomically (temporary file in the same folder, then rename).
pub fn write_png(path: &Path, img: &RgbImage) -> Result<(), QcError> {
    let bytes = img.encode_png().map_err(|e| QcError::Png { path: path.to_path_buf(), reason: e.to_string() })?;
    sinew_io::atomic::write_bytes_atomic(path, &bytes)?;
    Ok(())
}

/// The embedded text font (DejaVu Sans, shipped by the `dejavu` crate).
pub(crate) fn font() -> &'static FontRef<'static> {
    static FONT: OnceLock<FontRef<'static>> = OnceLock::new();
    FONT.get_or_init(|| FontRef::try_from_slice(dejavu::sans::regular()).expect("the embedded font parses"))
}

/// The bold variant of the embedded font.
pub(crate) fn font_bold() -> &'static FontRef<'static> {
    static FONT: OnceLock<FontRef<'static>> = OnceLock::new();
    FONT.get_or_init(|| FontRef::try_from_slice(dejavu::sans::bold()).expect("the embedded font parses"))
}

/// Text style: font, pixel height, colour.
#[derive(Clone, Copy)]
pub(crate) struct TextStyle {
    pub bold: bool,
    pub px: f32,
    pub colour: Rgb,
}

impl TextStyle {
    fn font(&self) -> &'static FontRef<'static> {
        if self.bold {
            font_bold()
        } else {
            font()
        }
    }
}

/// Width in pixels of `text` set in `style`.
pub(crate) fn text_width(text: &str, style: TextStyle) -> f32 {
    let f = style.font().as_scaled(PxScale::from(style.px));
    let mut w = 0.0;
    let mut prev = None;
    for ch in text.chars() {
        let id = f.glyph_id(ch);
        if let Some(p) = prev {
            w += f.kern(p, id);
        }
        w += f.h_advance(id);
        prev = Some(id);
    }
    w
}

impl RgbImage {
    /// Draws `text` with its top-left corner at `(x, y)` (pixels); returns the width drawn.
    pub(crate) fn text(&mut self, x: f32, y: f32, text: &str, style: TextStyle) -> f32 {
        let f = style.font().as_scaled(PxScale::from(style.px));
        let baseline = y + f.ascent();
        let mut pen = x;
        let mut prev = None;
        for ch in text.chars() {
            let id = f.glyph_id(ch);
            if let Some(p) = prev {
                pen += f.kern(p, id);
            }
            let g = id.with_scale_and_position(PxScale::from(style.px), point(pen, baseline));
            if let Some(outline) = style.font().outline_glyph(g) {
                let b = outline.px_bounds();
                outline.draw(|gx, gy, cov| {
                    self.blend(b.min.x as i64 + gx as i64, b.min.y as i64 + gy as i64, style.colour, cov);
                });
            }
            pen += f.h_advance(id);
            prev = Some(id);
        }
        pen - x
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn png_round_trips_through_the_decoder() {
        // Reference: the `png` crate's own decoder reads back exactly what was written.
        let mut img = RgbImage::new(5, 3, [10, 20, 30]);
        img.put(4, 2, [255, 0, 7]);
        let bytes = img.encode_png().unwrap();
        let dec = png::Decoder::new(std::io::Cursor::new(bytes));
        let mut r = dec.read_info().unwrap();
        let mut buf = vec![0; r.output_buffer_size().unwrap()];
        let info = r.next_frame(&mut buf).unwrap();
        assert_eq!((info.width, info.height, info.color_type), (5, 3, png::ColorType::Rgb));
        assert_eq!(&buf[..info.buffer_size()], img.as_raw());
    }

    #[test]
    fn text_marks_pixels_inside_its_box() {
        let mut img = RgbImage::new(80, 20, [0, 0, 0]);
        let style = TextStyle { bold: false, px: 14.0, colour: [255, 255, 255] };
        let w = img.text(2.0, 2.0, "Dice", style);
        approx::assert_abs_diff_eq!(w, text_width("Dice", style), epsilon = 1e-3);
        let lit: Vec<(u32, u32)> =
            (0..20).flat_map(|y| (0..80).map(move |x| (x, y))).filter(|&(x, y)| img.pixel(x, y)[0] > 0).collect();
        assert!(lit.len() > 20);
        assert!(lit.iter().all(|&(x, y)| x as f32 <= 2.0 + w + 1.0 && y < 20));
    }
}
