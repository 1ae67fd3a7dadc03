//! Seeded mutations of the two text inputs sinew reads besides images, through the binary: a
//! `--config` parameter file (TOML, `sinew register`) and a `scores.csv` table (`sinew cohort
//! merge`). The stable-Rust counterpart, for these readers, of the NIfTI fuzzing in `fuzz/` and
//! `crates/io/tests/mutations.rs` (same fixed SplitMix64 sequence, so every run sees the same
//! inputs).
//!
//! Properties, for every mutated input:
//! - the process ends with exit code 0 or 2, never a panic (101) or a signal;
//! - a failure is ONE line on stderr that names the offending file and leaves no output behind;
//! - config: the scans do not exist, so every run fails; a config that is accepted must fail on
//!   the missing fixed scan instead (and a share of them must, or the mutations only exercise
//!   the TOML parser);
//! - table: an accepted table is written back; merging that output again gives the same bytes
//!   (what the writer writes, the reader reads back unchanged).
//!
//! `SINEW_MUTATIONS=<n>` sets the number of mutated inputs per reader (default 300, a few
//! seconds).

use std::path::Path;
use std::process::Output;

use sinew_testkit::{listing, Sinew, SplitMix64};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

fn mutations() -> usize {
    std::env::var("SINEW_MUTATIONS").ok().and_then(|v| v.parse().ok()).unwrap_or(300)
}

/// Exit code 2 and one stderr line naming `culprit` (or one of `or_names`); returns the line.
#[track_caller]
fn one_line_error(out: &Output, input: &str, names: &[&str]) -> String {
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "exit {:?} on input:\n{input}\nstderr: {stderr}", out.status);
    let lines: Vec<&str> = stderr.lines().filter(|l| !l.trim().is_empty()).collect();
    assert_eq!(lines.len(), 1, "not one line on stderr for input:\n{input}\n{stderr}");
    assert!(!lines[0].contains("panicked"), "{}", lines[0]);
    assert!(names.iter().any(|n| lines[0].contains(n)), "{:?} names none of {names:?}; input:\n{input}", lines[0]);
    lines[0].to_string()
}

// ---------------------------------------------------------------- parameter files

/// A parameter file with every key (values from the README's parameter table).
const FULL_CONFIG: &str = "levels = 4
finest_level = 1
strides = [2, 2, 1]
iterations = [60, 40, 20]
step_size = [1.0, 0.8, 0.5]
lambda = 0.5
optimiser = \"adam\"
similarity = \"mind-ssc\"
mind_radius = 1
mind_dilation = 2
ncc_sigma = 3.0
tolerance = 0.0
diffeomorphic = false
field_sigma = 0.5
update_sigma = 0.0
model = \"dense\"
grid_spacing_mm = 10.0
bending = 0.0
affine = \"none\"
";

const KEYS: [&str; 19] = [
    "levels",
    "finest_level",
    "strides",
    "iterations",
    "step_size",
    "lambda",
    "optimiser",
    "similarity",
    "mind_radius",
    "mind_dilation",
    "ncc_sigma",
    "tolerance",
    "diffeomorphic",
    "field_sigma",
    "update_sigma",
    "model",
    "grid_spacing_mm",
    "bending",
    "affine",
];

const TOML_VALUES: [&str; 22] = [
    "[]",
    "[0]",
    "[1, 2, 3, 4, 5, 6, 7, 8, 9]",
    "[-1]",
    "[nan]",
    "-1",
    "0",
    "1",
    "9",
    "nan",
    "inf",
    "-inf",
    "1e309",
    "18446744073709551616",
    "\"x\"",
    "\"lbfgs\"",
    "\"bspline\"",
    "\"affine\"",
    "true",
    "{}",
    "[[1]]",
    "\"\"\"",
];

fn mutate_config(rng: &mut SplitMix64, seed: &str) -> String {
    let mut lines: Vec<String> = seed.lines().map(str::to_string).collect();
    for _ in 0..1 + rng.below(3) {
        let n = lines.len();
        match rng.below(8) {
            // Another value for a key.
            0 | 1 if n > 0 => {
                let i = rng.below(n);
                let key = lines[i].split('=').next().unwrap_or("").trim().to_string();
                lines[i] = format!("{key} = {}", rng.pick(&TOML_VALUES));
            }
            // A key with any value (possibly repeated, possibly unknown).
            2 => {
                let key = if rng.below(8) == 0 { "no_such_key" } else { rng.pick(&KEYS) };
                lines.insert(rng.below(n + 1), format!("{key} = {}", rng.pick(&TOML_VALUES)));
            }
            3 if n > 0 => {
                lines.remove(rng.below(n));
            }
            // A table header, or a stray token.
            4 => lines.insert(rng.below(n + 1), rng.pick(&["[levels]", "[[x]]", "=", "levels", "# c", "\u{0}"]).into()),
            // Byte-level damage inside a line (kept valid UTF-8 by working on chars).
            5 if n > 0 => {
                let i = rng.below(n);
                let mut chars: Vec<char> = lines[i].chars().collect();
                if !chars.is_empty() {
                    let at = rng.below(chars.len());
                    match rng.below(3) {
                        0 => {
                            chars.remove(at);
                        }
                        1 => chars.insert(at, ['"', '[', ']', '=', ',', '.', '-', 'é'][rng.below(8)]),
                        _ => chars.truncate(at),
                    }
                }
                lines[i] = chars.into_iter().collect();
            }
            // Truncation of the whole file.
            6 if n > 0 => lines.truncate(rng.below(n)),
            _ => {}
        }
    }
    let mut text = lines.join("\n");
    if rng.below(2) == 0 {
        text.push('\n');
    }
    text
}

/// Command-line flags that clap accepts (numbers of the right type), so that every failure
/// comes from the parameter check, not from argument parsing.
fn level_flags(rng: &mut SplitMix64) -> Vec<String> {
    let mut f = Vec::new();
    if rng.below(2) == 0 {
        f.push(format!("--levels={}", rng.below(10)));
    }
    if rng.below(3) == 0 {
        f.push(format!("--finest-level={}", rng.below(4)));
    }
    if rng.below(4) == 0 {
        let n = 1 + rng.below(4);
        f.push(format!("--iterations={}", vec!["3"; n].join(",")));
    }
    if rng.below(4) == 0 {
        f.push(format!("--lambda={}", ["0", "0.5", "-1", "NaN"][rng.below(4)]));
    }
    f
}

#[test]
fn seeded_config_mutations() {
    let dir = sinew_testkit::tempdir();
    let example =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("../../examples/bspline.toml")).unwrap();
    let seeds = [FULL_CONFIG.to_string(), example, "lambda = 0.3\n".to_string(), String::new()];
    // The scans do not exist: every run stops before any registration work.
    let (fixed, moving, out) =
        (dir.path().join("absent_fixed.nii"), dir.path().join("absent_moving.nii"), dir.path().join("out"));
    let cfg = dir.path().join("params.toml");
    // The seeds themselves are valid: the run fails on the missing fixed scan.
    let register: [&std::ffi::OsStr; 9] = [
        "register".as_ref(),
        "-f".as_ref(),
        fixed.as_os_str(),
        "-m".as_ref(),
        moving.as_os_str(),
        "-o".as_ref(),
        out.as_os_str(),
        "--config".as_ref(),
        cfg.as_os_str(),
    ];
    for s in &seeds {
        std::fs::write(&cfg, s).unwrap();
        one_line_error(&SINEW.run(register), s, &["absent_fixed.nii"]);
    }
    let before = listing(dir.path());
    let mut rng = SplitMix64(0xC0F1_6000_5EED);
    let (n, mut accepted) = (mutations(), 0);
    for _ in 0..n {
        let seed = &seeds[rng.below(seeds.len())];
        let text = mutate_config(&mut rng, seed);
        std::fs::write(&cfg, &text).unwrap();
        let flags = level_flags(&mut rng);
        let args = register.into_iter().chain(flags.iter().map(std::ffi::OsStr::new));
        let shown = format!("{text}\n(flags {flags:?})");
        let line = one_line_error(&SINEW.run(args), &shown, &["params.toml", "absent_fixed.nii"]);
        if line.contains("absent_fixed.nii") {
            accepted += 1;
        }
        assert_eq!(listing(dir.path()), before, "a run left files behind; input:\n{shown}");
    }
    assert!(n < 100 || accepted > n / 20, "only {accepted} of {n} mutated configs were accepted");
    assert!(n < 100 || accepted < n, "every mutated config was accepted: the mutations do nothing");
    eprintln!("{n} mutated configs, {accepted} accepted");
}

// ---------------------------------------------------------------- score tables

const HEADER: &str =
    "method,pair,fixed,moving,label,name,dice_before,dice,hd95_mm,hd_mm,assd_mm,folding,sdlogj,jac_min,landmark_mm,runtime_s";

/// A table with quoted cells (comma, doubled quote), empty cells and two methods.
fn seed_table() -> String {
    let rows = [
        "affine,0,subject_00,subject_01,1,liver,0.61,0.61,9.5,14,3.2,,,,,",
        "sinew,0,subject_00,subject_01,1,liver,0.61,0.83,4.1,8,1.2,0,0.09,0.41,,1.9",
        "sinew,0,subject_00,subject_01,2,\"spleen, tip\",0.5,0.79,5,9,2.25,0,0.09,0.41,,1.9",
        "sinew,1,subject_00,\"sub\"\"02\",1,liver,0.4,0.7,6,11,2.5,0.0001,0.12,-0.05,3.5,2.1",
        "net,1,subject_00,\"sub\"\"02\",1,liver,,0.75,5.5,10,2,0.002,0.2,-0.3,,",
    ];
    format!("{HEADER}\n{}\n", rows.join("\n"))
}

const CELL_VALUES: [&str; 20] = [
    "",
    "NaN",
    "inf",
    "-1",
    "1e400",
    "x",
    "\"",
    "\"open",
    "\"a,b\"",
    "\"q\"\"q\"",
    "18446744073709551616",
    "65536",
    "0.5",
    "7",
    "-0",
    "1e-320",
    " 0.5",
    "0x10",
    "é",
    "\"line\nbreak\"",
];

fn mutate_table(rng: &mut SplitMix64, seed: &str) -> String {
    let mut rows: Vec<Vec<String>> = seed.lines().map(|l| l.split(',').map(str::to_string).collect()).collect();
    for _ in 0..1 + rng.below(3) {
        let n = rows.len();
        match rng.below(9) {
            0..=2 if n > 1 => {
                let r = 1 + rng.below(n - 1);
                let c = rng.below(rows[r].len());
                rows[r][c] = rng.pick(&CELL_VALUES).to_string();
            }
            3 if n > 1 => {
                let r = 1 + rng.below(n - 1);
                let c = rng.below(rows[r].len());
                if rng.below(2) == 0 {
                    rows[r].remove(c);
                } else {
                    rows[r].insert(c, String::new());
                }
            }
            // A repeated row: identical (collapses) or with a changed figure (a conflict).
            4 if n > 1 => {
                let mut r = rows[1 + rng.below(n - 1)].clone();
                if rng.below(2) == 0 {
                    let c = 6 + rng.below(10);
                    if c < r.len() {
                        r[c] = "0.25".into();
                    }
                }
                rows.push(r);
            }
            5 if n > 0 => {
                rows.remove(rng.below(n));
            }
            6 => rows.insert(rng.below(n + 1), vec![String::new()]),
            7 if n > 0 => {
                let r = rng.below(n);
                let c = rng.below(rows[r].len());
                rows[r][c].push_str(rng.pick(&["\r", "\"", ",", " ", "\u{feff}"]));
            }
            8 => rows.truncate(rng.below(n + 1)),
            _ => {}
        }
    }
    let mut text: String = rows.iter().map(|r| r.join(",") + "\n").collect();
    if rng.below(8) == 0 {
        text = text.replace('\n', "\r\n");
    }
    text
}

#[test]
fn seeded_table_mutations() {
    let dir = sinew_testkit::tempdir();
    let table = dir.path().join("scores_in.csv");
    let (out, again) = (dir.path().join("merged"), dir.path().join("again"));
    let merge = |input: &Path, into: &Path| {
        SINEW.cmd().args(["cohort", "merge"]).arg(input).arg("--out").arg(into).output().unwrap()
    };
    let mut rng = SplitMix64(0x7AB1_E000_5EED);
    let (n, mut accepted) = (mutations(), 0);
    for t in 0..=n {
        // The seed itself first: it must be accepted.
        let text = if t == 0 { seed_table() } else { mutate_table(&mut rng, &seed_table()) };
        std::fs::write(&table, &text).unwrap();
        let o = merge(&table, &out);
        match o.status.code() {
            Some(0) => {
                accepted += 1;
                let first = std::fs::read(out.join("scores.csv")).unwrap();
                let o2 = merge(&out.join("scores.csv"), &again);
                assert!(o2.status.success(), "sinew's own table is refused: {}", String::from_utf8_lossy(&o2.stderr));
                let second = std::fs::read(again.join("scores.csv")).unwrap();
                assert!(first == second, "merging the merged table changed it; input:\n{text}");
            }
            _ => {
                assert!(t > 0, "the seed table is refused: {}", String::from_utf8_lossy(&o.stderr));
                one_line_error(&o, &text, &["scores_in.csv"]);
                assert!(!out.exists(), "a refused merge left {} behind; input:\n{text}", out.display());
            }
        }
        for d in [&out, &again] {
            if d.exists() {
                std::fs::remove_dir_all(d).unwrap();
            }
        }
    }
    assert!(n < 100 || accepted > n / 20, "only {accepted} of {n} mutated tables were accepted");
    assert!(n < 100 || accepted < n, "every mutated table was accepted: the mutations do nothing");
    eprintln!("{n} mutated tables, {accepted} accepted");
}
