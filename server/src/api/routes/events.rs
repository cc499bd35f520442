//! Live run progress as server-sent events (the HTML living standard's `text/event-stream`).
//!
//! Each engine [`ProgressEvent`] becomes one SSE message: `event:` is omitted so browsers deliver
//! everything to `onmessage`, `data:` is the event's JSON (with its own `event` member naming the
//! kind) and `id:` is a per-connection counter. `?run_id=` narrows the stream to one run. A watcher
//! that falls behind the broadcast buffer gets a `lagged` message saying how many events it
//! missed, never a stalled engine. A keep-alive comment every 15 s keeps proxies from closing an
//! idle stream. The stream ends when the daemon shuts down, so graceful shutdown is not held up,
//! and after `?timeout_s=` seconds when that is given, so a script or a test tool can sample it.
//!
//! Authentication: the bearer header, or `?ticket=` with a one-time ticket from
//! `POST /api/v1/events/ticket` ([`crate::api::event_tickets`]), because EventSource cannot set
//! headers and a token in the URL would be logged by proxies.

use crate::api::auth::{Viewer, ViewerFromHeaderOrTicket};
use crate::api::event_tickets::TICKET_LIFETIME;
use crate::api::params::ApiQuery;
use crate::api::problem::{FieldProblem, Problem};
use crate::api::AppState;
use crate::engine::events::ProgressEvent;
use axum::extract::State;
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::Json;
use futures_util::stream::Stream;
use serde::{Deserialize, Serialize};
use std::convert::Infallible;
use std::time::Duration;
use tokio::sync::broadcast::error::RecvError;
use utoipa::{IntoParams, ToSchema};

/// Query of the event stream.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct EventsQuery {
    /// Only events of this run.
    pub run_id: Option<i64>,
    /// A one-time ticket from `POST /api/v1/events/ticket`, for clients that cannot send an
    /// Authorization header (EventSource). Opens one stream within 30 s of being issued.
    pub ticket: Option<String>,
    /// End the stream after this many seconds (up to a day); without it the stream lasts until
    /// the client leaves or the daemon stops.
    #[param(exclusive_minimum = 0, maximum = 86400)]
    pub timeout_s: Option<f64>,
}

/// The longest `timeout_s` accepted: a day.
pub const MAX_STREAM_TIMEOUT_S: f64 = 86_400.0;

/// What the event stream carries, for the document.
const STREAM_DESCRIPTION: &str = "Server-sent events (`text/event-stream`). Each message's `data:` is one JSON object whose `event` member names its kind: `queued`, `started`, `point`, `point_failed`, `frequency`, `response`, `finished` (run progress, each with `run_id`), `bench_safety` (a bench's RF safety state, sent to every watcher), `chain_frequency` and `chain_finished` (a chain calibration's progress and end, each with `chain_run_id`, sent to every watcher) or `lagged` (`missed_events`: the watcher fell behind). `id:` counts messages per connection; a comment line every 15 s keeps the connection alive. The stream ends after `timeout_s` when given, and when the daemon stops.";

/// Live progress of runs as server-sent events; each `data:` is one JSON progress event.
#[utoipa::path(get, path = "/api/v1/events", tag = "runs", security(("bearer" = [])),
    params(EventsQuery),
    responses((status = 200, description = STREAM_DESCRIPTION, content_type = "text/event-stream", body = String),
              (status = 401, body = Problem),
              (status = 503, description = "Read-only server without an engine", body = Problem)))]
pub async fn events(
    _caller: ViewerFromHeaderOrTicket,
    State(state): State<AppState>,
    ApiQuery(query): ApiQuery<EventsQuery>,
) -> Result<Sse<impl Stream<Item = Result<Event, Infallible>>>, Problem> {
    let deadline = match query.timeout_s {
        None => None,
        Some(s) if s.is_finite() && s > 0.0 && s <= MAX_STREAM_TIMEOUT_S => {
            Some(tokio::time::Instant::now() + Duration::from_secs_f64(s))
        }
        Some(s) => {
            return Err(Problem::invalid(
                format!("timeout_s: {s} is not a number of seconds above 0 and at most {MAX_STREAM_TIMEOUT_S}"),
                vec![FieldProblem::new(
                    "timeout_s",
                    format!("{s} is outside (0, {MAX_STREAM_TIMEOUT_S}] seconds"),
                )],
            ))
        }
    };
    let receiver = state.engine()?.subscribe();
    let shutdown = state.shutdown_signal();
    let stream = futures_util::stream::unfold(
        (receiver, shutdown, 0u64, query.run_id),
        move |(mut receiver, mut shutdown, mut counter, run_filter)| async move {
            loop {
                let timed_out = async {
                    match deadline {
                        Some(at) => tokio::time::sleep_until(at).await,
                        None => std::future::pending().await,
                    }
                };
                let received = tokio::select! {
                    received = receiver.recv() => received,
                    _ = shutdown.wait_for(|stopping| *stopping) => return None,
                    _ = timed_out => return None,
                };
                let data = match received {
                    Ok(event) => {
                        // Bench events (no run) go to every watcher.
                        if matches!((run_filter, event.run_id()), (Some(f), Some(r)) if f != r) {
                            continue;
                        }
                        event_json(&event)
                    }
                    Err(RecvError::Lagged(missed)) => {
                        format!("{{\"event\":\"lagged\",\"missed_events\":{missed}}}")
                    }
                    Err(RecvError::Closed) => return None,
                };
                counter += 1;
                let event = Event::default().id(counter.to_string()).data(data);
                return Some((Ok(event), (receiver, shutdown, counter, run_filter)));
            }
        },
    );
    Ok(Sse::new(stream).keep_alive(KeepAlive::new().interval(Duration::from_secs(15))))
}

/// A one-time ticket for the event stream.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct EventTicket {
    /// Pass as `GET /api/v1/events?ticket=...`; opens one stream, once.
    pub ticket: String,
    /// Seconds left to open the stream.
    pub expires_in_s: u64,
}

/// A one-time ticket that opens one event stream within 30 s, with the role of the token that
/// asked for it: for browsers, whose EventSource cannot send the Authorization header, so the
/// token itself never appears in a URL (which proxies log).
#[utoipa::path(post, path = "/api/v1/events/ticket", tag = "runs", security(("bearer" = [])),
    responses((status = 200, description = "A ticket for `GET /api/v1/events?ticket=`", body = EventTicket),
              (status = 401, body = Problem)))]
pub async fn event_ticket(
    caller: Viewer,
    State(state): State<AppState>,
) -> Result<Json<EventTicket>, Problem> {
    let ticket = state
        .event_tickets()
        .issue(caller.0, std::time::Instant::now())
        .map_err(|e| Problem::internal(e.to_string()))?;
    Ok(Json(EventTicket {
        ticket,
        expires_in_s: TICKET_LIFETIME.as_secs(),
    }))
}

fn event_json(event: &ProgressEvent) -> String {
    serde_json::to_string(event).unwrap_or_else(|e| {
        format!(
            "{{\"event\":\"encoding_error\",\"run_id\":{},\"detail\":\"{e}\"}}",
            event
                .run_id()
                .map_or("null".to_string(), |id| id.to_string())
        )
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::RunState;

    #[test]
    fn a_finished_event_keeps_its_json() {
        // The run state is the enum in the engine and the same lowercase word on the wire as
        // when it was a string (the dashboard, the CLI and webhook receivers read this).
        for (state, word) in [
            (RunState::Completed, "completed"),
            (RunState::Failed, "failed"),
            (RunState::Cancelled, "cancelled"),
            (RunState::Interrupted, "interrupted"),
        ] {
            let event = ProgressEvent::Finished {
                run_id: 12,
                state,
                cause: Some("operator".into()),
            };
            assert_eq!(
                event_json(&event),
                format!(
                    r#"{{"event":"finished","run_id":12,"state":"{word}","cause":"operator"}}"#
                )
            );
        }
    }

    #[test]
    fn chain_calibration_events_name_their_chain_run_and_go_to_every_watcher() {
        use crate::engine::events::ChainRunEnd;
        let end = ProgressEvent::ChainFinished {
            chain_run_id: 3,
            bench: "sim".into(),
            state: ChainRunEnd::Completed,
            cause: None,
            chain_id: Some(8),
        };
        assert_eq!(
            event_json(&end),
            r#"{"event":"chain_finished","chain_run_id":3,"bench":"sim","state":"completed","cause":null,"chain_id":8}"#
        );
        assert_eq!(end.run_id(), None);
        let frequency = ProgressEvent::ChainFrequency {
            chain_run_id: 3,
            bench: "sim".into(),
            completed_frequencies: 1,
            total_frequencies: 5,
            frequency_hz: 2e8,
            gain_db: 18.25,
            gain_uncertainty_db: 0.08,
        };
        assert!(
            event_json(&frequency).starts_with(r#"{"event":"chain_frequency","chain_run_id":3,"#)
        );
        assert_eq!(frequency.run_id(), None);
    }
}
