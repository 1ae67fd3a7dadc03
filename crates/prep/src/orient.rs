//! Reorientation: an exact permutation and reversal of the array axes, chosen from the affine,
//! with the affine updated so that every voxel keeps its world position (no interpolation).
//!
//! Orientation codes follow NIfTI world space (RAS+): the letter of voxel axis `d` says where
//! that axis points — `R`/`L` along ±x, `A`/`P` along ±y, `S`/`I` along ±z. The current codes
//! of a grid are [`sinew_grid::Affine::axis_codes`] (nibabel's `aff2axcodes` rule).
//!
//! If output axis `d` reads input axis `a = source[d]`, reversed when `flip[d]`, the output
//! voxel `q` holds input voxel `p` with `p[a] = q[d]` or `p[a] = n_a − 1 − q[d]`. That map
//! `T: q ↦ p` is an integer affine map, and the output affine is `A_out = A_in · T`, so
//! `A_out(q) = A_in(p)`: the same world point, exactly.

use std::fmt;
use std::str::FromStr;

use ndarray::Axis;
use sinew_grid::{Affine, Grid, Volume};

use crate::PrepError;

/// A validated three-letter orientation code such as `RAS` or `LPS`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct AxisCodes(pub [char; 3]);

/// The world axis (0 = x, 1 = y, 2 = z) and direction (+1 or −1) of a code letter.
fn world_axis(c: char) -> Option<(usize, bool)> {
    match c {
        'R' => Some((0, true)),
        'L' => Some((0, false)),
        'A' => Some((1, true)),
        'P' => Some((1, false)),
        'S' => Some((2, true)),
        'I' => Some((2, false)),
        _ => None,
    }
}

impl FromStr for AxisCodes {
    type Err = PrepError;

    /// Parses a code (case-insensitive); each world axis must appear exactly once.
    fn from_str(s: &str) -> Result<Self, PrepError> {
        let bad = || PrepError::BadOrientation { code: s.to_string() };
        let letters: Vec<char> = s.trim().chars().map(|c| c.to_ascii_uppercase()).collect();
        if letters.len() != 3 {
            return Err(bad());
        }
        let mut seen = [false; 3];
        for &c in &letters {
            let (w, _) = world_axis(c).ok_or_else(bad)?;
            if std::mem::replace(&mut seen[w], true) {
                return Err(bad());
            }
        }
        Ok(AxisCodes([letters[0], letters[1], letters[2]]))
    }
}

impl fmt::Display for AxisCodes {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}{}{}", self.0[0], self.0[1], self.0[2])
    }
}

impl AxisCodes {
    /// The codes of a grid's voxel axes (nibabel's `aff2axcodes` rule).
    pub fn of_grid(grid: &Grid) -> Result<AxisCodes, PrepError> {
        let codes = grid.affine().axis_codes();
        let s: String = codes.iter().collect();
        s.parse().map_err(|_| PrepError::AmbiguousOrientation { codes: s })
    }

    /// The voxel axis whose code is `S` or `I` (the axis across axial slices).
    pub fn axial_axis(&self) -> usize {
        self.0.iter().position(|&c| c == 'S' || c == 'I').expect("validated codes name the z axis")
    }
}

/// A planned reorientation of one grid: output axis `d` reads input axis `source[d]`,
/// reversed when `flip[d]`.
#[derive(Clone, Debug, PartialEq)]
pub struct Reorientation {
    /// Input axis read by each output axis.
    pub source: [usize; 3],
    /// Whether each output axis runs backwards along its input axis.
    pub flip: [bool; 3],
    /// Codes of the input grid.
    pub from: AxisCodes,
    /// Codes of the output grid (the target).
    pub to: AxisCodes,
    /// The output grid: shape permuted, affine `A_in · T` (see the module doc).
    pub grid: Grid,
}

impl Reorientation {
    /// True when the reorientation changes nothing.
    pub fn is_identity(&self) -> bool {
        self.source == [0, 1, 2] && self.flip == [false; 3]
    }
}

/// Plans the reorientation of `grid` to the target codes.
pub fn plan(grid: &Grid, target: AxisCodes) -> Result<Reorientation, PrepError> {
    let from = AxisCodes::of_grid(grid)?;
    let n = grid.shape();
    let mut source = [0; 3];
    let mut flip = [false; 3];
    let mut lin = [[0.0; 3]; 3];
    let mut t = [0.0; 3];
    for d in 0..3 {
        let (w, positive) = world_axis(target.0[d]).expect("validated code");
        let a = (0..3).find(|&a| world_axis(from.0[a]).expect("validated code").0 == w).expect("each world axis once");
        source[d] = a;
        flip[d] = world_axis(from.0[a]).expect("validated code").1 != positive;
        // T: p[a] = q[d]   or   p[a] = (n_a − 1) − q[d]
        lin[a][d] = if flip[d] { -1.0 } else { 1.0 };
        t[a] = if flip[d] { (n[a] - 1) as f64 } else { 0.0 };
    }
    let shape = source.map(|a| n[a]);
    let out = Grid::new(shape, grid.affine().compose(&Affine::from_parts(lin, t)))?;
    Ok(Reorientation { source, flip, from, to: target, grid: out })
}

/// Applies a planned reorientation: an exact copy of the values in the new axis order.
///
/// # Panics
/// When `vol` is not on a grid of the shape the plan was made for (a programming error).
#[track_caller]
pub fn reorient<T: Clone>(vol: &Volume<T>, r: &Reorientation) -> Volume<T> {
    let expect = r.source.map(|a| vol.grid.shape()[a]);
    assert_eq!(expect, r.grid.shape(), "reorientation planned for another grid");
    let mut view = vol.data.view().permuted_axes(r.source);
    for d in 0..3 {
        if r.flip[d] {
            view.invert_axis(Axis(d));
        }
    }
    Volume { grid: r.grid.clone(), data: view.as_standard_layout().into_owned() }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_codes() {
        assert_eq!("ras".parse::<AxisCodes>().unwrap().to_string(), "RAS");
        assert_eq!("PIL".parse::<AxisCodes>().unwrap().axial_axis(), 1);
        for bad in ["RA", "RRS", "RAX", "RASL", "LRS"] {
            assert!(bad.parse::<AxisCodes>().is_err(), "{bad}");
        }
    }

    #[test]
    fn every_voxel_keeps_its_world_position() {
        // Exact fact: a permutation/reversal moves values and the affine together.
        let a = Affine::from_parts([[0.0, 0.0, -3.0], [2.0, 0.0, 0.0], [0.0, -1.5, 0.0]], [10.0, -20.0, 5.0]);
        let g = Grid::new([4, 5, 6], a).unwrap();
        let mut v = Volume::filled(g.clone(), 0u32);
        for ((i, j, k), x) in v.data.indexed_iter_mut() {
            *x = (i * 100 + j * 10 + k) as u32;
        }
        for code in ["RAS", "LPS", "SPR", "PIL", "AIL"] {
            let r = plan(&g, code.parse().unwrap()).unwrap();
            let o = reorient(&v, &r);
            assert_eq!(o.grid.orientation(), code);
            for ((i, j, k), &x) in o.data.indexed_iter() {
                let (pi, pj, pk) = ((x / 100) as f64, (x / 10 % 10) as f64, (x % 10) as f64);
                let w_in = g.voxel_to_world([pi, pj, pk]);
                let w_out = o.grid.voxel_to_world([i as f64, j as f64, k as f64]);
                assert_eq!(w_in, w_out, "{code}");
            }
        }
        assert!(plan(&g, "AIL".parse().unwrap()).unwrap().is_identity());
    }
}
