//! What a webhook delivery says: which engine events become notifications, and the JSON body.
//!
//! Pure: an engine [`ProgressEvent`] and the run it belongs to (read from the store by the
//! caller) in, a [`Payload`] out. Only the ends of runs and the safety holds of benches are
//! notified; progress within a run is for the event stream, not for a chat channel.

use super::settings::EventKind;
use crate::engine::events::ProgressEvent;
use crate::engine::rf_safety::SafetyState;
use crate::store::{RunRecord, RunState};
use serde::{Deserialize, Serialize};

/// Longest cause quoted in a summary, in characters (the full cause is in `cause`).
const SUMMARY_CAUSE_CHARS: usize = 200;

/// The JSON body of a delivery. Field names are stable; receivers should ignore fields they do
/// not know, as more may be added.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Payload {
    /// `run.completed`, `run.failed`, `run.interrupted`, `run.cancelled`, `bench.hold` or
    /// `bench.hold_cleared`.
    pub event_type: String,
    /// Unique per event, the same on every attempt and for every receiver (de-duplicate by it).
    pub event_id: String,
    /// When the daemon saw the event, RFC 3339 in UTC.
    pub occurred_at: String,
    pub occurred_at_unix_ms: i64,
    /// The run, for run events.
    pub run_id: Option<i64>,
    pub bench: String,
    /// The modulator's serial number, for run events.
    pub device_serial: Option<String>,
    /// The run's state (`completed`, `failed`, ...) or the bench's safety state
    /// (`output_unconfirmed`, `awaiting_acknowledgement`, `clear`).
    pub state: String,
    /// Why it ended or why the bench is held, when known.
    pub cause: Option<String>,
    /// One line for a person.
    pub summary: String,
}

/// The notification kind of an engine event; `None` for events that are not notified.
pub fn kind_of(event: &ProgressEvent) -> Option<EventKind> {
    match event {
        ProgressEvent::Finished { state, .. } => match state {
            RunState::Completed => Some(EventKind::RunCompleted),
            RunState::Failed => Some(EventKind::RunFailed),
            RunState::Interrupted => Some(EventKind::RunInterrupted),
            RunState::Cancelled => Some(EventKind::RunCancelled),
            RunState::Queued | RunState::Running => None,
        },
        ProgressEvent::BenchSafety {
            state: SafetyState::Clear,
            ..
        } => Some(EventKind::BenchHoldCleared),
        ProgressEvent::BenchSafety { .. } => Some(EventKind::BenchHold),
        _ => None,
    }
}

/// The body for `event` (of kind `kind`), with `run` its run when it has one and the store had it.
pub fn payload(
    kind: EventKind,
    event_id: &str,
    occurred_at_unix_ms: i64,
    event: &ProgressEvent,
    run: Option<&RunRecord>,
) -> Payload {
    let (run_id, bench, device_serial, state, cause) = match event {
        ProgressEvent::Finished {
            run_id,
            state,
            cause,
        } => (
            Some(*run_id),
            run.map(|r| r.bench_name.clone()).unwrap_or_default(),
            run.map(|r| r.device_serial.clone()),
            state.as_str().to_string(),
            cause.clone(),
        ),
        ProgressEvent::BenchSafety {
            bench,
            state,
            cause,
        } => (
            None,
            bench.clone(),
            None,
            state.as_str().to_string(),
            cause.clone(),
        ),
        other => (other.run_id(), String::new(), None, String::new(), None),
    };
    let quoted = cause.as_deref().map(shorten);
    let run_text = |verb: &str| {
        let device = device_serial
            .as_deref()
            .map(|s| format!(" (device {s})"))
            .unwrap_or_default();
        let bench = if bench.is_empty() {
            String::new()
        } else {
            format!(" on bench {bench}")
        };
        let because = quoted
            .as_deref()
            .map(|c| format!(": {c}"))
            .unwrap_or_default();
        format!(
            "run {}{device}{bench} {verb}{because}",
            run_id.unwrap_or_default()
        )
    };
    let summary = match kind {
        EventKind::RunCompleted => run_text("completed"),
        EventKind::RunFailed => run_text("failed"),
        EventKind::RunInterrupted => run_text("was interrupted (it can be resumed)"),
        EventKind::RunCancelled => run_text("was cancelled"),
        EventKind::BenchHold if state == "output_unconfirmed" => format!(
            "bench {bench}: the RF output could not be confirmed off{}; the daemon keeps trying, check the source",
            quoted.as_deref().map(|c| format!(" ({c})")).unwrap_or_default()
        ),
        EventKind::BenchHold => format!(
            "bench {bench} is held: the RF output is off after a fault{}; an operator must acknowledge before runs start again",
            quoted.as_deref().map(|c| format!(" ({c})")).unwrap_or_default()
        ),
        EventKind::BenchHoldCleared => {
            format!("bench {bench}: the safety hold was acknowledged; it takes runs again")
        }
    };
    Payload {
        event_type: kind.as_str().to_string(),
        event_id: event_id.to_string(),
        occurred_at: jiff::Timestamp::from_millisecond(occurred_at_unix_ms)
            .map(|t| t.to_string())
            .unwrap_or_default(),
        occurred_at_unix_ms,
        run_id,
        bench,
        device_serial,
        state,
        cause,
        summary,
    }
}

fn shorten(cause: &str) -> String {
    if cause.chars().count() <= SUMMARY_CAUSE_CHARS {
        cause.to_string()
    } else {
        let mut s: String = cause.chars().take(SUMMARY_CAUSE_CHARS).collect();
        s.push('…');
        s
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::RunState;

    fn run() -> RunRecord {
        RunRecord {
            id: 7,
            plan_json: "{}".into(),
            device_id: 1,
            device_serial: "EG-PM-0042".into(),
            bench_name: "sim".into(),
            chain_calibration_id: 1,
            chain_name: "flat".into(),
            chain_version: 1,
            state: RunState::Failed,
            submitted_by: "lab".into(),
            created_at_unix_ms: 0,
            started_at_unix_ms: None,
            finished_at_unix_ms: None,
            cause: Some("the analyzer stopped answering".into()),
            resumable: true,
            software_version: None,
            analysis_method: None,
            submitted_by_token_id: None,
            hard_limit_at_modulator_dbm: None,
            planned_max_at_modulator_dbm: None,
            source_level_accuracy_db: None,
        }
    }

    fn finished(state: &str, cause: Option<&str>) -> ProgressEvent {
        ProgressEvent::Finished {
            run_id: 7,
            state: RunState::ALL
                .into_iter()
                .find(|s| s.as_str() == state)
                .expect("a run state"),
            cause: cause.map(str::to_string),
        }
    }

    #[test]
    fn only_run_ends_and_bench_holds_are_notified() {
        assert_eq!(
            kind_of(&finished("completed", None)),
            Some(EventKind::RunCompleted)
        );
        assert_eq!(
            kind_of(&finished("cancelled", None)),
            Some(EventKind::RunCancelled)
        );
        assert_eq!(
            kind_of(&finished("interrupted", None)),
            Some(EventKind::RunInterrupted)
        );
        assert_eq!(
            kind_of(&finished("failed", None)),
            Some(EventKind::RunFailed)
        );
        let hold = |state: SafetyState| ProgressEvent::BenchSafety {
            bench: "sim".into(),
            state,
            cause: None,
        };
        assert_eq!(
            kind_of(&hold(SafetyState::AwaitingAcknowledgement)),
            Some(EventKind::BenchHold)
        );
        assert_eq!(
            kind_of(&hold(SafetyState::OutputUnconfirmed)),
            Some(EventKind::BenchHold)
        );
        assert_eq!(
            kind_of(&hold(SafetyState::Clear)),
            Some(EventKind::BenchHoldCleared)
        );
        assert_eq!(
            kind_of(&ProgressEvent::Queued {
                run_id: 1,
                bench: "sim".into()
            }),
            None
        );
    }

    #[test]
    fn a_failed_run_names_run_device_bench_and_cause() {
        let event = finished("failed", Some("the analyzer stopped answering"));
        // 2026-12-03 06:00:00 UTC (1,796,277,600 s since the epoch, checked with `date -u -d @1796277600`).
        let p = payload(
            EventKind::RunFailed,
            "abc",
            1_796_277_600_000,
            &event,
            Some(&run()),
        );
        assert_eq!(p.event_type, "run.failed");
        assert_eq!(p.occurred_at, "2026-12-03T06:00:00Z");
        assert_eq!(p.run_id, Some(7));
        assert_eq!(p.bench, "sim");
        assert_eq!(p.device_serial.as_deref(), Some("EG-PM-0042"));
        assert_eq!(p.state, "failed");
        assert_eq!(
            p.summary,
            "run 7 (device EG-PM-0042) on bench sim failed: the analyzer stopped answering"
        );
    }

    #[test]
    fn a_long_cause_is_shortened_in_the_summary_only() {
        let cause = "x".repeat(500);
        let event = finished("failed", Some(&cause));
        let p = payload(EventKind::RunFailed, "abc", 0, &event, None);
        assert_eq!(p.cause.as_deref(), Some(cause.as_str()));
        assert!(p.summary.chars().count() < 260, "{}", p.summary);
    }
}
