//! MIND-SSC: the self-similarity context variant of the modality independent neighbourhood
//! descriptor.
//!
//! # Definition
//! Let `N₆ = {±d·e_i, ±d·e_j, ±d·e_k}` be the six-neighbourhood at dilation `d` (voxels).
//! The twelve channels are the unordered pairs `(p, q)` of points of `N₆` at distance `√2·d`,
//! i.e. the pairs of neighbours on different axes ([`SSC_PAIRS`]). For each pair,
//!
//! ```text
//!   S_c(x) = (I(x + p) − I(x + q))²                         squared difference image
//!   D_c(x) = B_r * S_c (x)                                  box mean over (2r+1)³ voxels
//!   V(x)   = clamp( (1/12) Σ_c D_c(x), 0.001·V̄, 1000·V̄ )   local variance, V̄ = mean of V
//!   M_c(x) = exp(−D_c(x) / V(x)) / max_c' exp(−D_c'(x) / V(x))
//! ```
//!
//! Shifts and the box filter replicate the edge voxel outside the image (clamped indices):
//! `I(x + p)` reads `I(clamp(x + p))`, and `B_r` averages `S_c(clamp(·))`. This is
//! `scipy.ndimage.uniform_filter(S, 2r + 1, mode="nearest")` applied to the edge-replicated
//! difference image.
//!
//! Two steps are common practice in published implementations, not part of the papers'
//! formulas: the clamp of `V` to `[0.001·V̄, 1000·V̄]` (keeps flat and extremely noisy regions
//! from dominating) and the normalisation by the per-voxel maximum over channels (so the
//! largest channel is exactly 1). The maximum normalisation is computed as
//! `M_c = exp(−(D_c − min_c' D_c') / V)`, which is the same number and cannot underflow to 0/0.
//! When the whole image is constant (`V̄ = 0`), `V` is taken as the smallest positive `f32`
//! and every channel is 1.
//!
//! Offsets and the filter radius are in **voxels** along the array axes: spacing is ignored,
//! as in the papers. Non-finite input voxels make the output non-finite.
//!
//! The box filter uses running sums (constant cost per voxel whatever the radius), with the
//! running totals kept in `f64`. The MICCAI 2013 paper uses a box filter for speed; the 2012
//! paper uses a Gaussian. Only the box filter is implemented.
//!
//! # References
//! - "Towards realtime multimodal fusion for image-guided interventions using
//!   self-similarities", MICCAI 2013, LNCS 8149, pp. 187–194. doi:10.1007/978-3-642-40811-3_24
//! - "MIND: Modality independent neighbourhood descriptor for multi-modal deformable
//!   registration", Medical Image Analysis 16(7):1423–1435, 2012.
//!   doi:10.1016/j.media.2012.05.008

use std::sync::{Mutex, MutexGuard, TryLockError};

use rayon::prelude::*;
use sinew_grid::{Grid, Image};

use crate::FeatureError;

/// Number of MIND-SSC channels (pairs of six-neighbours on different axes).
pub const SSC_CHANNELS: usize = 12;

/// The six-neighbourhood as unit offsets `(di, dj, dk)`; the descriptor scales them by the
/// dilation. Order: `+i, −i, +j, −j, +k, −k`.
pub const SIX_NEIGHBOURS: [[isize; 3]; 6] = [[1, 0, 0], [-1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]];

/// Channel `c` compares the neighbours `SIX_NEIGHBOURS[a]` and `SIX_NEIGHBOURS[b]` with
/// `(a, b) = SSC_PAIRS[c]`: all unordered pairs on different axes, in lexicographic order.
pub const SSC_PAIRS: [(usize, usize); SSC_CHANNELS] =
    [(0, 2), (0, 3), (0, 4), (0, 5), (1, 2), (1, 3), (1, 4), (1, 5), (2, 4), (2, 5), (3, 4), (3, 5)];

/// Output slabs (along `i`) per parallel task. Fixed, so results never depend on the thread
/// count.
const CHUNK: usize = 8;

/// Settings of the MIND-SSC descriptor.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct MindParams {
    /// Radius `r` of the box filter in voxels: the patch is `(2r+1)³` voxels. Default 1.
    pub radius: usize,
    /// Dilation `d` of the six-neighbourhood in voxels (offsets `±d` along each axis). Default 2.
    pub dilation: usize,
}

impl Default for MindParams {
    /// `radius = 1`, `dilation = 2` (voxels).
    fn default() -> Self {
        MindParams { radius: 1, dilation: 2 }
    }
}

impl MindParams {
    /// Checked constructor: the dilation must be at least one voxel.
    pub fn new(radius: usize, dilation: usize) -> Result<MindParams, FeatureError> {
        if dilation == 0 {
            return Err(FeatureError::ZeroDilation { dilation });
        }
        Ok(MindParams { radius, dilation })
    }
}

/// A dense descriptor image, channel-last: voxel `n`'s channels are
/// `data[n * channels .. (n + 1) * channels]`, with `n` the standard-order linear index
/// `(i·ny + j)·nz + k` of `grid`.
#[derive(Clone, Debug, PartialEq)]
pub struct Descriptor {
    /// The grid of the image the descriptor was computed from.
    pub grid: Grid,
    /// Channels per voxel ([`SSC_CHANNELS`] for MIND-SSC).
    pub channels: usize,
    /// Values, `grid.len() · channels` entries, channel-last.
    pub data: Vec<f32>,
}

impl Descriptor {
    /// A zero descriptor with [`SSC_CHANNELS`] channels on `grid`.
    pub fn zeros(grid: Grid) -> Descriptor {
        let data = vec![0.0; grid.len() * SSC_CHANNELS];
        Descriptor { grid, channels: SSC_CHANNELS, data }
    }

    /// The channels of voxel `n` (standard-order linear index).
    #[inline]
    pub fn voxel(&self, n: usize) -> &[f32] {
        &self.data[n * self.channels..(n + 1) * self.channels]
    }
}

/// Reusable work buffers for [`mind_ssc_into`]. Buffers only grow, so repeated calls on
/// volumes of the same size allocate nothing.
#[derive(Debug, Default)]
pub struct MindScratch {
    /// The image with `d` edge-replicated voxels on every side.
    padded: Vec<f32>,
    /// One set of per-task buffers per worker thread.
    workers: Vec<Mutex<Work>>,
    /// Per-chunk sums of `D`, merged in index order.
    chunk_sums: Vec<f64>,
}

/// Buffers of one parallel task.
#[derive(Debug, Default)]
struct Work {
    /// `(CHUNK + 2r) × 12` planes of `S_c` box-filtered along `j` and `k`.
    planes: Vec<f32>,
    /// Running sums along `i`, planar `[c][j·nz + k]`.
    acc: Vec<f64>,
    /// One plane filtered along `k` only.
    hplane: Vec<f32>,
    /// One squared-difference row with `r` replicated entries on each side.
    row: Vec<f32>,
    /// Running sums along `j` for one row.
    jacc: Vec<f64>,
}

/// Index geometry shared by the kernels.
#[derive(Clone, Copy)]
struct Geo {
    shape: [usize; 3],
    d: usize,
    r: usize,
    pny: usize,
    pnz: usize,
}

/// The MIND-SSC descriptor of `img` (see the [module documentation](self) for the formulas).
///
/// # Panics
/// When `p.dilation == 0` (use [`MindParams::new`] to validate user input).
///
/// # Examples
/// ```
/// use sinew_features::{mind_ssc, MindParams};
/// use sinew_grid::{Grid, Image};
/// let img = Image::filled(Grid::axis_aligned([6, 5, 4], [1.0; 3], [0.0; 3]), 3.0);
/// let desc = mind_ssc(&img, &MindParams::default());
/// assert_eq!(desc.data.len(), 6 * 5 * 4 * 12);
/// assert!(desc.data.iter().all(|&v| v == 1.0)); // a constant image: all channels equal
/// ```
#[track_caller]
pub fn mind_ssc(img: &Image, p: &MindParams) -> Descriptor {
    let mut out = Descriptor { grid: img.grid.clone(), channels: SSC_CHANNELS, data: Vec::new() };
    mind_ssc_into(img, p, &mut out, &mut MindScratch::default());
    out
}

/// [`mind_ssc`] writing into `out` (reshaped to `img`'s grid) with reusable `scratch`.
///
/// Parallel over fixed chunks of `i` slabs; the result does not depend on the thread count.
///
/// # Panics
/// When `p.dilation == 0`.
#[track_caller]
pub fn mind_ssc_into(img: &Image, p: &MindParams, out: &mut Descriptor, scratch: &mut MindScratch) {
    assert!(p.dilation >= 1, "MIND-SSC dilation must be at least 1 voxel");
    let shape = img.grid.shape();
    let [nx, ny, nz] = shape;
    let (r, d) = (p.radius, p.dilation);
    let plane = ny * nz;
    let n = nx * plane;
    out.grid = img.grid.clone();
    out.channels = SSC_CHANNELS;
    if out.data.is_empty() {
        // Zeroed pages from the allocator (pass 1 writes every value): no fill pass.
        out.data = vec![0.0; n * SSC_CHANNELS];
    } else if out.data.len() != n * SSC_CHANNELS {
        out.data.resize(n * SSC_CHANNELS, 0.0);
    }
    let geo = Geo { shape, d, r, pny: ny + 2 * d, pnz: nz + 2 * d };
    pad_edges(img.as_slice(), geo, &mut scratch.padded);

    let n_workers = rayon::current_num_threads().max(1);
    if scratch.workers.len() < n_workers {
        scratch.workers.resize_with(n_workers, Default::default);
    }
    let n_chunks = nx.div_ceil(CHUNK);
    scratch.chunk_sums.clear();
    scratch.chunk_sums.resize(n_chunks, 0.0);
    let offsets = SSC_PAIRS.map(|(a, b)| {
        let s = d as isize;
        [SIX_NEIGHBOURS[a].map(|v| v * s), SIX_NEIGHBOURS[b].map(|v| v * s)]
    });

    // Pass 1: D_c for every voxel, written channel-last into `out`.
    let (padded, workers) = (&scratch.padded, &scratch.workers);
    out.data.par_chunks_mut(CHUNK * plane * SSC_CHANNELS).zip(scratch.chunk_sums.par_iter_mut()).enumerate().for_each(
        |(ci, (dst, sum))| {
            let mut work = acquire(workers);
            *sum = box_distances(padded, geo, &offsets, ci * CHUNK, &mut work, dst);
        },
    );

    // Pass 2: variance estimate, exponential, max normalisation (per voxel).
    let mean_v = (scratch.chunk_sums.iter().sum::<f64>() / (n * SSC_CHANNELS) as f64) as f32;
    let (lo, hi) = (0.001 * mean_v, 1000.0 * mean_v);
    out.data.par_chunks_mut(plane * SSC_CHANNELS).for_each(|slab| {
        for v in slab.chunks_exact_mut(SSC_CHANNELS) {
            normalise_voxel(v, lo, hi);
        }
    });
}

/// Turns the twelve distances of one voxel into descriptor values (pass 2).
#[inline]
fn normalise_voxel(v: &mut [f32], lo: f32, hi: f32) {
    let mut dmin = v[0];
    let mut sum = 0.0f32;
    for &x in v.iter() {
        dmin = dmin.min(x);
        sum += x;
    }
    // max/min rather than clamp: never panics, even for a NaN mean.
    let var = (sum / SSC_CHANNELS as f32).max(lo).min(hi).max(f32::MIN_POSITIVE);
    let inv = 1.0 / var;
    for x in v.iter_mut() {
        *x = (-(*x - dmin) * inv).exp();
    }
}

/// Copies `img` into `padded` with `d` edge-replicated voxels on every side.
fn pad_edges(img: &[f32], geo: Geo, padded: &mut Vec<f32>) {
    let [nx, ny, nz] = geo.shape;
    let (d, pny, pnz) = (geo.d, geo.pny, geo.pnz);
    let len = (nx + 2 * d) * pny * pnz;
    if padded.len() != len {
        padded.resize(len, 0.0);
    }
    padded.par_chunks_mut(pny * pnz).enumerate().for_each(|(a, slab)| {
        let i = a.saturating_sub(d).min(nx - 1);
        for (b, prow) in slab.chunks_exact_mut(pnz).enumerate() {
            let j = b.saturating_sub(d).min(ny - 1);
            let src = &img[(i * ny + j) * nz..(i * ny + j + 1) * nz];
            prow[..d].fill(src[0]);
            prow[d..d + nz].copy_from_slice(src);
            prow[d + nz..].fill(src[nz - 1]);
        }
    });
}

/// Takes a free worker buffer. A task never waits on another one: there are at least as many
/// buffers as threads and a task does not call back into rayon.
fn acquire(workers: &[Mutex<Work>]) -> MutexGuard<'_, Work> {
    let start = rayon::current_thread_index().unwrap_or(0);
    loop {
        for t in 0..workers.len() {
            match workers[(start + t) % workers.len()].try_lock() {
                Ok(g) => return g,
                Err(TryLockError::Poisoned(e)) => return e.into_inner(),
                Err(TryLockError::WouldBlock) => {}
            }
        }
        std::thread::yield_now();
    }
}

/// Pass 1 for the output slabs `i0 ..` held in `dst` (channel-last): box-filtered squared
/// differences `D_c`. Returns the sum of all values written (in index order).
fn box_distances(
    padded: &[f32],
    geo: Geo,
    offsets: &[[[isize; 3]; 2]; SSC_CHANNELS],
    i0: usize,
    work: &mut Work,
    dst: &mut [f32],
) -> f64 {
    let [nx, ny, nz] = geo.shape;
    let r = geo.r;
    let w = 2 * r + 1;
    let plane = ny * nz;
    let len = dst.len() / (plane * SSC_CHANNELS);
    let nt = len + 2 * r;
    let Work { planes, acc, hplane, row, jacc } = work;
    planes.resize(nt * SSC_CHANNELS * plane, 0.0);
    acc.resize(SSC_CHANNELS * plane, 0.0);
    hplane.resize(plane, 0.0);
    row.resize(nz + 2 * r, 0.0);
    jacc.resize(nz, 0.0);

    // Planes of S_c filtered along k and j, for virtual slabs i0 − r .. i0 + len + r.
    for t in 0..nt {
        let s = (i0 as isize + t as isize - r as isize).clamp(0, nx as isize - 1) as usize;
        for (c, off) in offsets.iter().enumerate() {
            let out = &mut planes[(t * SSC_CHANNELS + c) * plane..][..plane];
            filtered_plane(padded, geo, s, off, row, hplane, jacc, out);
        }
    }

    // Running sums along i, written channel-last.
    let inv = 1.0 / (w * w * w) as f64;
    acc.fill(0.0);
    for t in 0..w {
        for c in 0..SSC_CHANNELS {
            let src = &planes[(t * SSC_CHANNELS + c) * plane..][..plane];
            for (a, &v) in acc[c * plane..(c + 1) * plane].iter_mut().zip(src) {
                *a += v as f64;
            }
        }
    }
    let mut total = 0.0f64;
    for m in 0..len {
        let out = &mut dst[m * plane * SSC_CHANNELS..(m + 1) * plane * SSC_CHANNELS];
        for (nn, o) in out.chunks_exact_mut(SSC_CHANNELS).enumerate() {
            let mut s = 0.0f64;
            for (c, oc) in o.iter_mut().enumerate() {
                let v = (acc[c * plane + nn] * inv) as f32;
                *oc = v;
                s += v as f64;
            }
            total += s;
        }
        if m + 1 < len {
            for c in 0..SSC_CHANNELS {
                let add = &planes[((m + w) * SSC_CHANNELS + c) * plane..][..plane];
                let sub = &planes[(m * SSC_CHANNELS + c) * plane..][..plane];
                for ((a, &x), &y) in acc[c * plane..(c + 1) * plane].iter_mut().zip(add).zip(sub) {
                    *a += x as f64 - y as f64;
                }
            }
        }
    }
    total
}

/// One plane `i = s` of `Σ_{|dj|,|dk| ≤ r} S(s, j + dj, k + dk)` (box sums along k then j, edge
/// replicated) for the pair of offsets `off`.
#[allow(clippy::too_many_arguments)]
fn filtered_plane(
    padded: &[f32],
    geo: Geo,
    s: usize,
    off: &[[isize; 3]; 2],
    row: &mut [f32],
    hplane: &mut [f32],
    jacc: &mut [f64],
    out: &mut [f32],
) {
    let [_, ny, nz] = geo.shape;
    let (r, d) = (geo.r, geo.d as isize);
    let w = 2 * r + 1;
    let start = |o: &[isize; 3], j: usize| -> usize {
        let a = s as isize + d + o[0];
        let b = j as isize + d + o[1];
        ((a * geo.pny as isize + b) * geo.pnz as isize + d + o[2]) as usize
    };
    for j in 0..ny {
        let ra = &padded[start(&off[0], j)..][..nz];
        let rb = &padded[start(&off[1], j)..][..nz];
        let (lead, rest) = row.split_at_mut(r);
        let (mid, tail) = rest.split_at_mut(nz);
        for ((m, &x), &y) in mid.iter_mut().zip(ra).zip(rb) {
            let e = x - y;
            *m = e * e;
        }
        lead.fill(mid[0]);
        tail.fill(mid[nz - 1]);
        // Running sum along k.
        let h = &mut hplane[j * nz..(j + 1) * nz];
        let mut a: f64 = row[..w].iter().map(|&v| v as f64).sum();
        h[0] = a as f32;
        for k in 1..nz {
            a += row[k + w - 1] as f64 - row[k - 1] as f64;
            h[k] = a as f32;
        }
    }
    // Running sums along j (vectorised over k).
    let clampj = |j: isize| j.clamp(0, ny as isize - 1) as usize;
    jacc.fill(0.0);
    for m in -(r as isize)..=r as isize {
        let src = &hplane[clampj(m) * nz..][..nz];
        jacc.iter_mut().zip(src).for_each(|(a, &v)| *a += v as f64);
    }
    for j in 0..ny {
        out[j * nz..(j + 1) * nz].iter_mut().zip(jacc.iter()).for_each(|(o, &a)| *o = a as f32);
        if j + 1 < ny {
            let add = &hplane[clampj(j as isize + 1 + r as isize) * nz..][..nz];
            let sub = &hplane[clampj(j as isize - r as isize) * nz..][..nz];
            for ((a, &x), &y) in jacc.iter_mut().zip(add).zip(sub) {
                *a += x as f64 - y as f64;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    #[allow(clippy::needless_range_loop)]
    fn pairs_are_exactly_the_neighbour_pairs_at_distance_sqrt2() {
        // Exact fact: among the six points ±e_i, the unordered pairs at squared distance 2 are
        // the 3·4 = 12 pairs on different axes (same-axis pairs are at distance 2).
        let mut found = Vec::new();
        for a in 0..6 {
            for b in a + 1..6 {
                let (p, q) = (SIX_NEIGHBOURS[a], SIX_NEIGHBOURS[b]);
                let d2: isize = (0..3).map(|t| (p[t] - q[t]).pow(2)).sum();
                if d2 == 2 {
                    found.push((a, b));
                }
            }
        }
        assert_eq!(found, SSC_PAIRS.to_vec());
    }

    #[test]
    fn rejects_zero_dilation() {
        assert_eq!(MindParams::new(1, 0), Err(FeatureError::ZeroDilation { dilation: 0 }));
        assert_eq!(MindParams::new(0, 1), Ok(MindParams { radius: 0, dilation: 1 }));
    }
}
