//! Known-deformation recovery on a demo subject, with parameters from the command line:
//! `cargo run --release --example recover -- [MAX_MM] [KEY=VALUE ...]` where KEY is any
//! field of the registration parameters (TOML values), e.g. `lambda=0.5 iterations=[80,60,40]`.
//! Prints the mean and 95th-percentile endpoint error over the body and the time per level.

use sinew_phantom::{generate, PhantomParams};
use sinew_solve::{register, RegParams};
use sinew_testkit::{endpoint_error, endpoint_errors, timed, KnownWarp};

fn main() {
    let mut args = std::env::args().skip(1);
    let max_mm: f64 = args.next().map_or(15.0, |a| a.parse().expect("MAX_MM is a number"));
    let mut params = RegParams::default();
    let mut table = toml::Value::try_from(&params).unwrap();
    for kv in args {
        let (k, v) = kv.split_once('=').expect("KEY=VALUE");
        let val: toml::Value = toml::from_str(&format!("x = {v}")).map(|t: toml::Table| t["x"].clone()).unwrap();
        table.as_table_mut().unwrap().insert(k.to_string(), val);
    }
    params = table.try_into().expect("valid parameters");
    let subject = generate(11, 0, &PhantomParams::default());
    let case = KnownWarp::new(subject.image, max_mm, 0.0);
    let (reg, secs) = timed(|| register(&case.fixed, &case.moving, None, &params, &mut |_| {}).unwrap());
    let labels = case.on_fixed(&subject.labels);
    let mut per_label = std::collections::BTreeMap::<u16, (f64, usize)>::new();
    for (&l, e) in labels.as_slice().iter().zip(endpoint_errors(&reg.field, &case.truth)) {
        let s = per_label.entry(l).or_default();
        s.0 += e;
        s.1 += 1;
    }
    let per: Vec<String> = per_label.iter().map(|(l, (s, c))| format!("{l}:{:.2}", s / *c as f64)).collect();
    println!("EPE by label (mm): {}", per.join(" "));
    let (mean, p95) = endpoint_error(&reg.field, &case.truth, &labels);
    let det = sinew_transform::jacobian_determinant(&reg.field);
    let st = sinew_transform::jacobian_stats(&det, None);
    for l in &reg.levels {
        println!(
            "level {} {:?}: {} it, D {:.5}->{:.5} R {:.5}, desc {:.2}s opt {:.2}s",
            l.level,
            l.shape,
            l.iterations,
            l.energy_start.data,
            l.energy_end.data,
            l.energy_end.diffusion,
            l.descriptors_s,
            l.optimise_s
        );
    }
    println!(
        "max {max_mm} mm: EPE mean {mean:.3} p95 {p95:.3} mm; folding {:.5} sdlogj {:.3}; register {secs:.2} s",
        st.folding_fraction, st.sd_log_j
    );
}
