//! Following a run until it ends, with a progress bar fed from the daemon.
//!
//! The bar is fed by the daemon's server-sent events (`/api/v1/events?run_id=`): every `point`
//! event carries `completed_points` and `total_points`, every `frequency` event the V_pi just
//! fitted, which is printed above the bar. Events are a live feed, not a record (a watcher that
//! connects late or falls behind misses some), so the run itself is also read every few seconds
//! and whenever the stream ends or reports lost events; the run's state in the database decides
//! when following stops. The bar draws on stderr and only on a terminal, so `--json` output on
//! stdout stays clean. Ctrl-C stops following; the run goes on in the daemon.

use super::client::{is_terminal, ApiClient};
use super::CliError;
use crate::api::routes::runs::RunView;
use indicatif::{ProgressBar, ProgressStyle};
use std::time::{Duration, Instant};

/// How often the run is read even while events arrive.
const POLL_EVERY: Duration = Duration::from_secs(3);

/// How long to wait for an event before reading the run.
const EVENT_WAIT: Duration = Duration::from_secs(1);

/// The server-sent event stream of the daemon, split into JSON events.
pub struct EventStream {
    response: reqwest::Response,
    buffer: String,
    pending: std::collections::VecDeque<serde_json::Value>,
}

impl EventStream {
    /// Opens the stream (of one run, or of all runs when the id is not known yet).
    pub async fn open(client: &ApiClient, run_id: Option<i64>) -> Result<EventStream, CliError> {
        Ok(EventStream {
            response: client.event_stream(run_id).await?,
            buffer: String::new(),
            pending: Default::default(),
        })
    }

    /// The next event; `None` when the stream has ended (the daemon stopped or the link broke).
    pub async fn next(&mut self) -> Option<serde_json::Value> {
        loop {
            if let Some(event) = self.pending.pop_front() {
                return Some(event);
            }
            let chunk = self.response.chunk().await.ok()??;
            self.buffer.push_str(&String::from_utf8_lossy(&chunk));
            while let Some(end) = self.buffer.find("\n\n") {
                let message: String = self.buffer.drain(..end + 2).collect();
                for line in message.lines() {
                    if let Some(data) = line.strip_prefix("data:") {
                        if let Ok(event) = serde_json::from_str(data.trim()) {
                            self.pending.push_back(event);
                        }
                    }
                }
            }
        }
    }
}

/// A progress indicator on stderr (drawn only on a terminal): a spinner until the daemon says how
/// many points the run has, then a bar (see [`set_total`]).
pub fn run_bar(run_id: i64) -> ProgressBar {
    let bar = ProgressBar::no_length();
    let style = ProgressStyle::with_template("run {prefix} [{elapsed_precise}] {spinner} {msg}")
        .unwrap_or_else(|_| ProgressStyle::default_spinner());
    bar.set_style(style);
    bar.set_prefix(run_id.to_string());
    bar.enable_steady_tick(Duration::from_millis(200));
    bar
}

/// Gives the bar its length, switching it from a spinner to a bar the first time.
fn set_total(bar: &ProgressBar, total: u64) {
    if bar.length().is_none() {
        let style = ProgressStyle::with_template(
            "run {prefix} [{elapsed_precise}] {wide_bar} {pos}/{len} points, {eta} left  {msg}",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar());
        bar.set_style(style);
    }
    bar.set_length(total);
}

/// Follows run `run_id` until it ends and returns it as the daemon stores it. `events` is a
/// stream opened before the run was submitted (so no event is missed), or `None` to open one
/// now. When the daemon offers no event stream (a read-only server), the run is only read.
pub async fn follow_run(
    client: &ApiClient,
    run_id: i64,
    events: Option<EventStream>,
) -> Result<RunView, CliError> {
    let path = format!("/api/v1/runs/{run_id}");
    let mut events = match events {
        Some(stream) => Some(stream),
        None => EventStream::open(client, Some(run_id)).await.ok(),
    };
    let mut run: RunView = client.get_json(&path).await?;
    if is_terminal(&run.summary.state) {
        return Ok(run);
    }
    let bar = run_bar(run_id);
    bar.set_position(run.measured_points as u64);
    bar.set_message(run.summary.state.clone());
    let mut last_poll = Instant::now();
    loop {
        let event = match events.as_mut() {
            Some(stream) => match tokio::time::timeout(EVENT_WAIT, stream.next()).await {
                Ok(Some(event)) => Some(event),
                Ok(None) => {
                    events = None;
                    None
                }
                Err(_) => None,
            },
            None => {
                tokio::time::sleep(EVENT_WAIT).await;
                None
            }
        };
        let mut read_now = event.is_none() || last_poll.elapsed() >= POLL_EVERY;
        if let Some(event) = event {
            if event["run_id"].as_i64().is_some_and(|id| id != run_id) {
                continue;
            }
            read_now |= show_event(&bar, &event);
        }
        if read_now {
            last_poll = Instant::now();
            run = client.get_json(&path).await?;
            if is_terminal(&run.summary.state) {
                break;
            }
            if bar.position() < run.measured_points as u64 {
                bar.set_position(run.measured_points as u64);
            }
        }
    }
    bar.finish_and_clear();
    Ok(run)
}

/// Shows one event on the bar; true when the run should be read now (it ended, or events were
/// lost).
fn show_event(bar: &ProgressBar, event: &serde_json::Value) -> bool {
    let number = |key: &str| event[key].as_f64();
    let count = |key: &str| event[key].as_u64();
    match event["event"].as_str().unwrap_or_default() {
        "started" => {
            if let Some(total) = count("total_points") {
                set_total(bar, total);
            }
            if let Some(done) = count("already_measured") {
                bar.set_position(done);
            }
            bar.set_message("running");
            false
        }
        "point" => {
            if let (Some(done), Some(total)) = (count("completed_points"), count("total_points")) {
                set_total(bar, total);
                bar.set_position(done);
            }
            if let (Some(f), Some(level), Some(beta)) = (
                number("frequency_hz"),
                number("generator_level_dbm"),
                number("modulation_index"),
            ) {
                bar.set_message(format!(
                    "{:.3} GHz, {level:.1} dBm, beta {beta:.3}",
                    f / 1e9
                ));
            }
            false
        }
        "point_failed" => {
            if let (Some(f), Some(level)) = (number("frequency_hz"), number("generator_level_dbm"))
            {
                bar.println(format!(
                    "  point at {:.3} GHz, {level:.1} dBm not analysed: {}",
                    f / 1e9,
                    event["reason"].as_str().unwrap_or("no reason given")
                ));
            }
            false
        }
        "frequency" => {
            if let Some(f) = number("frequency_hz") {
                let line = match (number("v_pi_volts"), number("v_pi_uncertainty_volts")) {
                    (Some(v), Some(u)) => {
                        format!("  {:>8.3} GHz  V_pi = {v:.4} V +- {u:.4} V", f / 1e9)
                    }
                    _ => format!(
                        "  {:>8.3} GHz  no V_pi: {}",
                        f / 1e9,
                        event["note"]
                            .as_str()
                            .unwrap_or("the fit had too few points")
                    ),
                };
                bar.println(line);
            }
            false
        }
        "finished" | "lagged" => true,
        _ => false,
    }
}
