//! Temporary folders and what is in them.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

/// A new temporary folder, removed when the value is dropped.
pub fn tempdir() -> tempfile::TempDir {
    tempfile::tempdir().expect("a temporary folder")
}

/// Every path under `dir` (files and folders, recursively, hidden ones included), relative to
/// it and sorted. A folder that disappears while it is listed (a running command may remove
/// its staging folder) is passed over; a missing `dir` gives an empty listing.
pub fn listing(dir: &Path) -> BTreeSet<PathBuf> {
    let mut out = BTreeSet::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&d) else { continue };
        for e in entries.flatten() {
            let p = e.path();
            if p.is_dir() {
                stack.push(p.clone());
            }
            out.insert(p.strip_prefix(dir).unwrap().to_path_buf());
        }
    }
    out
}

/// A CSV table (header first) as rows of cells, read by the `csv` crate, without the
/// columns whose header ends in `_s` (wall times, which differ between runs).
pub fn table_without_times(path: &Path) -> Vec<Vec<String>> {
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(false)
        .from_path(path)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let rows: Vec<csv::StringRecord> =
        rdr.records().collect::<Result<_, _>>().unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let keep: Vec<bool> = rows.first().map_or(Vec::new(), |h| h.iter().map(|c| !c.ends_with("_s")).collect());
    rows.iter()
        .map(|r| {
            assert_eq!(
                r.len(),
                keep.len(),
                "{}: a row of {} cells under a header of {}",
                path.display(),
                r.len(),
                keep.len()
            );
            r.iter().zip(&keep).filter(|(_, k)| **k).map(|(c, _)| c.to_string()).collect()
        })
        .collect()
}
