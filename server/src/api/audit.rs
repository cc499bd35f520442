//! The audit trail of mutating API calls: who (the token's name) did what to which subject.
//!
//! A failure to write the audit row is logged, not returned: the action itself already happened
//! and the caller must learn its outcome.

use super::AppState;

/// Appends one row to the audit log.
pub async fn record(state: &AppState, actor: &str, action: &str, subject: &str, detail: &str) {
    if let Err(e) = state
        .store()
        .append_audit(actor, action, subject, detail)
        .await
    {
        tracing::error!(actor, action, subject, error = %e, "could not write the audit log");
    }
}
