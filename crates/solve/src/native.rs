//! The registration's field on the fixed scan's native grid, computed where it is needed
//! instead of held whole.
//!
//! A 512×512×400 scan has 105 M voxels: its displacement field is 1.26 GB of `f32` (3 per
//! voxel), as much again in mm for writing. The registration itself runs on a working grid of
//! about 2 mm (8 M voxels for the same scan), so [`NativeField`] keeps that field and the rule
//! that carries it to the native grid, and evaluates the native vectors block by block:
//! - [`NativeField::fill_planes`]: planes of constant `k` in file order (`i` fastest), for
//!   writing the field file one block at a time;
//! - [`native_outputs`]: the warped scan, the warped labels and the Jacobian determinant on the
//!   native grid, from chunks of `i` slabs of the field (with one slab either side for the
//!   central differences), never the whole field.
//!
//! Every vector equals the one of the whole-field path it replaces
//! ([`sinew_grid::resample::resample_field`] then [`crate::affine::compose_after`]) up to f32
//! rounding (the interpolation is separable when the working grid shares the native grid's
//! directions, as it does); the outputs equal, bit for bit, those of
//! [`sinew_transform::warp_image_from`], [`sinew_transform::warp_labels_from`] and
//! [`sinew_transform::jacobian_determinant`] on [`NativeField::to_field`] (tested below).

use ndarray::{ArrayViewMut3, Axis};
use rayon::prelude::*;
use sinew_grid::interp::{nearest, trilinear};
use sinew_grid::resample::voxel_map;
use sinew_grid::{det3, Affine, Border, Field, Grid, Image, LabelMap, Volume};

/// A displacement field on the fixed scan's native grid (voxels, pull:
/// `warped(x) = moving(x + u(x))`, `x + u(x)` in fixed voxel coordinates).
#[derive(Clone, Debug)]
pub struct NativeField {
    grid: Grid,
    kind: Kind,
}

// One value per registration: the size of the variants does not matter.
#[allow(clippy::large_enum_variant)]
#[derive(Clone, Debug)]
enum Kind {
    /// Held whole (the registration ran on the native grid).
    Full(Field),
    /// A working-grid field, carried to the native grid on demand.
    Upsampled(Upsampled),
}

/// `u(x) = G⁻¹·A·G·(x + w(x)) − x`, with `w(x) = L·v(m·x)`: `v` the working field (voxels of
/// the working grid) sampled trilinearly (edge repeated) at `m·x`, `m` the voxel map from the
/// native grid to the working grid, `L` the linear map from working voxels to native voxels,
/// and `A` (world mm, fixed point ↦ moving point) applied after it when it is not the identity.
#[derive(Clone, Debug)]
struct Upsampled {
    work: Field,
    m: Affine,
    lin: [[f64; 3]; 3],
    /// `G⁻¹·A·G` (native voxels), when `A` is not the identity.
    post: Option<Affine>,
    /// Per-axis interpolation cells when `m` maps each native axis onto one working axis (the
    /// working grid is the native grid with other voxel counts, [`Grid::with_shape`]).
    cells: Option<[Vec<Cell>; 3]>,
}

/// One axis of a separable trilinear interpolation: `value = lerp(v[lo], v[hi], t)` along it.
#[derive(Clone, Copy, Debug)]
struct Cell {
    lo: usize,
    hi: usize,
    t: f32,
}

/// `p + t·(q − p)` in f32: the one interpolation step of [`NativeField::at`] and of the
/// row-wise evaluation (the same expression, so the two agree bit for bit).
#[inline(always)]
fn lerp(p: f32, q: f32, t: f32) -> f32 {
    p + t * (q - p)
}

/// `out[n] = lerp(p[n], q[n], t)` over whole rows.
#[inline]
fn lerp_rows(out: &mut [f32], p: &[f32], q: &[f32], t: f32) {
    for ((o, &a), &b) in out.iter_mut().zip(p).zip(q) {
        *o = lerp(a, b, t);
    }
}

impl Upsampled {
    /// The working vector `v` (working voxels, trilinear at `m·x`) carried to native voxel
    /// `x = (i, j, k)`: `w = L·v` in f64 rounded to f32, then `G⁻¹AG·(x + w) − x` when the
    /// linear map is not the identity.
    #[inline]
    fn finish(&self, [i, j, k]: [usize; 3], v: [f32; 3]) -> [f32; 3] {
        let v = v.map(f64::from);
        let l = &self.lin;
        let w = [0, 1, 2].map(|r| (l[r][0] * v[0] + l[r][1] * v[1] + l[r][2] * v[2]) as f32);
        match &self.post {
            None => w,
            // compose_after: G⁻¹AG·(x + w) − x.
            Some(post) => {
                let x = [i as f64, j as f64, k as f64];
                let q = post.apply([x[0] + w[0] as f64, x[1] + w[1] as f64, x[2] + w[2] as f64]);
                [(q[0] - x[0]) as f32, (q[1] - x[1]) as f32, (q[2] - x[2]) as f32]
            }
        }
    }

    /// Component `d` of the working row `(x, y)` interpolated along `k` at the native
    /// positions `k0 .. k0 + out.len()` (the innermost step of [`NativeField::at`]).
    #[inline]
    fn k_row(&self, d: usize, x: usize, y: usize, cz: &[Cell], k0: usize, out: &mut [f32]) {
        let shape = self.work.grid.shape();
        let u = &self.work.component(d)[(x * shape[1] + y) * shape[2]..][..shape[2]];
        for (o, c) in out.iter_mut().zip(&cz[k0..]) {
            *o = lerp(u[c.lo], u[c.hi], c.t);
        }
    }

    /// Native slab `i` (memory order, `ny·nz` values per component) by rows: each working row
    /// `(x, y)` used is interpolated along `k` once, then the rows are combined along `j`, then
    /// `i`, in the order of [`NativeField::at`] (so the values are the same, bit for bit).
    /// `scratch` is resized as needed.
    fn fill_slab_rows(&self, i: usize, ny: usize, nz: usize, out: [&mut [f32]; 3], scratch: &mut Vec<f32>) {
        let [cx, cy, cz] = self.cells.as_ref().expect("separable");
        let nyw = self.work.grid.shape()[1];
        let a = cx[i];
        // Layout of scratch: per component, rows K0[y] (x = a.lo) and K1[y] (x = a.hi), then
        // two rows of nz for the j-combined values.
        let per = 2 * nyw * nz + 2 * nz;
        scratch.resize(3 * per, 0.0);
        let (ylo, yhi) = (cy[0].lo.min(cy[ny - 1].lo), cy[0].hi.max(cy[ny - 1].hi));
        for (d, o) in out.into_iter().enumerate() {
            let s = &mut scratch[d * per..(d + 1) * per];
            let (k0s, rest) = s.split_at_mut(nyw * nz);
            let (k1s, rest) = rest.split_at_mut(nyw * nz);
            let (c0, c1) = rest.split_at_mut(nz);
            for y in ylo..=yhi {
                self.k_row(d, a.lo, y, cz, 0, &mut k0s[y * nz..(y + 1) * nz]);
                self.k_row(d, a.hi, y, cz, 0, &mut k1s[y * nz..(y + 1) * nz]);
            }
            for (j, row) in o.chunks_exact_mut(nz).enumerate() {
                let b = cy[j];
                lerp_rows(c0, &k0s[b.lo * nz..][..nz], &k0s[b.hi * nz..][..nz], b.t);
                lerp_rows(c1, &k1s[b.lo * nz..][..nz], &k1s[b.hi * nz..][..nz], b.t);
                lerp_rows(row, c0, c1, a.t);
            }
        }
    }
}

/// The cells of native positions `0 .. n` along one axis, at working position
/// `q = scale·x + offset` on an axis of `len` working voxels, under the border rule of
/// [`sinew_grid::interp`] for values (the position clamped into the axis); `q` is rounded to
/// `f32` first, as the samplers take positions.
fn axis_cells(n: usize, scale: f64, offset: f64, len: usize) -> Vec<Cell> {
    (0..n)
        .map(|x| {
            let q = (scale * x as f64 + offset) as f32;
            let fl = q.floor();
            if len < 2 || q <= 0.0 {
                Cell { lo: 0, hi: 0, t: 0.0 }
            } else if fl as usize >= len - 1 {
                Cell { lo: len - 1, hi: len - 1, t: 0.0 }
            } else {
                Cell { lo: fl as usize, hi: fl as usize + 1, t: q - fl }
            }
        })
        .collect()
}

impl NativeField {
    /// A field held whole on its own grid.
    pub fn full(field: Field) -> NativeField {
        NativeField { grid: field.grid.clone(), kind: Kind::Full(field) }
    }

    /// The working-grid field `work` carried to `native` and composed with the linear map `a`
    /// (4×4 world mm, fixed point ↦ moving point; applied after the displacement), as
    /// [`sinew_grid::resample::resample_field`] then [`crate::affine::compose_after`] do.
    pub fn upsampled(work: Field, native: &Grid, a: &Affine) -> NativeField {
        let m = voxel_map(native, &work.grid);
        let lin = native.inverse_affine().compose(work.grid.affine()).linear();
        let post = (*a != Affine::IDENTITY).then(|| native.inverse_affine().compose(&a.compose(native.affine())));
        // Off-diagonal terms of m below 1e-9 (rounding of G_W⁻¹·G) are taken as zero: at most
        // 1e-9 × 32767 voxels = 3e-5 voxels of position.
        let mm = m.to_4x4();
        let separable = (0..3).all(|r| (0..3).all(|c| r == c || mm[r][c].abs() < 1e-9));
        let shape = work.grid.shape();
        let cells = separable.then(|| {
            let n = native.shape();
            [0, 1, 2].map(|d| axis_cells(n[d], mm[d][d], mm[d][3], shape[d]))
        });
        NativeField { grid: native.clone(), kind: Kind::Upsampled(Upsampled { work, m, lin, post, cells }) }
    }

    /// The native grid.
    pub fn grid(&self) -> &Grid {
        &self.grid
    }

    /// The whole field when it is held whole (the registration ran on the native grid).
    pub fn as_full(&self) -> Option<&Field> {
        match &self.kind {
            Kind::Full(f) => Some(f),
            Kind::Upsampled(_) => None,
        }
    }

    /// The field on the working grid composed with the linear map (`u_W(y) =
    /// G_W⁻¹·A·G_W·(y + v(y)) − y`): the same map at working resolution, for the QC sheet. For
    /// a field held whole, the field itself.
    pub fn on_working_grid(&self) -> Field {
        match &self.kind {
            Kind::Full(f) => f.clone(),
            Kind::Upsampled(up) => {
                let mut f = up.work.clone();
                if let Some(post_native) = &up.post {
                    // A in world mm, from the native map: A = G·post·G⁻¹.
                    let a = self.grid.affine().compose(&post_native.compose(self.grid.inverse_affine()));
                    crate::affine::compose_after(&mut f, &a);
                }
                f
            }
        }
    }

    /// The whole field on the native grid (1.26 GB at 512×512×400: for small grids, tests and
    /// the Python module).
    pub fn to_field(&self) -> Field {
        match &self.kind {
            Kind::Full(f) => f.clone(),
            Kind::Upsampled(_) => {
                let mut out = Field::zeros(self.grid.clone());
                out.par_slabs_mut(|i, out| self.fill_slab(i, out, &mut Vec::new()));
                out
            }
        }
    }

    /// The vector at native voxel `(i, j, k)` (voxels).
    #[inline]
    pub fn at(&self, i: usize, j: usize, k: usize) -> [f32; 3] {
        match &self.kind {
            Kind::Full(f) => {
                let [_, ny, nz] = self.grid.shape();
                let n = (i * ny + j) * nz + k;
                [f.component(0)[n], f.component(1)[n], f.component(2)[n]]
            }
            Kind::Upsampled(up) => {
                // resample_field: the working vectors at m·x, carried to native voxels.
                let shape = up.work.grid.shape();
                let v = match &up.cells {
                    Some([cx, cy, cz]) => {
                        let (a, b, c) = (cx[i], cy[j], cz[k]);
                        let (sy, sx) = (shape[2], shape[1] * shape[2]);
                        let (x0, x1, y0, y1) = (a.lo * sx, a.hi * sx, b.lo * sy, b.hi * sy);
                        [0, 1, 2].map(|d| {
                            let u = up.work.component(d);
                            let c00 = lerp(u[x0 + y0 + c.lo], u[x0 + y0 + c.hi], c.t);
                            let c01 = lerp(u[x0 + y1 + c.lo], u[x0 + y1 + c.hi], c.t);
                            let c10 = lerp(u[x1 + y0 + c.lo], u[x1 + y0 + c.hi], c.t);
                            let c11 = lerp(u[x1 + y1 + c.lo], u[x1 + y1 + c.hi], c.t);
                            lerp(lerp(c00, c01, b.t), lerp(c10, c11, b.t), a.t)
                        })
                    }
                    None => {
                        let q = up.m.apply([i as f64, j as f64, k as f64]);
                        let p = [q[0] as f32, q[1] as f32, q[2] as f32];
                        [0, 1, 2].map(|d| trilinear(up.work.component(d), shape, p, Border::Nearest))
                    }
                };
                up.finish([i, j, k], v)
            }
        }
    }

    /// The three components (voxels) on planes `k0 .. k0 + nk` in file order: `out[c]` holds
    /// `nk·ny·nx` values, index `(kk·ny + j)·nx + i` for voxel `(i, j, k0 + kk)`, with `nk`
    /// given by the length of `out[0]`. Parallel over `j`.
    ///
    /// # Panics
    /// When the buffers are not whole planes of equal length or reach beyond the grid.
    pub fn fill_planes(&self, k0: usize, out: [&mut [f32]; 3]) {
        let [nx, ny, nz] = self.grid.shape();
        let nk = out[0].len() / (nx * ny);
        assert!(out.iter().all(|o| o.len() == nk * nx * ny) && k0 + nk <= nz, "whole planes inside the grid");
        let [a, b, c] = out;
        let views = [a, b, c].map(|o| ArrayViewMut3::from_shape((nk, ny, nx), o).expect("whole planes"));
        let [mut va, mut vb, mut vc] = views;
        let rows =
            va.axis_iter_mut(Axis(1)).into_par_iter().zip(vb.axis_iter_mut(Axis(1))).zip(vc.axis_iter_mut(Axis(1)));
        match &self.kind {
            Kind::Upsampled(up @ Upsampled { cells: Some([cx, cy, cz]), .. }) => {
                // By rows: for row j, each working row (x, y) used is interpolated along k
                // once, combined along j into J[x], then along i (the order of `at`).
                let nxw = up.work.grid.shape()[0];
                let (xlo, xhi) = (cx[0].lo.min(cx[nx - 1].lo), cx[0].hi.max(cx[nx - 1].hi));
                rows.enumerate().for_each_init(
                    || vec![0.0f32; (3 * nxw + 2) * nk],
                    |scratch, (j, ((mut ra, mut rb), mut rc))| {
                        let b = cy[j];
                        let (js, rest) = scratch.split_at_mut(3 * nxw * nk);
                        let (t0, t1) = rest.split_at_mut(nk);
                        for d in 0..3 {
                            for x in xlo..=xhi {
                                up.k_row(d, x, b.lo, cz, k0, t0);
                                up.k_row(d, x, b.hi, cz, k0, t1);
                                lerp_rows(&mut js[(d * nxw + x) * nk..][..nk], t0, t1, b.t);
                            }
                        }
                        let jrow = |d: usize, x: usize| &js[(d * nxw + x) * nk..][..nk];
                        for i in 0..nx {
                            let a = cx[i];
                            let (p, q) = ([0, 1, 2].map(|d| jrow(d, a.lo)), [0, 1, 2].map(|d| jrow(d, a.hi)));
                            for kk in 0..nk {
                                let v = [0, 1, 2].map(|d| lerp(p[d][kk], q[d][kk], a.t));
                                let w = up.finish([i, j, k0 + kk], v);
                                ra[[kk, i]] = w[0];
                                rb[[kk, i]] = w[1];
                                rc[[kk, i]] = w[2];
                            }
                        }
                    },
                );
            }
            _ => rows.enumerate().for_each(|(j, ((mut ra, mut rb), mut rc))| {
                for i in 0..nx {
                    for kk in 0..nk {
                        let v = self.at(i, j, k0 + kk);
                        ra[[kk, i]] = v[0];
                        rb[[kk, i]] = v[1];
                        rc[[kk, i]] = v[2];
                    }
                }
            }),
        }
    }

    /// Slab `i` (memory order, `ny·nz` values per component) into `out`; `scratch` is working
    /// space, resized as needed.
    fn fill_slab(&self, i: usize, out: [&mut [f32]; 3], scratch: &mut Vec<f32>) {
        let [_, ny, nz] = self.grid.shape();
        let [a, b, c] = out;
        match &self.kind {
            Kind::Full(f) => {
                let r = i * ny * nz..(i + 1) * ny * nz;
                a.copy_from_slice(&f.component(0)[r.clone()]);
                b.copy_from_slice(&f.component(1)[r.clone()]);
                c.copy_from_slice(&f.component(2)[r]);
            }
            Kind::Upsampled(up) if up.cells.is_some() => {
                up.fill_slab_rows(i, ny, nz, [&mut *a, &mut *b, &mut *c], scratch);
                for j in 0..ny {
                    for k in 0..nz {
                        let n = j * nz + k;
                        let w = up.finish([i, j, k], [a[n], b[n], c[n]]);
                        (a[n], b[n], c[n]) = (w[0], w[1], w[2]);
                    }
                }
            }
            Kind::Upsampled(_) => {
                for j in 0..ny {
                    for k in 0..nz {
                        let v = self.at(i, j, k);
                        let n = j * nz + k;
                        (a[n], b[n], c[n]) = (v[0], v[1], v[2]);
                    }
                }
            }
        }
    }
}

/// `i` slabs per task of [`native_outputs`].
const CHUNK: usize = 4;

/// What [`native_outputs`] produces on the native grid.
#[derive(Debug)]
pub struct NativeOutputs {
    /// `moving(A_m⁻¹·A_f·(x + u(x)))`, trilinear, `pad` outside the moving scan (as
    /// [`sinew_transform::warp_image_from`] with [`Border::Constant`]).
    pub warped: Image,
    /// The moving labels pulled by nearest neighbour, 0 outside (as
    /// [`sinew_transform::warp_labels_from`]).
    pub warped_labels: Option<LabelMap>,
    /// `det(I + ∇u)` by central differences (as [`sinew_transform::jacobian_determinant`]).
    pub jacdet: Image,
}

/// The warped scan, warped labels and Jacobian determinant on the field's native grid (see the
/// module docs), in parallel over chunks of `i` slabs; the field is evaluated once per slab of
/// a chunk plus one slab either side, never held whole.
pub fn native_outputs(field: &NativeField, moving: &Image, pad: f32, labels: Option<&LabelMap>) -> NativeOutputs {
    let grid = field.grid().clone();
    let [nx, ny, nz] = grid.shape();
    let plane = ny * nz;
    let mut warped = Image::filled(grid.clone(), 0.0);
    let mut jacdet = Image::filled(grid.clone(), 0.0);
    let mut warped_labels: Option<LabelMap> = labels.map(|_| Volume::filled(grid.clone(), 0));
    let m_img = voxel_map(&grid, &moving.grid);
    let m_lab = labels.map(|l| voxel_map(&grid, &l.grid));
    let (mdata, mshape) = (moving.as_slice(), moving.grid.shape());
    let w_chunks: Vec<&mut [f32]> = warped.as_slice_mut().chunks_mut(CHUNK * plane).collect();
    let j_chunks: Vec<&mut [f32]> = jacdet.as_slice_mut().chunks_mut(CHUNK * plane).collect();
    let l_chunks: Vec<Option<&mut [u16]>> = match warped_labels.as_mut() {
        Some(l) => l.as_slice_mut().chunks_mut(CHUNK * plane).map(Some).collect(),
        None => (0..w_chunks.len()).map(|_| None).collect(),
    };
    w_chunks.into_par_iter().zip(j_chunks).zip(l_chunks).enumerate().for_each_init(
        || (vec![0.0f32; 3 * (CHUNK + 2) * plane], Vec::new()),
        |(scratch, rows), (chunk, ((wc, jc), mut lc))| {
            let i0 = chunk * CHUNK;
            let i1 = (i0 + CHUNK).min(nx);
            // Slabs lo .. hi of the field: the chunk and one either side inside the grid.
            let (lo, hi) = (i0.saturating_sub(1), (i1 + 1).min(nx));
            let n = (hi - lo) * plane;
            let (sa, rest) = scratch.split_at_mut(n);
            let (sb, rest) = rest.split_at_mut(n);
            let sc = &mut rest[..n];
            for i in lo..hi {
                let r = (i - lo) * plane..(i - lo + 1) * plane;
                field.fill_slab(i, [&mut sa[r.clone()], &mut sb[r.clone()], &mut sc[r]], rows);
            }
            let u = [&*sa, &*sb, &*sc];
            let at = |i: usize, j: usize, k: usize| ((i - lo) * ny + j) * nz + k;
            for i in i0..i1 {
                let (ia, ib) = (i.saturating_sub(1), (i + 1).min(nx - 1));
                for j in 0..ny {
                    let (ja, jb) = (j.saturating_sub(1), (j + 1).min(ny - 1));
                    for k in 0..nz {
                        let (ka, kb) = (k.saturating_sub(1), (k + 1).min(nz - 1));
                        let c = at(i, j, k);
                        let out = (i - i0) * plane + j * nz + k;
                        // The pull position x + u(x), in f64 (as the warper forms it).
                        let q = [i as f64 + u[0][c] as f64, j as f64 + u[1][c] as f64, k as f64 + u[2][c] as f64];
                        let p = m_img.apply(q);
                        wc[out] =
                            trilinear(mdata, mshape, [p[0] as f32, p[1] as f32, p[2] as f32], Border::Constant(pad));
                        if let (Some(l), Some(ml), Some(lab)) = (lc.as_deref_mut(), m_lab.as_ref(), labels) {
                            let p = ml.apply(q);
                            l[out] =
                                nearest(lab.as_slice(), lab.grid.shape(), [p[0] as f32, p[1] as f32, p[2] as f32], 0);
                        }
                        // Central differences (one-sided at the faces), as jacobian_determinant.
                        let along = [
                            (at(ia, j, k), at(ib, j, k), ib - ia),
                            (at(i, ja, k), at(i, jb, k), jb - ja),
                            (at(i, j, ka), at(i, j, kb), kb - ka),
                        ];
                        let mut g = [[0.0f64; 3]; 3];
                        for (a, ua) in u.iter().enumerate() {
                            for (b, &(lo_, hi_, h)) in along.iter().enumerate() {
                                let d = if h == 0 { 0.0 } else { (ua[hi_] as f64 - ua[lo_] as f64) / h as f64 };
                                g[a][b] = d + if a == b { 1.0 } else { 0.0 };
                            }
                        }
                        jc[out] = det3(&g) as f32;
                    }
                }
            }
        },
    );
    NativeOutputs { warped, warped_labels, jacdet }
}

#[cfg(test)]
mod tests {
    use super::*;
    use sinew_grid::resample::resample_field;

    /// A rotated, anisotropic native grid, a coarser working grid over it, a smooth working
    /// field and a rigid map: the streamed outputs against the whole-field path.
    fn case() -> (NativeField, Field, Image, LabelMap) {
        let native = Grid::new(
            [13, 11, 9],
            Affine::from_parts([[0.9, 0.1, 0.0], [-0.1, 0.9, 0.0], [0.0, 0.0, 2.5]], [-5.0, 3.0, 1.0]),
        )
        .unwrap();
        let work = native.with_shape([6, 5, 4]).unwrap();
        let mut v = Field::zeros(work.clone());
        for (n, x) in v.data.iter_mut().enumerate() {
            *x = ((n as f32) * 0.37).sin() * 0.8;
        }
        let a = Affine::from_parts([[0.995, -0.0998, 0.0], [0.0998, 0.995, 0.0], [0.0, 0.0, 1.0]], [2.0, -1.5, 0.7]);
        let nf = NativeField::upsampled(v.clone(), &native, &a);
        let mut whole = resample_field(&v, &native);
        crate::affine::compose_after(&mut whole, &a);
        let mgrid = Grid::axis_aligned([10, 12, 8], [1.2, 1.0, 3.0], [-6.0, -2.0, 0.0]);
        let mut moving = Image::filled(mgrid.clone(), 0.0);
        moving.as_slice_mut().iter_mut().enumerate().for_each(|(n, x)| *x = (n as f32 * 0.13).cos() * 100.0);
        let mut labels = LabelMap::filled(mgrid, 0);
        labels.as_slice_mut().iter_mut().enumerate().for_each(|(n, x)| *x = (n % 5) as u16);
        (nf, whole, moving, labels)
    }

    #[test]
    fn streamed_field_equals_the_whole_field_path() {
        let (nf, whole, _, _) = case();
        // The separable cells against resample_field's general trilinear sampler: equal up to
        // f32 rounding (the working grid shares the native grid's directions).
        let Kind::Upsampled(up) = &nf.kind else { panic!("upsampled") };
        assert!(up.cells.is_some(), "a with_shape working grid is separable");
        let diff = nf.to_field().data.iter().zip(whole.data.iter()).map(|(a, b)| (a - b).abs()).fold(0.0f32, f32::max);
        assert!(diff < 1e-5, "largest difference {diff} voxels");
        let whole = nf.to_field();
        let [nx, ny, nz] = nf.grid().shape();
        // The row-wise evaluation (slabs for to_field, planes below) interpolates in the order
        // of the per-voxel one, so they agree bit for bit.
        for i in 0..nx {
            for j in 0..ny {
                for k in 0..nz {
                    let n = (i * ny + j) * nz + k;
                    assert_eq!(nf.at(i, j, k), [0, 1, 2].map(|d| whole.component(d)[n]), "({i}, {j}, {k})");
                }
            }
        }
        let (k0, nk) = (3, 4);
        let mut out = [vec![0.0; nk * nx * ny], vec![0.0; nk * nx * ny], vec![0.0; nk * nx * ny]];
        let [a, b, c] = &mut out;
        nf.fill_planes(k0, [a, b, c]);
        for (d, o) in out.iter().enumerate() {
            for kk in 0..nk {
                for j in 0..ny {
                    for i in 0..nx {
                        let want = whole.component(d)[(i * ny + j) * nz + k0 + kk];
                        assert_eq!(o[(kk * ny + j) * nx + i], want);
                    }
                }
            }
        }
    }

    #[test]
    fn native_outputs_equal_the_whole_volume_functions() {
        let (nf, _, moving, labels) = case();
        let whole = nf.to_field();
        let o = native_outputs(&nf, &moving, -7.0, Some(&labels));
        assert_eq!(o.warped.data, sinew_transform::warp_image_from(&moving, &whole, Border::Constant(-7.0)).data);
        assert_eq!(o.warped_labels.unwrap().data, sinew_transform::warp_labels_from(&labels, &whole).data);
        assert_eq!(o.jacdet.data, sinew_transform::jacobian_determinant(&whole).data);
        let full = NativeField::full(whole.clone());
        let o2 = native_outputs(&full, &moving, -7.0, None);
        assert_eq!(o2.jacdet.data, o.jacdet.data);
        assert!(o2.warped_labels.is_none());
    }

    #[test]
    fn on_working_grid_composes_the_linear_map() {
        let (nf, _, _, _) = case();
        let Kind::Upsampled(up) = &nf.kind else { panic!("upsampled") };
        let w = nf.on_working_grid();
        // Exact fact: a working voxel y maps to moving world point A·G_W·(y + v(y)).
        let a = nf.grid.affine().compose(&up.post.unwrap().compose(nf.grid.inverse_affine()));
        let g = w.grid.affine();
        let [_, wy, wz] = w.grid.shape();
        let (i, j, k) = (2usize, 3usize, 2usize);
        let n = (i * wy + j) * wz + k;
        let y = [i as f64, j as f64, k as f64];
        let v = [0, 1, 2].map(|d| up.work.component(d)[n] as f64);
        let want = a.apply(g.apply([y[0] + v[0], y[1] + v[1], y[2] + v[2]]));
        let got = g.apply([0, 1, 2].map(|d| y[d] + w.component(d)[n] as f64));
        for d in 0..3 {
            assert!(approx::abs_diff_eq!(want[d], got[d], epsilon = 1e-4), "{want:?} {got:?}");
        }
    }
}
