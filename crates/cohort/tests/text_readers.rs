//! Seeded mutations of valid tables, manifests and pair lists through the checks of the
//! `text_read` fuzz target (`fuzz/src/text.rs`, included by path): no panic, every error one
//! line naming the file, an accepted table unchanged when written and read again.

#[path = "../../../fuzz/src/text.rs"]
mod text;

use rand::{Rng, SeedableRng};

/// Valid inputs of every reader: a scores table (quoted cells with a comma, a quote and a
/// line break), TOML and CSV manifests, a pair list.
const SEEDS: [&str; 4] = [
    "method,pair,fixed,moving,label,name,dice_before,dice,hd95_mm,hd_mm,assd_mm,folding,sdlogj,jac_min,landmark_mm,runtime_s\n\
     sinew,0,a,b,1,liver,0.5,0.75,1.25,2,0.1,0,0.05,0.9,,1.5\n\
     net,0,a,b,2,\"sp,\"\"l\"\"\neen\",,1e-3,,,,,,,,\n",
    "[[subject]]\nid = \"a\"\nimage = \"a.nii.gz\"\nlabels = \"al.nii.gz\"\n\
     [[subject]]\nid = \"b\"\nimage = \"b.nii.gz\"\nlabels = \"bl.nii.gz\"\nmask = \"m.nii.gz\"\n\
     [[pair]]\nfixed = \"b\"\nmoving = \"a\"\n",
    "id,image,labels,mask\na,a.nii.gz,al.nii.gz,\nb,b.nii.gz,bl.nii.gz,m.nii.gz\n",
    "# pairs\nfixed,moving\na,b\n\nb,a\n",
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
