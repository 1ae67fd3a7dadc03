//! Times writing and reading a 144×112×192 image and displacement field (plain and gzip).
//! Run: `cargo run -p sinew-io --release --example io_speed [DIR]`.

use ndarray::Array3;
use sinew_grid::{Field, Grid, Image};
use sinew_io::*;
use sinew_testkit::timed;

fn main() -> Result<(), IoError> {
    let dir = std::env::args().nth(1).map(std::path::PathBuf::from).unwrap_or_else(std::env::temp_dir);
    let grid = Grid::axis_aligned([144, 112, 192], [2.0; 3], [-144.0, -112.0, -192.0]);
    let img = Image::new(
        grid.clone(),
        Array3::from_shape_fn((144, 112, 192), |(i, j, k)| ((i * j + k) % 977) as f32 - 300.0),
    )
    .expect("shape matches");
    let mut field = Field::zeros(grid);
    for (n, v) in field.data.iter_mut().enumerate() {
        *v = ((n % 1013) as f32 * 0.01).sin();
    }
    for ext in ["nii", "nii.gz"] {
        let p = dir.join(format!("sinew_io_speed_img.{ext}"));
        let (written, w) = timed(|| write_image(&p, &img));
        written?;
        let (back, r) = timed(|| read_image(&p));
        let back = back?;
        println!("image {ext:7} write {:6.1} ms  read {:6.1} ms", w * 1e3, r * 1e3);
        assert_eq!(back.data, img.data);
        std::fs::remove_file(&p).ok();
        let p = dir.join(format!("sinew_io_speed_field.{ext}"));
        let (written, w) = timed(|| write_field(&p, &field, FieldUnits::Mm));
        written?;
        let (read, r) = timed(|| read_field(&p, FieldReadOptions::default()));
        read?;
        println!("field {ext:7} write {:6.1} ms  read {:6.1} ms", w * 1e3, r * 1e3);
        std::fs::remove_file(&p).ok();
    }
    Ok(())
}
