//! Reproducibility of `sinew register`: the same inputs and thread count give byte-identical
//! outputs; 1 and 2 worker threads give fields that differ by less than 1e-4 voxel; the
//! report records the version, the parameters and SHA-256 checksums of the inputs.
//!
//! The checksums are checked against Python's `hashlib` (an implementation sinew did not
//! write; python3 is required, the test fails without it).

use std::path::{Path, PathBuf};
use std::process::Command;

use sinew_testkit::{run_ok, Sinew};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn demo(dir: &Path) -> (PathBuf, PathBuf, PathBuf) {
    SINEW.demo(dir, 2, &[]);
    (dir.join("subject_00_image.nii.gz"), dir.join("subject_01_image.nii.gz"), dir.join("subject_01_labels.nii.gz"))
}

const ITER: &str = "--iterations=5,5,5,5";

fn register(fixed: &Path, moving: &Path, labels: &Path, out: &Path, threads: usize) {
    run_ok(
        SINEW
            .cmd()
            .args(["register", "-q", "--preset", "fast", ITER, "-j", &threads.to_string(), "-f"])
            .arg(fixed)
            .arg("-m")
            .arg(moving)
            .arg("--moving-labels")
            .arg(labels)
            .arg("-o")
            .arg(out),
    );
}

/// SHA-256 by Python's hashlib.
fn python_sha256(p: &Path) -> String {
    let out = Command::new("python3")
        .args(["-c", "import hashlib,sys; print(hashlib.sha256(open(sys.argv[1],'rb').read()).hexdigest())"])
        .arg(p)
        .output()
        .expect("python3 is required for this test");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8(out.stdout).unwrap().trim().to_string()
}

fn report(dir: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(dir.join("report.json")).unwrap()).unwrap()
}

#[test]
fn same_threads_same_bytes_and_thread_count_changes_little() {
    let tmp = sinew_testkit::tempdir();
    let (fixed, moving, labels) = demo(&tmp.path().join("demo"));
    let (a, b, c) = (tmp.path().join("a"), tmp.path().join("b"), tmp.path().join("c"));
    register(&fixed, &moving, &labels, &a, 2);
    register(&fixed, &moving, &labels, &b, 2);
    register(&fixed, &moving, &labels, &c, 1);

    // Same thread count: every image output is byte-identical (gzip written with mtime 0).
    for name in ["field.nii.gz", "warped.nii.gz", "warped_labels.nii.gz", "jacdet.nii.gz"] {
        let (x, y) = (std::fs::read(a.join(name)).unwrap(), std::fs::read(b.join(name)).unwrap());
        assert!(x == y, "{name} differs between two identical runs");
    }

    // 1 vs 2 threads: fields within 1e-4 voxel (in memory the field is in voxels).
    let read = |d: &Path| sinew_io::read_field(&d.join("field.nii.gz"), Default::default()).unwrap().0;
    let (fa, fc) = (read(&a), read(&c));
    assert_eq!(fa.data.shape(), fc.data.shape());
    let max_diff = fa.data.iter().zip(fc.data.iter()).map(|(x, y)| (x - y).abs()).fold(0.0f32, f32::max);
    let max_disp = fa.data.iter().map(|x| x.abs()).fold(0.0f32, f32::max);
    assert!(max_disp > 0.05, "the registration did not move anything ({max_disp} voxel): the comparison is empty");
    assert!(max_diff < 1e-4, "1 vs 2 threads: fields differ by {max_diff} voxel");

    // The report traces the result: version, parameters, input checksums, thread count.
    let (ra, rc) = (report(&a), report(&c));
    assert_eq!(ra["sinew_version"], env!("CARGO_PKG_VERSION"));
    assert_eq!(ra["threads"], 2);
    assert_eq!(rc["threads"], 1);
    assert_eq!(ra["params"]["iterations"], serde_json::json!([5, 5, 5, 5]));
    assert!(ra["params"]["lambda"].is_number(), "parameters missing: {}", ra["params"]);
    assert_eq!(ra["params"], rc["params"]);
    let inputs = ra["inputs"].as_array().expect("inputs listed");
    let roles: Vec<&str> = inputs.iter().map(|i| i["role"].as_str().unwrap()).collect();
    assert_eq!(roles, ["fixed", "moving", "moving_labels"]);
    for (inp, path) in inputs.iter().zip([&fixed, &moving, &labels]) {
        assert_eq!(inp["sha256"].as_str().unwrap(), python_sha256(path), "checksum of {}", path.display());
    }
}
