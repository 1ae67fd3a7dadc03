//! Times warping, the Jacobian determinant and its statistics on 144×112×192 (median of 5
//! runs after one warm-up).
//!
//! `cargo run -p sinew-transform --release --example bench_transform [-- THREADS]`

use sinew_grid::{Border, Field, Grid, Image, LabelMap};
use sinew_testkit::{thread_pool_from_args, time_runs};
use sinew_transform::{jacobian_determinant, jacobian_stats, warp_image_into, warp_labels};

/// The median seconds of 5 runs of `f` after one warm-up.
fn median_secs(f: impl FnMut()) -> f64 {
    time_runs(5, f).0
}

fn main() {
    let pool = thread_pool_from_args();
    let shape = [144, 112, 192];
    let grid = Grid::axis_aligned(shape, [2.0; 3], [0.0; 3]);
    let mut img = Image::filled(grid.clone(), 0.0);
    let mut lab = LabelMap::filled(grid.clone(), 0);
    for ((i, j, k), v) in img.data.indexed_iter_mut() {
        *v = 300.0 * ((i as f32 * 0.1).sin() + (j as f32 * 0.13).cos() * (k as f32 * 0.07).sin());
        lab.data[[i, j, k]] = ((i / 20 + j / 25 + k / 30) % 9) as u16;
    }
    let mut f = Field::zeros(grid.clone());
    for (c, comp) in f.components_mut().into_iter().enumerate() {
        for (n, v) in comp.iter_mut().enumerate() {
            let (i, j, k) = (n / (112 * 192), (n / 192) % 112, n % 192);
            *v = 4.0 * ((i as f32 * 0.05 + c as f32).sin() * (j as f32 * 0.04).cos() + (k as f32 * 0.03).sin());
        }
    }
    let mut out = Image::filled(grid.clone(), 0.0);
    pool.install(|| {
        let n = pool.current_num_threads();
        let w = median_secs(|| warp_image_into(&img, &f, Border::Nearest, &mut out).unwrap());
        println!("warp_image {shape:?} threads={n}: median {w:.3} s");
        let l = median_secs(|| {
            std::hint::black_box(warp_labels(&lab, &f).unwrap());
        });
        println!("warp_labels {shape:?} threads={n}: median {l:.3} s");
        let j = median_secs(|| {
            std::hint::black_box(jacobian_determinant(&f));
        });
        println!("jacobian_determinant {shape:?} threads={n}: median {j:.3} s");
        let det = jacobian_determinant(&f);
        let s = median_secs(|| {
            std::hint::black_box(jacobian_stats(&det, None));
        });
        println!("jacobian_stats {shape:?} threads={n}: median {s:.3} s");
    });
}
