//! The `halfwave` command line: one file per subcommand.
//!
//! Every subcommand returns `Result<(), CliError>`; `main` prints the error for the person at the
//! terminal and exits non-zero. Commands that print results print JSON on stdout.

pub mod analyze;

use clap::{Parser, Subcommand};

pub mod serve;
pub mod sim;
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
    /// Serve the simulated bench (RF source and analyzer) as SCPI instruments over TCP.
    Sim(sim::SimArgs),
    /// Run the daemon: the engine on the configured benches, the HTTP API and the dashboard.
    Serve(serve::ServeArgs),
    /// Analyse trace files you already have: modulation index from a trace CSV, V_pi from a sweep JSON.
    Analyze(analyze::AnalyzeArgs),
    /// Manage API tokens in the database: create (printed once), revoke, list.
    Token(token::TokenCommand),
}

/// Runs the parsed command.
pub fn run(cli: Cli) -> Result<(), CliError> {
    match cli.command {
        Command::Sim(args) => sim::run(args),
        Command::Serve(args) => serve::run(args),
        Command::Analyze(args) => analyze::run(args),
        Command::Token(command) => token::run(command),
    }
}
