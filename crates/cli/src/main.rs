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
    /// Search the registration parameters on labelled pairs under a folding and a time
    /// budget (resumable, shardable), and compare with the default on held-out pairs.
    Tune(cmd::tune::TuneArgs),
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
        Command::Tune(a) => cmd::tune::run(a),
    }
}

#[cfg(test)]
mod tests {
    use clap::{CommandFactory, Parser};

    /// Every `sinew …` line in the Examples of every command's long help (lines ending in `\`
    /// continue on the next; ` # comment` tails dropped), with every subcommand's help.
    fn help_examples() -> Vec<(String, Vec<String>)> {
        fn walk(cmd: &mut clap::Command, path: &str, out: &mut Vec<(String, Vec<String>)>) {
            let help = cmd.render_long_help().to_string();
            let mut lines = help.lines().map(str::trim).peekable();
            while let Some(line) = lines.next() {
                if !line.starts_with("sinew ") {
                    continue;
                }
                let mut text = line.to_string();
                while text.ends_with('\\') {
                    text.pop();
                    text.push(' ');
                    text.push_str(lines.next().unwrap_or_else(|| panic!("{path}: {line:?} continues past the help")));
                }
                let text = text.split(" # ").next().unwrap_or("").trim().to_string();
                out.push((format!("{path}: {text}"), text.split_whitespace().map(String::from).collect()));
            }
            for sub in cmd.get_subcommands_mut() {
                let name = format!("{path} {}", sub.get_name());
                walk(sub, &name, out);
            }
        }
        let mut out = Vec::new();
        walk(&mut super::Cli::command(), "sinew", &mut out);
        out
    }

    #[test]
    fn every_help_example_parses_and_its_parameters_are_accepted() {
        let examples = help_examples();
        // Every command with options documents examples (a floor, so that a help text change
        // that loses them fails here).
        assert!(examples.len() >= 20, "{} examples", examples.len());
        for (what, words) in &examples {
            let cli = super::Cli::try_parse_from(words).unwrap_or_else(|e| panic!("{what}\n{e}"));
            // Beyond the syntax: the registration parameters the example asks for must be
            // valid (a per-level list must match the level count; config files are not read).
            match cli.command {
                super::Command::Register(a) if a.params.config.is_none() => {
                    a.params.params().unwrap_or_else(|e| panic!("{what}: {e:#}"));
                }
                super::Command::Cohort(a) if a.params.config.is_none() && a.action.is_none() => {
                    crate::cmd::cohort::register_params(&a).unwrap_or_else(|e| panic!("{what}: {e:#}"));
                }
                super::Command::Tune(a) if a.params.config.is_none() => {
                    crate::cmd::tune::base_params(&a).unwrap_or_else(|e| panic!("{what}: {e:#}"));
                }
                _ => {}
            }
        }
    }

    #[test]
    fn cli_definition_is_consistent() {
        // clap's own consistency check (clap tutorial, "Testing").
        super::Cli::command().debug_assert();
    }
}
