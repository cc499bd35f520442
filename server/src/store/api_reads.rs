//! Reads the HTTP API serves many times a second, kept small: a run's point count, one page of
//! its points, a fingerprint of a device's completed calibrations, and the runs counted by state
//! (for the metrics).
//!
//! The SQLite driver hands every row from its database thread to the async side one at a time,
//! so a read's cost grows with the rows it returns more than with the work SQLite does: counting
//! in SQL and paging with LIMIT/OFFSET return one row and one page instead of every point of a
//! run. The fingerprint lets the API keep a device's calibration history in memory and ask the
//! database only whether it changed: completed runs are never modified or deleted (completed is
//! a final state, and a run's results are written before it completes), so the number of a
//! device's completed runs and the highest such id change exactly when its history does; the
//! pinned run's id, read in the same row, changes when a pin does.

use super::{PointRecord, RunState, Store, StoreError};

/// What identifies the set of a device's completed runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct CompletedRunsFingerprint {
    pub device_id: i64,
    pub completed_runs: i64,
    /// 0 when there is none.
    pub newest_run_id: i64,
    /// The pinned reference calibration; 0 when none is pinned.
    pub pinned_run_id: i64,
}

impl Store {
    /// How many points of the run are stored.
    pub async fn point_count(&self, run_id: i64) -> Result<i64, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_scalar("SELECT COUNT(*) FROM points WHERE run_id = $1")
            .bind(run_id)
            .fetch_one(pool)
            .await)
            .map_err(StoreError::database("counting a run's points"))
    }

    /// One page of the run's points, by frequency index then level index (as
    /// [`Store::points_of_run`] orders them).
    pub async fn points_page(
        &self,
        run_id: i64,
        limit: u32,
        offset: u64,
    ) -> Result<Vec<PointRecord>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, PointRecord>(
            "SELECT id, run_id, frequency_index, level_index, frequency_hz, generator_level_dbm, \
                 level_at_modulator_dbm, v_peak_volts, modulation_index, modulation_index_uncertainty, \
                 asymmetry_db, line_table_json, analysis_json, measured_at_unix_ms \
             FROM points WHERE run_id = $1 ORDER BY frequency_index, level_index LIMIT $2 OFFSET $3",
        )
        .bind(run_id)
        .bind(i64::from(limit))
        .bind(i64::try_from(offset).unwrap_or(i64::MAX))
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading a page of a run's points"))
    }

    /// How many runs are in each state (states with none are absent), in one grouped count.
    pub async fn run_counts_by_state(&self) -> Result<Vec<(String, i64)>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as("SELECT state, COUNT(*) FROM runs GROUP BY state")
            .fetch_all(pool)
            .await)
            .map_err(StoreError::database("counting runs by state"))
    }

    /// The device's id with the number of its completed runs, the newest one's id and its pinned
    /// run's id, in one round trip. [`StoreError::NotFound`] when no device has this serial
    /// number.
    pub async fn completed_runs_fingerprint(
        &self,
        serial: &str,
    ) -> Result<CompletedRunsFingerprint, StoreError> {
        let row: Option<(i64, i64, i64, i64)> = on_pool!(&self.pool, pool => sqlx::query_as(
            "SELECT d.id, COUNT(r.id), COALESCE(MAX(r.id), 0), \
                 COALESCE((SELECT p.run_id FROM device_pins p WHERE p.device_id = d.id), 0) \
             FROM devices d \
             LEFT JOIN runs r ON r.device_id = d.id AND r.state = $2 \
             WHERE d.serial = $1 GROUP BY d.id",
        )
        .bind(serial)
        .bind(RunState::Completed.as_str())
        .fetch_optional(pool)
        .await)
        .map_err(StoreError::database("reading a device's completed runs"))?;
        let (device_id, completed_runs, newest_run_id, pinned_run_id) =
            row.ok_or_else(|| StoreError::NotFound {
                what: "device with serial",
                key: serial.to_string(),
            })?;
        Ok(CompletedRunsFingerprint {
            device_id,
            completed_runs,
            newest_run_id,
            pinned_run_id,
        })
    }
}
