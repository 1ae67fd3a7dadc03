//! `sinew report`: the cohort report (one self-contained HTML file plus PNG plots).

use std::path::PathBuf;

use anyhow::Context;
use clap::Args;

use crate::cmd::common;

/// Arguments of `sinew report`.
#[derive(Args, Debug)]
#[command(after_long_help = "Examples:
  sinew report --cohort out/cohort --out out/cohort/report.html

Reads DIR/scores.csv (columns used: method, fixed, moving, label, name, dice, hd95_mm,
folding, sdlogj, runtime_s; others are ignored) and DIR/summary.json when present. Writes
one HTML file with inline SVG plots (no scripts, no network): Dice and HD95 box plots per
label with one box per method, a folding/SDlogJ scatter per method, summary tables and links
to the QC sheets (qc.png) of the worst, median and best pairs by mean Dice. The same plots
are written as PNG beside it: <stem>_dice.png, <stem>_hd95.png, <stem>_jacobian.png.")]
pub struct ReportArgs {
    /// The cohort folder (with scores.csv).
    #[arg(long, value_name = "DIR")]
    pub cohort: PathBuf,
    /// The HTML file to write.
    #[arg(long, short = 'o', value_name = "HTML")]
    pub out: PathBuf,
}

/// Runs `sinew report`.
pub fn run(args: ReportArgs) -> anyhow::Result<()> {
    let scores = args.cohort.join("scores.csv");
    sinew_io::atomic::ensure_not_input(&args.out, &[&scores, &args.cohort.join("summary.json")])?;
    if let Some(dir) = args.out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir).with_context(|| format!("{}: cannot create the folder", dir.display()))?;
    }
    let files = sinew_qc::report::write_report(&args.cohort, &args.out, common::CAUTION)?;
    println!(
        "wrote {} ({} methods, {} labels) and {}",
        files.html.display(),
        files.cohort.methods.len(),
        files.cohort.labels.len(),
        files.pngs.iter().map(|p| p.display().to_string()).collect::<Vec<_>>().join(", ")
    );
    Ok(())
}
