//! `halfwave submit | watch | runs | show`: runs on a daemon, over its HTTP API.
//!
//! `submit` reads a plan file (the JSON the API takes; see `POST /api/v1/runs`), checks that it is
//! JSON before anything is sent (a bad file is named with its line and column), opens the event
//! stream, submits, and follows the run with a progress bar until it ends. The daemon checks the
//! plan itself against the bench and the safety limits; a refused plan comes back with every
//! invalid field named. A run that does not complete makes the command exit non-zero, so scripts
//! can chain on it.

use super::client::{ApiClient, ClientArgs};
use super::follow::{follow_run, EventStream};
use super::text_table::{Align, TextTable};
use super::{report, CliError};
use crate::api::views::run_control::SubmittedRun;
use crate::api::views::runs::{RunList, RunView};
use clap::Args;
use std::path::{Path, PathBuf};

#[derive(Debug, Args)]
pub struct SubmitArgs {
    /// The plan: a JSON file with device, bench, chain, frequencies and levels (README, "CLI tour").
    pub plan: PathBuf,
    /// Print the run id and return instead of following the run.
    #[arg(long)]
    pub no_follow: bool,
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct WatchArgs {
    /// The run to follow.
    pub run_id: i64,
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct RunsArgs {
    /// Only runs of this device serial number.
    #[arg(long)]
    pub device: Option<String>,
    /// Only runs in this state: queued, running, completed, failed, cancelled or interrupted.
    #[arg(long)]
    pub state: Option<String>,
    /// Created at or after this date (YYYY-MM-DD, UTC) or Unix time in milliseconds.
    #[arg(long)]
    pub since: Option<String>,
    /// Created before this date (YYYY-MM-DD, UTC) or Unix time in milliseconds.
    #[arg(long)]
    pub until: Option<String>,
    /// Page number, from 1.
    #[arg(long, default_value_t = 1)]
    pub page: u32,
    /// Runs per page (1 to 1000).
    #[arg(long, default_value_t = 50)]
    pub per_page: u32,
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct ShowArgs {
    /// The run to show.
    pub run_id: i64,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// A current-thread runtime for one client command.
pub fn runtime() -> Result<tokio::runtime::Runtime, CliError> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| CliError::caused("cannot start the async runtime", e))
}

/// Reads a JSON file, naming the file (and the line and column of a syntax error).
pub fn read_json_file(path: &Path, what: &str) -> Result<serde_json::Value, CliError> {
    let bytes = std::fs::read(path).map_err(|e| {
        CliError::new(format!(
            "cannot read the {what} {}: {e}; check the path",
            path.display()
        ))
    })?;
    let text = String::from_utf8(bytes).map_err(|e| {
        CliError::new(format!(
            "the {what} {} is not a text file (byte {} is not UTF-8); a {what} is JSON text — is this the right file?",
            path.display(),
            e.utf8_error().valid_up_to()
        ))
    })?;
    serde_json::from_str(&text).map_err(|e| {
        CliError::new(format!(
            "the {what} {} is not valid JSON: line {}, column {}: {e}",
            path.display(),
            e.line(),
            e.column()
        ))
    })
}

/// Prints a finished run (JSON or text) and fails unless it completed.
pub fn finish(client: &ApiClient, run: &RunView, json: bool) -> Result<(), CliError> {
    if json {
        outln!("{}", to_json(run)?);
    } else {
        out!("{}", report::run_text(run));
    }
    let id = run.summary.id;
    if run.summary.state == "completed" {
        return Ok(());
    }
    let resume = if run.summary.resumable {
        format!(
            "; it can be resumed where it stopped with `{}`",
            client.hint(&format!("resume {id}"))
        )
    } else {
        String::new()
    };
    Err(CliError::new(format!(
        "run {id} ended {}{}; `{}` has the details{resume}",
        run.summary.state,
        run.summary
            .cause
            .as_ref()
            .map(|c| format!(": {c}"))
            .unwrap_or_default(),
        client.hint(&format!("show {id}")),
    )))
}

/// Pretty JSON of anything serializable.
pub fn to_json(value: &impl serde::Serialize) -> Result<String, CliError> {
    serde_json::to_string_pretty(value)
        .map_err(|e| CliError::caused("cannot encode the answer as JSON", e))
}

/// Submits a plan; with `follow`, follows the run to its end and returns it.
pub async fn submit_plan(
    client: &ApiClient,
    plan: &serde_json::Value,
    follow: bool,
) -> Result<(SubmittedRun, Option<RunView>), CliError> {
    // Open the stream before submitting, so the run's first events are not missed.
    let events = if follow {
        EventStream::open(client, None).await.ok()
    } else {
        None
    };
    let submitted: SubmittedRun = client.post_json("/api/v1/runs", plan).await?;
    if !follow {
        return Ok((submitted, None));
    }
    let run = follow_run(client, submitted.run_id, events).await?;
    Ok((submitted, Some(run)))
}

/// `halfwave submit`.
pub fn submit(args: SubmitArgs) -> Result<(), CliError> {
    let plan = read_json_file(&args.plan, "plan file")?;
    if !plan.is_object() {
        return Err(CliError::new(format!(
            "the plan file {} holds JSON but not an object; a plan is an object with device, bench, chain, frequencies and levels",
            args.plan.display()
        )));
    }
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let (submitted, run) = submit_plan(&client, &plan, !args.no_follow).await?;
        match run {
            None => {
                if args.client.json {
                    outln!("{}", to_json(&submitted)?);
                } else {
                    outln!(
                        "run {} queued; follow it with `{}`",
                        submitted.run_id,
                        client.hint(&format!("watch {}", submitted.run_id))
                    );
                }
                Ok(())
            }
            Some(run) => finish(&client, &run, args.client.json),
        }
    })
}

/// `halfwave watch`.
pub fn watch(args: WatchArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let run = follow_run(&client, args.run_id, None).await?;
        finish(&client, &run, args.client.json)
    })
}

/// `halfwave runs`.
pub fn list(args: RunsArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    let mut query = vec![
        format!("page={}", args.page),
        format!("per_page={}", args.per_page),
    ];
    for (key, value) in [
        ("device", &args.device),
        ("state", &args.state),
        ("since", &args.since),
        ("until", &args.until),
    ] {
        if let Some(value) = value {
            query.push(format!("{key}={}", encode_query_value(value)));
        }
    }
    let path = format!("/api/v1/runs?{}", query.join("&"));
    runtime()?.block_on(async {
        let list: RunList = client.get_json(&path).await?;
        if args.client.json {
            outln!("{}", to_json(&list)?);
            return Ok(());
        }
        if list.runs.is_empty() {
            outln!(
                "{}",
                empty_page_text(list.page, list.per_page, list.total.max(0) as u64)
            );
            return Ok(());
        }
        let mut table = TextTable::new(&[
            ("run", Align::Right),
            ("state", Align::Left),
            ("device", Align::Left),
            ("bench", Align::Left),
            ("created", Align::Left),
            ("submitted by", Align::Left),
        ]);
        for run in &list.runs {
            table.row(vec![
                run.id.to_string(),
                run.state.clone(),
                run.device_serial.clone(),
                run.bench.clone(),
                report::utc_time(run.created_at_unix_ms),
                run.submitted_by.clone(),
            ]);
        }
        out!("{}", table.render());
        outln!(
            "{}",
            page_footer(list.page, list.per_page, list.total.max(0) as u64)
        );
        Ok(())
    })
}

/// "1 run" or "3 runs".
pub fn count_of(n: usize, one: &str, many: &str) -> String {
    if n == 1 {
        format!("1 {one}")
    } else {
        format!("{n} {many}")
    }
}

/// The number of pages `total` items fill at `per_page` each.
fn page_count(total: u64, per_page: u32) -> u64 {
    total.div_ceil(u64::from(per_page.max(1)))
}

/// "1 run matches" or "120 runs match".
fn runs_match(total: u64) -> String {
    if total == 1 {
        "1 run matches".to_string()
    } else {
        format!("{total} runs match")
    }
}

/// The line under a page of runs: "page 1 of 3 (50 per page), 120 runs match".
fn page_footer(page: u32, per_page: u32, total: u64) -> String {
    format!(
        "page {page} of {} ({per_page} per page), {}",
        page_count(total, per_page),
        runs_match(total)
    )
}

/// What `halfwave runs` says when the page is empty: nothing matches, or the page is past the end.
fn empty_page_text(page: u32, per_page: u32, total: u64) -> String {
    if total == 0 {
        "no runs match".to_string()
    } else {
        format!(
            "page {page} is past the end: {}, {} ({per_page} per page); ask for --page 1 to {}",
            runs_match(total),
            count_of(page_count(total, per_page) as usize, "page", "pages"),
            page_count(total, per_page)
        )
    }
}

/// `halfwave show`.
pub fn show(args: ShowArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let run: RunView = client
            .get_json(&format!("/api/v1/runs/{}", args.run_id))
            .await?;
        if args.client.json {
            outln!("{}", to_json(&run)?);
        } else {
            out!("{}", report::run_text(&run));
        }
        Ok(())
    })
}

/// Percent-encodes a query value (RFC 3986 unreserved characters pass unchanged).
pub fn encode_query_value(value: &str) -> String {
    let mut out = String::with_capacity(value.len());
    for byte in value.bytes() {
        if byte.is_ascii_alphanumeric() || matches!(byte, b'-' | b'_' | b'.' | b'~') {
            out.push(char::from(byte));
        } else {
            out.push_str(&format!("%{byte:02X}"));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn run_counts_and_pages_read_as_english() {
        // The cases a user met: "1 runs match" and "page 1 of 0 runs".
        assert_eq!(
            page_footer(1, 50, 1),
            "page 1 of 1 (50 per page), 1 run matches"
        );
        assert_eq!(
            page_footer(2, 50, 120),
            "page 2 of 3 (50 per page), 120 runs match"
        );
        assert_eq!(empty_page_text(1, 50, 0), "no runs match");
        assert_eq!(
            empty_page_text(4, 50, 51),
            "page 4 is past the end: 51 runs match, 2 pages (50 per page); ask for --page 1 to 2"
        );
    }

    #[test]
    fn query_values_are_percent_encoded() {
        // RFC 3986 section 2.3: unreserved characters stay; everything else is %XX of its bytes.
        assert_eq!(encode_query_value("EG-PM-0042"), "EG-PM-0042");
        assert_eq!(encode_query_value("a b&c"), "a%20b%26c");
    }
}
