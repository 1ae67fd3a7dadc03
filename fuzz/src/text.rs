//! What must hold when the cohort's text readers are given arbitrary bytes.
//!
//! The same bytes go through the `scores.csv` reader, the manifest reader (as TOML and as CSV),
//! the pair-list reader and the landmark reader. No reader may panic; every error must be one line naming the file
//! (printed as the command line prints it: the error and its sources joined by ": "); and a
//! table that is accepted must come back unchanged when written and read again.

use std::path::Path;

use sinew_cohort::{manifest, parse_landmarks, table};

/// The error as `sinew` prints it: the message and each source, joined by ": ".
fn printed(e: &dyn std::error::Error) -> String {
    let mut s = e.to_string();
    let mut source = e.source();
    while let Some(inner) = source {
        s.push_str(": ");
        s.push_str(&inner.to_string());
        source = inner.source();
    }
    s
}

fn one_line_naming(e: &dyn std::error::Error, name: &str) {
    let text = printed(e);
    assert!(!text.contains('\n'), "{name}: error over several lines: {text:?}");
    assert!(text.contains(name), "{name}: error does not name the file: {text:?}");
}

/// Runs every text reader on `data` and checks the properties above (panics when one fails).
pub fn check_text(data: &[u8]) {
    let scores = Path::new("fuzz-scores.csv");
    match table::parse_csv(scores, data) {
        Ok(rows) => {
            // An accepted table round-trips: written canonically, read back, the same rows.
            let mut sorted = rows.clone();
            table::sort_rows(&mut sorted);
            let again = table::parse_csv(scores, table::to_csv(&rows).as_bytes())
                .unwrap_or_else(|e| panic!("a written table is refused: {}", printed(&e)));
            assert_eq!(again, sorted, "a table changed when written and read again");
        }
        Err(e) => one_line_naming(&e, "fuzz-scores.csv"),
    }
    let Ok(text) = std::str::from_utf8(data) else { return };
    for name in ["fuzz-manifest.toml", "fuzz-manifest.csv"] {
        if let Err(e) = manifest::parse_manifest(text, Path::new(name)) {
            one_line_naming(&e, name);
        }
    }
    if let Err(e) = manifest::parse_pair_list(text, Path::new("fuzz-pairs.csv")) {
        one_line_naming(&e, "fuzz-pairs.csv");
    }
    if let Err(e) = parse_landmarks(text, Path::new("fuzz-landmarks.csv")) {
        one_line_naming(&e, "fuzz-landmarks.csv");
    }
}
