//! Progress events: what a run tells its watchers as it goes.
//!
//! The engine publishes on a `tokio::sync::broadcast` channel; the HTTP API turns the events into
//! server-sent events and the CLI into progress bars. A slow watcher that falls behind loses old
//! events (broadcast semantics), never slows the run. Field names carry units.

use super::rf_safety::SafetyState;
use crate::store::RunState;
use serde::Serialize;

/// One thing that happened in a run.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "event", rename_all = "snake_case")]
pub enum ProgressEvent {
    /// A run was accepted and waits for its bench.
    Queued { run_id: i64, bench: String },
    /// A run started (or resumed) on its bench.
    Started {
        run_id: i64,
        bench: String,
        total_points: usize,
        already_measured: usize,
    },
    /// One point was measured, analysed and committed.
    Point {
        run_id: i64,
        completed_points: usize,
        total_points: usize,
        frequency_hz: f64,
        generator_level_dbm: f64,
        v_peak_volts: f64,
        modulation_index: f64,
        modulation_index_uncertainty: f64,
        /// Codes of the analysis' named warnings on this point (`index_not_within_one_percent`:
        /// beta's uncertainty does not keep it within 1 %); the messages are in the point's
        /// stored analysis.
        warnings: Vec<&'static str>,
    },
    /// A point could not be analysed; it is stored without a modulation index.
    PointFailed {
        run_id: i64,
        frequency_hz: f64,
        generator_level_dbm: f64,
        reason: String,
    },
    /// All levels of one frequency are done and V_pi was fitted.
    Frequency {
        run_id: i64,
        frequency_hz: f64,
        v_pi_volts: Option<f64>,
        v_pi_uncertainty_volts: Option<f64>,
        note: Option<String>,
    },
    /// Every frequency of a run is done: its electro-optic response, 20 log10(V_pi(f_ref) /
    /// V_pi(f)) against the lowest frequency with a V_pi, and where it falls by 3 and 6 dB
    /// (`None`: not within the measured range). Sent before `Finished` on a completed run with at
    /// least one V_pi.
    Response {
        run_id: i64,
        reference_frequency_hz: f64,
        points: Vec<ResponsePointEvent>,
        f_3db_hz: Option<f64>,
        f_6db_hz: Option<f64>,
    },
    /// A chain calibration (`POST /chain-calibration-runs`, power sensor) measured one
    /// frequency: the chain's gain there and its standard uncertainty. Chain calibrations have
    /// their own ids (`chain_run_id`, not a run's); every watcher gets these events.
    ChainFrequency {
        chain_run_id: i64,
        bench: String,
        completed_frequencies: usize,
        total_frequencies: usize,
        frequency_hz: f64,
        gain_db: f64,
        gain_uncertainty_db: f64,
    },
    /// A chain calibration ended; `chain_id` is the stored chain version when it completed.
    ChainFinished {
        chain_run_id: i64,
        bench: String,
        state: ChainRunEnd,
        cause: Option<String>,
        chain_id: Option<i64>,
    },
    /// The run ended: completed, failed, cancelled or interrupted (the lowercase word in JSON).
    Finished {
        run_id: i64,
        state: RunState,
        cause: Option<String>,
    },
    /// A bench's RF safety state changed: `output_unconfirmed`, `awaiting_acknowledgement` or
    /// `clear` (see `engine::rf_safety`). Not tied to a run; sent to every watcher.
    BenchSafety {
        bench: String,
        state: SafetyState,
        cause: Option<String>,
    },
}

/// How a chain calibration ended, in a [`ProgressEvent::ChainFinished`] (the lowercase word in
/// JSON, as stored in `chain_calibration_runs.state`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ChainRunEnd {
    Completed,
    Failed,
    Cancelled,
}

impl ChainRunEnd {
    /// The stored word.
    pub fn as_str(self) -> &'static str {
        match self {
            ChainRunEnd::Completed => "completed",
            ChainRunEnd::Failed => "failed",
            ChainRunEnd::Cancelled => "cancelled",
        }
    }
}

/// One frequency of the response curve in a [`ProgressEvent::Response`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ResponsePointEvent {
    pub frequency_hz: f64,
    pub response_db: f64,
    pub response_uncertainty_db: f64,
}

impl ProgressEvent {
    /// The run this event belongs to; `None` for bench and chain calibration events, which every
    /// watcher gets.
    pub fn run_id(&self) -> Option<i64> {
        match self {
            ProgressEvent::Queued { run_id, .. }
            | ProgressEvent::Started { run_id, .. }
            | ProgressEvent::Point { run_id, .. }
            | ProgressEvent::PointFailed { run_id, .. }
            | ProgressEvent::Frequency { run_id, .. }
            | ProgressEvent::Response { run_id, .. }
            | ProgressEvent::Finished { run_id, .. } => Some(*run_id),
            ProgressEvent::ChainFrequency { .. }
            | ProgressEvent::ChainFinished { .. }
            | ProgressEvent::BenchSafety { .. } => None,
        }
    }
}
