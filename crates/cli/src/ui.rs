//! Terminal helpers: progress bars that hide themselves when output is not a terminal.

use std::io::IsTerminal;

use indicatif::{ProgressBar, ProgressStyle};

/// A progress bar of `len` steps with `msg`, hidden when stderr is not a terminal or `quiet`.
pub fn progress(len: u64, msg: &str, quiet: bool) -> ProgressBar {
    if quiet || !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let pb = ProgressBar::new(len);
    pb.set_style(
        ProgressStyle::with_template("{spinner} {msg:<28} [{bar:30}] {pos}/{len} {elapsed_precise} eta {eta}")
            .expect("valid template")
            .progress_chars("=> "),
    );
    pb.set_message(msg.to_string());
    pb
}
