//! The answer to a submitted run.
//!
//! Shared by the route handlers (`api::routes::run_control`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The answer to a submission.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct SubmittedRun {
    pub run_id: i64,
    /// Where to read the run.
    pub location: String,
}
