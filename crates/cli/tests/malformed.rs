//! Malformed inputs through the `sinew` binary: every case must end with exit code 2, ONE line
//! on stderr naming the offending file (or folder) and the problem, and no new file (final or
//! temporary) in the output folder.
//!
//! Bad files are made by patching a valid little-endian NIfTI-1 file written by sinew at the
//! byte offsets of the NIfTI-1 standard header (`nifti1.h`, NIfTI Data Format Working Group,
//! 2004): dim 40, datatype 70, bitpix 72, pixdim 76, vox_offset 108, scl_slope 112,
//! qform_code 252, sform_code 254, quatern_b 256, srow_x 280, magic 344; voxel data at 352.

use std::path::{Path, PathBuf};
use std::process::Command;

use sinew_grid::{Field, Grid, Volume};
use sinew_testkit::{listing, Sinew};

const SHAPE: [usize; 3] = [20, 16, 24];
const VOX: usize = 352;

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

/// A folder of valid inputs (a smooth blob image pair with labels, a field) to corrupt.
struct Kit {
    dir: tempfile::TempDir,
}

impl Kit {
    fn new() -> Kit {
        let dir = sinew_testkit::tempdir();
        let grid = Grid::axis_aligned(SHAPE, [4.0, 4.0, 4.0], [-40.0, -30.0, -46.0]);
        for (name, shift) in [("fixed.nii", 0.0), ("moving.nii", 1.5)] {
            let img = Volume::new(
                grid.clone(),
                ndarray::Array3::from_shape_fn(SHAPE, |(i, j, k)| {
                    let r2 = (i as f32 - 10.0 - shift).powi(2) + (j as f32 - 8.0).powi(2) + (k as f32 - 12.0).powi(2);
                    1000.0 * (-r2 / 30.0).exp() + (i * 3 + j * 5 + k * 7) as f32 % 11.0
                }),
            )
            .unwrap();
            sinew_io::write_image(&dir.path().join(name), &img).unwrap();
            if shift == 0.0 {
                sinew_io::write_image(&dir.path().join("fixed.nii.gz"), &img).unwrap();
            }
        }
        let labels = Volume::new(
            grid.clone(),
            ndarray::Array3::from_shape_fn(SHAPE, |(i, j, k)| u16::from(i > 6 && i < 14 && j > 4 && j < 12 && k > 6)),
        )
        .unwrap();
        sinew_io::write_labels(&dir.path().join("labels.nii"), &labels).unwrap();
        sinew_io::write_field(&dir.path().join("field.nii"), &Field::zeros(grid), sinew_io::FieldUnits::Mm).unwrap();
        Kit { dir }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    fn bytes(&self, name: &str) -> Vec<u8> {
        std::fs::read(self.path(name)).unwrap()
    }

    /// Writes `bytes` as a new input file `name`.
    fn put(&self, name: &str, bytes: &[u8]) -> PathBuf {
        let p = self.path(name);
        std::fs::write(&p, bytes).unwrap();
        p
    }

    /// A copy of the valid file `from` with `edits` (offset, bytes) applied.
    fn patched(&self, from: &str, name: &str, edits: &[(usize, &[u8])]) -> PathBuf {
        let mut b = self.bytes(from);
        for (off, new) in edits {
            b[*off..*off + new.len()].copy_from_slice(new);
        }
        self.put(name, &b)
    }

    /// A copy of the valid image `fixed.nii` with voxel `index` (file order) set to `v`.
    fn with_voxel(&self, name: &str, index: usize, v: f32) -> PathBuf {
        self.patched("fixed.nii", name, &[(VOX + 4 * index, &v.to_le_bytes())])
    }

    /// An image on another grid (shape `shape`).
    fn image_shaped(&self, name: &str, shape: [usize; 3]) -> PathBuf {
        let grid = Grid::axis_aligned(shape, [4.0; 3], [0.0; 3]);
        let img =
            Volume::new(grid, ndarray::Array3::from_shape_fn(shape, |(i, j, k)| (i + 2 * j + 3 * k) as f32)).unwrap();
        let p = self.path(name);
        sinew_io::write_image(&p, &img).unwrap();
        p
    }

    /// A label map on the kit grid whose voxels are all `value` (written as float32 so any
    /// value can be stored).
    fn labels_valued(&self, name: &str, value: f32) -> PathBuf {
        let img = Volume::filled(Grid::axis_aligned(SHAPE, [4.0; 3], [-40.0, -30.0, -46.0]), value);
        let p = self.path(name);
        sinew_io::write_image(&p, &img).unwrap();
        p
    }
}

/// Runs `sinew args…` and asserts: exit code 2; stderr is one line that names `culprit` (its
/// file name) and contains every one of `needles` (case-insensitive); nothing new appeared in
/// `watch` (the output folder, or the folder of the output file).
#[track_caller]
fn fails(args: &[&dyn AsRefOsStr], watch: &Path, culprit: &Path, needles: &[&str]) {
    let before = listing(watch);
    let out = SINEW.cmd().args(args.iter().map(|a| a.as_os())).output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    let shown: Vec<String> = args.iter().map(|a| a.as_os().to_string_lossy().into_owned()).collect();
    assert_eq!(out.status.code(), Some(2), "sinew {shown:?}: exit {:?}, stderr {stderr}", out.status);
    let lines: Vec<&str> = stderr.lines().filter(|l| !l.trim().is_empty()).collect();
    assert_eq!(lines.len(), 1, "sinew {shown:?}: not one line on stderr:\n{stderr}");
    let line = lines[0];
    let name = culprit.file_name().unwrap().to_string_lossy();
    assert!(line.contains(name.as_ref()), "sinew {shown:?}: the error does not name {name}: {line}");
    for n in needles {
        assert!(line.to_lowercase().contains(&n.to_lowercase()), "sinew {shown:?}: expected {n:?} in: {line}");
    }
    assert!(!line.contains("panicked"), "{line}");
    let after = listing(watch);
    let new: Vec<_> = after.difference(&before).collect();
    assert!(new.is_empty(), "sinew {shown:?} left files behind: {new:?}");
}

/// `&str` and paths alike as command-line arguments.
trait AsRefOsStr {
    fn as_os(&self) -> &std::ffi::OsStr;
}
impl AsRefOsStr for &str {
    fn as_os(&self) -> &std::ffi::OsStr {
        self.as_ref()
    }
}
impl AsRefOsStr for PathBuf {
    fn as_os(&self) -> &std::ffi::OsStr {
        self.as_os_str()
    }
}

/// `sinew register` of `fixed` to `moving` (fast, tiny) with extra arguments, into `kit/out`;
/// asserts the failure.
#[track_caller]
fn register_fails(kit: &Kit, fixed: &Path, moving: &Path, extra: &[&dyn AsRefOsStr], culprit: &Path, needles: &[&str]) {
    let out = kit.path("out");
    let mut args: Vec<&dyn AsRefOsStr> = Vec::new();
    let (f, m) = (fixed.to_path_buf(), moving.to_path_buf());
    let fixed_flag = "-f";
    let moving_flag = "-m";
    let out_flag = "-o";
    let q = "-q";
    let cmd = "register";
    args.extend([&cmd as &dyn AsRefOsStr, &fixed_flag, &f, &moving_flag, &m, &out_flag, &out, &q]);
    args.extend_from_slice(extra);
    fails(&args, kit.dir.path(), culprit, needles);
}

fn i16le(v: i16) -> [u8; 2] {
    v.to_le_bytes()
}
fn f32le(v: f32) -> [u8; 4] {
    v.to_le_bytes()
}

// ---------------------------------------------------------------- truncated and corrupt files

#[test]
fn truncated_plain_file() {
    let k = Kit::new();
    let b = k.bytes("fixed.nii");
    let p = k.put("cut.nii", &b[..b.len() - 100]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["truncated"]);
}

#[test]
fn truncated_header() {
    let k = Kit::new();
    let p = k.put("stub.nii", &k.bytes("fixed.nii")[..200]);
    register_fails(&k, &k.path("fixed.nii"), &p, &[], &p, &["shorter than a NIfTI-1 header"]);
}

#[test]
fn empty_file() {
    let k = Kit::new();
    let p = k.put("empty.nii", b"");
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["shorter than a NIfTI-1 header"]);
}

#[test]
fn truncated_gzip_stream() {
    let k = Kit::new();
    let gz = k.bytes("fixed.nii.gz");
    let p = k.put("cut.nii.gz", &gz[..gz.len() / 2]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &[]);
}

#[test]
fn corrupt_gzip_stream() {
    let k = Kit::new();
    let mut gz = k.bytes("fixed.nii.gz");
    let n = gz.len();
    for b in &mut gz[n / 3..n / 3 + 40] {
        *b ^= 0x5a;
    }
    let p = k.put("corrupt.nii.gz", &gz);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &[]);
}

#[test]
fn missing_file() {
    let k = Kit::new();
    let p = k.path("nowhere.nii.gz");
    register_fails(&k, &k.path("fixed.nii"), &p, &[], &p, &["cannot open"]);
}

#[test]
fn input_is_a_folder() {
    let k = Kit::new();
    let p = k.path("a_folder.nii");
    std::fs::create_dir(&p).unwrap();
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &[]);
}

// ---------------------------------------------------------------- header inconsistencies

#[test]
fn wrong_magic() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "magic.nii", &[(344, b"xyz\0")]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["magic"]);
}

#[test]
fn not_nifti_at_all() {
    let k = Kit::new();
    let p = k.put("text.nii", &b"this is a text file, not a scan\n".repeat(20));
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["not a NIfTI-1 file"]);
}

#[test]
fn nifti2_header() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "v2.nii", &[(0, &540i32.to_le_bytes())]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["NIfTI-2"]);
}

#[test]
fn datatype_and_bitpix_disagree() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "bitpix.nii", &[(72, &i16le(16))]); // float32 with bitpix 16
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["bitpix", "float32"]);
}

#[test]
fn unsupported_datatype() {
    let k = Kit::new();
    // complex64 (code 32, 64 bits)
    let p = k.patched("fixed.nii", "complex.nii", &[(70, &i16le(32)), (72, &i16le(64))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["unsupported datatype", "32"]);
}

#[test]
fn bad_dim0_and_zero_extent() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "dim0.nii", &[(40, &i16le(9))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["dim[0]"]);
    let p = k.patched("fixed.nii", "dim2.nii", &[(44, &i16le(0))]);
    register_fails(&k, &k.path("fixed.nii"), &p, &[], &p, &["dim[2]"]);
    let p = k.patched("fixed.nii", "dimneg.nii", &[(46, &i16le(-24))]);
    register_fails(&k, &k.path("fixed.nii"), &p, &[], &p, &["dim[3]"]);
}

#[test]
fn dims_claim_more_than_the_file_holds() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "big.nii", &[(42, &i16le(30000)), (44, &i16le(30000)), (46, &i16le(30000))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &[]);
}

#[test]
fn bad_vox_offset() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "vox.nii", &[(108, &f32le(100.0))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["vox_offset"]);
    let p = k.patched("fixed.nii", "voxnan.nii", &[(108, &f32le(f32::NAN))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["vox_offset"]);
    let p = k.patched("fixed.nii", "voxfar.nii", &[(108, &f32le(1e9))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["truncated"]);
}

#[test]
fn several_volumes() {
    let k = Kit::new();
    // dim = (4, 20, 16, 12, 2): same bytes, read as two volumes of half the depth.
    let p = k.patched("fixed.nii", "4d.nii", &[(40, &i16le(4)), (46, &i16le(12)), (48, &i16le(2))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["2 volumes"]);
}

// ---------------------------------------------------------------- geometry

#[test]
fn zero_spacing() {
    let k = Kit::new();
    // No sform, no qform: the affine is diag(pixdim), and pixdim[2] is 0.
    let p = k.patched("fixed.nii", "zero_sp.nii", &[(252, &i16le(0)), (254, &i16le(0)), (84, &f32le(0.0))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["pixdim[2]"]);
}

#[test]
fn nan_spacing() {
    let k = Kit::new();
    // qform only, pixdim[3] NaN.
    let p = k.patched("fixed.nii", "nan_sp.nii", &[(254, &i16le(0)), (88, &f32le(f32::NAN))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["pixdim[3]"]);
}

#[test]
fn singular_affine() {
    let k = Kit::new();
    // sform with a zero third row.
    let zeros = [0u8; 16];
    let p = k.patched("fixed.nii", "singular.nii", &[(312, &zeros)]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["affine", "sform"]);
}

#[test]
fn non_finite_affine() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "inf_affine.nii", &[(280, &f32le(f32::INFINITY))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["affine"]);
}

#[test]
fn non_finite_quaternion() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "quat.nii", &[(254, &i16le(0)), (260, &f32le(f32::NAN))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["qform"]);
}

// ---------------------------------------------------------------- voxel values

#[test]
fn nan_voxels_are_rejected() {
    let k = Kit::new();
    let p = k.with_voxel("nan.nii", 1234, f32::NAN);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["NaN"]);
}

#[test]
fn infinite_voxels_are_rejected() {
    let k = Kit::new();
    let p = k.with_voxel("inf.nii", 77, f32::NEG_INFINITY);
    register_fails(&k, &k.path("fixed.nii"), &p, &[], &p, &["infinite"]);
}

#[test]
fn nan_through_scaling_is_rejected() {
    let k = Kit::new();
    // scl_slope = inf turns every voxel into ±inf or NaN... a slope that is not finite is
    // ignored (NIfTI-1), so use a finite slope that overflows float32 instead.
    let p = k.patched("fixed.nii", "scaled.nii", &[(112, &f32le(3e38))]);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["infinite"]);
}

#[test]
fn constant_image() {
    let k = Kit::new();
    let p = k.labels_valued("flat.nii", 42.0);
    register_fails(&k, &p, &k.path("moving.nii"), &[], &p, &["constant"]);
}

// ---------------------------------------------------------------- labels and masks

#[test]
fn labels_on_another_grid() {
    let k = Kit::new();
    let l = k.image_shaped("small_labels.nii", [10, 8, 12]);
    let fl: &dyn AsRefOsStr = &"--fixed-labels";
    register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[fl, &l], &l, &["does not match"]);
}

#[test]
fn labels_not_integers() {
    let k = Kit::new();
    let l = k.labels_valued("frac_labels.nii", 2.5);
    let ml: &dyn AsRefOsStr = &"--moving-labels";
    register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[ml, &l], &l, &["not integers"]);
}

#[test]
fn negative_labels() {
    let k = Kit::new();
    let l = k.labels_valued("neg_labels.nii", -3.0);
    let ml: &dyn AsRefOsStr = &"--moving-labels";
    register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[ml, &l], &l, &["negative"]);
}

#[test]
fn empty_label_map() {
    let k = Kit::new();
    let l = k.labels_valued("empty_labels.nii", 0.0);
    let fl: &dyn AsRefOsStr = &"--fixed-labels";
    let ml: &dyn AsRefOsStr = &"--moving-labels";
    let good = k.path("labels.nii");
    register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[fl, &l, ml, &good], &l, &["empty"]);
}

#[test]
fn empty_mask() {
    let k = Kit::new();
    let m = k.labels_valued("empty_mask.nii", 0.0);
    let mf: &dyn AsRefOsStr = &"--mask";
    register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[mf, &m], &m, &["empty"]);
}

// ---------------------------------------------------------------- outputs

#[test]
fn output_folder_cannot_be_created() {
    let k = Kit::new();
    // A folder below a regular file cannot be created, even by root.
    let file = k.put("plain_file", b"x");
    let out = file.join("out");
    let args: [&dyn AsRefOsStr; 8] =
        [&"register", &"-f", &k.path("fixed.nii"), &"-m", &k.path("moving.nii"), &"-o", &out, &"-q"];
    fails(&args, k.dir.path(), &out, &["cannot create"]);
}

#[test]
fn output_would_overwrite_an_input() {
    let k = Kit::new();
    // The fixed scan is named like an output and lives in the output folder.
    let out = k.path("out");
    std::fs::create_dir(&out).unwrap();
    let fixed = out.join("warped.nii.gz");
    std::fs::copy(k.path("fixed.nii"), &fixed).unwrap();
    let args: [&dyn AsRefOsStr; 9] =
        [&"register", &"-f", &fixed, &"-m", &k.path("moving.nii"), &"-o", &out, &"-q", &"--levels=1"];
    fails(&args, k.dir.path(), &fixed, &["overwrite"]);
    assert_eq!(std::fs::read(&fixed).unwrap(), k.bytes("fixed.nii"), "the input was changed");
}

/// A tiny tmpfs of `size_k` KiB to fill, unmounted when dropped.
struct Tmpfs(PathBuf);

impl Tmpfs {
    /// Mounts it at `at`; `None` where this process may not mount.
    fn mount(at: &Path, size_k: u64) -> Option<Tmpfs> {
        std::fs::create_dir_all(at).unwrap();
        let ok = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size_k}k"), "tmpfs"])
            .arg(at)
            .output()
            .is_ok_and(|o| o.status.success());
        ok.then(|| Tmpfs(at.to_path_buf()))
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.0).status();
    }
}

/// Set in the copy of this test that runs inside its own user and mount namespace.
const IN_NAMESPACE: &str = "SINEW_FULL_DISK_IN_NAMESPACE";

#[test]
fn full_disk() {
    let k = Kit::new();
    // Mounting needs root (CAP_SYS_ADMIN). Without it the test runs itself again inside a new
    // user and mount namespace (`unshare --user --map-root-user --mount`, Linux), where a
    // tmpfs may be mounted; where neither works it fails, saying why: it never passes
    // without having filled a disk.
    if std::env::var_os(IN_NAMESPACE).is_none() && Tmpfs::mount(&k.path("probe"), 64).is_none() {
        let out = Command::new("unshare")
            .args(["--user", "--map-root-user", "--mount"])
            .arg(std::env::current_exe().unwrap())
            .args(["full_disk", "--exact", "--test-threads=1"])
            .env(IN_NAMESPACE, "1")
            .output()
            .unwrap_or_else(|e| {
                panic!("no permission to mount a tmpfs and no `unshare` ({e}); skip explicitly: -- --skip full_disk")
            });
        let stdout = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success() && stdout.contains(" 1 passed"),
            "full_disk inside `unshare --user --map-root-user --mount` (no permission to mount here): {stdout}{}",
            String::from_utf8_lossy(&out.stderr)
        );
        return;
    }
    let register = |out: &Path| {
        let mut c = SINEW.cmd();
        c.args(["register", "-q", "--levels=2", "--iterations=2,2", "-f"])
            .arg(k.path("fixed.nii"))
            .arg("-m")
            .arg(k.path("moving.nii"))
            .arg("--moving-labels")
            .arg(k.path("labels.nii"))
            .arg("-o")
            .arg(out);
        c
    };
    // The same run on a roomy disk tells how large the first output (the field) is.
    let reference = k.path("reference");
    let r = register(&reference).output().unwrap();
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let field_k = std::fs::metadata(reference.join("field.nii.gz")).unwrap().len().div_ceil(4096) * 4;
    // 64 KiB: the first write fails; field + 8 KiB: the field is written, the next one fails
    // (and the field must then be removed, not left as a partial set).
    for size_k in [64, field_k + 8] {
        let fs = Tmpfs::mount(&k.path(&format!("tiny{size_k}")), size_k).expect("mount a tmpfs");
        let out = fs.0.join("out");
        let r = register(&out).output().unwrap();
        let stderr = String::from_utf8_lossy(&r.stderr);
        assert_eq!(r.status.code(), Some(2), "{stderr}");
        assert_eq!(stderr.lines().count(), 1, "{stderr}");
        assert!(stderr.contains("No space left on device"), "{stderr}");
        assert!(stderr.contains(&format!("{}/", out.display())), "does not name the file: {stderr}");
        if size_k != 64 {
            assert!(!stderr.contains("field.nii.gz"), "the field should have fitted: {stderr}");
        }
        let left: Vec<_> = listing(&fs.0).into_iter().filter(|p| p.as_os_str() != "out").collect();
        assert!(left.is_empty(), "a full disk ({size_k} KiB) left files behind: {left:?} ({stderr})");
    }
}

// ---------------------------------------------------------------- other commands

#[test]
fn warp_field_that_is_not_a_field() {
    let k = Kit::new();
    let out = k.path("w.nii.gz");
    let f = k.path("fixed.nii");
    let args: [&dyn AsRefOsStr; 6] = [&"warp", &"-m", &k.path("moving.nii"), &"--field", &f, &"-o"];
    let mut v: Vec<&dyn AsRefOsStr> = args.to_vec();
    v.push(&out);
    fails(&v, k.dir.path(), &f, &["not a displacement field"]);
}

#[test]
fn warp_field_with_nan_vectors() {
    let k = Kit::new();
    let f = k.patched("field.nii", "nan_field.nii", &[(VOX + 4 * 500, &f32le(f32::NAN))]);
    let out = k.path("w.nii.gz");
    let v: [&dyn AsRefOsStr; 7] = [&"warp", &"-m", &k.path("moving.nii"), &"--field", &f, &"-o", &out];
    fails(&v, k.dir.path(), &f, &["NaN"]);
}

#[test]
fn warp_truncated_field() {
    let k = Kit::new();
    let b = k.bytes("field.nii");
    let f = k.put("cut_field.nii", &b[..b.len() - 1]);
    let out = k.path("w.nii.gz");
    let v: [&dyn AsRefOsStr; 7] = [&"warp", &"-m", &k.path("moving.nii"), &"--field", &f, &"-o", &out];
    fails(&v, k.dir.path(), &f, &["truncated"]);
}

#[test]
fn warp_labels_not_integers() {
    let k = Kit::new();
    let l = k.labels_valued("frac.nii", 0.25);
    let out = k.path("w.nii.gz");
    let v: [&dyn AsRefOsStr; 8] = [&"warp", &"-m", &l, &"--field", &k.path("field.nii"), &"-o", &out, &"--labels"];
    fails(&v, k.dir.path(), &l, &["not integers"]);
}

#[test]
fn warp_nan_moving() {
    let k = Kit::new();
    let m = k.with_voxel("nan_moving.nii", 3, f32::NAN);
    let out = k.path("w.nii.gz");
    let v: [&dyn AsRefOsStr; 7] = [&"warp", &"-m", &m, &"--field", &k.path("field.nii"), &"-o", &out];
    fails(&v, k.dir.path(), &m, &["NaN"]);
}

#[test]
fn warp_into_a_missing_folder() {
    let k = Kit::new();
    let out = k.path("no/such/folder/w.nii.gz");
    let v: [&dyn AsRefOsStr; 7] =
        [&"warp", &"-m", &k.path("moving.nii"), &"--field", &k.path("field.nii"), &"-o", &out];
    fails(&v, k.dir.path(), &out, &[]);
}

#[test]
fn info_on_corrupt_files() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "magic.nii", &[(344, b"nope")]);
    let v: [&dyn AsRefOsStr; 2] = [&"info", &p];
    fails(&v, k.dir.path(), &p, &["magic"]);
    let b = k.bytes("fixed.nii");
    let p = k.put("cut.nii", &b[..b.len() - 7]);
    let v: [&dyn AsRefOsStr; 3] = [&"info", &"--json", &p];
    fails(&v, k.dir.path(), &p, &["truncated"]);
}

#[test]
fn demo_into_an_uncreatable_folder() {
    let k = Kit::new();
    let file = k.put("plain_file", b"x");
    let out = file.join("demo");
    let v: [&dyn AsRefOsStr; 6] = [&"demo", &"--out", &out, &"--small", &"--subjects", &"2"];
    fails(&v, k.dir.path(), &out, &[]);
}

#[test]
fn prep_on_corrupt_input() {
    let k = Kit::new();
    let p = k.patched("fixed.nii", "bitpix.nii", &[(72, &i16le(8))]);
    let out = k.path("prepped");
    let v: [&dyn AsRefOsStr; 4] = [&"prep", &p, &"-o", &out];
    fails(&v, k.dir.path(), &p, &["bitpix"]);
}

#[test]
fn score_with_mismatched_label_grids() {
    let k = Kit::new();
    let small = k.image_shaped("small_labels.nii", [10, 8, 12]);
    let v: [&dyn AsRefOsStr; 7] =
        [&"score", &"--fixed-labels", &k.path("labels.nii"), &"--moving-labels", &small, &"--warped-labels", &small];
    fails(&v, k.dir.path(), &small, &[]);
}

#[test]
fn qc_field_on_another_grid() {
    let k = Kit::new();
    let f = k.path("small_field.nii");
    let grid = Grid::axis_aligned([10, 8, 12], [4.0; 3], [0.0; 3]);
    sinew_io::write_field(&f, &Field::zeros(grid), sinew_io::FieldUnits::Mm).unwrap();
    let out = k.path("qc.png");
    let v: [&dyn AsRefOsStr; 9] =
        [&"qc", &"-f", &k.path("fixed.nii"), &"-m", &k.path("moving.nii"), &"--field", &f, &"-o", &out];
    fails(&v, k.dir.path(), &f, &["grid", "fixed"]);
}

// ---------------------------------------------------------------- parameter files and tables

#[test]
fn config_with_an_empty_per_level_list_and_levels() {
    let k = Kit::new();
    for key in ["iterations", "step_size", "strides"] {
        let cfg = k.put(&format!("empty_{key}.toml"), format!("{key} = []\n").as_bytes());
        let (c, l): (&dyn AsRefOsStr, &dyn AsRefOsStr) = (&"--config", &"--levels=2");
        register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[c, &cfg, l], &cfg, &[key, "empty"]);
        // Without --levels the list is not stretched; validation names the file and the key.
        register_fails(&k, &k.path("fixed.nii"), &k.path("moving.nii"), &[c, &cfg], &cfg, &[key]);
    }
}

#[test]
fn cohort_merge_of_a_table_with_a_non_finite_cell() {
    let k = Kit::new();
    let header = "method,pair,fixed,moving,label,name,dice_before,dice,hd95_mm,hd_mm,assd_mm,folding,sdlogj,\
                  jac_min,landmark_mm,runtime_s";
    for (n, bad) in ["NaN", "nan", "inf", "-inf"].into_iter().enumerate() {
        let row = format!("sinew,0,a,b,1,liver,0.5,{bad},3,4,1,0,0.1,0.5,,2");
        let table = k.put(&format!("scores_{n}.csv"), format!("{header}\n{row}\n").as_bytes());
        let out = k.path("merged");
        let args: [&dyn AsRefOsStr; 5] = [&"cohort", &"merge", &table, &"--out", &out];
        fails(&args, k.dir.path(), &table, &["not a finite number"]);
    }
}
