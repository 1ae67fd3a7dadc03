//! What several subcommands share: loading and checking inputs, output folders, JSON, Dice.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use serde::Serialize;
use sinew_grid::{Image, LabelMap};

pub use sinew_cohort::{sha256_file, write_json, CAUTION};
pub use sinew_score::{dice_report, DiceReport};
pub use sinew_solve::{with_threads, PairScans};

/// The inputs of one pair, read and checked.
pub struct Inputs {
    /// The scans, labels and mask.
    pub scans: PairScans,
    /// What was done with NaN or infinite voxels.
    pub nan: NanRecord,
    paths: Vec<(&'static str, PathBuf)>,
}

/// What to do with NaN or infinite voxels (`--nan`), and its record in the report: shared
/// with the Python module ([`sinew_solve::nan`]).
pub use sinew_solve::nan::{NanPolicy, NanRecord};

/// Parses `--nan`: `refuse`, `pad` or a finite number.
pub fn parse_nan(s: &str) -> anyhow::Result<NanPolicy> {
    NanPolicy::parse(s).map_err(|e| anyhow::anyhow!("--nan {e}"))
}

/// One input file in a report.
#[derive(Serialize, Clone)]
pub struct InputRecord {
    /// Its role (fixed, moving, ...).
    pub role: &'static str,
    /// Its path as given.
    pub path: String,
    /// SHA-256 of its bytes.
    pub sha256: String,
}

impl Inputs {
    /// Reads every input and checks that labels and masks match their scan's grid, with a
    /// policy for NaN or infinite voxels ([`NanPolicy::Refuse`]: none may be). With [`NanPolicy::Pad`],
    /// the fixed scan's non-finite voxels are also removed from the mask (a mask of the
    /// finite voxels is made when none is given), so they do not drive the data term.
    pub fn load(
        fixed: &Path,
        moving: &Path,
        fixed_labels: Option<&Path>,
        moving_labels: Option<&Path>,
        mask: Option<&Path>,
        nan: NanPolicy,
    ) -> anyhow::Result<Inputs> {
        // Scans and label maps at once (decompression is single-threaded per file); errors are
        // reported in the order fixed, moving, fixed labels, moving labels.
        let labels = |p: Option<&Path>| p.map(sinew_io::read_labels).transpose();
        let ((f, fl), (m, ml)) = rayon::join(
            || rayon::join(|| read_image_nan(fixed, nan), || labels(fixed_labels)),
            || rayon::join(|| read_image_nan(moving, nan), || labels(moving_labels)),
        );
        let (fixed_img, fixed_bad) = f?;
        let (moving_img, moving_bad) = m?;
        let fixed_labels_map = fixed_labels.zip(fl?).map(|(p, l)| labels_on(p, l, &fixed_img, fixed)).transpose()?;
        let moving_labels_map =
            moving_labels.zip(ml?).map(|(p, l)| labels_on(p, l, &moving_img, moving)).transpose()?;
        let mut mask_map = mask.map(|p| read_labels_on(p, &fixed_img, fixed)).transpose()?;
        sinew_solve::nan::pad_fixed_mask(nan, fixed_bad.as_deref(), &mut mask_map, &fixed_img)
            .map_err(|e| anyhow::anyhow!("{}: {e}", fixed.display()))?;
        let count = sinew_solve::nan::count;
        let nan_record = NanRecord { policy: nan, fixed_voxels: count(&fixed_bad), moving_voxels: count(&moving_bad) };
        if let Some(m) = &mask_map {
            if m.as_slice().iter().all(|&v| v == 0) {
                bail!("{}: the mask is empty (no non-zero voxel)", mask.unwrap().display());
            }
        }
        for (map, path) in [(&fixed_labels_map, fixed_labels), (&moving_labels_map, moving_labels)] {
            if let (Some(l), Some(p)) = (map, path) {
                if l.as_slice().iter().all(|&v| v == 0) {
                    bail!("{}: the label map is empty (every voxel is 0, no label to score)", p.display());
                }
            }
        }
        let mut paths = vec![("fixed", fixed.to_path_buf()), ("moving", moving.to_path_buf())];
        for (role, p) in [("fixed_labels", fixed_labels), ("moving_labels", moving_labels), ("mask", mask)] {
            if let Some(p) = p {
                paths.push((role, p.to_path_buf()));
            }
        }
        Ok(Inputs {
            scans: PairScans {
                fixed: fixed_img,
                moving: moving_img,
                fixed_labels: fixed_labels_map,
                moving_labels: moving_labels_map,
                mask: mask_map,
            },
            nan: nan_record,
            paths,
        })
    }

    /// The input paths.
    pub fn paths(&self) -> Vec<PathBuf> {
        self.paths.iter().map(|(_, p)| p.clone()).collect()
    }

    /// Records with checksums, for the report (the files hashed at the same time).
    pub fn records(&self) -> anyhow::Result<Vec<InputRecord>> {
        use rayon::prelude::*;
        self.paths
            .par_iter()
            .map(|(role, p)| Ok(InputRecord { role, path: p.display().to_string(), sha256: sha256_file(p)? }))
            .collect()
    }
}

/// Reads an image and applies `nan` to its NaN or infinite voxels: refused (the error of
/// [`read_finite_image`]), or replaced (by the finite minimum for [`NanPolicy::Pad`]). Returns
/// the image and, when any voxel was replaced, which.
pub fn read_image_nan(path: &Path, nan: NanPolicy) -> anyhow::Result<(Image, Option<Vec<bool>>)> {
    if nan == NanPolicy::Refuse {
        return Ok((read_finite_image(path)?, None));
    }
    let mut img = sinew_io::read_image(path)?;
    let bad = nan.apply(&mut img).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))?;
    check_not_constant(&img, path)?;
    Ok((img, bad))
}

/// A constant scan holds nothing to register.
fn check_not_constant(img: &Image, path: &Path) -> anyhow::Result<()> {
    if let Some((lo, hi)) = img.finite_range() {
        if lo == hi {
            bail!("{}: the image is constant ({lo}); nothing to register", path.display());
        }
    }
    Ok(())
}

/// Reads an image and rejects NaN or infinite voxels.
pub fn read_finite_image(path: &Path) -> anyhow::Result<Image> {
    let mut img = sinew_io::read_image(path)?;
    NanPolicy::Refuse.apply(&mut img).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))?;
    check_not_constant(&img, path)?;
    Ok(img)
}

/// Reads a label map that must lie on `img`'s grid.
pub fn read_labels_on(path: &Path, img: &Image, img_path: &Path) -> anyhow::Result<LabelMap> {
    labels_on(path, sinew_io::read_labels(path)?, img, img_path)
}

/// The label map `l` read from `path`, refused unless it lies on `img`'s grid.
fn labels_on(path: &Path, l: LabelMap, img: &Image, img_path: &Path) -> anyhow::Result<LabelMap> {
    if !l.grid.same_as(&img.grid, 1e-3) {
        bail!(
            "{}: grid {:?} does not match its scan {} ({:?}); resample it onto the scan's grid first",
            path.display(),
            l.grid.shape(),
            img_path.display(),
            img.grid.shape()
        );
    }
    Ok(l)
}

/// Creates the output folder and refuses outputs that would overwrite an input.
pub fn prepare_out_dir(dir: &Path, outputs: &[PathBuf], inputs: &[PathBuf]) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("{}: cannot create the output folder", dir.display()))?;
    for o in outputs {
        sinew_io::atomic::ensure_not_input(o, inputs)?;
    }
    Ok(())
}

/// Peak resident memory of this process in MB, from `VmHWM` in `/proc/self/status` (Linux);
/// `None` where that file does not exist.
pub fn peak_rss_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}
