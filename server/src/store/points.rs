//! Points, their traces, RF-off reference traces and per-frequency V_pi results.
//!
//! [`Store::commit_point`] is the engine's hot path: the trace is compressed first, then the point
//! and its trace are written by one INSERT (atomic by itself, one round trip to the database
//! thread), so a killed daemon loses at most the point in flight and the write lock is held for
//! microseconds. The UNIQUE (run, frequency index, level index) key makes a second commit of the
//! same grid position fail with [`StoreError::DuplicatePoint`] instead of storing it twice.

use super::error::is_unique_violation;
use super::trace_codec;
use super::{
    now_unix_ms, FrequencyResultRecord, NewFrequencyResult, NewPoint, PointRecord, ReferenceTrace,
    Store, StoreError,
};
use halfwave_units::{Hz, Trace};

/// True when a sqlx error is a violated FOREIGN KEY constraint.
fn is_foreign_key_violation(error: &sqlx::Error) -> bool {
    matches!(error, sqlx::Error::Database(db) if db.is_foreign_key_violation())
}

fn optional_finite(what: &'static str, value: Option<f64>) -> Result<Option<f64>, StoreError> {
    value
        .map(|v| StoreError::require_finite(what, v))
        .transpose()
}

impl Store {
    /// Commits one measured point with its trace; returns the point's id.
    pub async fn commit_point(&self, point: &NewPoint<'_>) -> Result<i64, StoreError> {
        let frequency = StoreError::require_finite("point frequency", point.frequency.value())?;
        let generator_level =
            StoreError::require_finite("generator level", point.generator_level.value())?;
        let level_at_modulator =
            StoreError::require_finite("level at modulator", point.level_at_modulator.value())?;
        let v_peak = StoreError::require_finite("peak voltage", point.v_peak.value())?;
        let beta = optional_finite("modulation index", point.modulation_index)?;
        let beta_uncertainty = optional_finite(
            "modulation index uncertainty",
            point.modulation_index_uncertainty,
        )?;
        let asymmetry = optional_finite("asymmetry", point.asymmetry.map(|a| a.value()))?;
        let encoded = trace_codec::encode(point.trace)?;
        let point_count = point.trace.len() as i64;
        let line_table = super::json_text(&point.line_table);
        let analysis = super::json_text(&point.analysis);
        let now = now_unix_ms();

        // One statement, atomic by itself: the point and its trace arrive together or not at all.
        let point_id: i64 = on_pool!(&self.pool, pool => sqlx::query_scalar(
            "INSERT INTO points (run_id, frequency_index, level_index, frequency_hz, generator_level_dbm, \
                 level_at_modulator_dbm, v_peak_volts, modulation_index, modulation_index_uncertainty, \
                 asymmetry_db, line_table_json, analysis_json, measured_at_unix_ms, \
                 trace_point_count, trace_encoded, analyzer_sweeps) \
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16) RETURNING id",
        )
        .bind(point.run_id)
        .bind(i64::from(point.frequency_index))
        .bind(i64::from(point.level_index))
        .bind(frequency)
        .bind(generator_level)
        .bind(level_at_modulator)
        .bind(v_peak)
        .bind(beta)
        .bind(beta_uncertainty)
        .bind(asymmetry)
        .bind(line_table)
        .bind(analysis)
        .bind(now)
        .bind(point_count)
        .bind(encoded)
        .bind(i64::from(point.analyzer_sweeps))
        .fetch_one(pool)
        .await)
        .map_err(|source| {
            if is_unique_violation(&source) {
                StoreError::DuplicatePoint {
                    run_id: point.run_id,
                    frequency_index: point.frequency_index,
                    level_index: point.level_index,
                }
            } else if is_foreign_key_violation(&source) {
                StoreError::NotFound {
                    what: "run with id",
                    key: point.run_id.to_string(),
                }
            } else {
                StoreError::Database {
                    operation: "storing a point",
                    source,
                }
            }
        })?;
        Ok(point_id)
    }

    /// The points of a run, by frequency index then level index.
    pub async fn points_of_run(&self, run_id: i64) -> Result<Vec<PointRecord>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, PointRecord>(
            "SELECT id, run_id, frequency_index, level_index, frequency_hz, generator_level_dbm, \
                 level_at_modulator_dbm, v_peak_volts, modulation_index, modulation_index_uncertainty, \
                 asymmetry_db, line_table_json, analysis_json, measured_at_unix_ms \
             FROM points WHERE run_id = $1 ORDER BY frequency_index, level_index",
        )
        .bind(run_id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading a run's points"))
    }

    /// The trace of a point, decoded.
    pub async fn point_trace(&self, point_id: i64) -> Result<Trace, StoreError> {
        let encoded: Option<Vec<u8>> =
            on_pool!(&self.pool, pool => sqlx::query_scalar("SELECT trace_encoded FROM points WHERE id = $1")
                .bind(point_id)
                .fetch_optional(pool)
                .await)
                .map_err(StoreError::database("reading a point's trace"))?
                .ok_or_else(|| StoreError::NotFound {
                    what: "point with id",
                    key: point_id.to_string(),
                })?;
        let encoded = encoded.ok_or_else(|| StoreError::NotFound {
            what: "trace for point",
            key: point_id.to_string(),
        })?;
        Ok(trace_codec::decode(&encoded)?)
    }

    /// Stores the RF-off reference trace of a run frequency, replacing an earlier one of the same
    /// frequency index (a resumed run may retake it).
    pub async fn store_reference_trace(
        &self,
        run_id: i64,
        frequency_index: u32,
        frequency: Hz,
        trace: &Trace,
    ) -> Result<(), StoreError> {
        let frequency_hz = StoreError::require_finite("reference frequency", frequency.value())?;
        let encoded = trace_codec::encode(trace)?;
        on_pool!(&self.pool, pool => sqlx::query(
            "INSERT INTO reference_traces (run_id, frequency_index, frequency_hz, measured_at_unix_ms, point_count, encoded) \
             VALUES ($1, $2, $3, $4, $5, $6) \
             ON CONFLICT (run_id, frequency_index) DO UPDATE SET frequency_hz = excluded.frequency_hz, \
                 measured_at_unix_ms = excluded.measured_at_unix_ms, point_count = excluded.point_count, \
                 encoded = excluded.encoded",
        )
        .bind(run_id)
        .bind(i64::from(frequency_index))
        .bind(frequency_hz)
        .bind(now_unix_ms())
        .bind(trace.len() as i64)
        .bind(encoded)
        .execute(pool)
        .await.map(|done| done.rows_affected()))
        .map_err(|source| {
            if is_foreign_key_violation(&source) {
                StoreError::NotFound {
                    what: "run with id",
                    key: run_id.to_string(),
                }
            } else {
                StoreError::Database {
                    operation: "storing a reference trace",
                    source,
                }
            }
        })?;
        Ok(())
    }

    /// The RF-off reference trace of one frequency of a run, when it was stored (one row read and
    /// decoded, not the run's every reference).
    pub async fn reference_trace(
        &self,
        run_id: i64,
        frequency_index: u32,
    ) -> Result<Option<Trace>, StoreError> {
        let row: Option<(Vec<u8>,)> = on_pool!(&self.pool, pool => sqlx::query_as(
            "SELECT encoded FROM reference_traces WHERE run_id = $1 AND frequency_index = $2",
        )
        .bind(run_id)
        .bind(i64::from(frequency_index))
        .fetch_optional(pool)
        .await)
        .map_err(StoreError::database("reading a reference trace"))?;
        row.map(|(encoded,)| Ok(trace_codec::decode(&encoded)?))
            .transpose()
    }

    /// The RF-off reference traces of a run, by frequency index.
    pub async fn reference_traces(&self, run_id: i64) -> Result<Vec<ReferenceTrace>, StoreError> {
        let rows: Vec<(i64, f64, i64, Vec<u8>)> = on_pool!(&self.pool, pool => sqlx::query_as(
            "SELECT frequency_index, frequency_hz, measured_at_unix_ms, encoded FROM reference_traces \
             WHERE run_id = $1 ORDER BY frequency_index",
        )
        .bind(run_id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading reference traces"))?;
        rows.into_iter()
            .map(
                |(frequency_index, frequency_hz, measured_at_unix_ms, encoded)| {
                    Ok(ReferenceTrace {
                        run_id,
                        frequency_index: super::index_from_db(
                            "reference frequency index",
                            frequency_index,
                        )?,
                        frequency_hz,
                        measured_at_unix_ms,
                        trace: trace_codec::decode(&encoded)?,
                    })
                },
            )
            .collect()
    }

    /// Stores V_pi at one frequency of a run, replacing an earlier result for the same frequency
    /// index. The uncertainty must be finite and not negative, V_pi positive.
    pub async fn save_frequency_result(
        &self,
        result: &NewFrequencyResult,
    ) -> Result<FrequencyResultRecord, StoreError> {
        let frequency_hz =
            StoreError::require_finite("result frequency", result.frequency.value())?;
        let v_pi = StoreError::require_finite("V_pi", result.v_pi.value())?;
        let uncertainty =
            StoreError::require_finite("V_pi uncertainty", result.v_pi_uncertainty.value())?;
        if v_pi <= 0.0 || uncertainty < 0.0 {
            return Err(StoreError::InvalidInput {
                what: "frequency result",
                reason: format!(
                    "V_pi {v_pi} V must be positive and its uncertainty {uncertainty} V not negative"
                ),
            });
        }
        on_pool!(&self.pool, pool => sqlx::query_as::<_, FrequencyResultRecord>(
            "INSERT INTO frequency_results (run_id, frequency_index, frequency_hz, v_pi_volts, \
                 v_pi_uncertainty_volts, excluded_points_json, fit_json, computed_at_unix_ms) \
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8) \
             ON CONFLICT (run_id, frequency_index) DO UPDATE SET frequency_hz = excluded.frequency_hz, \
                 v_pi_volts = excluded.v_pi_volts, v_pi_uncertainty_volts = excluded.v_pi_uncertainty_volts, \
                 excluded_points_json = excluded.excluded_points_json, fit_json = excluded.fit_json, \
                 computed_at_unix_ms = excluded.computed_at_unix_ms \
             RETURNING id, run_id, frequency_index, frequency_hz, v_pi_volts, v_pi_uncertainty_volts, \
                 excluded_points_json, fit_json, computed_at_unix_ms",
        )
        .bind(result.run_id)
        .bind(i64::from(result.frequency_index))
        .bind(frequency_hz)
        .bind(v_pi)
        .bind(uncertainty)
        .bind(super::json_text(&result.excluded_points))
        .bind(super::json_text(&result.fit))
        .bind(now_unix_ms())
        .fetch_one(pool)
        .await)
        .map_err(|source| {
            if is_foreign_key_violation(&source) {
                StoreError::NotFound {
                    what: "run with id",
                    key: result.run_id.to_string(),
                }
            } else {
                StoreError::Database {
                    operation: "storing a frequency result",
                    source,
                }
            }
        })
    }

    /// Analyzer sweeps per frequency index of a run, summed over its committed points (points
    /// stored before sweeps were counted add nothing; a frequency with none of them counted is
    /// left out).
    pub async fn analyzer_sweeps(&self, run_id: i64) -> Result<Vec<(u32, i64)>, StoreError> {
        let rows: Vec<(i64, Option<i64>)> = on_pool!(&self.pool, pool => sqlx::query_as(
            "SELECT frequency_index, CAST(SUM(analyzer_sweeps) AS BIGINT) FROM points WHERE run_id = $1 \
             GROUP BY frequency_index ORDER BY frequency_index",
        )
        .bind(run_id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("counting a run's analyzer sweeps"))?;
        rows.into_iter()
            .filter_map(|(index, sweeps)| sweeps.map(|s| (index, s)))
            .map(|(index, sweeps)| Ok((super::index_from_db("frequency index", index)?, sweeps)))
            .collect()
    }

    /// The per-frequency results of a run, by frequency index.
    pub async fn frequency_results(
        &self,
        run_id: i64,
    ) -> Result<Vec<FrequencyResultRecord>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, FrequencyResultRecord>(
            "SELECT id, run_id, frequency_index, frequency_hz, v_pi_volts, v_pi_uncertainty_volts, \
                 excluded_points_json, fit_json, computed_at_unix_ms \
             FROM frequency_results WHERE run_id = $1 ORDER BY frequency_index",
        )
        .bind(run_id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading a run's frequency results"))
    }
}
