//! The `halfwave` binary: parses the command line and hands over to [`halfwave::cli`].

#![forbid(unsafe_code)]

use clap::Parser;

fn main() -> std::process::ExitCode {
    let cli = halfwave::cli::Cli::parse();
    // The demo shows failed points on its progress bar; its log would only repeat them. The
    // daemon says what it does (runs queued, started, ended; acknowledgements) at info level.
    let level = match cli.command {
        halfwave::cli::Command::Demo(_) => "error",
        halfwave::cli::Command::Serve(_) => "info",
        _ => "warn",
    };
    halfwave::telemetry::init(level);
    match halfwave::cli::run(cli) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(halfwave::cli::CliError::ClosedPipe) => {
            std::process::ExitCode::from(halfwave::cli::CLOSED_PIPE_EXIT_CODE)
        }
        Err(halfwave::cli::CliError::Finding(finding)) => {
            eprintln!("{finding}");
            std::process::ExitCode::from(halfwave::cli::FINDING_EXIT_CODE)
        }
        Err(e) => {
            eprintln!("error: {}", e.report());
            std::process::ExitCode::FAILURE
        }
    }
}
