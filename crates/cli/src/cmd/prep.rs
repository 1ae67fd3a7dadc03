//! `sinew prep`: bring scans (and their label maps) onto a common working grid.
//!
//! Steps, each optional, always in this order: orient → resample → body mask → crop/pad →
//! window → scale (the mask is computed on the intensities before windowing). A recipe file
//! (TOML, see `sinew_prep::recipe`) holds the steps; flags override it.
//!
//! Inputs: files, or folders (every `.nii`/`.nii.gz` inside, sorted by name, hidden files
//! skipped). Label maps are paired with images either by `--labels` (one per image, in the
//! order of the images) or, without `--labels`, by name inside folders: `X_labels.nii.gz`
//! belongs to `X_image.nii.gz`, else to `X.nii.gz`, in the same folder.
//!
//! Outputs in `--out DIR`: `<name>.nii.gz` for each image and label map (the input's name),
//! `<name>_mask.nii.gz` with `--mask-out`, and `prep_log.json`, written last. Every input is
//! read and checked before anything is written; outputs are staged in a hidden folder inside
//! DIR and moved into place only when every file succeeded, so a failure leaves no partial
//! output. DIR must not hold any input.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context, Result};
use clap::{Args, ValueEnum};
use serde::Serialize;
use sinew_prep::{
    prepare, AxisCodes, BodyParams, Centre, CropPadStep, GridRecord, Recipe, Resample, Scale, StepRecord, Steps, Window,
};

use crate::cmd::common;
use crate::ui;

/// Arguments of `sinew prep`.
#[derive(Args, Debug)]
#[command(after_long_help = "Order of operations: orient -> resample -> body mask -> crop/pad -> window -> scale.
The body mask (threshold, largest 6-connected component, holes filled per axial slice) is
computed on the intensities before windowing. Reorientation and crop/pad move whole voxels
(no interpolation); resampling is trilinear for images and nearest-neighbour for labels.
Every output keeps the world position of each voxel centre, so it overlays its input.

Label maps: --labels L... pairs them with the images in order; without --labels, inside a
folder X_labels.nii.gz goes with X_image.nii.gz (else X.nii.gz).

Examples:
  sinew prep scans/ --out prepped/ --recipe examples/prep_recipe.toml
  sinew prep a.nii.gz b.nii.gz --labels a_seg.nii.gz b_seg.nii.gz --out prepped/ \\
      --orient RAS --spacing 2,2,2 --crop-pad 144,112,192 \\
      --centre body --window=-1000,1500 --scale unit")]
pub struct PrepArgs {
    /// Scans to prepare: NIfTI files or folders of them.
    #[arg(required = true, value_name = "IN")]
    pub inputs: Vec<PathBuf>,
    /// Output folder (created when missing; must not hold any input).
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: PathBuf,
    /// Recipe file (TOML) with the steps; the flags below override it.
    #[arg(long, value_name = "TOML")]
    pub recipe: Option<PathBuf>,
    /// Reorient to this axis code (e.g. RAS, LPS): axes permuted and flipped, no interpolation.
    #[arg(long, value_name = "CODE")]
    pub orient: Option<String>,
    /// Resample to this spacing in mm along i, j, k (centred on the same field of view).
    #[arg(long, value_name = "X,Y,Z", value_parser = parse_f64x3, conflicts_with = "shape")]
    pub spacing: Option<[f64; 3]>,
    /// Plain trilinear resampling: no Gaussian anti-aliasing before going to a coarser grid.
    #[arg(long)]
    pub no_antialias: bool,
    /// NaN or infinite voxels: refuse (default), pad (the image minimum) or a number to put in
    /// their place; recorded in prep_log.json.
    #[arg(long, value_name = "refuse|pad|VALUE", default_value = "refuse", allow_hyphen_values = true)]
    pub nan: String,
    /// Resample to this many voxels over the same field of view.
    #[arg(long, value_name = "NX,NY,NZ", value_parser = parse_usizex3)]
    pub shape: Option<[usize; 3]>,
    /// Crop and/or pad to this shape (whole voxels) around --centre.
    #[arg(long, value_name = "NX,NY,NZ", value_parser = parse_usizex3)]
    pub crop_pad: Option<[usize; 3]>,
    /// Centre of the crop/pad: the body's bounding box or the image centre [default: image].
    #[arg(long, value_enum)]
    pub centre: Option<CentreArg>,
    /// Image value outside the input when padding [default: the image minimum].
    #[arg(long, value_name = "VALUE", allow_negative_numbers = true)]
    pub pad: Option<f32>,
    /// Clip intensities to LO,HI (HU). Write --window=-1000,1500 (with '=') for negative LO.
    #[arg(long, value_name = "LO,HI", value_parser = parse_f32x2, allow_hyphen_values = true)]
    pub window: Option<[f32; 2]>,
    /// Scale intensities: unit maps the window (or the image range) to [0, 1]; zscore uses the
    /// mean and SD inside the body mask [default: none].
    #[arg(long, value_enum)]
    pub scale: Option<ScaleArg>,
    /// Body threshold in HU [default: -500].
    #[arg(long, value_name = "HU", allow_negative_numbers = true)]
    pub body_threshold: Option<f32>,
    /// Do not fill holes in the body mask (per axial slice).
    #[arg(long)]
    pub no_fill_holes: bool,
    /// Label maps, one per image in the order of the images (folders allowed).
    #[arg(long, num_args = 1.., value_name = "L")]
    pub labels: Vec<PathBuf>,
    /// Also write the body mask as <name>_mask.nii.gz.
    #[arg(long)]
    pub mask_out: bool,
    /// No progress bar and no per-file lines.
    #[arg(long, short)]
    pub quiet: bool,
    /// Worker threads (default: all cores).
    #[arg(long, short = 'j')]
    pub threads: Option<usize>,
}

/// `--centre`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum CentreArg {
    /// Centre of the body mask's bounding box.
    Body,
    /// Centre of the image.
    Image,
}

/// `--scale`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum ScaleArg {
    /// No scaling.
    None,
    /// Window (or image range) to [0, 1].
    Unit,
    /// z-score inside the body mask.
    Zscore,
}

fn parse_list<T: std::str::FromStr, const N: usize>(s: &str) -> Result<[T; N], String> {
    let parts: Vec<&str> = s.split(',').map(str::trim).collect();
    if parts.len() != N {
        return Err(format!("expected {N} comma-separated numbers, got {s:?}"));
    }
    let vals: Vec<T> =
        parts.iter().map(|p| p.parse::<T>().map_err(|_| format!("not a number: {p:?}"))).collect::<Result<_, _>>()?;
    vals.try_into().map_err(|_| "length checked above".to_string())
}

fn parse_f64x3(s: &str) -> Result<[f64; 3], String> {
    parse_list(s)
}

fn parse_usizex3(s: &str) -> Result<[usize; 3], String> {
    parse_list(s)
}

fn parse_f32x2(s: &str) -> Result<[f32; 2], String> {
    parse_list(s)
}

/// One image to prepare, with its label map.
#[derive(Clone, Debug)]
struct Job {
    image: PathBuf,
    labels: Option<PathBuf>,
}

/// One file of the log.
#[derive(Serialize)]
struct FileLog {
    input: String,
    sha256: String,
    output: String,
    labels: Option<LabelLog>,
    mask: Option<String>,
    before: GridRecord,
    after: GridRecord,
    steps: Vec<StepRecord>,
    /// NaN or infinite voxels replaced under `--nan` (0 with the default refusal).
    non_finite_replaced: usize,
    seconds: f64,
    /// Wall-clock seconds spent reading, preparing and writing this file.
    timings: Timings,
}

#[derive(Serialize)]
struct Timings {
    read: f64,
    prepare: f64,
    write: f64,
}

#[derive(Serialize)]
struct LabelLog {
    input: String,
    sha256: String,
    output: String,
}

/// `prep_log.json`.
#[derive(Serialize)]
struct PrepLog {
    sinew_version: &'static str,
    order: &'static str,
    recipe: Option<String>,
    pipeline: Recipe,
    /// What `--nan` asked for.
    nan: common::NanPolicy,
    files: Vec<FileLog>,
}

const ORDER: &str = "orient -> resample -> body mask -> crop/pad -> window -> scale";

/// Runs `sinew prep`.
pub fn run(args: PrepArgs) -> Result<()> {
    common::with_threads(args.threads, || run_inner(&args))
}

/// The steps of the recipe (if any) with the flags applied over them.
pub fn effective_steps(args: &PrepArgs) -> Result<Steps> {
    let mut s = match &args.recipe {
        Some(p) => Recipe::load(p)?.steps()?,
        None => Steps::default(),
    };
    if let Some(code) = &args.orient {
        s.orient = Some(code.parse::<AxisCodes>()?);
    }
    if let Some(sp) = args.spacing {
        s.resample = Some(Resample::Spacing(sp));
    }
    s.antialias = !args.no_antialias;
    if let Some(sh) = args.shape {
        s.resample = Some(Resample::Shape(sh));
    }
    if let Some(Resample::Spacing(sp)) = s.resample {
        if sp.iter().any(|&v| !(v.is_finite() && v > 0.0)) {
            bail!("--spacing {sp:?}: every value must be a positive number of mm");
        }
    }
    if let Some(shape) = args.crop_pad {
        let old = s.crop_pad.unwrap_or(CropPadStep { shape, centre: Centre::Image, pad: None });
        s.crop_pad = Some(CropPadStep { shape, ..old });
    }
    if let Some(c) = args.centre {
        let Some(cp) = s.crop_pad.as_mut() else { bail!("--centre needs --crop-pad (or a [crop_pad] recipe section)") };
        cp.centre = match c {
            CentreArg::Body => Centre::Body,
            CentreArg::Image => Centre::Image,
        };
    }
    if let Some(pad) = args.pad {
        let Some(cp) = s.crop_pad.as_mut() else { bail!("--pad needs --crop-pad (or a [crop_pad] recipe section)") };
        cp.pad = Some(pad);
    }
    if let Some([lo, hi]) = args.window {
        s.window = Some(Window::new(lo, hi)?);
    }
    if let Some(sc) = args.scale {
        s.scale = match sc {
            ScaleArg::None => Scale::None,
            ScaleArg::Unit => Scale::Unit,
            ScaleArg::Zscore => Scale::Zscore,
        };
    }
    if let Some(t) = args.body_threshold {
        if !t.is_finite() {
            bail!("--body-threshold must be a finite number of HU");
        }
        s.body = BodyParams { threshold: t, ..s.body };
    }
    if args.no_fill_holes {
        s.body.fill_holes = false;
    }
    s.mask |= args.mask_out;
    Ok(s)
}

fn is_nifti_name(p: &Path) -> bool {
    let n = p.file_name().map(|n| n.to_string_lossy().to_ascii_lowercase()).unwrap_or_default();
    !n.starts_with('.') && (n.ends_with(".nii") || n.ends_with(".nii.gz"))
}

/// The name without `.nii` / `.nii.gz`.
fn stem(p: &Path) -> String {
    let n = p.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let lower = n.to_ascii_lowercase();
    for ext in [".nii.gz", ".nii"] {
        if lower.ends_with(ext) {
            return n[..n.len() - ext.len()].to_string();
        }
    }
    n
}

/// The NIfTI files of a folder, sorted by name.
fn folder_files(dir: &Path) -> Result<Vec<PathBuf>> {
    let mut v = Vec::new();
    for e in std::fs::read_dir(dir).with_context(|| format!("{}: cannot list the folder", dir.display()))? {
        let p = e.with_context(|| format!("{}: cannot list the folder", dir.display()))?.path();
        if p.is_file() && is_nifti_name(&p) {
            v.push(p);
        }
    }
    v.sort();
    Ok(v)
}

/// Expands folders and pairs label maps with images (see the module doc).
fn collect_jobs(inputs: &[PathBuf], labels: &[PathBuf]) -> Result<Vec<Job>> {
    let mut images = Vec::new();
    let mut named_labels: Vec<PathBuf> = Vec::new();
    for inp in inputs {
        if inp.is_dir() {
            let files = folder_files(inp)?;
            if files.is_empty() {
                bail!("{}: the folder holds no .nii or .nii.gz file", inp.display());
            }
            for f in files {
                if stem(&f).ends_with("_labels") {
                    named_labels.push(f);
                } else {
                    images.push(f);
                }
            }
        } else if inp.is_file() {
            images.push(inp.clone());
        } else {
            bail!("{}: no such file or folder", inp.display());
        }
    }
    if images.is_empty() {
        bail!("{}: no image among the inputs (only *_labels files)", inputs[0].display());
    }
    let mut seen = BTreeSet::new();
    for f in images.iter().chain(&named_labels) {
        if !seen.insert(f.canonicalize().unwrap_or_else(|_| f.clone())) {
            bail!("{}: given twice among the inputs", f.display());
        }
    }
    let mut jobs: Vec<Job> = images.into_iter().map(|image| Job { image, labels: None }).collect();
    if !labels.is_empty() {
        if let Some(l) = named_labels.first() {
            bail!(
                "{}: label maps found by name in an input folder while --labels was given; use one or the other",
                l.display()
            );
        }
        let mut lab = Vec::new();
        for l in labels {
            if l.is_dir() {
                lab.extend(folder_files(l)?);
            } else {
                lab.push(l.clone());
            }
        }
        if lab.len() != jobs.len() {
            bail!(
                "{}: --labels lists {} label maps for {} images; give one per image, in the same order",
                labels[0].display(),
                lab.len(),
                jobs.len()
            );
        }
        for (j, l) in jobs.iter_mut().zip(lab) {
            j.labels = Some(l);
        }
    } else {
        for l in named_labels {
            let base = stem(&l);
            let base = &base[..base.len() - "_labels".len()];
            let dir = l.parent().map(Path::to_path_buf).unwrap_or_default();
            let found = jobs.iter_mut().find(|j| {
                j.image.parent().map(Path::to_path_buf).unwrap_or_default() == dir
                    && (stem(&j.image) == format!("{base}_image") || stem(&j.image) == base)
            });
            match found {
                Some(j) if j.labels.is_none() => j.labels = Some(l),
                Some(j) => bail!("{}: a second label map for {}", l.display(), j.image.display()),
                None => {
                    bail!("{}: no image {base}_image.nii(.gz) or {base}.nii(.gz) beside this label map", l.display())
                }
            }
        }
    }
    Ok(jobs)
}

/// Output paths of one job: image, labels, mask.
fn outputs_of(job: &Job, dir: &Path, mask: bool) -> (PathBuf, Option<PathBuf>, Option<PathBuf>) {
    let name = stem(&job.image);
    (
        dir.join(format!("{name}.nii.gz")),
        job.labels.as_ref().map(|l| dir.join(format!("{}.nii.gz", stem(l)))),
        mask.then(|| dir.join(format!("{name}_mask.nii.gz"))),
    )
}

/// Refuses an output folder that holds an input, and outputs that collide or equal an input.
fn check_outputs(jobs: &[Job], dir: &Path, mask: bool) -> Result<()> {
    let inputs: Vec<&PathBuf> = jobs.iter().flat_map(|j| std::iter::once(&j.image).chain(j.labels.as_ref())).collect();
    if let Ok(out) = dir.canonicalize() {
        for inp in &inputs {
            let parent = inp.canonicalize().ok().and_then(|c| c.parent().map(Path::to_path_buf));
            if parent.is_some_and(|p| p == out) {
                bail!("{}: the output folder {} holds this input; choose another --out", inp.display(), dir.display());
            }
        }
    }
    let mut seen = BTreeSet::new();
    for j in jobs {
        let (img, lab, msk) = outputs_of(j, dir, mask);
        for o in std::iter::once(img).chain(lab).chain(msk) {
            sinew_io::atomic::ensure_not_input(&o, &inputs)?;
            if o.file_name().is_some_and(|n| n == "prep_log.json") || !seen.insert(o.clone()) {
                bail!("{}: two inputs would be written to this output (rename one of them)", o.display());
            }
        }
    }
    Ok(())
}

/// Reads an image and its label map and checks them (finite values, labels on the image grid).
/// With a `--nan` policy other than refuse, non-finite voxels are replaced first (their count
/// is returned).
fn load(job: &Job, nan: common::NanPolicy) -> Result<(sinew_grid::Image, Option<sinew_grid::LabelMap>, usize)> {
    let (img, bad) = common::read_image_nan(&job.image, nan)?;
    let replaced = bad.map_or(0, |b| b.iter().filter(|&&x| x).count());
    let lab = match &job.labels {
        Some(p) => Some(common::read_labels_on(p, &img, &job.image)?),
        None => None,
    };
    Ok((img, lab, replaced))
}

/// A hidden staging folder inside the output folder, removed on drop unless emptied.
struct Staging(PathBuf);

impl Drop for Staging {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Removes what killed runs left in the output folder: staging folders `.sinew-prep-<pid>`
/// whose process is gone (checked in `/proc` where it exists; elsewhere every other staging
/// folder is taken as stale) and temporaries of the log (`.prep_log.json.tmp-*`).
fn remove_leftovers(out: &Path) {
    let Ok(entries) = std::fs::read_dir(out) else { return };
    let proc_fs = Path::new("/proc/self").exists();
    for e in entries.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if let Some(pid) = name.strip_prefix(".sinew-prep-").and_then(|p| p.parse::<u32>().ok()) {
            let alive = pid == std::process::id() || (proc_fs && Path::new("/proc").join(pid.to_string()).exists());
            if !alive {
                let _ = std::fs::remove_dir_all(e.path());
            }
        } else if name.starts_with(".prep_log.json.tmp-") {
            let _ = std::fs::remove_file(e.path());
        }
    }
}

fn run_inner(args: &PrepArgs) -> Result<()> {
    let steps = effective_steps(args)?;
    let nan = common::parse_nan(&args.nan)?;
    let jobs = collect_jobs(&args.inputs, &args.labels)?;
    check_outputs(&jobs, &args.out, steps.mask)?;

    // 1. Read and check every input before writing anything.
    let pb = ui::progress(jobs.len() as u64, "checking inputs", args.quiet);
    let mut sums = Vec::with_capacity(jobs.len());
    for j in &jobs {
        pb.set_message(stem(&j.image));
        load(j, nan)?;
        let lab_sum = j.labels.as_deref().map(common::sha256_file).transpose()?;
        sums.push((common::sha256_file(&j.image)?, lab_sum));
        pb.inc(1);
    }
    pb.finish_and_clear();

    // 2. Prepare every file into a staging folder.
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("{}: cannot create the output folder", args.out.display()))?;
    remove_leftovers(&args.out);
    let staging = Staging(args.out.join(format!(".sinew-prep-{}", std::process::id())));
    std::fs::create_dir(&staging.0)
        .with_context(|| format!("{}: cannot create a staging folder", staging.0.display()))?;
    let pb = ui::progress(jobs.len() as u64, "preparing", args.quiet);
    let say = |line: String| {
        if !args.quiet {
            pb.suspend(|| println!("{line}"));
        }
    };
    let mut files = Vec::with_capacity(jobs.len());
    let mut moves: Vec<(PathBuf, PathBuf)> = Vec::new();
    for (j, (sha, lab_sha)) in jobs.iter().zip(sums) {
        pb.set_message(stem(&j.image));
        let t = Instant::now();
        let (img, lab, non_finite_replaced) = load(j, nan)?;
        let t_read = t.elapsed().as_secs_f64();
        let before = GridRecord::from(&img.grid);
        let p = prepare(img, lab, &steps).with_context(|| j.image.display().to_string())?;
        let t_prep = t.elapsed().as_secs_f64();
        let (out_img, out_lab, out_mask) = outputs_of(j, &args.out, steps.mask);
        let staged = |o: &Path| staging.0.join(o.file_name().expect("output has a name"));
        sinew_io::write_image(&staged(&out_img), &p.image)?;
        moves.push((staged(&out_img), out_img.clone()));
        if let (Some(l), Some(o)) = (&p.labels, &out_lab) {
            sinew_io::write_labels(&staged(o), l)?;
            moves.push((staged(o), o.clone()));
        }
        if let (Some(m), Some(o)) = (&p.mask, &out_mask) {
            sinew_io::write_labels(&staged(o), m)?;
            moves.push((staged(o), o.clone()));
        }
        let after = GridRecord::from(&p.image.grid);
        let secs = t.elapsed().as_secs_f64();
        let [nx, ny, nz] = after.shape;
        let [sx, sy, sz] = after.spacing_mm;
        let [bx, by, bz] = before.shape;
        say(format!(
            "{}  {bx}x{by}x{bz} {} -> {nx}x{ny}x{nz} {} @ {sx:.3}x{sy:.3}x{sz:.3} mm  {secs:.2} s",
            stem(&j.image),
            before.orientation,
            after.orientation
        ));
        files.push(FileLog {
            input: j.image.display().to_string(),
            sha256: sha,
            output: out_img.display().to_string(),
            labels: j.labels.as_ref().zip(out_lab).zip(lab_sha).map(|((l, o), s)| LabelLog {
                input: l.display().to_string(),
                sha256: s,
                output: o.display().to_string(),
            }),
            mask: out_mask.map(|m| m.display().to_string()),
            non_finite_replaced,
            before,
            after,
            steps: p.steps,
            seconds: secs,
            timings: Timings { read: t_read, prepare: t_prep - t_read, write: secs - t_prep },
        });
        pb.inc(1);
    }
    pb.finish_and_clear();

    // 3. Every file succeeded: move the outputs into place, then write the log (last). A log
    // of an earlier run would vouch for a mix of old and new files if this is interrupted.
    match std::fs::remove_file(args.out.join("prep_log.json")) {
        Err(e) if e.kind() != std::io::ErrorKind::NotFound => {
            return Err(e).with_context(|| format!("{}: cannot remove the old log", args.out.display()));
        }
        _ => {}
    }
    for (from, to) in &moves {
        std::fs::rename(from, to).with_context(|| format!("{}: cannot move the output into place", to.display()))?;
    }
    let log = PrepLog {
        sinew_version: env!("CARGO_PKG_VERSION"),
        order: ORDER,
        recipe: args.recipe.as_ref().map(|p| p.display().to_string()),
        pipeline: Recipe::from_steps(&steps),
        nan,
        files,
    };
    common::write_json(&args.out.join("prep_log.json"), &log)?;
    drop(staging);
    if !args.quiet {
        println!("prepared {} scans into {} (log: prep_log.json)", jobs.len(), args.out.display());
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_number_lists() {
        assert_eq!(parse_f64x3("2,2.5, 3").unwrap(), [2.0, 2.5, 3.0]);
        assert_eq!(parse_f32x2("-1000,1500").unwrap(), [-1000.0, 1500.0]);
        assert!(parse_usizex3("1,2").is_err());
        assert!(parse_usizex3("1,2,x").is_err());
    }

    #[test]
    fn stems_drop_nifti_extensions() {
        assert_eq!(stem(Path::new("/a/b/subject_00_image.nii.gz")), "subject_00_image");
        assert_eq!(stem(Path::new("x.NII")), "x");
    }
}
