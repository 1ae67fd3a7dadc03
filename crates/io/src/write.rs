//! Writing images, label maps and displacement fields as NIfTI-1 (`.nii`, or `.nii.gz` when
//! the name ends in `.gz`), always atomically (see [`crate::atomic`]).

use std::io::Write;
use std::path::Path;

use flate2::write::GzEncoder;
use flate2::Compression;
use sinew_grid::{Field, Grid, Image, LabelMap};

use crate::atomic::AtomicFile;
use crate::header::{serialize, DataType, WriteHeader, INTENT_DISPVECT};
use crate::IoError;

/// Units of the vectors in a displacement-field file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum FieldUnits {
    /// Millimetres along the world axes x, y, z (the default for NIfTI fields).
    Mm,
    /// Voxels along the array axes i, j, k (what most Python code and `.npy` files use).
    Voxel,
}

impl FieldUnits {
    /// The `intent_name` sinew writes for these units: `"sinew-mm"` or `"sinew-vox"`.
    pub fn intent_name(self) -> &'static str {
        match self {
            FieldUnits::Mm => "sinew-mm",
            FieldUnits::Voxel => "sinew-vox",
        }
    }

    /// The units named by a sinew `intent_name`, if it is one.
    pub fn from_intent_name(name: &str) -> Option<FieldUnits> {
        match name {
            "sinew-mm" => Some(FieldUnits::Mm),
            "sinew-vox" => Some(FieldUnits::Voxel),
            _ => None,
        }
    }

    /// `"mm"` or `"voxel"`.
    pub fn as_str(self) -> &'static str {
        match self {
            FieldUnits::Mm => "mm",
            FieldUnits::Voxel => "voxel",
        }
    }
}

/// gzip level for `.nii.gz` outputs: float data compresses little, so favour speed (level 1
/// wrote a 144×112×192 float image in ~0.16 s vs ~0.55 s at level 3 on the 2-core machine).
const GZIP_LEVEL: u32 = 1;

/// True when the file name ends in `.gz` (any case).
pub(crate) fn is_gz_name(path: &Path) -> bool {
    path.file_name().is_some_and(|n| n.to_string_lossy().to_ascii_lowercase().ends_with(".gz"))
}

fn check_fits(path: &Path, grid: &Grid) -> Result<(), IoError> {
    let s = grid.shape();
    if s.iter().any(|&n| n > i16::MAX as usize) {
        return Err(IoError::WrongShape {
            path: path.to_path_buf(),
            reason: format!("shape {s:?} does not fit NIfTI-1 (at most {} voxels per axis)", i16::MAX),
        });
    }
    Ok(())
}

/// Where the bytes of an output go: the atomic file itself, or through [`ParallelGz`].
enum Sink {
    Plain(AtomicFile),
    Gz(ParallelGz<AtomicFile>),
}

impl Sink {
    /// Opens `path` (atomically, gzip when the name ends in `.gz`) and writes `header`.
    fn create(path: &Path, header: &[u8]) -> Result<Sink, IoError> {
        let file = AtomicFile::create(path)?;
        let mut sink = if is_gz_name(path) { Sink::Gz(ParallelGz::new(file)) } else { Sink::Plain(file) };
        sink.write_all(header).map_err(|e| IoError::os(path, "cannot write", e))?;
        Ok(sink)
    }

    fn path(&self) -> &Path {
        match self {
            Sink::Plain(f) => f.path(),
            Sink::Gz(g) => g.out.path(),
        }
    }

    /// Writes what is left and renames the file into place.
    fn finish(self) -> Result<(), IoError> {
        match self {
            Sink::Plain(f) => f.finish(),
            Sink::Gz(g) => {
                let path = g.out.path().to_path_buf();
                g.finish().map_err(|e| IoError::os(&path, "cannot write", e))?.finish()
            }
        }
    }
}

impl Write for Sink {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        match self {
            Sink::Plain(f) => f.write(buf),
            Sink::Gz(g) => g.write(buf),
        }
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

/// Bytes per gzip member of [`ParallelGz`].
const GZ_CHUNK: usize = 16 << 20;

/// A gzip writer that compresses fixed-size chunks of its input ([`GZ_CHUNK`] bytes) as
/// independent gzip members on the rayon pool, and writes them in order. A series of members
/// is a valid gzip file (RFC 1952, section 2.2: "a gzip file consists of a series of
/// members"), read as one stream by gzip, zlib's `gzread`, Python's `gzip` module (nibabel) and
/// flate2's `MultiGzDecoder`. Chunk boundaries depend only on the byte count, so the output
/// does not depend on the thread count; an input of at most one chunk is one member, the
/// plain single-stream file. At most `2 × threads` chunks are held at once.
struct ParallelGz<W: Write> {
    out: W,
    full: Vec<Vec<u8>>,
    current: Vec<u8>,
    /// Emptied chunk buffers, reused for the next chunks (a fresh 16 MB buffer per chunk is
    /// page-faulted in anew each time).
    spare: Vec<Vec<u8>>,
    /// One member buffer per chunk of `full`, reused from one flush to the next.
    members: Vec<Vec<u8>>,
}

impl<W: Write> ParallelGz<W> {
    fn new(out: W) -> ParallelGz<W> {
        ParallelGz { out, full: Vec::new(), current: Vec::new(), spare: Vec::new(), members: Vec::new() }
    }

    /// Compresses the full chunks in parallel and writes them in order.
    fn flush_full(&mut self) -> std::io::Result<()> {
        use rayon::prelude::*;
        if self.members.len() < self.full.len() {
            self.members.resize_with(self.full.len(), Vec::new);
        }
        self.full
            .par_iter()
            .zip(self.members.par_iter_mut())
            .map(|(c, m)| gzip_member(c, m))
            .collect::<std::io::Result<()>>()?;
        for m in &self.members[..self.full.len()] {
            self.out.write_all(m)?;
        }
        for mut c in self.full.drain(..) {
            c.clear();
            self.spare.push(c);
        }
        Ok(())
    }

    /// Writes everything left, as the last member(s); returns the underlying writer.
    fn finish(mut self) -> std::io::Result<W> {
        if !self.current.is_empty() || self.full.is_empty() {
            let last = std::mem::take(&mut self.current);
            self.full.push(last);
        }
        self.flush_full()?;
        Ok(self.out)
    }
}

/// Bytes of each of the three probes (start, middle, end of a chunk) of [`worth_compressing`].
const PROBE: usize = 64 << 10;

/// A chunk is deflated only when its probes shrink to at most this share of their size.
const PROBE_RATIO: f64 = 0.9;

/// Whether deflating `data` at [`GZIP_LEVEL`] is worth its time: three probes of [`PROBE`]
/// bytes (start, middle, end) deflated must shrink to at most [`PROBE_RATIO`] of their size.
/// Float scans, fields and Jacobians of real data often do not shrink at all (their low
/// mantissa bits are noise: a 512×512×400 field grew by 5 % at level 1), while label maps and
/// images with large constant regions do. Small chunks are always deflated. The decision
/// depends only on the bytes, so the output stays deterministic.
fn worth_compressing(data: &[u8]) -> bool {
    if data.len() < 8 * PROBE {
        return true;
    }
    let mid = data.len() / 2 - PROBE / 2;
    let mut sink = flate2::write::DeflateEncoder::new(std::io::sink(), Compression::new(GZIP_LEVEL));
    let mut total = 0u64;
    for start in [0, mid, data.len() - PROBE] {
        // A write to io::sink cannot fail.
        sink.write_all(&data[start..start + PROBE]).expect("deflating into a sink");
        total += PROBE as u64;
    }
    let _ = sink.try_finish();
    sink.total_out() as f64 <= PROBE_RATIO * total as f64
}

/// One gzip member of `data`: deflated at [`GZIP_LEVEL`] when [`worth_compressing`], else in
/// stored blocks (level 0: the bytes as they are, with the gzip framing and CRC-32; about as
/// fast as a copy).
fn gzip_member(data: &[u8], out: &mut Vec<u8>) -> std::io::Result<()> {
    let deflate = worth_compressing(data);
    // Room for the whole member up front, so the buffer is never grown (each growth of a
    // 16 MB chunk's member is a fresh allocation, page faults and a copy). Stored blocks add
    // 5 bytes each (RFC 1951, 3.2.4) to the 18 bytes of gzip framing (RFC 1952); measured here
    // they hold 32 KiB each (2 578 bytes over a 16 MiB chunk), and 1/1024 of room covers blocks
    // down to 5 KiB. A deflated chunk gets half its size, its usual room.
    let room = if deflate { data.len() / 2 + 64 } else { data.len() + data.len() / 1024 + 64 };
    let level = if deflate { GZIP_LEVEL } else { 0 };
    let mut buf = std::mem::take(out);
    buf.clear();
    buf.reserve(room);
    let mut e = GzEncoder::new(buf, Compression::new(level));
    e.write_all(data)?;
    *out = e.finish()?;
    Ok(())
}

impl<W: Write> Write for ParallelGz<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        if self.current.capacity() == 0 {
            self.current = self.spare.pop().unwrap_or_else(|| Vec::with_capacity(GZ_CHUNK));
        }
        let n = buf.len().min(GZ_CHUNK - self.current.len());
        self.current.extend_from_slice(&buf[..n]);
        if self.current.len() == GZ_CHUNK {
            let chunk = std::mem::take(&mut self.current);
            self.full.push(chunk);
            if self.full.len() >= 2 * rayon::current_num_threads() {
                self.flush_full()?;
            }
        }
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

/// Planes (of constant `k`) per block when an in-memory volume is written: about 4 M voxels.
fn block_planes(nx: usize, ny: usize) -> usize {
    ((4 << 20) / (nx * ny).max(1)).max(1)
}

/// Planes `k0 .. k0 + nk` of a volume held in memory order (`(nx, ny, nz)`, `k` fastest) copied
/// into `out` in disk order (`(nk, ny, nx)`, `i` fastest).
fn to_disk_planes<T: Copy + Send + Sync>(src: &[T], shape: [usize; 3], k0: usize, out: &mut [T]) {
    to_disk_planes_with(shape, k0, out, |n| src[n]);
}

/// Planes `k0 .. k0 + nk` in disk order (`(nk, ny, nx)`, `i` fastest): `out` receives
/// `value(n)` for each voxel's memory-order index `n = (i·ny + j)·nz + k` of a volume of
/// `shape = (nx, ny, nz)`. A blocked transposition, parallel over `j`, reading `nk`
/// consecutive memory indices per `(i, j)`.
fn to_disk_planes_with<T: Send + Sync>(shape: [usize; 3], k0: usize, out: &mut [T], value: impl Fn(usize) -> T + Sync) {
    use ndarray::{ArrayViewMut3, Axis};
    use rayon::prelude::*;
    let [nx, ny, nz] = shape;
    let nk = out.len() / (nx * ny);
    let mut view = ArrayViewMut3::from_shape((nk, ny, nx), out).expect("whole planes");
    view.axis_iter_mut(Axis(1)).into_par_iter().enumerate().for_each(|(j, mut rows)| {
        for (kk, mut row) in rows.outer_iter_mut().enumerate() {
            let row = row.as_slice_mut().expect("rows are contiguous");
            for (i, o) in row.iter_mut().enumerate() {
                *o = value((i * ny + j) * nz + k0 + kk);
            }
        }
    });
}

/// A NIfTI-1 output written plane by plane (planes of constant `k`, `i` fastest inside a
/// plane, then `j`), so that a volume computed in slabs never has to be held whole: open it
/// with [`image_plane_writer`], [`labels_plane_writer`] or [`field_plane_writer`], hand it
/// every plane in order ([`PlaneWriter::write_f32`] or [`PlaneWriter::write_labels`]), then
/// [`PlaneWriter::finish`]. The file is written atomically: dropped before `finish` (an error
/// on the way), it leaves nothing behind. The bytes are exactly those of the whole-volume
/// writers ([`write_image`], [`write_labels`], [`write_field`]) for the same values.
pub struct PlaneWriter {
    sink: Sink,
    /// Voxels per plane (`nx·ny`).
    plane: usize,
    /// Planes still expected (`nz`, times 3 for a field).
    planes_left: usize,
    datatype: DataType,
    bytes: Vec<u8>,
}

impl PlaneWriter {
    fn new(path: &Path, header: &[u8], plane: usize, planes: usize, datatype: DataType) -> Result<Self, IoError> {
        Ok(PlaneWriter { sink: Sink::create(path, header)?, plane, planes_left: planes, datatype, bytes: Vec::new() })
    }

    fn take(&mut self, n: usize) -> usize {
        assert!(n % self.plane == 0, "whole planes only ({n} values, {} per plane)", self.plane);
        let planes = n / self.plane;
        assert!(planes <= self.planes_left, "more planes than the file holds");
        self.planes_left -= planes;
        planes
    }

    fn put(&mut self) -> Result<(), IoError> {
        let r = self.sink.write_all(&self.bytes);
        self.bytes.clear();
        r.map_err(|e| IoError::os(self.sink.path(), "cannot write", e))
    }

    /// Writes whole planes of float32 values (image or field writers), `i` fastest.
    ///
    /// # Panics
    /// When `values` is not a whole number of planes, holds more planes than are left, or the
    /// writer is a label writer (bugs).
    pub fn write_f32(&mut self, values: &[f32]) -> Result<(), IoError> {
        assert_eq!(self.datatype, DataType::F32, "a float writer");
        self.take(values.len());
        self.bytes.resize(4 * values.len(), 0);
        for (b, v) in self.bytes.chunks_exact_mut(4).zip(values) {
            b.copy_from_slice(&v.to_le_bytes());
        }
        self.put()
    }

    /// Writes whole planes of labels (label writers), `i` fastest.
    ///
    /// # Panics
    /// As [`PlaneWriter::write_f32`], or when a label exceeds the `max_label` the writer was
    /// opened with (a bug: the file's datatype was chosen from it).
    pub fn write_labels(&mut self, values: &[u16]) -> Result<(), IoError> {
        self.take(values.len());
        match self.datatype {
            DataType::U8 => self.bytes.extend(values.iter().map(|&v| u8::try_from(v).expect("label below max_label"))),
            DataType::U16 => {
                self.bytes.resize(2 * values.len(), 0);
                for (b, v) in self.bytes.chunks_exact_mut(2).zip(values) {
                    b.copy_from_slice(&v.to_le_bytes());
                }
            }
            _ => panic!("a label writer"),
        }
        self.put()
    }

    /// Writes what is left and renames the file into place.
    ///
    /// # Panics
    /// When planes are missing (a bug).
    pub fn finish(self) -> Result<(), IoError> {
        assert_eq!(self.planes_left, 0, "planes missing from the file");
        self.sink.finish()
    }
}

fn image_header(grid: &Grid) -> Vec<u8> {
    serialize(
        grid,
        &WriteHeader {
            dims: &grid.shape(),
            datatype: DataType::F32,
            intent_code: 0,
            intent_name: "",
            descrip: "sinew image",
        },
    )
}

/// A [`PlaneWriter`] for a float32 image on `grid` (the header of [`write_image`]).
pub fn image_plane_writer(path: &Path, grid: &Grid) -> Result<PlaneWriter, IoError> {
    check_fits(path, grid)?;
    let [nx, ny, nz] = grid.shape();
    PlaneWriter::new(path, &image_header(grid), nx * ny, nz, DataType::F32)
}

fn label_datatype(max_label: u16) -> DataType {
    if max_label < 256 {
        DataType::U8
    } else {
        DataType::U16
    }
}

fn labels_header(grid: &Grid, datatype: DataType) -> Vec<u8> {
    serialize(
        grid,
        &WriteHeader { dims: &grid.shape(), datatype, intent_code: 0, intent_name: "", descrip: "sinew labels" },
    )
}

/// A [`PlaneWriter`] for a label map on `grid` whose largest label is at most `max_label`:
/// uint8 when it is below 256, else uint16 (as [`write_labels`] chooses from the data).
pub fn labels_plane_writer(path: &Path, grid: &Grid, max_label: u16) -> Result<PlaneWriter, IoError> {
    check_fits(path, grid)?;
    let [nx, ny, nz] = grid.shape();
    let dt = label_datatype(max_label);
    PlaneWriter::new(path, &labels_header(grid, dt), nx * ny, nz, dt)
}

fn field_header(grid: &Grid, units: FieldUnits) -> Vec<u8> {
    let [nx, ny, nz] = grid.shape();
    let descrip = match units {
        FieldUnits::Mm => "sinew displacement, mm along world x y z",
        FieldUnits::Voxel => "sinew displacement, voxels along i j k",
    };
    serialize(
        grid,
        &WriteHeader {
            dims: &[nx, ny, nz, 1, 3],
            datatype: DataType::F32,
            intent_code: INTENT_DISPVECT,
            intent_name: units.intent_name(),
            descrip,
        },
    )
}

/// A [`PlaneWriter`] for a displacement field on `grid` (the header of [`write_field`]): the
/// planes of component 0 (`k = 0 … nz−1`), then those of component 1, then component 2, each
/// value already in `units` (mm along world x, y, z, or voxels along i, j, k).
pub fn field_plane_writer(path: &Path, grid: &Grid, units: FieldUnits) -> Result<PlaneWriter, IoError> {
    check_fits(path, grid)?;
    let [nx, ny, nz] = grid.shape();
    PlaneWriter::new(path, &field_header(grid, units), nx * ny, 3 * nz, DataType::F32)
}

/// Writes `img` as float32 NIfTI-1: `.nii`, or `.nii.gz` when the name ends in `.gz`.
///
/// The header carries the grid's affine in both sform (exact, as float32) and qform (the
/// nearest rigid map, `qfac` for mirrored grids), codes 1; `pixdim` = spacing in mm.
pub fn write_image(path: &Path, img: &Image) -> Result<(), IoError> {
    let mut w = image_plane_writer(path, &img.grid)?;
    let shape = img.grid.shape();
    let [nx, ny, nz] = shape;
    let step = block_planes(nx, ny);
    let mut buf = vec![0.0f32; nx * ny * step.min(nz)];
    for k0 in (0..nz).step_by(step) {
        let planes = &mut buf[..nx * ny * step.min(nz - k0)];
        to_disk_planes(img.as_slice(), shape, k0, planes);
        w.write_f32(planes)?;
    }
    w.finish()
}

/// Writes a label map as uint8 when its largest label is below 256, else uint16.
pub fn write_labels(path: &Path, labels: &LabelMap) -> Result<(), IoError> {
    let max = labels.as_slice().iter().copied().max().unwrap_or(0);
    let mut w = labels_plane_writer(path, &labels.grid, max)?;
    let shape = labels.grid.shape();
    let [nx, ny, nz] = shape;
    let step = block_planes(nx, ny);
    let mut buf = vec![0u16; nx * ny * step.min(nz)];
    for k0 in (0..nz).step_by(step) {
        let planes = &mut buf[..nx * ny * step.min(nz - k0)];
        to_disk_planes(labels.as_slice(), shape, k0, planes);
        w.write_labels(planes)?;
    }
    w.finish()
}

/// Writes a displacement field as float32 NIfTI-1 of shape `(nx, ny, nz, 1, 3)`, intent
/// code 1006 (displacement vector).
///
/// `units` chooses the vectors stored: [`FieldUnits::Mm`] = millimetres along the world axes
/// (`u_mm = M · u_vox`, see [`Field::to_world_mm`]); [`FieldUnits::Voxel`] = voxels along
/// the array axes `i, j, k`. The choice is recorded in `intent_name` (`"sinew-mm"` /
/// `"sinew-vox"`) and in `descrip`, so [`crate::read_field`] can tell.
pub fn write_field(path: &Path, field: &Field, units: FieldUnits) -> Result<(), IoError> {
    let mut w = field_plane_writer(path, &field.grid, units)?;
    let shape = field.grid.shape();
    let [nx, ny, nz] = shape;
    let step = block_planes(nx, ny);
    let mut out = vec![0.0f32; nx * ny * step.min(nz)];
    let lin = field.grid.affine().linear();
    let comps = [field.component(0), field.component(1), field.component(2)];
    // Disk order: i fastest, then j, k, (t), component.
    for (c, r) in lin.iter().enumerate() {
        for k0 in (0..nz).step_by(step) {
            let planes = &mut out[..nx * ny * step.min(nz - k0)];
            match units {
                FieldUnits::Voxel => to_disk_planes(comps[c], shape, k0, planes),
                FieldUnits::Mm => to_disk_planes_mm(comps, *r, shape, k0, planes),
            }
            w.write_f32(planes)?;
        }
    }
    w.finish()
}

/// [`to_disk_planes`] of one world component of a field held in voxels: `out` receives
/// `u_mm = r · u_vox` (`r` a row of the grid's linear part), formed in f64 and rounded once,
/// as [`Field::to_world_mm`] does.
fn to_disk_planes_mm(comps: [&[f32]; 3], r: [f64; 3], shape: [usize; 3], k0: usize, out: &mut [f32]) {
    to_disk_planes_with(shape, k0, out, |n| {
        let v = [comps[0][n] as f64, comps[1][n] as f64, comps[2][n] as f64];
        (r[0] * v[0] + r[1] * v[1] + r[2] * v[2]) as f32
    });
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Read;

    fn gunzip(bytes: &[u8]) -> Vec<u8> {
        let mut out = Vec::new();
        flate2::read::MultiGzDecoder::new(bytes).read_to_end(&mut out).unwrap();
        out
    }

    #[test]
    fn incompressible_chunks_are_stored_and_others_deflated() {
        // 2 MB of xorshift noise: deflate cannot shrink it, so the member holds stored blocks.
        let mut x = 0x9e37_79b9_7f4a_7c15u64;
        let noise: Vec<u8> = (0..2 << 20)
            .map(|_| {
                x ^= x << 13;
                x ^= x >> 7;
                x ^= x << 17;
                x as u8
            })
            .collect();
        assert!(!worth_compressing(&noise));
        let mut m = Vec::new();
        gzip_member(&noise, &mut m).unwrap();
        // RFC 1952: a 10-byte header (no optional fields here); RFC 1951 §3.2.3: the first
        // block header's bits 1–2 are BTYPE, 00 = no compression.
        assert_eq!(&m[..2], &[0x1f, 0x8b]);
        assert_eq!((m[10] >> 1) & 3, 0, "stored block");
        // A stored block costs 5 bytes (RFC 1951 §3.2.4; zlib-rs cuts them at 32 KiB here),
        // plus 18 bytes of gzip header and trailer: under 0.1 % in all.
        assert!(m.len() <= noise.len() + noise.len() / 1000 + 18, "{}", m.len());
        assert_eq!(gunzip(&m), noise);
        // A float ramp with a zero background (as a label map or a masked image): deflated.
        let ramp: Vec<u8> = (0..(1 << 19))
            .flat_map(|n: u32| (if n % 1000 < 600 { 0.0f32 } else { (n % 1000) as f32 * 0.25 }).to_le_bytes())
            .collect();
        assert!(worth_compressing(&ramp));
        // Into the same buffer, as the writer reuses it: nothing of the first member is left.
        gzip_member(&ramp, &mut m).unwrap();
        assert_ne!((m[10] >> 1) & 3, 0, "compressed block");
        assert!(m.len() < ramp.len() / 2, "{}", m.len());
        assert_eq!(gunzip(&m), ramp);
    }
}
