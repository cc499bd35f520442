//! `halfwave cancel RUN` and `halfwave resume RUN`: changing a run on a daemon (operator token).
//!
//! `cancel` asks the daemon to stop the run (its RF output is switched off as it stops) and waits
//! a little for the run to reach its final state, so the person at the terminal learns whether it
//! stopped. `resume` queues an interrupted run (or a failed one whose cause was a link fault) again
//! where it stopped and, like `submit`, follows it to its end unless told not to.

use super::client::{is_terminal, ApiClient, ClientArgs};
use super::follow::follow_resumed_run;
use super::runs::{finish, runtime, to_json};
use super::CliError;
use crate::api::views::runs::RunView;
use clap::Args;
use std::time::{Duration, Instant};

/// How long `cancel` waits for the run to reach its final state before it says it is still
/// stopping (the engine drops the run's step at once, settling and sweeps included, then
/// switches the RF output off and reads it back, which a source that does not answer delays).
const CANCEL_WAIT: Duration = Duration::from_secs(30);

#[derive(Debug, Args)]
pub struct CancelArgs {
    /// The run to cancel.
    pub run_id: i64,
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct ResumeArgs {
    /// The run to resume.
    pub run_id: i64,
    /// Return once the run is queued again instead of following it.
    #[arg(long)]
    pub no_follow: bool,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// `halfwave cancel`.
pub fn cancel(args: CancelArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    let id = args.run_id;
    runtime()?.block_on(async {
        client
            .post_no_content(&format!("/api/v1/runs/{id}/cancel"), &serde_json::json!({}))
            .await?;
        let run = wait_until_ended(&client, id, CANCEL_WAIT).await?;
        if args.client.json {
            outln!("{}", to_json(&run)?);
        } else if is_terminal(&run.summary.state) {
            outln!(
                "run {id} {} ({} points measured and kept)",
                run.summary.state,
                run.measured_points
            );
        } else {
            outln!(
                "cancellation of run {id} requested; it is still {} after {} s (the daemon stops a run at once, then waits for the source to confirm its RF output off); `{}` shows when it has stopped",
                run.summary.state,
                CANCEL_WAIT.as_secs(),
                client.hint(&format!("show {id}"))
            );
        }
        Ok(())
    })
}

/// Reads the run until it is in a final state or `limit` has passed; returns the last reading.
async fn wait_until_ended(
    client: &ApiClient,
    run_id: i64,
    limit: Duration,
) -> Result<RunView, CliError> {
    let path = format!("/api/v1/runs/{run_id}");
    let started = Instant::now();
    loop {
        let run: RunView = client.get_json(&path).await?;
        if is_terminal(&run.summary.state) || started.elapsed() >= limit {
            return Ok(run);
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
}

/// `halfwave resume`.
pub fn resume(args: ResumeArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    let id = args.run_id;
    runtime()?.block_on(async {
        let before: RunView = client.get_json(&format!("/api/v1/runs/{id}")).await?;
        client
            .post_no_content(&format!("/api/v1/runs/{id}/resume"), &serde_json::json!({}))
            .await?;
        if args.no_follow {
            if args.client.json {
                outln!(
                    "{}",
                    to_json(&serde_json::json!({ "run_id": id, "state": "queued" }))?
                );
            } else {
                outln!(
                    "run {id} queued again; follow it with `{}`",
                    client.hint(&format!("watch {id}"))
                );
            }
            return Ok(());
        }
        let run = follow_resumed_run(&client, id, before.summary).await?;
        finish(&client, &run, args.client.json)
    })
}
