//! The audit log: who did what, when. Append-only.
//!
//! Changes that matter later (a calibration upload, runs interrupted at start-up) write their
//! entry in the same transaction as the change, so the log cannot miss or invent one. The API and
//! the engine add their own entries (submissions, cancels, logins) with [`Store::append_audit`].

use super::{now_unix_ms, AuditEntry, Store, StoreError};
use sqlx::{Sqlite, Transaction};

impl Store {
    /// Appends an entry stamped with the current time.
    pub async fn append_audit(
        &self,
        actor: &str,
        action: &str,
        subject: &str,
        detail: &str,
    ) -> Result<AuditEntry, StoreError> {
        sqlx::query_as::<_, AuditEntry>(
            "INSERT INTO audit_log (at_unix_ms, actor, action, subject, detail) \
             VALUES ($1, $2, $3, $4, $5) \
             RETURNING id, at_unix_ms, actor, action, subject, detail",
        )
        .bind(now_unix_ms())
        .bind(actor)
        .bind(action)
        .bind(subject)
        .bind(detail)
        .fetch_one(&self.pool)
        .await
        .map_err(StoreError::database("writing the audit log"))
    }

    /// Up to `limit` entries, newest first; with `before_id`, only entries older than that one
    /// (pass the last id of a page to get the next).
    pub async fn audit_log(
        &self,
        limit: u32,
        before_id: Option<i64>,
    ) -> Result<Vec<AuditEntry>, StoreError> {
        sqlx::query_as::<_, AuditEntry>(
            "SELECT id, at_unix_ms, actor, action, subject, detail FROM audit_log \
             WHERE id < $1 ORDER BY id DESC LIMIT $2",
        )
        .bind(before_id.unwrap_or(i64::MAX))
        .bind(i64::from(limit))
        .fetch_all(&self.pool)
        .await
        .map_err(StoreError::database("reading the audit log"))
    }
}

/// Appends an audit entry inside an open transaction, so the entry and the change it records
/// commit together.
pub(crate) async fn audit_in(
    tx: &mut Transaction<'_, Sqlite>,
    at_unix_ms: i64,
    actor: &str,
    action: &str,
    subject: &str,
    detail: &str,
) -> Result<(), StoreError> {
    sqlx::query(
        "INSERT INTO audit_log (at_unix_ms, actor, action, subject, detail) VALUES ($1, $2, $3, $4, $5)",
    )
    .bind(at_unix_ms)
    .bind(actor)
    .bind(action)
    .bind(subject)
    .bind(detail)
    .execute(&mut **tx)
    .await
    .map_err(StoreError::database("writing the audit log"))?;
    Ok(())
}
