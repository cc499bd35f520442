//! The one error type of the store.
//!
//! Every variant says what failed and what the operator or caller can do about it, so the API can
//! turn it into a problem-details response and the CLI can print it as it is. Variants the engine
//! acts on ([`StoreError::DuplicatePoint`], [`StoreError::InvalidTransition`]) carry the keys it
//! needs.

use super::records::RunState;
use super::trace_codec::TraceCodecError;

/// What went wrong in the store.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// The database file could not be opened or created.
    #[error("could not open the database at {location}: {source}; for a file, check that the directory exists and is writable; for a PostgreSQL URL, check that the server is reachable, the database exists and the user may connect")]
    Open {
        location: String,
        #[source]
        source: sqlx::Error,
    },

    /// The schema could not be brought up to date.
    #[error("could not apply the database migrations: {source}; the file may come from a newer Halfwave (upgrade) or be damaged (restore a backup)")]
    Migrate {
        #[source]
        source: sqlx::migrate::MigrateError,
    },

    /// A statement failed.
    #[error("database error while {operation}: {source}")]
    Database {
        operation: &'static str,
        #[source]
        source: sqlx::Error,
    },

    /// Nothing has this key.
    #[error("no {what} {key}; check the identifier")]
    NotFound { what: &'static str, key: String },

    /// A run cannot move from its current state to the requested one.
    #[error("run {run_id} is {from} and cannot become {to}")]
    InvalidTransition {
        run_id: i64,
        from: RunState,
        to: RunState,
    },

    /// The point of this run at this grid position is already stored (a resumed run must skip it).
    #[error("run {run_id} already has the point at frequency index {frequency_index}, level index {level_index}; skip it when resuming")]
    DuplicatePoint {
        run_id: i64,
        frequency_index: u32,
        level_index: u32,
    },

    /// A value handed to the store is unusable.
    #[error("{what} is not valid: {reason}")]
    InvalidInput { what: &'static str, reason: String },

    /// A stored value cannot be read back as the type it should be.
    #[error("stored {what} is damaged: {detail}; restore a backup or re-measure")]
    CorruptRow { what: &'static str, detail: String },

    /// A trace could not be encoded or decoded.
    #[error(transparent)]
    TraceCodec(#[from] TraceCodecError),

    /// The device has no completed run with V_pi results.
    #[error("device {serial} has no completed run with V_pi results; calibrate it first")]
    NoCompletedRun { serial: String },

    /// The frequency asked for lies outside what the chosen run (the pinned one, or the one asked
    /// for) measured. `hint` says, starting with "; ", what else may answer.
    #[error("{frequency_hz} Hz is outside the range measured for device {serial} in run {run_id} ({min_hz} Hz to {max_hz} Hz){hint}; V_pi is not extrapolated, measure that frequency")]
    OutsideMeasuredRange {
        serial: String,
        run_id: i64,
        frequency_hz: f64,
        min_hz: f64,
        max_hz: f64,
        hint: String,
    },

    /// No completed calibration of the device covers the frequency (and none is pinned).
    #[error("{frequency_hz} Hz is outside every completed calibration of device {serial} ({ranges}); V_pi is not extrapolated, measure that frequency")]
    NotCovered {
        serial: String,
        frequency_hz: f64,
        /// The measured range of each run, e.g. "run 2: 200000000 Hz to 20000000000 Hz".
        ranges: String,
    },

    /// The run named is not one of the device's completed calibrations with V_pi results.
    #[error("run {run_id} is not a completed calibration of device {serial} with V_pi results; its calibrations are listed at /api/v1/devices/{serial}/calibrations")]
    NotACalibration { serial: String, run_id: i64 },

    /// The run cannot be pinned as a reference calibration in its state.
    #[error("run {run_id} cannot be the reference calibration of device {serial}: {reason}; only a completed run with V_pi results can be pinned")]
    NotPinnable {
        serial: String,
        run_id: i64,
        reason: String,
    },

    /// The run belongs to another device than the one it is to be pinned on.
    #[error("run {run_id} is a run of device {run_serial}, not of {serial}; a run can be pinned only on its own device")]
    RunOfAnotherDevice {
        serial: String,
        run_id: i64,
        run_serial: String,
    },

    /// A bench's lease is held by another live daemon (shared database).
    #[error("{detail}; stop that daemon first, or remove the bench from this daemon's configuration; nothing was changed")]
    BenchHeld { detail: String },

    /// An unpin on a device without a pinned run.
    #[error("device {serial} has no pinned run; nothing to unpin")]
    NothingPinned { serial: String },
}

impl StoreError {
    /// Wraps a sqlx error with what the store was doing.
    pub(crate) fn database(operation: &'static str) -> impl FnOnce(sqlx::Error) -> StoreError {
        move |source| StoreError::Database { operation, source }
    }

    /// Refuses a number that is not finite.
    pub(crate) fn require_finite(what: &'static str, value: f64) -> Result<f64, StoreError> {
        if value.is_finite() {
            Ok(value)
        } else {
            Err(StoreError::InvalidInput {
                what,
                reason: format!("{value} is not a finite number"),
            })
        }
    }
}

/// True when a sqlx error is a violated UNIQUE (or primary-key) constraint.
pub(crate) fn is_unique_violation(error: &sqlx::Error) -> bool {
    matches!(error, sqlx::Error::Database(db) if db.is_unique_violation())
}
