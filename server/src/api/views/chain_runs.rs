//! Chain calibration runs as the API answers them (`/chain-calibration-runs`) and the CLI reads
//! them.

use crate::api::problem::Problem;
use crate::engine::chain_run::{ChainCalibrationRequest, ChainRunResult};
use crate::store::ChainRunRecord;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The answer to a submission.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct SubmittedChainRun {
    pub chain_run_id: i64,
    /// Where to read it.
    pub location: String,
}

/// A chain calibration run.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ChainRunView {
    pub id: i64,
    pub name: String,
    pub bench: String,
    /// `queued`, `running`, `completed`, `failed` or `cancelled`.
    pub state: String,
    pub cause: Option<String>,
    pub submitted_by: String,
    pub created_at_unix_ms: i64,
    pub finished_at_unix_ms: Option<i64>,
    /// The chain calibration version it stored (completed runs).
    pub chain_calibration_id: Option<i64>,
    pub request: ChainCalibrationRequest,
    /// Readings and the per-frequency budget (completed runs).
    pub result: Option<ChainRunResult>,
}

impl ChainRunView {
    pub(crate) fn of(record: ChainRunRecord) -> Result<ChainRunView, Problem> {
        let request = serde_json::from_str(&record.request).map_err(|e| {
            Problem::internal(format!(
                "chain run {}'s stored request cannot be read: {e}",
                record.id
            ))
        })?;
        let result = record
            .result
            .as_deref()
            .map(serde_json::from_str)
            .transpose()
            .map_err(|e| {
                Problem::internal(format!(
                    "chain run {}'s stored result cannot be read: {e}",
                    record.id
                ))
            })?;
        Ok(ChainRunView {
            id: record.id,
            name: record.name,
            bench: record.bench_name,
            state: record.state,
            cause: record.cause,
            submitted_by: record.submitted_by,
            created_at_unix_ms: record.created_at_unix_ms,
            finished_at_unix_ms: record.finished_at_unix_ms,
            chain_calibration_id: record.chain_calibration_id,
            request,
            result,
        })
    }
}
