//! Runs: queueing, the state machine, listing, and what recovery after a crash needs.
//!
//! States move only along allowed edges (queued -> running -> completed/failed/cancelled,
//! running -> interrupted -> running again on resume); a transition is one conditional UPDATE, so
//! two callers racing cannot both move the same run. At start-up the daemon calls
//! [`Store::mark_running_as_interrupted`]: whatever was running when it died becomes interrupted,
//! its committed points untouched, and [`Store::stored_point_indices`] tells the resume which grid
//! positions to skip.

use super::audit::audit_in;
use super::{
    now_unix_ms, NewRun, RunDetail, RunFilter, RunPage, RunRecord, RunState, Store, StoreError,
};
use sqlx::AssertSqlSafe;
use std::collections::HashSet;

/// The actor named in audit entries for changes the daemon makes by itself.
pub const DAEMON_ACTOR: &str = "halfwave";

/// The cause recorded on runs found running at start-up.
pub const INTERRUPTED_CAUSE: &str =
    "the daemon stopped while this run was running; its committed points are kept, resume it to finish";

/// Columns of a [`RunRecord`], from `runs r JOIN devices d`.
const RUN_SELECT: &str = "SELECT r.id, r.plan_json, r.device_id, d.serial AS device_serial, \
     r.bench_name, r.chain_calibration_id, c.name AS chain_name, c.version AS chain_version, \
     r.state, r.submitted_by, r.created_at_unix_ms, \
     r.started_at_unix_ms, r.finished_at_unix_ms, r.cause, r.resumable, \
     r.software_version, r.analysis_method, r.submitted_by_token_id, \
     r.hard_limit_at_modulator_dbm, r.planned_max_at_modulator_dbm, r.source_level_accuracy_db \
     FROM runs r JOIN devices d ON d.id = r.device_id \
     JOIN chain_calibrations c ON c.id = r.chain_calibration_id";

/// Between the versions a run was executed with, oldest first ("A then B").
pub const VERSION_SEPARATOR: &str = " then ";

/// The states a run may be in to move to `to`.
fn allowed_sources(to: RunState) -> &'static [RunState] {
    match to {
        RunState::Queued => &[],
        RunState::Running => &[RunState::Queued, RunState::Interrupted],
        RunState::Completed => &[RunState::Running],
        RunState::Failed => &[RunState::Queued, RunState::Running, RunState::Interrupted],
        RunState::Cancelled => &[RunState::Queued, RunState::Running, RunState::Interrupted],
        RunState::Interrupted => &[RunState::Running],
    }
}

impl Store {
    /// Queues a run. The device and the calibration version must exist.
    pub async fn create_run(&self, run: &NewRun) -> Result<RunRecord, StoreError> {
        // The existence checks run before the transaction (devices and calibration versions are
        // never deleted), so the transaction opens with a write: in WAL mode a transaction that
        // reads first and then writes fails at once with "database is locked" when another
        // connection committed in between, whatever the busy timeout.
        let device_exists: Option<i64> =
            on_pool!(&self.pool, pool => sqlx::query_scalar("SELECT id FROM devices WHERE id = $1")
            .bind(run.device_id)
            .fetch_optional(pool)
            .await)
            .map_err(StoreError::database("checking the run's device"))?;
        if device_exists.is_none() {
            return Err(StoreError::NotFound {
                what: "device with id",
                key: run.device_id.to_string(),
            });
        }
        let calibration_exists: Option<i64> =
            on_pool!(&self.pool, pool => sqlx::query_scalar("SELECT id FROM chain_calibrations WHERE id = $1")
                .bind(run.chain_calibration_id)
                .fetch_optional(pool)
                .await)
                .map_err(StoreError::database("checking the run's chain calibration"))?;
        if calibration_exists.is_none() {
            return Err(StoreError::NotFound {
                what: "chain calibration with id",
                key: run.chain_calibration_id.to_string(),
            });
        }
        let now = now_unix_ms();
        let id = on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting to queue a run"))?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO runs (plan_json, device_id, bench_name, chain_calibration_id, state, submitted_by, created_at_unix_ms, \
             software_version, analysis_method, submitted_by_token_id, hard_limit_at_modulator_dbm, planned_max_at_modulator_dbm, source_level_accuracy_db) \
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13) RETURNING id",
        )
        .bind(super::json_text(&run.plan))
        .bind(run.device_id)
        .bind(&run.bench_name)
        .bind(run.chain_calibration_id)
        .bind(RunState::Queued.as_str())
        .bind(&run.submitted_by)
        .bind(now)
        .bind(&run.provenance.software_version)
        .bind(&run.provenance.analysis_method)
        .bind(run.provenance.submitted_by_token_id)
        .bind(run.provenance.hard_limit_at_modulator.map(|l| l.0))
        .bind(run.provenance.planned_max_at_modulator.map(|l| l.0))
        .bind(run.provenance.source_level_accuracy.map(|a| a.0))
        .fetch_one(&mut *tx)
        .await
        .map_err(StoreError::database("queueing a run"))?;
        audit_in!(tx,
            now,
            &run.submitted_by,
            "run.submit",
            &format!("run:{id}"),
            &serde_json::json!({ "device_id": run.device_id, "bench_name": run.bench_name })
                .to_string(),
        )?;
        tx.commit()
            .await
            .map_err(StoreError::database("committing a queued run"))?;
        id
        });
        self.run(id).await
    }

    /// The run with this id.
    pub async fn run(&self, id: i64) -> Result<RunRecord, StoreError> {
        let sql = format!("{RUN_SELECT} WHERE r.id = $1");
        on_pool!(&self.pool, pool => sqlx::query_as::<_, RunRecord>(AssertSqlSafe(sql))
            .bind(id)
            .fetch_optional(pool)
            .await)
        .map_err(StoreError::database("reading a run"))?
        .ok_or_else(|| StoreError::NotFound {
            what: "run with id",
            key: id.to_string(),
        })
    }

    /// Records the software and analysis method versions executing run `id` as it starts or
    /// resumes: set when none is stored, appended as "A then B" when the last one stored differs
    /// (a run resumed after an upgrade was judged by both), unchanged otherwise.
    pub async fn record_run_software(
        &self,
        id: i64,
        software_version: &str,
        analysis_method: &str,
    ) -> Result<(), StoreError> {
        let run = self.run(id).await?;
        let joined = |stored: &Option<String>, now: &str| match stored {
            None => Some(now.to_string()),
            Some(text) if text.rsplit(VERSION_SEPARATOR).next() == Some(now) => None,
            Some(text) => Some(format!("{text}{VERSION_SEPARATOR}{now}")),
        };
        let software = joined(&run.software_version, software_version);
        let method = joined(&run.analysis_method, analysis_method);
        if software.is_none() && method.is_none() {
            return Ok(());
        }
        on_pool!(&self.pool, pool => sqlx::query(
            "UPDATE runs SET software_version = COALESCE($1, software_version), \
             analysis_method = COALESCE($2, analysis_method) WHERE id = $3",
        )
        .bind(software)
        .bind(method)
        .bind(id)
        .execute(pool)
        .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("recording a run's software version"))?;
        Ok(())
    }

    /// Moves a run to `to` if its current state allows it, stamping the start time (first move to
    /// running) or the finish time (completed, failed, cancelled) and recording `cause` (pass
    /// `None` to clear it, e.g. on resume). Returns the updated run.
    pub async fn transition_run(
        &self,
        id: i64,
        to: RunState,
        cause: Option<&str>,
    ) -> Result<RunRecord, StoreError> {
        self.change_run_state(id, to, cause, false).await
    }

    /// Records a run as failed on a fault that left its points intact and its plan valid (a lost
    /// instrument link, a hung instrument): it may be resumed like an interrupted run.
    pub async fn fail_run_resumably(&self, id: i64, cause: &str) -> Result<RunRecord, StoreError> {
        self.change_run_state(id, RunState::Failed, Some(cause), true)
            .await
    }

    async fn change_run_state(
        &self,
        id: i64,
        to: RunState,
        cause: Option<&str>,
        resumable: bool,
    ) -> Result<RunRecord, StoreError> {
        let now = now_unix_ms();
        let sources = allowed_sources(to);
        // Placeholders are numbered by hand (`$N` is the one form both drivers read).
        let mut sql = String::from("UPDATE runs SET state = $1, cause = $2, resumable = $3");
        if to == RunState::Running {
            sql.push_str(", started_at_unix_ms = COALESCE(started_at_unix_ms, $4)");
        }
        if to.is_final() {
            sql.push_str(", finished_at_unix_ms = $4");
        } else {
            sql.push_str(", finished_at_unix_ms = NULL");
        }
        sql.push_str(" WHERE id = $5 AND (state IN (");
        let mut sources_sql: Vec<String> =
            (0..sources.len()).map(|k| format!("${}", 6 + k)).collect();
        if sources_sql.is_empty() {
            sources_sql.push("NULL".to_string());
        }
        sql.push_str(&sources_sql.join(", "));
        sql.push(')');
        if matches!(to, RunState::Running | RunState::Cancelled) {
            // A failure that left the points intact may be resumed (see `fail_run_resumably`),
            // and a resumption still queued may be cancelled.
            sql.push_str(&format!(
                " OR (state = '{}' AND resumable)",
                RunState::Failed.as_str()
            ));
        }
        sql.push(')');
        let changed = on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting a run state change"))?;
        let mut update = sqlx::query(AssertSqlSafe(sql.clone()))
            .bind(to.as_str())
            .bind(cause)
            .bind(resumable)
            .bind(now)
            .bind(id);
        for source in sources {
            update = update.bind(source.as_str());
        }
        let changed = update
            .execute(&mut *tx)
            .await
            .map_err(StoreError::database("changing a run's state"))?
            .rows_affected();
        if changed > 0 {
            let detail =
                serde_json::json!({ "state": to.as_str(), "cause": cause, "resumable": resumable });
            audit_in!(tx,
                now,
                DAEMON_ACTOR,
                "run.state",
                &format!("run:{id}"),
                &detail.to_string(),
            )?;
            tx.commit()
                .await
                .map_err(StoreError::database("committing a run state change"))?;
        }
        changed
        });
        if changed == 0 {
            let current = self.run(id).await?;
            return Err(StoreError::InvalidTransition {
                run_id: id,
                from: current.state,
                to,
            });
        }
        self.run(id).await
    }

    /// Start-up recovery: every run left `running` becomes `interrupted` (points untouched), with
    /// an audit entry each. Returns their ids, oldest first.
    pub async fn mark_running_as_interrupted(&self) -> Result<Vec<i64>, StoreError> {
        self.mark_running_as_interrupted_on(None).await
    }

    /// [`Store::mark_running_as_interrupted`] limited to runs on the named benches when `benches`
    /// is given: on a database shared by several daemons, each recovers only the benches it
    /// holds the lease of (another daemon's running runs are its own).
    pub async fn mark_running_as_interrupted_on(
        &self,
        benches: Option<&[String]>,
    ) -> Result<Vec<i64>, StoreError> {
        let now = now_unix_ms();
        let mut sql = String::from("UPDATE runs SET state = $1, cause = $2 WHERE state = $3");
        if let Some(benches) = benches {
            if benches.is_empty() {
                return Ok(Vec::new());
            }
            let list: Vec<String> = (0..benches.len()).map(|k| format!("${}", 4 + k)).collect();
            sql.push_str(&format!(" AND bench_name IN ({})", list.join(", ")));
        }
        sql.push_str(" RETURNING id");
        let ids = on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting start-up recovery"))?;
        let mut query = sqlx::query_scalar::<_, i64>(AssertSqlSafe(sql.clone()))
            .bind(RunState::Interrupted.as_str())
            .bind(INTERRUPTED_CAUSE)
            .bind(RunState::Running.as_str());
        for bench in benches.unwrap_or_default() {
            query = query.bind(bench.as_str());
        }
        let mut ids: Vec<i64> = query
            .fetch_all(&mut *tx)
            .await
            .map_err(StoreError::database("marking running runs as interrupted"))?;
        ids.sort_unstable();
        for id in &ids {
            audit_in!(tx,
                now,
                DAEMON_ACTOR,
                "run.interrupted",
                &format!("run:{id}"),
                INTERRUPTED_CAUSE,
            )?;
        }
        tx.commit()
            .await
            .map_err(StoreError::database("committing start-up recovery"))?;
        ids
        });
        Ok(ids)
    }

    /// The (frequency index, level index) positions of a run that already have a stored point; a
    /// resumed run measures only the others.
    pub async fn stored_point_indices(
        &self,
        run_id: i64,
    ) -> Result<HashSet<(u32, u32)>, StoreError> {
        let rows: Vec<(i64, i64)> =
            on_pool!(&self.pool, pool => sqlx::query_as("SELECT frequency_index, level_index FROM points WHERE run_id = $1")
                .bind(run_id)
                .fetch_all(pool)
                .await)
                .map_err(StoreError::database("reading a run's stored points"))?;
        rows.into_iter()
            .map(|(f, l)| {
                Ok((
                    super::index_from_db("point frequency index", f)?,
                    super::index_from_db("point level index", l)?,
                ))
            })
            .collect()
    }

    /// Runs matching `filter`, newest first, one page at a time, with the total number matching.
    pub async fn list_runs(&self, filter: &RunFilter) -> Result<RunPage, StoreError> {
        if filter.limit == 0 || filter.limit > RunFilter::MAX_LIMIT {
            return Err(StoreError::InvalidInput {
                what: "page size",
                reason: format!(
                    "{} is outside 1 to {}; ask for a smaller page",
                    filter.limit,
                    RunFilter::MAX_LIMIT
                ),
            });
        }
        let (conditions, values) = run_conditions(filter);
        let count_sql =
            format!("SELECT COUNT(*) FROM runs r JOIN devices d ON d.id = r.device_id{conditions}");
        let n = values.len();
        let select_sql = format!(
            "{RUN_SELECT}{conditions} ORDER BY r.created_at_unix_ms DESC, r.id DESC LIMIT ${} OFFSET ${}",
            n + 1,
            n + 2
        );
        let (total, runs) = on_pool!(&self.pool, pool => {
            let mut count = sqlx::query_scalar::<_, i64>(AssertSqlSafe(count_sql));
            for value in &values {
                count = match value {
                    FilterValue::Int(v) => count.bind(*v),
                    FilterValue::Text(v) => count.bind(v.clone()),
                };
            }
            let total = count
                .fetch_one(pool)
                .await
                .map_err(StoreError::database("counting runs"))?;
            let mut select = sqlx::query_as::<_, RunRecord>(AssertSqlSafe(select_sql));
            for value in &values {
                select = match value {
                    FilterValue::Int(v) => select.bind(*v),
                    FilterValue::Text(v) => select.bind(v.clone()),
                };
            }
            let runs = select
                .bind(i64::from(filter.limit))
                .bind(i64::from(filter.offset))
                .fetch_all(pool)
                .await
                .map_err(StoreError::database("listing runs"))?;
            (total, runs)
        });
        Ok(RunPage { runs, total })
    }

    /// A run with all its points and per-frequency results.
    pub async fn run_detail(&self, id: i64) -> Result<RunDetail, StoreError> {
        let run = self.run(id).await?;
        let points = self.points_of_run(id).await?;
        let results = self.frequency_results(id).await?;
        Ok(RunDetail {
            run,
            points,
            results,
        })
    }
}

/// A value bound to a run filter's condition.
enum FilterValue {
    Int(i64),
    Text(String),
}

/// The WHERE clause of a run filter, with `$1`, `$2`... in the order of the returned values.
fn run_conditions(filter: &RunFilter) -> (String, Vec<FilterValue>) {
    let mut sql = String::from(" WHERE 1 = 1");
    let mut values = Vec::new();
    let mut condition = |sql: &mut String, column: &str, operator: &str, value: FilterValue| {
        values.push(value);
        sql.push_str(&format!(" AND {column} {operator} ${}", values.len()));
    };
    if let Some(device_id) = filter.device_id {
        condition(&mut sql, "r.device_id", "=", FilterValue::Int(device_id));
    }
    if let Some(serial) = &filter.device_serial {
        condition(&mut sql, "d.serial", "=", FilterValue::Text(serial.clone()));
    }
    if let Some(state) = filter.state {
        condition(
            &mut sql,
            "r.state",
            "=",
            FilterValue::Text(state.as_str().to_string()),
        );
    }
    if let Some(from) = filter.created_from_unix_ms {
        condition(
            &mut sql,
            "r.created_at_unix_ms",
            ">=",
            FilterValue::Int(from),
        );
    }
    if let Some(before) = filter.created_before_unix_ms {
        condition(
            &mut sql,
            "r.created_at_unix_ms",
            "<",
            FilterValue::Int(before),
        );
    }
    (sql, values)
}
