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
    #[error("could not open the database at {location}: {source}; check that the directory exists and is writable")]
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

    /// The frequency asked for lies outside what the newest completed run measured.
    #[error("{frequency_hz} Hz is outside the range measured for device {serial} in run {run_id} ({min_hz} Hz to {max_hz} Hz); V_pi is not extrapolated, measure that frequency")]
    OutsideMeasuredRange {
        serial: String,
        run_id: i64,
        frequency_hz: f64,
        min_hz: f64,
        max_hz: f64,
    },
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
