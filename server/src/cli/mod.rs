//! The `halfwave` command line: one file per subcommand.
//!
//! Every subcommand returns `Result<(), CliError>`; `main` prints the error for the person at the
//! terminal and exits non-zero. Three kinds of command live here: the daemon and its local tools
//! (`serve`, `demo`, `sim`, `analyze`, `predict`, `token`, `check-bench`, `db`, `chain cascade`), which read the configuration
//! or the database directly, and the clients (`submit`, `watch`, `runs`, `show`, `cancel`, `resume`, `compare`, `devices`,
//! `v-pi`, `drive`, `pin`, `unpin`, `export`, `report`, `trace`, `benches`, `acknowledge`, `chain import`, `budget`), which
//! speak only HTTP to a running daemon through [`client::ApiClient`], so they work from any
//! machine that can reach it. Clients print tables for people and JSON with `--json`.

/// Prints a line on stdout like `println!`, inside a function that returns
/// `Result<_, CliError>`: a reader that closed the pipe (`halfwave runs | head -1`) ends the
/// command quietly through [`CliError::ClosedPipe`] instead of a panic.
macro_rules! outln {
    ($($arg:tt)*) => {
        $crate::cli::write_stdout(format_args!($($arg)*), true)?
    };
}

/// Prints on stdout like `print!`; see [`outln!`].
macro_rules! out {
    ($($arg:tt)*) => {
        $crate::cli::write_stdout(format_args!($($arg)*), false)?
    };
}

pub mod analyze;

use clap::{Parser, Subcommand};

pub mod benches;
pub mod budget;
pub mod calibration_report;
pub mod chain;
pub mod chain_calibrate;
pub mod check_bench;
pub mod client;
pub mod compare;
pub mod control;
pub mod db;
pub mod demo;
pub mod devices;
pub mod drill;
pub mod drive;
pub mod export;
pub mod follow;
pub mod frequency_arg;
pub mod output_file;
pub mod pin;
pub mod predict;
pub mod report;
pub mod runs;
pub mod serve;
pub mod sim;
pub mod suggest_profile;
pub mod text_table;
pub mod token;
pub mod trace;

/// An error that ends a command: the message says what is wrong and what to do.
#[derive(Debug, thiserror::Error)]
pub enum CliError {
    /// What went wrong and what to do, for the person at the terminal.
    #[error("{0}")]
    Message(String),
    /// What went wrong, with the error that caused it kept as its source; [`CliError::report`]
    /// prints the message followed by every cause in the chain.
    #[error("{message}")]
    Caused {
        message: String,
        #[source]
        source: Box<dyn std::error::Error + Send + Sync + 'static>,
    },
    /// The reader of stdout went away (`| head`): nothing is wrong and nothing more is said;
    /// the process exits with [`CLOSED_PIPE_EXIT_CODE`].
    #[error("standard output was closed by its reader")]
    ClosedPipe,
    /// The command worked, and what it found is the answer "no" a script tests for (two runs that
    /// differ significantly): said on stderr, exit status [`FINDING_EXIT_CODE`], so that a script
    /// tells it from a failure (status 1).
    #[error("{0}")]
    Finding(String),
}

impl CliError {
    pub fn new(message: impl Into<String>) -> Self {
        CliError::Message(message.into())
    }

    /// `message` with `source` kept as the cause (its own causes follow it in [`Self::report`]).
    pub fn caused(
        message: impl Into<String>,
        source: impl Into<Box<dyn std::error::Error + Send + Sync + 'static>>,
    ) -> Self {
        CliError::Caused {
            message: message.into(),
            source: source.into(),
        }
    }

    /// What `main` prints: the message, then each cause in the source chain after `": "` (the
    /// formatter the webhook sender uses too, [`client::with_causes`]).
    pub fn report(&self) -> String {
        client::with_causes(self.to_string(), self)
    }
}

/// The exit status after stdout's reader went away: 128 + SIGPIPE (13), what a shell reports for
/// a program that a closed pipe stopped (common practice), so `set -o pipefail` still sees it.
pub const CLOSED_PIPE_EXIT_CODE: u8 = 141;

/// The exit status of a command whose answer is a finding rather than a failure
/// ([`CliError::Finding`]): `compare` on runs that differ significantly. Every failure exits 1.
pub const FINDING_EXIT_CODE: u8 = 3;

/// Writes to stdout (and flushes, so that a closed pipe is noticed at once); a closed pipe is
/// [`CliError::ClosedPipe`], any other failure a message naming stdout.
pub fn write_stdout(text: std::fmt::Arguments<'_>, newline: bool) -> Result<(), CliError> {
    use std::io::Write;
    let mut stdout = std::io::stdout().lock();
    let written = stdout
        .write_fmt(text)
        .and_then(|()| {
            if newline {
                stdout.write_all(b"\n")
            } else {
                Ok(())
            }
        })
        .and_then(|()| stdout.flush());
    match written {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Err(CliError::ClosedPipe),
        Err(e) => Err(CliError::new(format!(
            "cannot write to standard output: {e}"
        ))),
    }
}

/// Halfwave calibrates electro-optic phase modulators: it drives an RF source and reads an optical
/// spectrum analyzer, fits the modulation index from the Bessel sidebands and records V_pi versus
/// frequency per serial number.
#[derive(Debug, Parser)]
#[command(name = "halfwave", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the whole job on a simulated bench in seconds: an in-process daemon, a
    /// calibration submitted over HTTP, the V_pi table, the response frequencies and SVG plots.
    Demo(demo::DemoArgs),
    /// Serve the simulated bench (RF source and analyzer, and with --sensor-port a power sensor) as
    /// SCPI instruments over TCP.
    Sim(sim::SimArgs),
    /// Run the daemon: the engine on the configured benches, the HTTP API and the dashboard.
    Serve(serve::ServeArgs),
    /// Analyse trace files you already have: modulation index from a trace CSV, V_pi from a sweep JSON.
    Analyze(analyze::AnalyzeArgs),
    /// Manage API tokens in the database: create (printed once), revoke, list.
    Token(token::TokenCommand),
    /// Submit a plan (JSON file) to a running daemon and follow the run with a progress bar.
    Submit(runs::SubmitArgs),
    /// Follow a run on a running daemon with a progress bar until it ends.
    Watch(runs::WatchArgs),
    /// List runs on a running daemon (filters: device, state, dates).
    Runs(runs::RunsArgs),
    /// Show one run: state, V_pi per frequency, response frequencies.
    Show(runs::ShowArgs),
    /// Cancel a queued or running run (operator token); its RF output goes off, its points stay.
    Cancel(control::CancelArgs),
    /// Resume an interrupted run (or one that failed on a link fault) where it stopped, and
    /// follow it.
    Resume(control::ResumeArgs),
    /// Compare two runs' V_pi per frequency: difference, combined uncertainty, significance (E_n);
    /// exits 3 when a frequency differs significantly, 1 on a failure.
    Compare(compare::CompareArgs),
    /// List the modulators with their newest calibration (date, run, frequency range).
    Devices(devices::DevicesArgs),
    /// V_pi of a modulator at one frequency, with its uncertainty and the run it comes from.
    #[command(name = "v-pi")]
    VPi(devices::VpiArgs),
    /// The generator level for a wanted modulation index on a calibrated modulator at one
    /// frequency through a drive chain (or the index a level gives), checked against the limits.
    Drive(drive::DriveArgs),
    /// Predict the optical comb of a periodic phase drive (several harmonics) from a JSON file;
    /// computed locally, no daemon needed.
    Predict(predict::PredictArgs),
    /// Export one stored analyzer trace as the CSV that `halfwave analyze` reads.
    Trace(trace::TraceArgs),
    /// Export a run's points and V_pi as CSV or JSON (units in the column names).
    Export(export::ExportArgs),
    /// Write a run's printable calibration report: one self-contained HTML file (device,
    /// instruments, chain, method, V_pi with uncertainties, response plot, limits in force).
    Report(calibration_report::ReportArgs),
    /// Identify every configured instrument and verify its read-backs. RF stays off: this never
    /// switches an RF output on.
    CheckBench(check_bench::CheckBenchArgs),
    /// Database maintenance: `db backup DEST` (consistent copy, safe while the daemon runs).
    Db(db::DbCommand),
    /// List the benches with their queue and RF safety state.
    Benches(benches::BenchesArgs),
    /// Acknowledge a bench's safety fault once its RF output reads back off (operator token);
    /// the bench then takes runs again.
    Acknowledge(benches::AcknowledgeArgs),
    #[command(flatten)]
    Pins(pin::PinCommand),
    /// Drive-chain calibrations: `chain upload` stores a CSV table, `chain import` cascades
    /// Touchstone files and stores them (`chain cascade` only prints the gain), `chain list` the
    /// stored versions, `chain calibrate` measures it with the bench's power sensor.
    #[command(subcommand)]
    Chain(chain::ChainCommand),
    /// V_pi's uncertainty budget per frequency of a run (fit, drive chain, generator level; GUM).
    Budget(budget::BudgetArgs),
}

/// Runs the parsed command.
pub fn run(cli: Cli) -> Result<(), CliError> {
    match cli.command {
        Command::Sim(args) => sim::run(args),
        Command::Serve(args) => serve::run(args),
        Command::Analyze(args) => analyze::run(args),
        Command::Token(command) => token::run(command),
        Command::Demo(args) => demo::run(args),
        Command::Submit(args) => runs::submit(args),
        Command::Watch(args) => runs::watch(args),
        Command::Runs(args) => runs::list(args),
        Command::Show(args) => runs::show(args),
        Command::Cancel(args) => control::cancel(args),
        Command::Resume(args) => control::resume(args),
        Command::Compare(args) => compare::run(args),
        Command::Devices(args) => devices::list(args),
        Command::VPi(args) => devices::v_pi(args),
        Command::Drive(args) => drive::run(args),
        Command::Predict(args) => predict::run(args),
        Command::Trace(args) => trace::run(args),
        Command::Export(args) => export::run(args),
        Command::Report(args) => calibration_report::run(args),
        Command::CheckBench(args) => check_bench::run(args),
        Command::Db(command) => db::run(command),
        Command::Benches(args) => benches::list(args),
        Command::Acknowledge(args) => benches::acknowledge(args),
        Command::Pins(command) => pin::run(command),
        Command::Chain(command) => chain::run(command),
        Command::Budget(args) => budget::run(args),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An error whose text is only its own, with an optional cause (as library errors wrap
    /// the error they met).
    #[derive(Debug)]
    struct Layer(&'static str, Option<Box<Layer>>);

    impl std::fmt::Display for Layer {
        fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            f.write_str(self.0)
        }
    }

    impl std::error::Error for Layer {
        fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
            self.1.as_deref().map(|e| e as _)
        }
    }

    #[test]
    fn a_nested_cause_reaches_the_printed_report() {
        let root = Layer("connection refused (os error 111)", None);
        let middle = Layer("tcp connect error", Some(Box::new(root)));
        let error = CliError::caused("cannot reach the daemon", middle);
        // The chain is kept, not flattened into the message.
        let source = std::error::Error::source(&error).expect("the cause is kept");
        assert_eq!(source.to_string(), "tcp connect error");
        assert!(source.source().is_some());
        assert_eq!(
            error.report(),
            "cannot reach the daemon: tcp connect error: connection refused (os error 111)"
        );
        // A message without a cause prints as it is.
        assert_eq!(CliError::new("no run 7").report(), "no run 7");
    }

    #[test]
    fn an_io_error_keeps_its_inner_error() {
        let inner = Layer("disk quota exceeded", None);
        let io = std::io::Error::other(inner);
        let report = CliError::caused("cannot write report.html", io).report();
        assert!(report.starts_with("cannot write report.html: "), "{report}");
        assert!(report.contains("disk quota exceeded"), "{report}");
    }
}
