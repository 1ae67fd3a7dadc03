//! Times the generation of one default-size demo subject (144 × 112 × 192 voxels of 2 mm).
//!
//! `cargo run --release -p sinew-phantom --example phantom_timing` prints the median of three
//! runs and the label volumes of the subject.

use std::time::Instant;

use sinew_phantom::{generate, PhantomParams, LABELS};

fn main() {
    let p = PhantomParams::default();
    let threads = rayon::current_num_threads();
    let mut times = Vec::new();
    let mut last = None;
    for run in 0..3 {
        let t = Instant::now();
        let s = generate(7, run, &p);
        times.push(t.elapsed().as_secs_f64());
        last = Some(s);
    }
    times.sort_by(|a, b| a.total_cmp(b));
    let s = last.expect("three runs");
    println!(
        "{:?} voxels at {:?} mm, {threads} threads: median {:.3} s per subject (runs {:?})",
        p.shape, p.spacing, times[1], times
    );
    let ml = p.spacing.iter().product::<f64>() / 1000.0;
    for (l, n) in s.labels.label_counts() {
        let name = LABELS.iter().find(|e| e.0 == l).map_or("air", |e| e.1);
        println!("  {l:>2} {name:<13} {:>8.1} ml", n as f64 * ml);
    }
}
