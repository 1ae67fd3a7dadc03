//! `sinew`: deformable registration of 3-D scans on a CPU.
//!
//! Exit codes: 0 success; 2 bad input or failure (one line on stderr naming the file and
//! the problem); 1 is never used on purpose.

use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod cmd;
mod ui;

/// Deformable registration of 3-D medical scans on a CPU: MIND-SSC descriptors, diffusion
/// regularisation, multi-resolution pyramid. Research use only; not for diagnosis or
/// treatment.
#[derive(Parser, Debug)]
#[command(
    name = "sinew",
    version,
    propagate_version = true,
    after_help = "Start with `sinew demo --out demo-data` (the whole job on a synthetic cohort), then \
`sinew register --help`.\nConventions: fields live on the fixed grid and pull, warped(x) = moving(x + u(x)).\n\
Exit codes: 0 success, 2 error (one line on stderr naming the file and the problem)."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Describe NIfTI files: shape, spacing, orientation, datatype, value range, labels.
    Info(cmd::info::InfoArgs),
    /// The whole job on a synthetic cohort: write CT-like abdomens with labels, register and
    /// score every pair, draw QC sheets and an HTML report.
    Demo(cmd::demo::DemoArgs),
    /// Register a moving scan to a fixed scan and write the field, warped scans and a report.
    Register(cmd::register::RegisterArgs),
    /// Compose, invert or convert displacement fields.
    Field(cmd::field::FieldArgs),
    /// Apply a displacement field to a scan or a label map.
    Warp(cmd::warp::WarpArgs),
    /// Bring scans and label maps onto a common grid: orient, resample, crop/pad, window, scale.
    Prep(cmd::prep::PrepArgs),
    /// Score a registered pair: Dice, HD95, Jacobian statistics, landmark error.
    Score(cmd::score::ScoreArgs),
    /// Register and score every pair of a cohort (resumable, shardable), and compare methods.
    Cohort(cmd::cohort::CohortArgs),
    /// Draw the quality-control sheet (PNG) of a fixed/moving/field triple.
    Qc(cmd::qc::QcArgs),
    /// Turn a cohort's tables into one self-contained HTML report with plots.
    Report(cmd::report::ReportArgs),
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match dispatch(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            // One line: the context chain joined by ": ".
            eprintln!("sinew: error: {e:#}");
            ExitCode::from(2)
        }
    }
}

/// Runs a command line given as words (the first is the program name): lets one command
/// run others (the demo runs `cohort` and `report`) exactly as a user would.
pub(crate) fn run_args(words: &[&str]) -> anyhow::Result<()> {
    dispatch(Cli::try_parse_from(words)?)
}

fn dispatch(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Info(a) => cmd::info::run(a),
        Command::Demo(a) => cmd::demo::run(a),
        Command::Register(a) => cmd::register::run(a),
        Command::Field(a) => cmd::field::run(a),
        Command::Warp(a) => cmd::warp::run(a),
        Command::Prep(a) => cmd::prep::run(a),
        Command::Score(a) => cmd::score::run(a),
        Command::Cohort(a) => cmd::cohort::run(a),
        Command::Qc(a) => cmd::qc::run(a),
        Command::Report(a) => cmd::report::run(a),
    }
}

#[cfg(test)]
mod tests {
    use clap::CommandFactory;

    #[test]
    fn cli_definition_is_consistent() {
        // clap's own consistency check (clap tutorial, "Testing").
        super::Cli::command().debug_assert();
    }
}
