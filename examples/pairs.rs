//! Inter-subject registration of generated subjects, with parameters from the command line:
//! `cargo run --release --example pairs -- [--seed S] [--n N] [--small] [--variation V] [--noise HU] [--pairs MAX] [KEY=VALUE ...]`
//! registers every pair `i < j` of `N` subjects drawn with seed `S` (moving `j` onto fixed
//! `i`) and prints Dice over the 10 labels, folding and SDlogJ per pair and their means.
//! KEY is any field of the registration parameters (TOML values), e.g. `lambda=0.05`.

use sinew_phantom::{generate, PhantomParams, LABELS};
use sinew_solve::{register, RegParams};
use sinew_testkit::timed;

fn main() {
    let mut seed = 2024u64;
    let mut n = 4usize;
    let mut small = false;
    let mut max_pairs = usize::MAX;
    let mut variation = 1.0f64;
    let mut noise = None;
    let mut params = RegParams::default();
    let mut table = toml::Value::try_from(&params).unwrap();
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        match a.as_str() {
            "--seed" => seed = args.next().unwrap().parse().unwrap(),
            "--n" => n = args.next().unwrap().parse().unwrap(),
            "--pairs" => max_pairs = args.next().unwrap().parse().unwrap(),
            "--small" => small = true,
            "--variation" => variation = args.next().unwrap().parse().unwrap(),
            "--noise" => noise = Some(args.next().unwrap().parse().unwrap()),
            kv => {
                let (k, v) = kv.split_once('=').expect("KEY=VALUE");
                let val: toml::Value =
                    toml::from_str(&format!("x = {v}")).map(|t: toml::Table| t["x"].clone()).unwrap();
                table.as_table_mut().unwrap().insert(k.to_string(), val);
            }
        }
    }
    params = table.try_into().expect("valid parameters");
    let mut pp = if small { PhantomParams::small() } else { PhantomParams::default() };
    pp.variation = variation;
    if let Some(n) = noise {
        pp.noise_hu = n;
    }
    let subjects: Vec<_> = (0..n).map(|s| generate(seed, s, &pp)).collect();
    let labels: Vec<u16> = LABELS.iter().map(|l| l.0).collect();
    let (mut sd, mut sf, mut ss, mut st, mut s0) = (0.0, 0.0, 0.0, 0.0, 0.0);
    let mut count = 0;
    let mut worst_fold: f64 = 0.0;
    let mut per_label = vec![(0.0f64, 0usize); labels.len()];
    'outer: for i in 0..n {
        for j in i + 1..n {
            if count >= max_pairs {
                break 'outer;
            }
            let (f, m) = (&subjects[i], &subjects[j]);
            let (reg, secs) = timed(|| register(&f.image, &m.image, None, &params, &mut |_| {}).unwrap());
            let warped = sinew_transform::warp_labels(&m.labels, &reg.field).unwrap();
            let d = sinew_score::dice_per_label(&f.labels, &warped, &labels).unwrap();
            let d0 = sinew_score::dice_per_label(&f.labels, &m.labels, &labels).unwrap();
            let dm = sinew_score::mean_dice(&d).unwrap();
            let dm0 = sinew_score::mean_dice(&d0).unwrap();
            let det = sinew_transform::jacobian_determinant(&reg.field);
            let js = sinew_transform::jacobian_stats(&det, None);
            let its: Vec<usize> = reg.levels.iter().map(|l| l.iterations).collect();
            println!(
                "pair {i}-{j}: dice {dm0:.3} -> {dm:.4}  folding {:.4} %  sdlogj {:.3}  {secs:.2} s (affine {:.2} s)  iterations {its:?}",
                100.0 * js.folding_fraction,
                js.sd_log_j,
                reg.affine_s
            );
            for (acc, (_, v)) in per_label.iter_mut().zip(&d) {
                if let Some(v) = v {
                    acc.0 += v;
                    acc.1 += 1;
                }
            }
            sd += dm;
            s0 += dm0;
            sf += 100.0 * js.folding_fraction;
            ss += js.sd_log_j;
            st += secs;
            worst_fold = worst_fold.max(100.0 * js.folding_fraction);
            count += 1;
        }
    }
    let c = count as f64;
    println!(
        "MEAN over {count} pairs: dice {:.3} -> {:.4}  folding {:.4} % (max {worst_fold:.3} %)  sdlogj {:.3}  {:.2} s",
        s0 / c,
        sd / c,
        sf / c,
        ss / c,
        st / c
    );
    let names: Vec<String> = LABELS
        .iter()
        .zip(&per_label)
        .map(|((_, name), (s, k))| format!("{name} {:.3}", s / (*k).max(1) as f64))
        .collect();
    println!("per label: {}", names.join("  "));
}
