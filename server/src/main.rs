//! The `halfwave` binary: parses the command line and hands over to [`halfwave::cli`].

use clap::Parser;

fn main() -> std::process::ExitCode {
    let cli = halfwave::cli::Cli::parse();
    halfwave::telemetry::init("warn");
    match halfwave::cli::run(cli) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e}");
            std::process::ExitCode::FAILURE
        }
    }
}
