//! Times one evaluation of the fused objective kernel (12 channels) at two sizes:
//! `cargo run -p sinew-solve --release --example bench_kernel`. Prints the median of 7 runs
//! after one warm-up.

use sinew_solve::kernel::Problem;
use sinew_testkit::time_runs;

fn main() {
    let small_only = std::env::args().any(|a| a == "--small");
    let shapes: &[[usize; 3]] = if small_only { &[[72, 56, 96]] } else { &[[72, 56, 96], [144, 112, 192]] };
    for &shape in shapes {
        let n: usize = shape.iter().product();
        let c = 12;
        let fixed: Vec<f32> = (0..n * c).map(|i| ((i as f32) * 0.013).sin() * 0.5 + 0.5).collect();
        let moving: Vec<f32> = (0..n * c).map(|i| ((i as f32) * 0.011).cos() * 0.5 + 0.5).collect();
        let u: Vec<f32> = (0..3 * n).map(|i| ((i as f32) * 0.001).sin() * 2.0).collect();
        let mut g = vec![0.0f32; 3 * n];
        let mut sums = Vec::new();
        let p = Problem {
            shape,
            spacing: [2.0; 3],
            stride: 1,
            desc_shape: shape,
            channels: c,
            fixed: &fixed,
            moving: &moving,
            mask: None,
            lambda: 0.1,
        };
        let (med, _) = time_runs(7, || {
            std::hint::black_box(p.evaluate(&u, &mut g, &mut sums));
        });
        println!(
            "{shape:?}: {:.1} ms per evaluation, {:.1} ns per voxel ({} threads)",
            med * 1e3,
            med * 1e9 / n as f64,
            rayon::current_num_threads()
        );
    }
}
