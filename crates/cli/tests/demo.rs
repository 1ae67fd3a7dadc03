//! `sinew demo` end to end: the files it writes, read back by sinew and by nibabel, and the
//! resume/refuse behaviour of reruns.

use std::path::Path;
use std::process::{Command, Output};

use sinew_phantom::{generate, PhantomParams, LABELS};
use sinew_testkit::{text, Sinew};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn sinew(args: &[&str], out: &Path) -> Output {
    SINEW.cmd().arg("demo").args(args).arg("--out").arg(out).output().expect("run sinew")
}

#[test]
fn writes_a_small_cohort_and_resumes() {
    let tmp = sinew_testkit::tempdir();
    let dir = tmp.path().join("cohort");
    let out = sinew(&["--small", "--subjects", "2"], &dir);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    assert_eq!(stdout.lines().filter(|l| l.contains("72x56x96 @ 4x4x4 mm")).count(), 2, "{stdout}");

    // labels.json: value → name, exactly the phantom's table
    let labels: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("labels.json")).unwrap()).unwrap();
    assert_eq!(labels.as_object().unwrap().len(), LABELS.len());
    for (v, name) in LABELS {
        assert_eq!(labels[v.to_string()], *name);
    }

    // Reading the files back gives the generator's subjects exactly (float32 and uint8 on
    // disk hold the values without loss).
    let p = PhantomParams::small();
    for i in 0..2 {
        let s = generate(7, i, &p);
        let img = sinew_io::read_image(&dir.join(format!("subject_{i:02}_image.nii.gz"))).unwrap();
        let lab = sinew_io::read_labels(&dir.join(format!("subject_{i:02}_labels.nii.gz"))).unwrap();
        assert_eq!(lab.data, s.labels.data);
        assert_eq!(img.data, s.image.data);
        assert!(img.grid.same_as(&s.image.grid, 1e-6));
    }

    // nibabel (an independent NIfTI reader) sees the same files: RAS grid of 4 mm voxels
    // centred on the origin, uint8 labels 0..10, float32 HU with air near −1000.
    let script = r#"
import sys, nibabel as nib, numpy as np
d = sys.argv[1]
for i in range(2):
    img = nib.load(f"{d}/subject_{i:02d}_image.nii.gz")
    lab = nib.load(f"{d}/subject_{i:02d}_labels.nii.gz")
    assert img.shape == (72, 56, 96) and lab.shape == (72, 56, 96), img.shape
    assert nib.aff2axcodes(img.affine) == ("R", "A", "S")
    expect = np.diag([4.0, 4.0, 4.0, 1.0]); expect[:3, 3] = [-142.0, -110.0, -190.0]
    assert np.allclose(img.affine, expect) and np.allclose(lab.affine, expect), img.affine
    assert img.get_data_dtype() == np.float32 and lab.get_data_dtype() == np.uint8
    l = np.asarray(lab.dataobj); a = img.get_fdata()
    assert list(np.unique(l)) == list(range(11)), np.unique(l)
    assert abs(a[l == 0].mean() + 1000.0) < 10.0, a[l == 0].mean()
print("ok")
"#;
    let py =
        Command::new("python3").arg("-c").arg(script).arg(&dir).output().expect("python3 with nibabel is required");
    assert!(py.status.success(), "nibabel check failed: {}{}", text(&py.stdout), text(&py.stderr));

    // A rerun skips both subjects and leaves the files untouched.
    let stamp = |n: &str| std::fs::metadata(dir.join(n)).unwrap().modified().unwrap();
    let before = stamp("subject_01_image.nii.gz");
    let again = sinew(&["--small", "--subjects", "2"], &dir);
    assert!(again.status.success(), "{}", text(&again.stderr));
    assert_eq!(text(&again.stdout).matches("exists, skipped").count(), 2, "{}", text(&again.stdout));
    assert_eq!(stamp("subject_01_image.nii.gz"), before);

    // A damaged subject is written again (resume after a crash or a bad copy).
    std::fs::write(dir.join("subject_01_labels.nii.gz"), b"not a nifti file").unwrap();
    let fix = sinew(&["--small", "--subjects", "2"], &dir);
    assert!(fix.status.success(), "{}", text(&fix.stderr));
    assert_eq!(text(&fix.stdout).matches("exists, skipped").count(), 1);
    let lab = sinew_io::read_labels(&dir.join("subject_01_labels.nii.gz")).unwrap();
    assert_eq!(lab.data, generate(7, 1, &p).labels.data);

    // Another seed in the same folder is refused (exit code 2, one error line).
    let other = sinew(&["--small", "--subjects", "2", "--seed", "8"], &dir);
    assert_eq!(other.status.code(), Some(2));
    assert!(text(&other.stderr).contains("refusing to mix"), "{}", text(&other.stderr));
}

#[test]
fn rejects_a_zero_subject_count() {
    let tmp = sinew_testkit::tempdir();
    let out = sinew(&["--subjects", "0"], &tmp.path().join("x"));
    assert!(!out.status.success());
    assert!(!tmp.path().join("x").exists());
}

#[test]
fn variation_and_noise_flags_reach_the_generator() {
    let tmp = sinew_testkit::tempdir();
    let dir = tmp.path().join("hard");
    let out = sinew(
        &["--data-only", "--small", "--subjects", "1", "--seed", "11", "--variation", "2", "--noise-hu", "20"],
        &dir,
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    // The files are exactly the generator's subject under those parameters …
    let mut p = PhantomParams::small();
    p.variation = 2.0;
    p.noise_hu = 20.0;
    let s = generate(11, 0, &p);
    let img = sinew_io::read_image(&dir.join("subject_00_image.nii.gz")).unwrap();
    let lab = sinew_io::read_labels(&dir.join("subject_00_labels.nii.gz")).unwrap();
    assert_eq!(img.data, s.image.data);
    assert_eq!(lab.data, s.labels.data);
    // … and differ from the demo cohort's subject of the same seed.
    assert_ne!(img.data, generate(11, 0, &PhantomParams::small()).image.data);
    let info: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("cohort.json")).unwrap()).unwrap();
    assert_eq!(info["variation"], 2.0);
    assert_eq!(info["noise_hu"], 20.0);

    // The same folder with another variation or noise is refused, not mixed.
    for args in [["--variation", "1"], ["--noise-hu", "12"]] {
        let mut a = vec!["--data-only", "--small", "--subjects", "1", "--seed", "11"];
        a.extend(args);
        if args[0] != "--variation" {
            a.extend(["--variation", "2"]);
        }
        let other = sinew(&a, &dir);
        assert_eq!(other.status.code(), Some(2), "{a:?}");
        assert!(text(&other.stderr).contains("refusing to mix"), "{}", text(&other.stderr));
    }

    // Out-of-range values are usage errors and write nothing.
    for bad in [["--variation", "-1"], ["--noise-hu", "nan"]] {
        let mut a = vec!["--data-only", "--small", "--subjects", "1"];
        a.extend(bad);
        let o = sinew(&a, &tmp.path().join("bad"));
        assert_eq!(o.status.code(), Some(2), "{bad:?}");
        assert!(!tmp.path().join("bad").exists());
    }
}
