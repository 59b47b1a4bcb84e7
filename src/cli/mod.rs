//! Command-line interface: argument parsing and wiring only, no statistics.
//!
//! One file per subcommand, plus `common` for the flags and helpers several commands share
//! (command files import only `common` and this module, never each other). Each turns what the user typed into a checked configuration in
//! one step, calls the library, writes outputs atomically and maps errors to exit codes:
//! 0 success, 2 bad usage or input (nothing is written), 1 internal failure.
//! A closed stdout pipe (e.g. `| head`) is not an error.

pub mod audit;
pub mod batch;
pub(crate) mod batch_design;
pub mod check;
pub mod columns;
pub mod common;
pub mod demo;
pub mod rescreen;
pub mod select;
mod select_streamed;
pub mod shift;
mod signals;

use std::io::Write;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// Shortlists from screening predictions with a false discovery rate guarantee when the
/// labeled set and the pool differ (covariate shift).
#[derive(Debug, Parser)]
#[command(
    name = "weighbridge",
    version,
    about,
    long_about = "Shortlists from screening predictions with a false discovery rate (FDR) \
guarantee when the labeled set was not a random sample of the pool.\n\n\
Give a labeled set (units already measured: outcome and model prediction) and a pool \
(predictions only). weighbridge computes weighted conformal p-values and selects the pool \
units whose outcome is likely above a threshold, so that on average at most a fraction q \
of the shortlist is not.\n\n\
The shortlist guides which experiments to run next; it is not a safety, clinical or \
regulatory decision.",
    after_help = "Examples:\n  weighbridge demo\n  weighbridge select --labeled fixtures/labeled.csv --pool fixtures/pool.csv \\\n      --threshold 6.5 --weight-column w --fdr 0.1 --out shortlist\n  weighbridge columns fixtures/labeled.csv"
)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Select a shortlist from a pool with FDR control.
    Select(select::SelectCommand),
    /// Measure the shift between the labeled set and the pool and fit density-ratio weights.
    Shift(shift::ShiftArgs),
    /// Run the whole job on an invented screening scenario and explain the result.
    Demo(demo::DemoArgs),
    /// Check whether an earlier shortlist was distorted by covariate shift.
    Audit(audit::AuditArgs),
    /// Estimate by simulation on your labeled set whether the pipeline keeps FDR <= q.
    Check(check::CheckArgs),
    /// Re-run the selection on a grown pool and report what changed since a previous run.
    Rescreen(rescreen::RescreenArgs),
    /// Design a calibration batch: units to assay, drawn with known probabilities.
    Batch(batch::BatchArgs),
    /// List a table's columns with their positions and what their first rows hold.
    Columns(columns::ColumnsArgs),
}

/// Why a command failed, and so which exit code it gets.
#[derive(Debug)]
pub enum Failure {
    /// Bad usage or input: exit code 2.
    Input(String),
    /// A bug or an environment failure: exit code 1.
    Internal(String),
    /// Refused: the fitted weights are unreliable (exit code 3); nothing was written.
    Refused(String),
}

impl From<crate::io::InputError> for Failure {
    fn from(e: crate::io::InputError) -> Self {
        Failure::Input(e.to_string())
    }
}

impl From<crate::selection::pipeline::SelectError> for Failure {
    fn from(e: crate::selection::pipeline::SelectError) -> Self {
        match e {
            crate::selection::pipeline::SelectError::FdrOutOfRange(_) => Failure::Input(format!(
                "--fdr: {e}. Hint: pass --fdr Q with 0 < Q <= 1, e.g. --fdr 0.1 (on average \
                 at most 10% of the shortlist is not above the threshold)."
            )),
            other => Failure::Input(other.to_string()),
        }
    }
}

impl From<crate::io::FolderError> for Failure {
    fn from(e: crate::io::FolderError) -> Self {
        Failure::Input(e.to_string())
    }
}

/// Take the output folder for this run (see [`crate::io::RunFolder`]): lock it, refuse a
/// folder the tool did not make unless `--force`. `reads` are the run's input files, which
/// are never removed as stale. Call before reading the inputs, so the lock covers the run.
pub(crate) fn open_output(
    dir: &std::path::Path,
    force: bool,
    reads: &[&std::path::Path],
) -> Result<crate::io::RunFolder, Failure> {
    Ok(crate::io::RunFolder::open(dir, force, reads)?)
}

/// Write output files all at once, record them in the folder's manifest and remove the
/// previous run's files this run did not write; a failure names the folder.
pub(crate) fn commit_outputs(
    folder: crate::io::RunFolder,
    set: crate::io::OutputSet,
    command: &str,
) -> Result<Vec<std::path::PathBuf>, Failure> {
    Ok(folder.commit(set, command)?)
}

/// The command line of this process (argv, program name first), for `command_line` in
/// the JSON outputs; arguments that are not valid UTF-8 are written lossily.
pub(crate) fn command_line() -> Vec<String> {
    std::env::args_os()
        .map(|a| a.to_string_lossy().into_owned())
        .collect()
}

/// Print to stdout; a closed pipe ends quietly.
pub(crate) fn print_stdout(text: &str) {
    let mut out = std::io::stdout().lock();
    match out.write_all(text.as_bytes()).and_then(|_| out.flush()) {
        Ok(()) => {}
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => {}
        Err(e) => eprintln!("weighbridge: cannot write to stdout: {e}"),
    }
}

/// Prints how long each phase took to stderr when `WEIGHBRIDGE_TIMINGS` is set (for
/// benchmarks and for users who want to know where the time goes).
pub(crate) struct PhaseTimer {
    enabled: bool,
    last: std::time::Instant,
}

impl PhaseTimer {
    pub(crate) fn new() -> Self {
        PhaseTimer {
            enabled: std::env::var_os("WEIGHBRIDGE_TIMINGS").is_some(),
            last: std::time::Instant::now(),
        }
    }

    /// Report the time since the previous mark under `phase`.
    pub(crate) fn mark(&mut self, phase: &str) {
        if self.enabled {
            let now = std::time::Instant::now();
            eprintln!(
                "timing: {phase:<28} {:8.3} s",
                (now - self.last).as_secs_f64()
            );
            self.last = now;
        }
    }
}

/// A one-line status on stderr naming the step that is running (reading the files, fitting
/// the classifier, selecting, ...), shown only when stderr is a terminal: never in files or
/// pipes, and costing nothing there. Each new step overwrites the line; dropping the value
/// clears it.
pub(crate) struct StepStatus {
    enabled: bool,
    started: std::time::Instant,
    /// When the last progress line was drawn (they are drawn at most 5 times a second).
    last_progress: std::cell::Cell<Option<std::time::Instant>>,
}

impl StepStatus {
    pub(crate) fn new(quiet: bool) -> Self {
        use std::io::IsTerminal;
        StepStatus {
            enabled: !quiet && std::io::stderr().is_terminal(),
            started: std::time::Instant::now(),
            last_progress: std::cell::Cell::new(None),
        }
    }

    /// The step now running with the share done (0 to 1) as a percentage; redrawn at
    /// most five times a second.
    pub(crate) fn progress(&self, what: &str, done: f64) {
        if !self.enabled {
            return;
        }
        let now = std::time::Instant::now();
        if let Some(last) = self.last_progress.get() {
            if now.duration_since(last).as_millis() < 200 {
                return;
            }
        }
        self.last_progress.set(Some(now));
        let mut err = std::io::stderr().lock();
        let _ = write!(
            err,
            "\r\x1b[2Kweighbridge [{:6.1} s] {what} ... {:3.0}%",
            self.started.elapsed().as_secs_f64(),
            100.0 * done.clamp(0.0, 1.0)
        );
        let _ = err.flush();
    }

    /// Announce the step now starting.
    pub(crate) fn step(&self, what: &str) {
        if self.enabled {
            let mut err = std::io::stderr().lock();
            let _ = write!(
                err,
                "\r\x1b[2Kweighbridge [{:6.1} s] {what} ...",
                self.started.elapsed().as_secs_f64()
            );
            let _ = err.flush();
        }
    }
}

impl Drop for StepStatus {
    fn drop(&mut self) {
        if self.enabled {
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[2K");
            let _ = err.flush();
        }
    }
}

/// Parse arguments, run the command, map the result to an exit code.
pub fn main_entry() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            // clap prints help/version to stdout (exit 0) and usage errors to stderr (exit 2).
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { 2 } else { 0 });
        }
    };
    signals::install();
    let result = match cli.command {
        Command::Select(args) => select::run(args),
        Command::Shift(args) => shift::run(args),
        Command::Demo(args) => demo::run(args),
        Command::Audit(args) => audit::run(args),
        Command::Check(args) => check::run(args),
        Command::Rescreen(args) => rescreen::run(args),
        Command::Batch(args) => batch::run(args),
        Command::Columns(args) => columns::run(args),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::Input(message)) => {
            eprintln!("error: {message}");
            ExitCode::from(2)
        }
        Err(Failure::Internal(message)) => {
            eprintln!("internal error: {message}");
            ExitCode::from(1)
        }
        Err(Failure::Refused(message)) => {
            eprintln!("refused: {message}");
            ExitCode::from(3)
        }
    }
}
