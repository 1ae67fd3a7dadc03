//! Seeded mutations of valid tables, manifests and pair lists through the checks of the
//! `text_read` fuzz target (`fuzz/src/text.rs`, included by path): no panic, every error one
//! line naming the file, an accepted table unchanged when written and read again.

#[path = "../../../fuzz/src/text.rs"]
mod text;

use rand::{Rng, SeedableRng};

/// Valid inputs of every reader, the `text_read` fuzz target's seed corpus
/// (`fuzz/corpus/text_read/`): a scores table (quoted cells with a comma, a quote and a line
/// break), TOML and CSV manifests, a pair list, landmarks (a quoted name with a comma).
const SEEDS: [&str; 5] = [
    include_str!("../../../fuzz/corpus/text_read/scores.csv"),
    include_str!("../../../fuzz/corpus/text_read/manifest.toml"),
    include_str!("../../../fuzz/corpus/text_read/manifest.csv"),
    include_str!("../../../fuzz/corpus/text_read/pairs.csv"),
    include_str!("../../../fuzz/corpus/text_read/landmarks.csv"),
];

#[test]
fn the_seeds_are_accepted_and_round_trip() {
    let rows = sinew_cohort::table::parse_csv(std::path::Path::new("s.csv"), SEEDS[0].as_bytes()).unwrap();
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[1].name, "sp,\"l\"\neen");
    for seed in SEEDS {
        text::check_text(seed.as_bytes());
    }
}

#[test]
fn mutated_inputs_keep_the_properties() {
    // Byte flips, insertions of the CSV/TOML delimiters and truncations (fixed seed).
    let n: usize = std::env::var("SINEW_MUTATIONS").ok().and_then(|v| v.parse().ok()).unwrap_or(300);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(17);
    let specials = b",\"\n\r#[]=\\ \t0.-eNa";
    for i in 0..n {
        let mut bytes = SEEDS[i % SEEDS.len()].as_bytes().to_vec();
        for _ in 0..rng.gen_range(1..4) {
            let at = rng.gen_range(0..bytes.len().max(1));
            match rng.gen_range(0..4) {
                0 if at < bytes.len() => bytes[at] = rng.gen(),
                1 => bytes.insert(at.min(bytes.len()), specials[rng.gen_range(0..specials.len())]),
                2 if at < bytes.len() => {
                    bytes.remove(at);
                }
                _ => bytes.truncate(at),
            }
        }
        text::check_text(&bytes);
    }
}

#[test]
fn fuzz_regressions_keep_the_properties() {
    // Every input that ever broke a property of the `text_read` target, kept in
    // `fuzz/regressions/text_read/` (the first: a pair list whose header cell held a line
    // break, reported over two lines).
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz/regressions/text_read");
    let mut n = 0;
    for entry in std::fs::read_dir(&dir).unwrap_or_else(|e| panic!("{}: {e}", dir.display())) {
        let bytes = std::fs::read(entry.unwrap().path()).unwrap();
        text::check_text(&bytes);
        n += 1;
    }
    assert!(n >= 1, "no regression inputs in {}", dir.display());
}
