//! `halfwave report RUN [--output FILE.html]`: the printable calibration report of a run, fetched
//! from `GET /api/v1/runs/{id}/report.html` (built by [`crate::api::calibration_report`], so the
//! file and the browser view are the same document) and written to stdout or a file that is never
//! replaced without `--force` ([`super::output_file`]).

use super::client::ClientArgs;
use super::output_file::OutputArgs;
use super::runs::runtime;
use super::CliError;
use clap::Args;

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// The run.
    pub run_id: i64,
    #[command(flatten)]
    pub output: OutputArgs,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// `halfwave report`.
pub fn run(args: ReportArgs) -> Result<(), CliError> {
    if args.client.json {
        return Err(CliError::new(format!(
            "the report is an HTML document, --json does not apply; `halfwave show {} --json` gives the run as JSON",
            args.run_id
        )));
    }
    args.output.check_free()?;
    let client = args.client.client()?;
    let run_id = args.run_id;
    let html =
        runtime()?.block_on(client.get_text(&format!("/api/v1/runs/{run_id}/report.html")))?;
    args.output.write(&html)?;
    if let Some(path) = &args.output.output {
        eprintln!(
            "run {run_id}: calibration report written to {} (open it in a browser; print to PDF from there)",
            path.display()
        );
    }
    Ok(())
}
