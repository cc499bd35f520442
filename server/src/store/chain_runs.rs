//! Chain calibration runs (table `chain_calibration_runs`, migration 0014). The same migration's
//! `runs.source_level_accuracy_db` is written with the run itself ([`super::RunProvenance`]).
//!
//! A chain calibration run is queued, runs, and ends completed (with the id of the chain
//! calibration version it stored and its per-frequency budget as a JSON document), failed or
//! cancelled (with the cause). Runs a stopped daemon left queued or running are failed at the next
//! start: their request is kept for resubmission, their readings are not (a calibration is short
//! and is measured again whole).

use super::{now_unix_ms, Store, StoreError};
use serde::{Deserialize, Serialize};
use sqlx::AssertSqlSafe;

/// A chain calibration run as stored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, sqlx::FromRow)]
pub struct ChainRunRecord {
    pub id: i64,
    /// The chain calibration's name (its new version is stored under it).
    pub name: String,
    pub bench_name: String,
    /// The request, as a JSON document.
    pub request: String,
    /// `queued`, `running`, `completed`, `failed` or `cancelled`.
    pub state: String,
    pub cause: Option<String>,
    pub submitted_by: String,
    pub created_at_unix_ms: i64,
    pub finished_at_unix_ms: Option<i64>,
    /// The chain calibration version it stored (completed runs).
    pub chain_calibration_id: Option<i64>,
    /// Per-frequency readings and budget, as a JSON document (completed runs).
    pub result: Option<String>,
}

impl Store {
    /// Stores a queued chain calibration run and returns its id.
    pub async fn create_chain_run(
        &self,
        name: &str,
        bench_name: &str,
        request: &str,
        submitted_by: &str,
    ) -> Result<i64, StoreError> {
        let id: i64 = on_pool!(&self.pool, pool => sqlx::query_scalar(
            "INSERT INTO chain_calibration_runs \
             (name, bench_name, request, state, submitted_by, created_at_unix_ms) \
             VALUES ($1, $2, $3, 'queued', $4, $5) RETURNING id",
        )
        .bind(name)
        .bind(bench_name)
        .bind(request)
        .bind(submitted_by)
        .bind(now_unix_ms())
        .fetch_one(pool).await)
        .map_err(StoreError::database("storing a chain calibration run"))?;
        Ok(id)
    }

    /// The chain calibration run with this id.
    pub async fn chain_run(&self, id: i64) -> Result<ChainRunRecord, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainRunRecord>(
            "SELECT id, name, bench_name, request, state, cause, submitted_by, \
             created_at_unix_ms, finished_at_unix_ms, chain_calibration_id, result \
             FROM chain_calibration_runs WHERE id = $1",
        )
        .bind(id)
        .fetch_optional(pool).await)
        .map_err(StoreError::database("reading a chain calibration run"))?
        .ok_or_else(|| StoreError::NotFound {
            what: "chain calibration run",
            key: id.to_string(),
        })
    }

    /// Marks a queued run as running.
    pub async fn start_chain_run(&self, id: i64) -> Result<(), StoreError> {
        on_pool!(&self.pool, pool => sqlx::query("UPDATE chain_calibration_runs SET state = 'running' WHERE id = $1")
            .bind(id)
            .execute(pool).await.map(|_| ()))
            .map_err(StoreError::database("starting a chain calibration run"))?;
        Ok(())
    }

    /// Ends a run: `completed` (with the stored version and the result document), `failed` or
    /// `cancelled` (with the cause).
    pub async fn finish_chain_run(
        &self,
        id: i64,
        state: &str,
        cause: Option<&str>,
        chain_calibration_id: Option<i64>,
        result: Option<&str>,
    ) -> Result<(), StoreError> {
        if !["completed", "failed", "cancelled"].contains(&state) {
            return Err(StoreError::InvalidInput {
                what: "chain calibration run state",
                reason: format!("{state:?} is not an end state"),
            });
        }
        on_pool!(&self.pool, pool => sqlx::query(
            "UPDATE chain_calibration_runs SET state = $2, cause = $3, chain_calibration_id = $4, \
             result = $5, finished_at_unix_ms = $6 WHERE id = $1",
        )
        .bind(id)
        .bind(state)
        .bind(cause)
        .bind(chain_calibration_id)
        .bind(result)
        .bind(now_unix_ms())
        .execute(pool).await.map(|_| ()))
        .map_err(StoreError::database("ending a chain calibration run"))?;
        Ok(())
    }

    /// Fails every chain calibration run a previous process left queued or running; returns
    /// their ids. `benches` limits it to those benches (a daemon on a shared database fails only
    /// its own benches' runs: the others belong to live daemons); `None` means every bench.
    pub async fn fail_unfinished_chain_runs_on(
        &self,
        benches: Option<&[String]>,
    ) -> Result<Vec<i64>, StoreError> {
        let mut sql = String::from(
            "UPDATE chain_calibration_runs SET state = 'failed', \
             cause = 'the daemon stopped before it finished; submit it again', \
             finished_at_unix_ms = $1 WHERE state IN ('queued', 'running')",
        );
        if let Some(benches) = benches {
            if benches.is_empty() {
                return Ok(Vec::new());
            }
            let list: Vec<String> = (0..benches.len()).map(|k| format!("${}", 2 + k)).collect();
            sql.push_str(&format!(" AND bench_name IN ({})", list.join(", ")));
        }
        sql.push_str(" RETURNING id");
        let mut ids: Vec<i64> = on_pool!(&self.pool, pool => {
            let mut query = sqlx::query_scalar::<_, i64>(AssertSqlSafe(sql.clone()))
                .bind(now_unix_ms());
            for bench in benches.unwrap_or_default() {
                query = query.bind(bench.as_str());
            }
            query.fetch_all(pool).await
        })
        .map_err(StoreError::database(
            "failing unfinished chain calibration runs",
        ))?;
        ids.sort_unstable();
        Ok(ids)
    }
}
