//! Times the generation of one default-size demo subject (144 × 112 × 192 voxels of 2 mm).
//!
//! `cargo run --release -p sinew-phantom --example phantom_timing` prints the median of three
//! runs (after one warm-up) and the label volumes of the subject.

use sinew_phantom::{generate, PhantomParams, LABELS};
use sinew_testkit::time_runs;

fn main() {
    let p = PhantomParams::default();
    let threads = rayon::current_num_threads();
    let mut last = None;
    let mut run = 0;
    let (median, times) = time_runs(3, || {
        last = Some(generate(7, run, &p));
        run += 1;
    });
    let s = last.expect("three runs");
    println!(
        "{:?} voxels at {:?} mm, {threads} threads: median {median:.3} s per subject (runs {times:?})",
        p.shape, p.spacing
    );
    let ml = p.spacing.iter().product::<f64>() / 1000.0;
    for (l, n) in s.labels.label_counts() {
        let name = LABELS.iter().find(|e| e.0 == l).map_or("air", |e| e.1);
        println!("  {l:>2} {name:<13} {:>8.1} ml", n as f64 * ml);
    }
}
