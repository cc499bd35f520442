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
use crate::api::views::runs::{RunSummary, RunView};
use indicatif::{ProgressBar, ProgressStyle};
use std::time::{Duration, Instant};

/// How often the run is read even while events arrive.
const POLL_EVERY: Duration = Duration::from_secs(3);

/// How long to wait for an event before reading the run.
const EVENT_WAIT: Duration = Duration::from_secs(1);

/// The server-sent event stream of the daemon, split into JSON events.
pub struct EventStream {
    response: reqwest::Response,
    /// Bytes received and not yet split into messages: a message (and a UTF-8 character) can
    /// arrive split across network chunks, so text is decoded only once a message is whole.
    buffer: Vec<u8>,
    pending: std::collections::VecDeque<serde_json::Value>,
}

impl EventStream {
    /// Opens the stream (of one run, or of all runs when the id is not known yet).
    pub async fn open(client: &ApiClient, run_id: Option<i64>) -> Result<EventStream, CliError> {
        Ok(EventStream {
            response: client.event_stream(run_id).await?,
            buffer: Vec::new(),
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
            self.buffer.extend_from_slice(&chunk);
            self.pending.extend(take_messages(&mut self.buffer));
        }
    }
}

/// Splits the whole messages off the front of `buffer` (each ends with a blank line) and returns
/// the JSON of their `data:` lines; an incomplete message stays in the buffer.
fn take_messages(buffer: &mut Vec<u8>) -> Vec<serde_json::Value> {
    let mut events = Vec::new();
    while let Some(end) = buffer.windows(2).position(|w| w == b"\n\n") {
        let message: Vec<u8> = buffer.drain(..end + 2).collect();
        for line in String::from_utf8_lossy(&message).lines() {
            if let Some(data) = line.strip_prefix("data:") {
                if let Ok(event) = serde_json::from_str(data.trim()) {
                    events.push(event);
                }
            }
        }
    }
    events
}

/// Time left from the average pace since following began: `done_at_start` points were measured
/// when the clock started, `done` are measured `elapsed` later, of `total`. The average over the
/// whole follow does not jump when a slow step (a reference sweep, the laser search at a new
/// frequency) follows a run of quick points, as a recent-rate estimate does. `None` until two
/// points have been measured while following.
pub fn time_left(done_at_start: u64, done: u64, total: u64, elapsed: Duration) -> Option<Duration> {
    let measured = done.checked_sub(done_at_start)?;
    if measured < 2 || elapsed.is_zero() {
        return None;
    }
    let per_point = elapsed.as_secs_f64() / measured as f64;
    Some(Duration::from_secs_f64(
        per_point * total.saturating_sub(done) as f64,
    ))
}

/// "2 h 05 min", "4 min 10 s", "12 s".
pub fn short_duration(d: Duration) -> String {
    let s = d.as_secs();
    if s >= 3600 {
        format!("{} h {:02} min", s / 3600, (s % 3600) / 60)
    } else if s >= 60 {
        format!("{} min {:02} s", s / 60, s % 60)
    } else {
        format!("{s} s")
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

/// Gives the bar its length, switching it from a spinner to a bar the first time. The time left
/// is [`time_left`] from the moment the bar became a bar.
fn set_total(bar: &ProgressBar, total: u64) {
    if bar.length().is_none() {
        let done_at_start = bar.position();
        let started = Instant::now();
        let style = ProgressStyle::with_template(
            "run {prefix} [{elapsed_precise}] {wide_bar} {pos}/{len} points, {left}  {msg}",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .with_key(
            "left",
            move |state: &indicatif::ProgressState, w: &mut dyn std::fmt::Write| {
                let total = state.len().unwrap_or(0);
                let text = match time_left(done_at_start, state.pos(), total, started.elapsed()) {
                    Some(left) => format!("{} left", short_duration(left)),
                    None => "time left: estimating".to_string(),
                };
                let _ = w.write_str(&text);
            },
        );
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
    follow(client, run_id, events, None).await
}

/// Follows a run that was just queued for resumption. Until its bench's worker takes it up, the
/// run still reads as it ended (interrupted, or failed on a link fault), so it counts as ended
/// only once its state, end time or cause differ from `before`, the reading taken before resuming.
pub async fn follow_resumed_run(
    client: &ApiClient,
    run_id: i64,
    before: RunSummary,
) -> Result<RunView, CliError> {
    follow(client, run_id, None, Some(before)).await
}

/// True when `run` has ended, and is not the old ending of a run that was queued again.
fn has_ended(run: &RunSummary, before: Option<&RunSummary>) -> bool {
    let unchanged = |b: &RunSummary| {
        b.state == run.state
            && b.finished_at_unix_ms == run.finished_at_unix_ms
            && b.cause == run.cause
    };
    is_terminal(&run.state) && !before.is_some_and(unchanged)
}

async fn follow(
    client: &ApiClient,
    run_id: i64,
    events: Option<EventStream>,
    before: Option<RunSummary>,
) -> Result<RunView, CliError> {
    let path = format!("/api/v1/runs/{run_id}");
    let mut events = match events {
        Some(stream) => Some(stream),
        None => EventStream::open(client, Some(run_id)).await.ok(),
    };
    let mut run: RunView = client.get_json(&path).await?;
    if has_ended(&run.summary, before.as_ref()) {
        return Ok(run);
    }
    if !std::io::IsTerminal::is_terminal(&std::io::stderr()) {
        // No progress bar off a terminal: one line, so that a log or a script's output shows
        // what the command waits for.
        eprintln!(
            "run {run_id} (state {} when asked): following it until it ends (Ctrl-C stops \
             following, not the run)",
            run.summary.state
        );
    }
    let bar = run_bar(run_id);
    bar.set_position(run.measured_points as u64);
    bar.set_message(run.summary.state.clone());
    let mut last_poll = Instant::now();
    let interrupted = tokio::signal::ctrl_c();
    tokio::pin!(interrupted);
    loop {
        let next = async {
            match events.as_mut() {
                Some(stream) => match tokio::time::timeout(EVENT_WAIT, stream.next()).await {
                    Ok(Some(event)) => (Some(event), false),
                    Ok(None) => (None, true),
                    Err(_) => (None, false),
                },
                None => {
                    tokio::time::sleep(EVENT_WAIT).await;
                    (None, false)
                }
            }
        };
        let (event, stream_ended) = tokio::select! {
            next = next => next,
            _ = &mut interrupted => {
                bar.finish_and_clear();
                return Err(CliError::new(format!(
                    "stopped following run {run_id} (Ctrl-C); the run goes on in the daemon: `{}` follows it again, `{}` cancels it (RF off)",
                    client.hint(&format!("watch {run_id}")),
                    client.hint(&format!("cancel {run_id}"))
                )));
            }
        };
        if stream_ended {
            events = None;
        }
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
            if has_ended(&run.summary, before.as_ref()) {
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_character_split_across_chunks_arrives_whole() {
        // "µ" is two bytes in UTF-8 (0xC2 0xB5, RFC 3629); the network may cut between them.
        let message = "data: {\"event\":\"point\",\"note\":\"5 µs\"}\n\n".as_bytes();
        let cut = message.iter().position(|&b| b == 0xC2).expect("the µ") + 1;
        let mut buffer = message[..cut].to_vec();
        assert!(
            take_messages(&mut buffer).is_empty(),
            "half a message waits"
        );
        buffer.extend_from_slice(&message[cut..]);
        let events = take_messages(&mut buffer);
        assert_eq!(events.len(), 1);
        assert_eq!(events[0]["note"], "5 µs");
        assert!(buffer.is_empty());
    }

    #[test]
    fn time_left_follows_the_average_pace_through_slow_steps() {
        // A frequency of a run: a slow reference-and-search step (19 s) then nine quick points
        // (1 s each), 10 frequencies, 90 points in all. The true time left after each point is
        // known; from the third frequency to the last the estimate must stay within a factor 1.6
        // of it (the slow steps come in lumps the average smooths over), and it must never jump
        // by more than that factor from one point to the next (a recent-rate estimate jumps by
        // about 20 here: from 1 s per point to 19 s per point).
        let (per_frequency_slow, per_point) = (19.0, 1.0);
        let total = 90u64;
        let mut elapsed = 0.0;
        let mut previous: Option<f64> = None;
        for done in 1..=total {
            if (done - 1) % 9 == 0 {
                elapsed += per_frequency_slow;
            }
            elapsed += per_point;
            let frequencies_left = (total - done) / 9;
            let truth =
                (total - done) as f64 * per_point + frequencies_left as f64 * per_frequency_slow;
            let estimate = time_left(0, done, total, Duration::from_secs_f64(elapsed))
                .map(|d| d.as_secs_f64());
            if done < 2 {
                assert!(estimate.is_none());
                continue;
            }
            let estimate = estimate.expect("an estimate after two points");
            if (18..total - 9).contains(&done) {
                let ratio = estimate / truth;
                assert!(
                    (1.0 / 1.6..=1.6).contains(&ratio),
                    "point {done}: {estimate} s against {truth} s"
                );
            }
            if let Some(previous) = previous.filter(|p| *p > 30.0) {
                assert!(
                    estimate / previous < 1.6,
                    "point {done}: jumped from {previous} to {estimate}"
                );
            }
            previous = Some(estimate);
        }
        assert_eq!(short_duration(Duration::from_secs(7_500)), "2 h 05 min");
        assert_eq!(short_duration(Duration::from_secs(250)), "4 min 10 s");
    }
}
