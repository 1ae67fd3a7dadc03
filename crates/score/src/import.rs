//! Fields saved the way training code saves them, turned into sinew fields.
//!
//! A learned method's displacement array usually differs from sinew's convention (a pull
//! field on the fixed grid, component-first, in voxels along the array axes `i, j, k`) in
//! one or more of these ways, each handled here:
//!
//! | convention | how it is recognised | what is done |
//! | --- | --- | --- |
//! | a leading batch axis `(1, 3, nx, ny, nz)` / `(1, nx, ny, nz, 3)` | five axes, the first of length 1 (detected) | dropped |
//! | channel-first `(3, …)` or channel-last `(…, 3)` | the axis of length 3 at one end (detected; [`Layout`] when both ends are 3) | read accordingly |
//! | components in reversed order `(k, j, i)` — PyTorch's `grid_sample` takes `(x, y, z)` = (last, middle, first) array axis | cannot be detected: [`ChannelOrder`] | components reversed |
//! | normalised `[−1, 1]` coordinates, either corner convention | cannot be detected: [`Units`] | scaled to voxels |
//! | absolute sampling positions instead of displacements | cannot be detected: [`Values`] | the identity grid subtracted |
//! | a field at a fraction `1/f` of the fixed resolution | the spatial shape is `⌈n/f⌉` or `⌊n/f⌋` on every axis for one whole `f ≥ 2` (detected) | upsampled trilinearly, sample positions per [`LowRes`] |
//!
//! Normalised coordinates along an axis of `m` samples (PyTorch, `grid_sample`):
//! - `align_corners=True` ([`Units::NormCorners`]): −1 and +1 are the centres of the first and
//!   last voxel, so position `a = (x + 1)·(m − 1)/2` and a displacement `d` is `d·(m − 1)/2` voxels;
//! - `align_corners=False` ([`Units::NormEdges`]): −1 and +1 are the outer edges of those
//!   voxels, so `a = ((x + 1)·m − 1)/2` and `d` is `d·m/2` voxels.
//!
//! A low-resolution field of `m` samples along an axis of `n` fixed voxels sits at fixed voxel
//! positions `x = s·a + t`:
//! - [`LowRes::Blocks`] (average pooling, strided convolution, `interpolate(align_corners=False)`):
//!   `s = f`, `t = (f − 1)/2`, sample `a` at the centre of its block of `f` voxels;
//! - [`LowRes::Corners`] (`interpolate(align_corners=True)`): `s = (n − 1)/(m − 1)`, `t = 0`,
//!   the first and last samples on the first and last voxels.
//!
//! Vectors in voxels of the low-resolution grid are scaled by `s` on the way to fixed voxels.
//! Every choice made is returned in an [`ImportReport`].

use ndarray::Array4;
use serde::{Deserialize, Serialize};
use sinew_grid::{resample, Affine, Field, Grid};

use crate::ScoreError;

/// Which end of the array holds the three vector components.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Layout {
    /// Detect: the end whose axis has length 3 (an error when both or neither have).
    #[default]
    Auto,
    /// `(3, nx, ny, nz)`.
    ChannelFirst,
    /// `(nx, ny, nz, 3)`.
    ChannelLast,
}

/// The order of the three components.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ChannelOrder {
    /// Component `c` is the displacement along array axis `c` (`i, j, k`): sinew's, and numpy
    /// code that indexes `(i, j, k)`.
    #[default]
    Ijk,
    /// Component 0 is along the last array axis `k`, component 2 along the first `i`
    /// (`grid_sample`'s `(x, y, z)` order).
    Kji,
}

/// Units of the stored numbers.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Units {
    /// Voxels along the array axes (of the array's own grid when it is at low resolution).
    #[default]
    Voxel,
    /// Millimetres along the world axes of the fixed scan's affine.
    Mm,
    /// Normalised `[−1, 1]`, −1/+1 at the centres of the corner voxels (`align_corners=True`).
    NormCorners,
    /// Normalised `[−1, 1]`, −1/+1 at the outer edges of the corner voxels (`align_corners=False`).
    NormEdges,
}

/// What the numbers are.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Values {
    /// Displacements `u(x)` (pull: `warped(x) = moving(x + u(x))`).
    #[default]
    Displacement,
    /// Absolute sampling positions `x + u(x)` in the same units (a sampling grid).
    Positions,
}

/// Where the samples of a low-resolution field sit on the fixed grid.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum LowRes {
    /// Sample `a` at the centre of fixed voxels `f·a … f·a + f − 1`.
    #[default]
    Blocks,
    /// First and last samples on the first and last fixed voxels.
    Corners,
}

/// How to read a foreign displacement array.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Conventions {
    /// Where the components are.
    pub layout: Layout,
    /// Their order.
    pub channel_order: ChannelOrder,
    /// Their units.
    pub units: Units,
    /// Displacements or positions.
    pub values: Values,
    /// Placement of low-resolution samples.
    pub low_res: LowRes,
}

/// Every choice made while importing an array, for reports.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ImportReport {
    /// The array's shape as stored.
    pub stored_shape: Vec<usize>,
    /// True when a leading batch axis of length 1 was dropped.
    pub batch_axis_dropped: bool,
    /// The layout used (never `auto`), and whether it was detected.
    pub layout: Layout,
    /// True when the layout was detected from the shape.
    pub layout_detected: bool,
    /// The component order used.
    pub channel_order: ChannelOrder,
    /// The units used.
    pub units: Units,
    /// Displacements or positions.
    pub values: Values,
    /// The detected resolution factor `f` (1 = the fixed grid's resolution).
    pub resolution_factor: usize,
    /// Placement of the samples when `f > 1`.
    pub low_res: Option<LowRes>,
}

fn bad(reason: String) -> ScoreError {
    ScoreError::FieldArray(reason)
}

/// The whole factor `f ≥ 1` with `spatial[d] ∈ {⌈n_d/f⌉, ⌊n_d/f⌋}` on every axis, if any.
fn resolution_factor(spatial: [usize; 3], fixed: [usize; 3]) -> Option<usize> {
    if spatial == fixed {
        return Some(1);
    }
    let largest = fixed.iter().max().copied().unwrap_or(1);
    (2..=largest).find(|&f| {
        (0..3).all(|d| spatial[d] >= 1 && (fixed[d].div_ceil(f) == spatial[d] || fixed[d] / f == spatial[d]))
    })
}

/// Turns a displacement array of `shape` with `values` in C order into a pull field on
/// `fixed` (in voxels), following `conv` and the detections described in the module docs.
pub fn import_array(
    shape: &[usize],
    values: Vec<f32>,
    fixed: &Grid,
    conv: &Conventions,
) -> Result<(Field, ImportReport), ScoreError> {
    let stored_shape = shape.to_vec();
    let mut shape = shape.to_vec();
    let batch_axis_dropped = shape.len() == 5 && shape[0] == 1;
    if shape.len() == 5 && shape[0] != 1 {
        return Err(bad(format!(
            "shape {stored_shape:?}: a batch of {} fields; save one field per pair (batch axis of length 1)",
            shape[0]
        )));
    }
    if batch_axis_dropped {
        shape.remove(0);
    }
    if shape.len() != 4 {
        return Err(bad(format!(
            "shape {stored_shape:?}: expected 4 axes (3, nx, ny, nz) or (nx, ny, nz, 3), optionally after a batch axis of 1"
        )));
    }
    let (layout, layout_detected) = match conv.layout {
        Layout::Auto => match (shape[0] == 3, shape[3] == 3) {
            (true, false) => (Layout::ChannelFirst, true),
            (false, true) => (Layout::ChannelLast, true),
            (true, true) => {
                return Err(bad(format!(
                    "shape {stored_shape:?}: both ends have length 3; say which holds the components (layout)"
                )))
            }
            (false, false) => {
                return Err(bad(format!("shape {stored_shape:?}: no end of length 3 holds the three components")))
            }
        },
        l => (l, false),
    };
    let spatial = match layout {
        Layout::ChannelFirst if shape[0] == 3 => [shape[1], shape[2], shape[3]],
        Layout::ChannelLast if shape[3] == 3 => [shape[0], shape[1], shape[2]],
        _ => return Err(bad(format!("shape {stored_shape:?} has no axis of length 3 where {layout:?} puts it"))),
    };
    let n = fixed.shape();
    let factor = resolution_factor(spatial, n).ok_or_else(|| {
        bad(format!(
            "spatial shape {spatial:?} is neither the fixed grid's {n:?} nor a whole fraction of it (⌈n/f⌉ or ⌊n/f⌋ on every axis)"
        ))
    })?;
    if factor > 1 && conv.low_res == LowRes::Corners && spatial.iter().any(|&m| m < 2) {
        return Err(bad(format!("spatial shape {spatial:?}: the corner convention needs two samples per axis")));
    }
    // Component-first (3, m0, m1, m2), components in the file's order.
    let mut comps = match layout {
        Layout::ChannelFirst => Array4::from_shape_vec((3, spatial[0], spatial[1], spatial[2]), values),
        _ => Array4::from_shape_vec((spatial[0], spatial[1], spatial[2], 3), values)
            .map(|a| a.permuted_axes([3, 0, 1, 2]).as_standard_layout().into_owned()),
    }
    .map_err(|e| bad(format!("shape {stored_shape:?}: {e}")))?;
    if conv.channel_order == ChannelOrder::Kji {
        comps.invert_axis(ndarray::Axis(0));
        comps = comps.as_standard_layout().into_owned();
    }
    // The grid the array lives on: fixed voxel x = s·a + t per axis, world = fixed affine of x.
    let (s, t): ([f64; 3], [f64; 3]) = if factor == 1 {
        ([1.0; 3], [0.0; 3])
    } else {
        match conv.low_res {
            LowRes::Blocks => ([factor as f64; 3], [(factor as f64 - 1.0) / 2.0; 3]),
            LowRes::Corners => (std::array::from_fn(|d| (n[d] as f64 - 1.0) / (spatial[d] as f64 - 1.0)), [0.0; 3]),
        }
    };
    let scale = Affine::from_parts([[s[0], 0.0, 0.0], [0.0, s[1], 0.0], [0.0, 0.0, s[2]]], t);
    let own = Grid::new(spatial, fixed.affine().compose(&scale)).map_err(ScoreError::from)?;
    // Positions of sample a along axis d in the file's units, for `Values::Positions`.
    let m = spatial;
    let identity = |d: usize, a: usize| -> f64 {
        match conv.units {
            Units::Voxel => a as f64,
            Units::NormCorners => 2.0 * a as f64 / (m[d] as f64 - 1.0).max(1.0) - 1.0,
            Units::NormEdges => (2.0 * a as f64 + 1.0) / m[d] as f64 - 1.0,
            Units::Mm => unreachable!("mm positions are handled with the affine"),
        }
    };
    if conv.values == Values::Positions {
        if conv.units == Units::Mm {
            for ((d, i, j, k), v) in comps.indexed_iter_mut() {
                *v -= own.voxel_to_world([i as f64, j as f64, k as f64])[d] as f32;
            }
        } else {
            for ((d, i, j, k), v) in comps.indexed_iter_mut() {
                *v -= identity(d, [i, j, k][d]) as f32;
            }
        }
    }
    let field = match conv.units {
        Units::Mm => {
            let last = comps.view().permuted_axes([1, 2, 3, 0]).as_standard_layout().into_owned();
            Field::from_world_mm(own.clone(), &last).map_err(ScoreError::from)?
        }
        Units::Voxel | Units::NormCorners | Units::NormEdges => {
            let per_unit: [f64; 3] = std::array::from_fn(|d| match conv.units {
                Units::NormCorners => (m[d] as f64 - 1.0) / 2.0,
                Units::NormEdges => m[d] as f64 / 2.0,
                _ => 1.0,
            });
            for (d, mut c) in comps.outer_iter_mut().enumerate() {
                c.mapv_inplace(|v| (v as f64 * per_unit[d]) as f32);
            }
            Field::from_voxel_components(own.clone(), comps).map_err(ScoreError::from)?
        }
    };
    let field = if factor == 1 {
        Field { grid: fixed.clone(), data: field.data }
    } else {
        resample::resample_field(&field, fixed)
    };
    let report = ImportReport {
        stored_shape,
        batch_axis_dropped,
        layout,
        layout_detected,
        channel_order: conv.channel_order,
        units: conv.units,
        values: conv.values,
        resolution_factor: factor,
        low_res: (factor > 1).then_some(conv.low_res),
    };
    Ok((field, report))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A field that is affine in the voxel index: u_d(i, j, k) = c_d + A_d · (i, j, k) (voxels).
    fn linear(d: usize, p: [f64; 3]) -> f64 {
        let c = [1.5, -0.75, 0.25];
        let a = [[0.1, -0.05, 0.02], [0.03, 0.08, -0.04], [-0.02, 0.01, 0.06]];
        c[d] + a[d][0] * p[0] + a[d][1] * p[1] + a[d][2] * p[2]
    }

    fn grid() -> Grid {
        Grid::axis_aligned([8, 6, 10], [2.0, 1.5, 3.0], [-5.0, 2.0, 7.0])
    }

    fn check(field: &Field, interior_only: bool, tol: f64) {
        let [nx, ny, nz] = field.grid.shape();
        for (d, i, j, k) in ndarray::indices((3, nx, ny, nz)) {
            let inside = [i, j, k].iter().zip([nx, ny, nz]).all(|(&a, n)| a >= 1 && a + 2 <= n);
            if interior_only && !inside {
                continue;
            }
            let want = linear(d, [i as f64, j as f64, k as f64]);
            let got = field.data[[d, i, j, k]] as f64;
            assert!(
                approx::abs_diff_eq!(got, want, epsilon = tol),
                "component {d} at {:?}: {got} vs {want}",
                [i, j, k]
            );
        }
    }

    #[test]
    fn batch_axis_layout_and_reversed_order_are_undone() {
        let g = grid();
        let [nx, ny, nz] = g.shape();
        // (1, nx, ny, nz, 3) with components (k, j, i): built by index arithmetic, the layout
        // numpy's C order defines (last axis fastest).
        let mut v = Vec::new();
        for (i, j, k) in ndarray::indices((nx, ny, nz)) {
            for c in 0..3 {
                v.push(linear(2 - c, [i as f64, j as f64, k as f64]) as f32);
            }
        }
        let conv = Conventions { channel_order: ChannelOrder::Kji, ..Default::default() };
        let (f, r) = import_array(&[1, nx, ny, nz, 3], v, &g, &conv).unwrap();
        assert!(r.batch_axis_dropped && r.layout_detected && r.layout == Layout::ChannelLast);
        assert_eq!(r.resolution_factor, 1);
        check(&f, false, 1e-6);
        assert!(import_array(&[2, nx, ny, nz, 3], vec![0.0; 2 * nx * ny * nz * 3], &g, &conv).is_err());
    }

    #[test]
    fn normalised_positions_in_both_corner_conventions() {
        let g = grid();
        let n = g.shape();
        for units in [Units::NormCorners, Units::NormEdges] {
            // channel-first normalised sampling positions x_norm(a + u(a)), from the formulas
            // of the module docs inverted: corners x = 2a/(n−1) − 1, edges x = (2a + 1)/n − 1.
            let mut v = Vec::new();
            for d in 0..3 {
                for (i, j, k) in ndarray::indices((n[0], n[1], n[2])) {
                    let p = [i as f64, j as f64, k as f64];
                    let a = p[d] + linear(d, p);
                    let x = match units {
                        Units::NormCorners => 2.0 * a / (n[d] as f64 - 1.0) - 1.0,
                        _ => (2.0 * a + 1.0) / n[d] as f64 - 1.0,
                    };
                    v.push(x as f32);
                }
            }
            let conv = Conventions { units, values: Values::Positions, ..Default::default() };
            let (f, r) = import_array(&[3, n[0], n[1], n[2]], v, &g, &conv).unwrap();
            assert_eq!(r.layout, Layout::ChannelFirst);
            check(&f, false, 1e-4);
        }
    }

    #[test]
    fn half_resolution_fields_are_upsampled_exactly_where_trilinear_is_exact() {
        let g = grid();
        let n = g.shape();
        for low in [LowRes::Blocks, LowRes::Corners] {
            let m = match low {
                LowRes::Blocks => n.map(|x| x / 2),
                LowRes::Corners => n.map(|x| x.div_ceil(2)),
            };
            // sample a sits at fixed voxel x = s·a + t; the stored vector is in low voxels,
            // u_low = u_fixed / s (the module docs).
            let (s, t): ([f64; 3], f64) = match low {
                LowRes::Blocks => ([2.0; 3], 0.5),
                LowRes::Corners => (std::array::from_fn(|d| (n[d] as f64 - 1.0) / (m[d] as f64 - 1.0)), 0.0),
            };
            let mut v = Vec::new();
            for (i, j, k) in ndarray::indices((m[0], m[1], m[2])) {
                let x = [s[0] * i as f64 + t, s[1] * j as f64 + t, s[2] * k as f64 + t];
                for (d, sd) in s.iter().enumerate() {
                    v.push((linear(d, x) / sd) as f32);
                }
            }
            let conv = Conventions { low_res: low, ..Default::default() };
            let (f, r) = import_array(&[m[0], m[1], m[2], 3], v, &g, &conv).unwrap();
            assert_eq!(r.resolution_factor, 2);
            // Trilinear interpolation reproduces an affine function exactly between samples;
            // outside the outermost samples (blocks: half a voxel at each end) the edge value
            // is repeated, so only the interior is compared there.
            check(&f, low == LowRes::Blocks, 1e-4);
        }
        assert!(import_array(&[3, 3, 3, 3], vec![0.0; 81], &g, &Conventions::default()).is_err());
    }
}
