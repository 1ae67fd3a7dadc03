//! sinew writes images, labels, fields and .npy; nibabel 5.3 / numpy read them back
//! (scripts/ref/io_check_written.py) and must see the same affine, shape, dtype, intent and
//! values. Fails (does not skip) when python3 or nibabel is missing.

use std::path::{Path, PathBuf};
use std::process::Command;

use approx::assert_relative_eq;
use ndarray::Array3;
use serde_json::Value;
use sinew_grid::{Affine, Field, Grid, Image, LabelMap};
use sinew_io::*;

fn nibabel_view(files: &[&Path]) -> Value {
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../scripts/ref/io_check_written.py");
    let out =
        Command::new("python3").arg(script).args(files).output().expect("python3 must be installed for this test");
    assert!(out.status.success(), "io_check_written.py failed: {}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

/// Values as f32: the files hold float32 (or integers), and serde_json's default float parsing
/// may be one f64 ulp off Python's shortest repr.
fn f32s(v: &Value) -> Vec<f32> {
    f64s(v).into_iter().map(|x| x as f32).collect()
}

fn rows(v: &Value) -> Vec<Vec<f64>> {
    v.as_array().unwrap().iter().map(f64s).collect()
}

/// An oblique grid: rotations about two axes, mirrored k, anisotropic spacing, large origin;
/// optionally with shear.
fn grid(shear: bool) -> Grid {
    let (s1, c1) = 20f64.to_radians().sin_cos();
    let (s2, c2) = (-35f64).to_radians().sin_cos();
    let rz = [[c1, -s1, 0.0], [s1, c1, 0.0], [0.0, 0.0, 1.0]];
    let rx = [[1.0, 0.0, 0.0], [0.0, c2, -s2], [0.0, s2, c2]];
    let mut lin = [[0.0; 3]; 3];
    let sp = [0.8, 1.25, -2.0];
    for r in 0..3 {
        for c in 0..3 {
            lin[r][c] = (0..3).map(|k| rz[r][k] * rx[k][c]).sum::<f64>() * sp[c];
        }
    }
    if shear {
        lin[0][1] += 0.3;
    }
    Grid::new([6, 5, 4], Affine::from_parts(lin, [-180.7, 95.3, -412.1])).unwrap()
}

fn check_affine(name: &str, got: &Value, grid: &Grid) {
    // nibabel's img.affine equals ours to 1e-5 relative (the header stores float32).
    for (r, row) in rows(got).iter().take(3).enumerate() {
        for (c, &ours) in grid.affine().m[r].iter().enumerate() {
            assert!(
                approx::abs_diff_eq!(row[c], ours, epsilon = 1e-5 * ours.abs().max(1.0)),
                "{name}: affine[{r}][{c}] {} vs {ours}",
                row[c]
            );
        }
    }
}

#[test]
fn nibabel_reads_what_we_write() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let (rigid, sheared) = (grid(false), grid(true));
    let img = Image::new(
        sheared.clone(),
        Array3::from_shape_fn((6, 5, 4), |(i, j, k)| (i * 100 + j * 10 + k) as f32 * 0.5 - 7.0),
    )
    .unwrap();
    let lab8 =
        LabelMap::new(rigid.clone(), Array3::from_shape_fn((6, 5, 4), |(i, j, k)| ((i + 2 * j + 3 * k) % 7) as u16))
            .unwrap();
    let mut lab16 = lab8.clone();
    lab16.data[[5, 4, 3]] = 1000;
    let mut field = Field::zeros(rigid.clone());
    for (n, v) in field.data.iter_mut().enumerate() {
        *v = ((n as f32) * 0.37).cos() * 2.5;
    }
    let paths = [
        d.join("img.nii.gz"),
        d.join("img.nii"),
        d.join("lab8.nii.gz"),
        d.join("lab16.nii"),
        d.join("field_mm.nii.gz"),
        d.join("field_vox.nii"),
        d.join("field.npy"),
    ];
    write_image(&paths[0], &img).unwrap();
    write_image(&paths[1], &img).unwrap();
    write_labels(&paths[2], &lab8).unwrap();
    write_labels(&paths[3], &lab16).unwrap();
    write_field(&paths[4], &field, FieldUnits::Mm).unwrap();
    write_field(&paths[5], &field, FieldUnits::Voxel).unwrap();
    write_npy_field(&paths[6], &field).unwrap();
    let refs: Vec<&Path> = paths.iter().map(|p| p.as_path()).collect();
    let all = nibabel_view(&refs);
    let get = |p: &PathBuf| &all[p.to_str().unwrap()];

    for (p, g, dtype) in [
        (&paths[0], &sheared, "float32"),
        (&paths[1], &sheared, "float32"),
        (&paths[2], &rigid, "uint8"),
        (&paths[3], &rigid, "uint16"),
    ] {
        let v = get(p);
        let name = p.file_name().unwrap().to_str().unwrap();
        assert_eq!(v["shape"], serde_json::json!([6, 5, 4]), "{name}");
        assert_eq!(v["dtype"], dtype, "{name}");
        check_affine(name, &v["affine"], g);
        assert_eq!((v["sform_code"].as_i64(), v["qform_code"].as_i64()), (Some(1), Some(1)), "{name}");
        assert_eq!(v["xyzt_units"], 2, "{name}: mm");
        assert_eq!(v["vox_offset"], 352.0);
        assert_eq!(v["slope_inter"], serde_json::json!([1.0, 0.0]));
        let sp = g.spacing();
        let pix = f64s(&v["pixdim"]);
        for a in 0..3 {
            assert!(approx::abs_diff_eq!(pix[a + 1], sp[a], epsilon = 1e-5), "{name}: pixdim");
        }
    }
    // Values in C order of (i, j, k) = our standard layout.
    assert_eq!(f32s(&get(&paths[0])["data"]), img.as_slice());
    assert_eq!(f64s(&get(&paths[3])["data"]), lab16.as_slice().iter().map(|&x| x as f64).collect::<Vec<_>>());
    assert_eq!(f64s(&get(&paths[2])["data"]), lab8.as_slice().iter().map(|&x| x as f64).collect::<Vec<_>>());

    // Rigid grid: the qform is the same map (qfac −1 for the mirrored k axis).
    let lab = get(&paths[2]);
    check_affine("lab8 qform", &lab["qform"], &rigid);
    assert_eq!(f64s(&lab["pixdim"])[0], -1.0);
    // Sheared grid: the sform is exact, the qform is rigid (orthonormal columns after
    // dividing by pixdim) — the nearest rigid map.
    let q = rows(&get(&paths[0])["qform"]);
    let pix = f64s(&get(&paths[0])["pixdim"]);
    for c1 in 0..3 {
        for c2 in 0..3 {
            let dot: f64 = (0..3).map(|r| q[r][c1] / pix[c1 + 1] * q[r][c2] / pix[c2 + 1]).sum();
            assert!(
                approx::abs_diff_eq!(dot, if c1 == c2 { 1.0 } else { 0.0 }, epsilon = 1e-5),
                "qform not rigid: {q:?}"
            );
        }
    }

    // Fields: (nx, ny, nz, 1, 3) float32, intent 1006, units in intent_name; values in C order
    // of (i, j, k, 1, c), component c of voxel n at n·3 + c. In mm the vector is nibabel's
    // affine applied to the voxel vector, m_r = Σ_c A[r][c]·u_c (the header stores float32).
    let voxels: Vec<[f64; 3]> =
        (0..rigid.len()).map(|n| std::array::from_fn(|c| field.component(c)[n] as f64)).collect();
    for (p, units) in [(&paths[4], "sinew-mm"), (&paths[5], "sinew-vox")] {
        let v = get(p);
        assert_eq!(v["shape"], serde_json::json!([6, 5, 4, 1, 3]));
        assert_eq!(v["dtype"], "float32");
        assert_eq!(v["intent_code"], 1006);
        assert_eq!(v["intent_name"], units);
        check_affine(units, &v["affine"], &rigid);
        let (data, a) = (f64s(&v["data"]), rows(&v["affine"]));
        assert_eq!(data.len(), 3 * voxels.len(), "{units}");
        for (n, u) in voxels.iter().enumerate() {
            for r in 0..3 {
                let got = data[n * 3 + r];
                if units == "sinew-mm" {
                    let want: f64 = (0..3).map(|c| a[r][c] * u[c]).sum();
                    assert_relative_eq!(got, want, epsilon = 1e-5, max_relative = 1e-5);
                } else {
                    assert_eq!(got as f32, u[r] as f32, "{units}: voxel {n} component {r}");
                }
            }
        }
    }
    let npy = get(&paths[6]);
    assert_eq!(npy["shape"], serde_json::json!([6, 5, 4, 3]));
    assert_eq!(npy["dtype"], "<f4");
    assert_eq!(npy["fortran_order"], false);
    let data = f32s(&npy["data"]);
    assert_eq!(data.len(), 3 * voxels.len());
    for (n, u) in voxels.iter().enumerate() {
        assert_eq!(data[n * 3..n * 3 + 3], u.map(|x| x as f32), ".npy: voxel {n}");
    }
}
