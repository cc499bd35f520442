//! The audit log: who did what, when. Append-only.
//!
//! Changes that matter later (a calibration upload, runs interrupted at start-up) write their
//! entry in the same transaction as the change, so the log cannot miss or invent one. The API and
//! the engine add their own entries (submissions, cancels, logins) with [`Store::append_audit`].

use super::{now_unix_ms, AuditEntry, Store, StoreError};

impl Store {
    /// Appends an entry stamped with the current time.
    pub async fn append_audit(
        &self,
        actor: &str,
        action: &str,
        subject: &str,
        detail: &str,
    ) -> Result<AuditEntry, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, AuditEntry>(
            "INSERT INTO audit_log (at_unix_ms, actor, action, subject, detail) \
             VALUES ($1, $2, $3, $4, $5) \
             RETURNING id, at_unix_ms, actor, action, subject, detail",
        )
        .bind(now_unix_ms())
        .bind(actor)
        .bind(action)
        .bind(subject)
        .bind(detail)
        .fetch_one(pool)
        .await)
        .map_err(StoreError::database("writing the audit log"))
    }

    /// Up to `limit` entries, newest first; with `before_id`, only entries older than that one
    /// (pass the last id of a page to get the next).
    pub async fn audit_log(
        &self,
        limit: u32,
        before_id: Option<i64>,
    ) -> Result<Vec<AuditEntry>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, AuditEntry>(
            "SELECT id, at_unix_ms, actor, action, subject, detail FROM audit_log \
             WHERE id < $1 ORDER BY id DESC LIMIT $2",
        )
        .bind(before_id.unwrap_or(i64::MAX))
        .bind(i64::from(limit))
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading the audit log"))
    }
}

/// Appends an audit entry inside an open transaction `$tx` (a `sqlx::Transaction` of either
/// backend, inside [`on_pool!`](crate::on_pool)), so the entry and the change it records commit
/// together. Arguments: the transaction, the time in Unix ms, actor, action, subject, detail; the
/// value is a `Result<(), StoreError>`. A macro, not a function, so each backend's arm binds its
/// own transaction type without generic bounds.
macro_rules! audit_in {
    ($tx:expr, $at_unix_ms:expr, $actor:expr, $action:expr, $subject:expr, $detail:expr $(,)?) => {
        sqlx::query(
            "INSERT INTO audit_log (at_unix_ms, actor, action, subject, detail) VALUES ($1, $2, $3, $4, $5)",
        )
        .bind($at_unix_ms)
        .bind($actor)
        .bind($action)
        .bind($subject)
        .bind($detail)
        .execute(&mut *$tx)
        .await
        .map(|_| ())
        .map_err($crate::store::StoreError::database("writing the audit log"))
    };
}
pub(crate) use audit_in;
