//! Run and queue gauges for the Prometheus metrics: runs by state, each bench's queue, the
//! points committed since the daemon started, the progress of the runs being measured, and the
//! webhook outbox by state.
//!
//! Runs by state come from the database at each scrape (one grouped count over an indexed
//! column), so they count runs of every process that wrote there. Queues come from the engine's
//! own bookkeeping. Progress and the committed-point counter come from the engine's progress
//! events: a small task follows the broadcast channel (as the event stream does) and keeps the
//! latest count per run, so a scrape reads memory instead of counting 100,000 point rows. The
//! task starts with the state, so points committed before it are not counted; a follower that
//! falls behind the channel skips old events and catches up with the next point's counts.

use super::metrics::Exposition;
use crate::engine::events::ProgressEvent;
use crate::engine::Engine;
use crate::store::{BenchFault, RunState, WebhookDeliveryCounts};
use prometheus_client::encoding::EncodeLabelSet;
use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use tokio::sync::broadcast::error::RecvError;

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
struct Progress {
    completed: usize,
    total: usize,
}

/// What the progress events have told so far.
#[derive(Debug, Default)]
pub struct RunGauges {
    progress: Mutex<HashMap<i64, Progress>>,
    points_committed: AtomicU64,
}

impl RunGauges {
    /// Starts following `engine`'s progress events (needs a tokio runtime; without one the
    /// progress gauges stay empty and a warning is logged).
    pub fn follow(engine: &Engine) -> Arc<RunGauges> {
        let gauges = Arc::new(RunGauges::default());
        let mut events = engine.subscribe();
        let follower = Arc::downgrade(&gauges);
        match tokio::runtime::Handle::try_current() {
            Ok(runtime) => {
                runtime.spawn(async move {
                    loop {
                        let event = match events.recv().await {
                            Ok(event) => event,
                            Err(RecvError::Lagged(_)) => continue,
                            Err(RecvError::Closed) => break,
                        };
                        // The state was dropped: nobody reads the gauges any more.
                        let Some(gauges) = follower.upgrade() else {
                            break;
                        };
                        gauges.apply(&event);
                    }
                });
            }
            Err(_) => tracing::warn!("no async runtime: run progress gauges are not collected"),
        }
        gauges
    }

    /// Updates the gauges with one event.
    pub fn apply(&self, event: &ProgressEvent) {
        let Ok(mut progress) = self.progress.lock() else {
            return;
        };
        match event {
            ProgressEvent::Started {
                run_id,
                total_points,
                already_measured,
                ..
            } => {
                progress.insert(
                    *run_id,
                    Progress {
                        completed: *already_measured,
                        total: *total_points,
                    },
                );
            }
            ProgressEvent::Point {
                run_id,
                completed_points,
                total_points,
                ..
            } => {
                self.points_committed.fetch_add(1, Ordering::Relaxed);
                progress.insert(
                    *run_id,
                    Progress {
                        completed: *completed_points,
                        total: *total_points,
                    },
                );
            }
            ProgressEvent::PointFailed { run_id, .. } => {
                // Stored without a modulation index: committed all the same.
                self.points_committed.fetch_add(1, Ordering::Relaxed);
                if let Some(p) = progress.get_mut(run_id) {
                    p.completed = (p.completed + 1).min(p.total);
                }
            }
            ProgressEvent::Finished { run_id, .. } => {
                progress.remove(run_id);
            }
            ProgressEvent::Queued { .. }
            | ProgressEvent::Frequency { .. }
            | ProgressEvent::Response { .. }
            | ProgressEvent::ChainFrequency { .. }
            | ProgressEvent::ChainFinished { .. }
            | ProgressEvent::BenchSafety { .. } => {}
        }
    }

    fn progress_of(&self, run_id: i64) -> Option<Progress> {
        self.progress.lock().ok()?.get(&run_id).copied()
    }

    /// Points committed since the gauges started following the engine.
    pub fn points_committed(&self) -> u64 {
        self.points_committed.load(Ordering::Relaxed)
    }
}

/// The label of the per-state families.
#[derive(Debug, Clone, PartialEq, Eq, Hash, EncodeLabelSet)]
struct StateLabel {
    state: &'static str,
}

/// The label of the per-bench families.
#[derive(Debug, Clone, PartialEq, Eq, Hash, EncodeLabelSet)]
struct BenchLabel {
    bench: String,
}

/// The labels of the active run's progress.
#[derive(Debug, Clone, PartialEq, Eq, Hash, EncodeLabelSet)]
struct RunLabels {
    bench: String,
    run_id: i64,
}

/// Adds runs by state (`counts` from the database, every state present, 0 when none).
pub fn expose_runs_by_state(counts: &[(String, i64)], out: &mut Exposition) {
    let samples = RunState::ALL.into_iter().map(|state| {
        let n: i64 = counts
            .iter()
            .filter(|(s, _)| s == state.as_str())
            .map(|(_, n)| *n)
            .sum();
        (
            StateLabel {
                state: state.as_str(),
            },
            n,
        )
    });
    out.gauges("halfwave_runs", "Runs in the database by state.", samples);
}

/// Adds the webhook outbox by state (`store::webhooks`): pending (waiting for an attempt or a
/// retry), delivered, and failed (attempts used up; see the daemon's log for the last error).
pub fn expose_webhook_deliveries(counts: &WebhookDeliveryCounts, out: &mut Exposition) {
    out.gauges(
        "halfwave_webhook_deliveries",
        "Webhook deliveries in the database by state.",
        [
            ("pending", counts.pending),
            ("delivered", counts.delivered),
            ("failed", counts.failed),
        ]
        .into_iter()
        .map(|(state, n)| (StateLabel { state }, n)),
    );
}

fn has_fault(bench: &crate::engine::BenchStatus, fault: BenchFault) -> bool {
    bench
        .safety_fault
        .as_ref()
        .is_some_and(|f| f.fault == fault)
}

/// A count as a gauge value (saturating; no count comes near `i64::MAX`).
fn count(n: usize) -> i64 {
    i64::try_from(n).unwrap_or(i64::MAX)
}

/// Adds each bench's queue, the committed-point counter and the active runs' progress.
pub fn expose_engine(engine: &Engine, gauges: &RunGauges, out: &mut Exposition) {
    let benches = engine.benches();
    let per_bench = |value: &dyn Fn(&crate::engine::BenchStatus) -> i64| {
        benches
            .iter()
            .map(|b| {
                (
                    BenchLabel {
                        bench: b.name.clone(),
                    },
                    value(b),
                )
            })
            .collect::<Vec<_>>()
    };
    out.gauges(
        "halfwave_bench_queued_runs",
        "Runs waiting for the bench.",
        per_bench(&|b| count(b.queued_run_ids.len())),
    );
    out.gauges(
        "halfwave_bench_busy",
        "1 while the bench measures a run, else 0.",
        per_bench(&|b| i64::from(b.active_run_id.is_some())),
    );
    out.gauges(
        "halfwave_bench_rf_output_unconfirmed",
        "1 while the bench's RF output could not be read back off (the daemon keeps trying), else 0.",
        per_bench(&|b| i64::from(has_fault(b, BenchFault::OutputUnconfirmed))),
    );
    out.gauges(
        "halfwave_bench_awaiting_acknowledgement",
        "1 while the bench holds its runs after a safety fault until an operator acknowledges, else 0.",
        per_bench(&|b| i64::from(has_fault(b, BenchFault::AwaitingAcknowledgement))),
    );
    out.counter(
        "halfwave_points_committed",
        "Points measured and committed since the daemon started.",
        gauges.points_committed(),
    );
    let active: Vec<(RunLabels, Progress)> = benches
        .iter()
        .filter_map(|b| {
            let run_id = b.active_run_id?;
            let labels = RunLabels {
                bench: b.name.clone(),
                run_id,
            };
            Some((labels, gauges.progress_of(run_id)?))
        })
        .collect();
    out.gauges(
        "halfwave_run_points_completed",
        "Points of the active run measured so far.",
        active
            .iter()
            .map(|(labels, p)| (labels.clone(), count(p.completed))),
    );
    out.gauges(
        "halfwave_run_points_total",
        "Points in the active run's plan.",
        active
            .iter()
            .map(|(labels, p)| (labels.clone(), count(p.total))),
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    fn point(run_id: i64, completed: usize, total: usize) -> ProgressEvent {
        ProgressEvent::Point {
            run_id,
            completed_points: completed,
            total_points: total,
            frequency_hz: 1e9,
            generator_level_dbm: 0.0,
            v_peak_volts: 1.0,
            modulation_index: 0.5,
            modulation_index_uncertainty: 0.01,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn events_move_progress_and_the_counter() {
        let gauges = RunGauges::default();
        gauges.apply(&ProgressEvent::Started {
            run_id: 4,
            bench: "a".into(),
            total_points: 10,
            already_measured: 3,
        });
        assert_eq!(
            gauges.progress_of(4),
            Some(Progress {
                completed: 3,
                total: 10
            })
        );
        gauges.apply(&point(4, 4, 10));
        gauges.apply(&ProgressEvent::PointFailed {
            run_id: 4,
            frequency_hz: 1e9,
            generator_level_dbm: 2.0,
            reason: "no comb".into(),
        });
        assert_eq!(gauges.progress_of(4).map(|p| p.completed), Some(5));
        assert_eq!(gauges.points_committed(), 2);
        gauges.apply(&ProgressEvent::Finished {
            run_id: 4,
            state: RunState::Completed,
            cause: None,
        });
        assert_eq!(gauges.progress_of(4), None);
        assert_eq!(gauges.points_committed(), 2);
    }

    #[test]
    fn every_state_is_exported_even_at_zero() {
        let mut exposition = Exposition::default();
        expose_runs_by_state(
            &[("completed".into(), 7), ("running".into(), 1)],
            &mut exposition,
        );
        let out = exposition.render();
        assert!(out.contains("halfwave_runs{state=\"completed\"} 7\n"));
        assert!(out.contains("halfwave_runs{state=\"running\"} 1\n"));
        assert!(out.contains("halfwave_runs{state=\"interrupted\"} 0\n"));
        assert_eq!(
            out.lines()
                .filter(|l| l.starts_with("halfwave_runs{"))
                .count(),
            6
        );
    }
}
