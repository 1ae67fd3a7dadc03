//! Colours of the sheets: grey window, label palette, Jacobian colour map.

use crate::canvas::Rgb;

/// Colour of folded voxels (`det ≤ 0`) in the Jacobian panel; no colour of the Jacobian map
/// equals it (its blue channel is 0, the map's never drops below 43).
pub const FOLD: Rgb = [255, 215, 0];
/// Colour of voxels whose determinant is NaN or infinite.
pub const NON_FINITE: Rgb = [96, 96, 96];
/// Image pixels that lie outside the scanned volume (NaN in the image drawn): padding.
pub const PADDING: Rgb = [40, 52, 72];
/// Sheet background.
pub const BACKGROUND: Rgb = [24, 24, 28];
/// Main text colour.
pub const TEXT: Rgb = [232, 232, 232];
/// Secondary text colour.
pub const TEXT_DIM: Rgb = [165, 165, 170];
/// Deformation grid lines.
pub const GRID_LINE: Rgb = [90, 220, 255];

/// Label outline colours (label `l` takes entry `(l − 1) mod 12`).
const PALETTE: [Rgb; 12] = [
    [230, 25, 75],
    [60, 180, 75],
    [255, 225, 25],
    [67, 99, 216],
    [245, 130, 49],
    [145, 30, 180],
    [70, 240, 240],
    [240, 50, 230],
    [188, 246, 12],
    [250, 190, 190],
    [0, 128, 128],
    [230, 190, 255],
];

/// Outline colour of label `l` (non-zero).
pub fn label_colour(l: u16) -> Rgb {
    PALETTE[(l.max(1) as usize - 1) % PALETTE.len()]
}

/// Grey level in `[0, 1]` of value `v` in the window `[lo, hi]`: `(v − lo)/(hi − lo)` clamped.
#[inline]
pub fn window(v: f32, lo: f32, hi: f32) -> f32 {
    ((v - lo) / (hi - lo)).clamp(0.0, 1.0)
}

/// Grey colour of a level in `[0, 1]`.
#[inline]
pub fn grey(g: f32) -> Rgb {
    let b = (g * 255.0).round() as u8;
    [b, b, b]
}

const BLUE: [f32; 3] = [33.0, 102.0, 172.0];
const WHITE: [f32; 3] = [247.0, 247.0, 247.0];
const RED: [f32; 3] = [178.0, 24.0, 43.0];

/// Jacobian colour map: `t = clamp(log₂(det)/range, −1, 1)` blends white (t = 0, volume
/// kept) to blue (t = −1, compression by `2^range`) or red (t = 1, expansion); `det ≤ 0` is
/// [`FOLD`], a non-finite value [`NON_FINITE`].
pub fn jacobian_colour(det: f32, range: f32) -> Rgb {
    if !det.is_finite() {
        return NON_FINITE;
    }
    if det <= 0.0 {
        return FOLD;
    }
    let t = (det.log2() / range).clamp(-1.0, 1.0);
    let (end, a) = if t < 0.0 { (BLUE, -t) } else { (RED, t) };
    [0, 1, 2].map(|d| (WHITE[d] + a * (end[d] - WHITE[d])).round() as u8)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fold_colour_is_never_produced_by_the_map() {
        for n in 1..20000 {
            let det = n as f32 * 1e-3;
            assert_ne!(jacobian_colour(det, 1.0), FOLD, "det {det}");
        }
        assert_eq!(jacobian_colour(0.0, 1.0), FOLD);
        assert_eq!(jacobian_colour(-0.3, 1.0), FOLD);
        assert_eq!(jacobian_colour(1.0, 1.0), [247, 247, 247]);
        assert_eq!(jacobian_colour(4.0, 1.0), [178, 24, 43]);
    }
}
