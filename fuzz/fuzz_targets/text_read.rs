//! libFuzzer target: arbitrary bytes through the cohort's text readers (`scores.csv` tables,
//! manifests in TOML and CSV, pair lists, landmarks); see `sinew_fuzz::check_text`.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    sinew_fuzz::check_text(data);
});
