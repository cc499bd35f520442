//! Live run progress as server-sent events (the HTML living standard's `text/event-stream`).
//!
//! Each engine [`ProgressEvent`] becomes one SSE message: `event:` is omitted so browsers deliver
//! everything to `onmessage`, `data:` is the event's JSON (with its own `event` member naming the
//! kind) and `id:` is a per-connection counter. `?run_id=` narrows the stream to one run. A watcher
//! that falls behind the broadcast buffer gets a `lagged` message saying how many events it
//! missed, never a stalled engine. A keep-alive comment every 15 s keeps proxies from closing an
//! idle stream. The stream ends when the daemon shuts down, so graceful shutdown is not held up.
//!
//! Authentication: the bearer header, or `?access_token=` because EventSource cannot set headers.

use crate::api::auth::ViewerFromHeaderOrQuery;
use crate::api::params::ApiQuery;
use crate::api::problem::Problem;
use crate::api::AppState;
use crate::engine::events::ProgressEvent;
use axum::extract::State;
use axum::response::sse::{Event, KeepAlive, Sse};
use futures_util::stream::Stream;
use serde::Deserialize;
use std::convert::Infallible;
use std::time::Duration;
use tokio::sync::broadcast::error::RecvError;
use utoipa::IntoParams;

/// Query of the event stream.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct EventsQuery {
    /// Only events of this run.
    pub run_id: Option<i64>,
    /// The token, for clients that cannot send an Authorization header (EventSource).
    pub access_token: Option<String>,
}

/// Live progress of runs as server-sent events; each `data:` is one JSON progress event.
#[utoipa::path(get, path = "/api/v1/events", tag = "runs", security(("bearer" = [])),
    params(EventsQuery),
    responses((status = 200, description = "text/event-stream of progress events (queued, started, point, point_failed, frequency, response, finished, lagged)", content_type = "text/event-stream", body = String),
              (status = 401, body = Problem)))]
pub async fn events(
    _caller: ViewerFromHeaderOrQuery,
    State(state): State<AppState>,
    ApiQuery(query): ApiQuery<EventsQuery>,
) -> Result<Sse<impl Stream<Item = Result<Event, Infallible>>>, Problem> {
    let receiver = state.engine()?.subscribe();
    let shutdown = state.shutdown_signal();
    let stream = futures_util::stream::unfold(
        (receiver, shutdown, 0u64, query.run_id),
        |(mut receiver, mut shutdown, mut counter, run_filter)| async move {
            loop {
                let received = tokio::select! {
                    received = receiver.recv() => received,
                    _ = shutdown.wait_for(|stopping| *stopping) => return None,
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
