//! The `halfwave` command line: one file per subcommand.
//!
//! Every subcommand returns `Result<(), CliError>`; `main` prints the error for the person at the
//! terminal and exits non-zero. Three kinds of command live here: the daemon and its local tools
//! (`serve`, `demo`, `sim`, `analyze`, `token`, `check-bench`, `db`), which read the configuration
//! or the database directly, and the clients (`submit`, `watch`, `runs`, `show`, `export`, `benches`, `acknowledge`), which
//! speak only HTTP to a running daemon through [`client::ApiClient`], so they work from any
//! machine that can reach it. Clients print tables for people and JSON with `--json`.

pub mod analyze;

use clap::{Parser, Subcommand};

pub mod benches;
pub mod check_bench;
pub mod client;
pub mod db;
pub mod demo;
pub mod drill;
pub mod export;
pub mod follow;
pub mod pin;
pub mod report;
pub mod runs;
pub mod serve;
pub mod sim;
pub mod suggest_profile;
pub mod token;

/// An error that ends a command: the message says what is wrong and what to do.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct CliError(pub String);

impl CliError {
    pub fn new(message: impl Into<String>) -> Self {
        CliError(message.into())
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
    /// Serve the simulated bench (RF source and analyzer) as SCPI instruments over TCP.
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
    /// Export a run's points and V_pi as CSV or JSON (units in the column names).
    Export(export::ExportArgs),
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
        Command::Export(args) => export::run(args),
        Command::CheckBench(args) => check_bench::run(args),
        Command::Db(command) => db::run(command),
        Command::Benches(args) => benches::list(args),
        Command::Acknowledge(args) => benches::acknowledge(args),
        Command::Pins(command) => pin::run(command),
    }
}
