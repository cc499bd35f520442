//! The stored RF safety state of each bench (table `bench_safety`).
//!
//! The engine's bench slot owns the live state (see `engine::safety`); this is its persistent
//! copy, written on every change, so that a bench whose output could not be confirmed off, or
//! that waits for an operator's acknowledgement after such a fault, is still flagged and still
//! holds its queue after the daemon restarts. A bench without a row is clear. The operator's
//! acknowledgement deletes the row and writes its audit entry in the same transaction.

use super::audit::audit_in;
use super::{now_unix_ms, Store, StoreError};
use serde::{Deserialize, Serialize};

/// A bench's RF safety fault as stored.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct BenchSafetyRecord {
    pub bench_name: String,
    pub fault: BenchFault,
    /// What happened, for the operator.
    pub cause: String,
    /// When the output was first found unconfirmed.
    pub since_unix_ms: i64,
    /// When the output was read back off after the fault (for `AwaitingAcknowledgement`).
    pub confirmed_off_at_unix_ms: Option<i64>,
}

/// The two fault states of a bench.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BenchFault {
    /// The source's output could not be read back off; the daemon keeps trying.
    OutputUnconfirmed,
    /// The output was read back off after a fault; an operator must acknowledge before runs
    /// start on this bench again.
    AwaitingAcknowledgement,
}

impl BenchFault {
    /// The word stored in the `state` column.
    pub fn as_str(self) -> &'static str {
        match self {
            BenchFault::OutputUnconfirmed => "output_unconfirmed",
            BenchFault::AwaitingAcknowledgement => "awaiting_acknowledgement",
        }
    }

    fn parse(word: &str) -> Option<BenchFault> {
        [
            BenchFault::OutputUnconfirmed,
            BenchFault::AwaitingAcknowledgement,
        ]
        .into_iter()
        .find(|f| f.as_str() == word)
    }
}

#[derive(sqlx::FromRow)]
struct Row {
    bench_name: String,
    state: String,
    cause: String,
    since_unix_ms: i64,
    confirmed_off_at_unix_ms: Option<i64>,
}

impl Store {
    /// Every bench with a stored safety fault, by name.
    pub async fn bench_safety_faults(&self) -> Result<Vec<BenchSafetyRecord>, StoreError> {
        let rows: Vec<Row> = on_pool!(&self.pool, pool => sqlx::query_as(
            "SELECT bench_name, state, cause, since_unix_ms, confirmed_off_at_unix_ms \
             FROM bench_safety ORDER BY bench_name",
        )
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading the benches' safety state"))?;
        rows.into_iter()
            .map(|r| {
                let fault = BenchFault::parse(&r.state).ok_or_else(|| StoreError::CorruptRow {
                    what: "bench safety state",
                    detail: format!("bench {:?}: unknown state {:?}", r.bench_name, r.state),
                })?;
                Ok(BenchSafetyRecord {
                    bench_name: r.bench_name,
                    fault,
                    cause: r.cause,
                    since_unix_ms: r.since_unix_ms,
                    confirmed_off_at_unix_ms: r.confirmed_off_at_unix_ms,
                })
            })
            .collect()
    }

    /// Records (or replaces) a bench's safety fault, with an audit entry by the daemon.
    pub async fn record_bench_fault(&self, record: &BenchSafetyRecord) -> Result<(), StoreError> {
        let now = now_unix_ms();
        on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting a bench safety change"))?;
        sqlx::query(
            "INSERT INTO bench_safety (bench_name, state, cause, since_unix_ms, \
             confirmed_off_at_unix_ms, updated_at_unix_ms) VALUES ($1, $2, $3, $4, $5, $6) \
             ON CONFLICT (bench_name) DO UPDATE SET state = excluded.state, \
             cause = excluded.cause, since_unix_ms = excluded.since_unix_ms, \
             confirmed_off_at_unix_ms = excluded.confirmed_off_at_unix_ms, \
             updated_at_unix_ms = excluded.updated_at_unix_ms",
        )
        .bind(&record.bench_name)
        .bind(record.fault.as_str())
        .bind(&record.cause)
        .bind(record.since_unix_ms)
        .bind(record.confirmed_off_at_unix_ms)
        .bind(now)
        .execute(&mut *tx)
        .await
        .map_err(StoreError::database("recording a bench safety fault"))?;
        let detail = serde_json::json!({ "state": record.fault.as_str(), "cause": record.cause });
        audit_in!(tx,
            now,
            super::runs::DAEMON_ACTOR,
            "bench.safety",
            &format!("bench:{}", record.bench_name),
            &detail.to_string(),
        )?;
        tx.commit()
            .await
            .map_err(StoreError::database("committing a bench safety change"))
        })
    }

    /// An operator's acknowledgement: clears a bench that waits for one, with the audit entry in
    /// the same transaction. Returns false (and changes nothing) when the bench is not waiting
    /// for an acknowledgement.
    pub async fn acknowledge_bench_fault(
        &self,
        bench_name: &str,
        by: &str,
        note: &str,
    ) -> Result<bool, StoreError> {
        let now = now_unix_ms();
        on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting an acknowledgement"))?;
        let cleared = sqlx::query("DELETE FROM bench_safety WHERE bench_name = $1 AND state = $2")
            .bind(bench_name)
            .bind(BenchFault::AwaitingAcknowledgement.as_str())
            .execute(&mut *tx)
            .await
            .map_err(StoreError::database("clearing a bench safety fault"))?
            .rows_affected();
        if cleared == 0 {
            return Ok(false);
        }
        audit_in!(tx,
            now,
            by,
            "bench.acknowledge",
            &format!("bench:{bench_name}"),
            note,
        )?;
        tx.commit()
            .await
            .map_err(StoreError::database("committing an acknowledgement"))?;
        Ok(true)
        })
    }
}
