//! The audit trail of mutating API calls: who (the token's name) did what to which subject.
//!
//! A failure to write the audit row is logged, not returned: the action itself already happened
//! and the caller must learn its outcome.

use super::AppState;

/// Appends one row to the audit log.
pub async fn record(state: &AppState, actor: &str, action: &str, subject: &str, detail: &str) {
    let at = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
        .unwrap_or(0);
    let result = sqlx::query(
        "INSERT INTO audit_log (at_unix_ms, actor, action, subject, detail) VALUES (?, ?, ?, ?, ?)",
    )
    .bind(at)
    .bind(actor)
    .bind(action)
    .bind(subject)
    .bind(detail)
    .execute(state.pool())
    .await;
    if let Err(e) = result {
        tracing::error!(actor, action, subject, error = %e, "could not write the audit log");
    }
}
