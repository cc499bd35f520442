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

#[cfg(test)]
mod tests {
    use super::*;
    use axum::{routing::get, Json, Router};
    use std::sync::atomic::{AtomicUsize, Ordering};
    use std::sync::Arc;

    /// A run as `GET /api/v1/runs/{id}` shows it, in `state`.
    fn run_in(state: &str) -> serde_json::Value {
        serde_json::json!({
            "id": 7, "device_serial": "EOM-TEST-1", "bench": "bench-1", "state": state,
            "submitted_by": "test", "created_at_unix_ms": 0, "started_at_unix_ms": 1,
            "finished_at_unix_ms": null, "cause": null, "plan": null,
            "measured_points": 3, "results": []
        })
    }

    /// A daemon whose run 7 reads `running` the first `running_reads` times, then `cancelled`.
    async fn daemon(running_reads: usize) -> (ApiClient, Arc<AtomicUsize>) {
        let reads = Arc::new(AtomicUsize::new(0));
        let counted = reads.clone();
        let app = Router::new().route(
            "/api/v1/runs/7",
            get(move || {
                let counted = counted.clone();
                async move {
                    let n = counted.fetch_add(1, Ordering::SeqCst);
                    Json(run_in(if n < running_reads {
                        "running"
                    } else {
                        "cancelled"
                    }))
                }
            }),
        );
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let address = listener.local_addr().unwrap();
        tokio::spawn(async move { axum::serve(listener, app).await });
        let client = ApiClient::new(&format!("http://{address}"), None).unwrap();
        (client, reads)
    }

    /// README's CLI tour: `cancel` "waits up to 30 s for it to stop and says how it ended". A run
    /// that stops is returned at its first final reading; one that stays running is returned as
    /// still running once the limit has passed (a shorter limit here; the CLI's is 30 s).
    #[tokio::test]
    async fn the_wait_after_a_cancel_ends_with_the_run_or_at_the_limit() {
        assert_eq!(CANCEL_WAIT, Duration::from_secs(30));
        let (client, reads) = daemon(2).await;
        let run = wait_until_ended(&client, 7, Duration::from_secs(20))
            .await
            .unwrap();
        assert_eq!(run.summary.state, "cancelled");
        assert_eq!(
            reads.load(Ordering::SeqCst),
            3,
            "read until it stopped, no more"
        );

        let (client, _) = daemon(usize::MAX).await;
        let limit = Duration::from_millis(700);
        let started = Instant::now();
        let run = wait_until_ended(&client, 7, limit).await.unwrap();
        let waited = started.elapsed();
        assert_eq!(run.summary.state, "running");
        assert!(waited >= limit, "gave up after {waited:?}");
        // One more reading at most past the limit (each 200 ms apart), with a loaded machine's delays.
        assert!(waited < limit + Duration::from_secs(5), "waited {waited:?}");
    }
}
