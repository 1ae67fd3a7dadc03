//! Running the `sinew` binary from a test.

use std::ffi::OsStr;
use std::path::Path;
use std::process::{Command, Output};

/// The `sinew` binary of the calling test crate. Cargo tells integration tests of the crate
/// that builds a binary where it is, at compile time, so each test file names it once:
/// `const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));`.
#[derive(Clone, Copy, Debug)]
pub struct Sinew(&'static str);

impl Sinew {
    /// The binary at `path`.
    pub const fn new(path: &'static str) -> Sinew {
        Sinew(path)
    }

    /// The binary's path.
    pub fn path(&self) -> &Path {
        Path::new(self.0)
    }

    /// A command running the binary, without arguments yet.
    pub fn cmd(&self) -> Command {
        Command::new(self.0)
    }

    /// Runs `sinew ARGS…` to the end and returns its exit status and output.
    pub fn run<I, S>(&self, args: I) -> Output
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        self.cmd().args(args).output().expect("run sinew")
    }

    /// Runs `sinew ARGS…` and asserts that it succeeded (the failure shows its stderr).
    #[track_caller]
    pub fn ok<I, S>(&self, args: I) -> Output
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        ok(self.run(args))
    }

    /// Writes the small demo cohort of `subjects` subjects into `dir` (`sinew demo --small
    /// -q`, plus `extra` such as `--data-only`) and asserts that it succeeded.
    #[track_caller]
    pub fn demo(&self, dir: &Path, subjects: usize, extra: &[&str]) {
        let n = subjects.to_string();
        let mut c = self.cmd();
        c.args(["demo", "--small", "-q", "--subjects", &n]).args(extra).arg("--out").arg(dir);
        run_ok(&mut c);
    }
}

/// Asserts that `out` is a success; returns it.
#[track_caller]
pub fn ok(out: Output) -> Output {
    assert!(out.status.success(), "{}", text(&out.stderr));
    out
}

/// Runs `cmd` to the end and asserts that it succeeded.
#[track_caller]
pub fn run_ok(cmd: &mut Command) {
    let out = cmd.output().unwrap();
    assert!(out.status.success(), "{cmd:?} failed: {}", text(&out.stderr));
}

/// Bytes of a process's output as text (invalid UTF-8 replaced).
pub fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// A path as a command-line argument (the tests' paths are UTF-8).
pub fn p(path: &Path) -> &str {
    path.to_str().expect("a UTF-8 path")
}

/// Registration settings under which the CLI tests' cohorts run quickly and reproducibly:
/// the fast preset, few iterations and a fixed thread count (the same pair gives the same
/// field in every run).
pub const QUICK: [&str; 6] = ["--preset", "fast", "--iterations", "10,8,6,4", "--threads", "2"];
