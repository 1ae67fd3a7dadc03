//! Times MIND-SSC on a 144×112×192 volume (median of 5 runs after one warm-up).
//!
//! `cargo run -p sinew-features --release --example bench_mind [-- THREADS]` (default: rayon's).

use sinew_features::{mind_ssc_into, Descriptor, MindParams, MindScratch};
use sinew_grid::{Grid, Image};
use sinew_testkit::{thread_pool_from_args, time_runs};

fn main() {
    let pool = thread_pool_from_args();
    let shape = [144, 112, 192];
    let grid = Grid::axis_aligned(shape, [2.0; 3], [0.0; 3]);
    // A smooth pattern plus seeded noise, CT-like range.
    let mut img = Image::filled(grid.clone(), 0.0);
    let mut s = 1u64;
    for ((i, j, k), v) in img.data.indexed_iter_mut() {
        s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        let noise = (s >> 40) as f32 / (1u64 << 24) as f32;
        *v = 400.0 * ((i as f32 * 0.11).sin() * (j as f32 * 0.07).cos() + (k as f32 * 0.05).sin()) + 30.0 * noise;
    }
    let p = MindParams::default();
    let mut out = Descriptor::zeros(grid);
    let mut scratch = MindScratch::default();
    let (median, times) = pool.install(|| time_runs(5, || mind_ssc_into(&img, &p, &mut out, &mut scratch)));
    println!(
        "mind_ssc {:?} r={} d={} threads={}: median {:.3} s (runs {:?})",
        shape,
        p.radius,
        p.dilation,
        pool.current_num_threads(),
        median,
        times.iter().map(|t| format!("{t:.3}")).collect::<Vec<_>>()
    );
}
