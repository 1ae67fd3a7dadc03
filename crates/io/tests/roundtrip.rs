//! sinew writes, sinew reads back: exact for data, f32-exact for the affine.

use std::path::Path;

use ndarray::Array3;
use sinew_grid::{Affine, Field, Grid, Image, LabelMap, Volume};
use sinew_io::*;

fn oblique_grid() -> Grid {
    // A rotation about z by 30° with a mirrored third axis and anisotropic spacing.
    let (s, c) = 30f64.to_radians().sin_cos();
    let lin = [[c * 0.8, -s * 1.1, 0.0], [s * 0.8, c * 1.1, 0.0], [0.0, 0.0, -2.5]];
    Grid::new([5, 4, 3], Affine::from_parts(lin, [-10.5, 20.25, 7.0])).unwrap()
}

fn f32_affine(g: &Grid) -> [[f64; 4]; 3] {
    g.affine().m.map(|r| r.map(|v| v as f32 as f64))
}

fn check_image_round_trip(path: &Path) {
    let g = oblique_grid();
    let data = Array3::from_shape_fn((5, 4, 3), |(i, j, k)| (100 * i + 10 * j + k) as f32 - 0.5);
    let img = Image::new(g.clone(), data).unwrap();
    write_image(path, &img).unwrap();
    let back = read_image(path).unwrap();
    assert_eq!(back.data, img.data);
    assert_eq!(back.grid.affine().m, f32_affine(&g));
    let h = read_header(path).unwrap();
    assert_eq!(h.affine_source, AffineSource::Sform);
    assert_eq!(h.datatype, DataType::F32);
    assert_eq!(h.dims, vec![5, 4, 3]);
}

#[test]
fn image_round_trip_plain_and_gz() {
    let dir = tempfile::tempdir().unwrap();
    check_image_round_trip(&dir.path().join("a.nii"));
    check_image_round_trip(&dir.path().join("a.nii.gz"));
    let gz = std::fs::read(dir.path().join("a.nii.gz")).unwrap();
    assert_eq!(&gz[..2], &[0x1f, 0x8b]);
}

#[test]
fn labels_pick_smallest_type() {
    let dir = tempfile::tempdir().unwrap();
    let g = oblique_grid();
    for (max, dt) in [(255u16, DataType::U8), (256, DataType::U16), (65535, DataType::U16)] {
        let data =
            Array3::from_shape_fn((5, 4, 3), |(i, j, k)| if (i, j, k) == (4, 3, 2) { max } else { (i + j * k) as u16 });
        let lab = LabelMap::new(g.clone(), data).unwrap();
        let p = dir.path().join(format!("l{max}.nii.gz"));
        write_labels(&p, &lab).unwrap();
        assert_eq!(read_header(&p).unwrap().datatype, dt);
        assert_eq!(read_labels(&p).unwrap().data, lab.data);
    }
}

fn test_field(g: &Grid) -> Field {
    let mut f = Field::zeros(g.clone());
    for (n, v) in f.data.iter_mut().enumerate() {
        *v = ((n as f32) * 0.731).sin() * 3.0;
    }
    f
}

#[test]
fn field_round_trip_both_units() {
    let dir = tempfile::tempdir().unwrap();
    let g = oblique_grid();
    let f = test_field(&g);
    for units in [FieldUnits::Mm, FieldUnits::Voxel] {
        let p = dir.path().join(format!("f-{}.nii.gz", units.as_str()));
        write_field(&p, &f, units).unwrap();
        let h = read_header(&p).unwrap();
        assert_eq!(h.dims, vec![5, 4, 3, 1, 3]);
        assert_eq!(h.intent_code, 1006);
        assert_eq!(h.sinew_field_units(), Some(units));
        // The recorded units win over the option.
        let other = if units == FieldUnits::Mm { FieldUnits::Voxel } else { FieldUnits::Mm };
        let (back, used) = read_field(&p, FieldReadOptions { units: Some(other), ..Default::default() }).unwrap();
        assert_eq!(used, units);
        for (a, b) in back.data.iter().zip(f.data.iter()) {
            assert!(approx::abs_diff_eq!(a, b, epsilon = 1e-5), "{a} vs {b}");
        }
    }
}

#[test]
fn npy_round_trip_and_layouts() {
    let dir = tempfile::tempdir().unwrap();
    let g = oblique_grid();
    let f = test_field(&g);
    let p = dir.path().join("f.npy");
    write_npy_field(&p, &f).unwrap();
    let bytes = std::fs::read(&p).unwrap();
    let hlen = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
    assert_eq!((10 + hlen) % 64, 0, "data aligned to 64 bytes (NEP 1, numpy >= 1.? writes 64)");
    let back = read_npy_field(&p, &g, NpyLayout::ChannelLast).unwrap();
    assert_eq!(back.data, f.data);
    assert!(matches!(read_npy_field(&p, &g, NpyLayout::ChannelFirst), Err(IoError::BadNpy { .. })));
    let wrong = Grid::axis_aligned([5, 4, 4], [1.0; 3], [0.0; 3]);
    assert!(read_npy_field(&p, &wrong, NpyLayout::ChannelLast).is_err());
}

#[test]
fn single_volume_required_for_images() {
    let dir = tempfile::tempdir().unwrap();
    let g = oblique_grid();
    let p = dir.path().join("f.nii");
    write_field(&p, &Field::zeros(g.clone()), FieldUnits::Voxel).unwrap();
    let e = read_image(&p).unwrap_err();
    assert!(matches!(e, IoError::WrongShape { .. }), "{e}");
    let img = Volume::filled(g, 1.0f32);
    let q = dir.path().join("i.nii");
    write_image(&q, &img).unwrap();
    assert!(matches!(read_field(&q, FieldReadOptions::default()), Err(IoError::WrongShape { .. })));
}
