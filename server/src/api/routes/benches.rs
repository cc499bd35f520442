//! Benches: each bench's instruments, its active run, its queue and its RF safety state, as the
//! engine sees them now; and the operator's acknowledgement of a safety fault.

use crate::api::auth::{Operator, Viewer};
use crate::api::json_body::parse_json;
use crate::api::params::ApiPath;
use crate::api::problem::Problem;
use crate::api::AppState;
use axum::body::Bytes;
use axum::extract::State;
use axum::http::StatusCode;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// Every bench with its instruments' identity, the active run, the queued runs and its RF safety
/// state.
#[utoipa::path(get, path = "/api/v1/benches", tag = "benches", security(("bearer" = [])),
    responses((status = 200, description = "The benches (name, source and analyzer status, active_run_id, queued_run_ids, safety_state: clear | output_unconfirmed | awaiting_acknowledgement, safety_fault {fault, cause, since_unix_ms, confirmed_off_at_unix_ms})", body = [Object]),
              (status = 401, body = Problem)))]
pub async fn list_benches(
    _caller: Viewer,
    State(state): State<AppState>,
) -> Result<Json<serde_json::Value>, Problem> {
    let benches = state.engine()?.benches();
    serde_json::to_value(benches)
        .map(Json)
        .map_err(|e| Problem::internal(format!("could not encode the bench status: {e}")))
}

/// What an operator may say when acknowledging a safety fault.
#[derive(Debug, Default, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Acknowledgement {
    /// What was checked on the bench (kept in the audit log).
    #[serde(default)]
    pub note: String,
}

/// Acknowledges a bench's safety fault once its RF output has been read back off: the bench takes
/// runs again. The acknowledgement, with the operator's name and note, goes to the audit log.
#[utoipa::path(post, path = "/api/v1/benches/{bench}/acknowledge", tag = "benches", security(("bearer" = [])),
    params(("bench" = String, Path, description = "Bench name")),
    request_body(content = Acknowledgement, description = "Optional: {\"note\": \"what was checked\"}"),
    responses((status = 204, description = "Acknowledged; the bench takes runs again"),
              (status = 401, body = Problem), (status = 403, body = Problem),
              (status = 404, description = "No such bench", body = Problem),
              (status = 409, description = "Nothing to acknowledge, or the output is not confirmed off yet", body = Problem),
              (status = 422, body = Problem)))]
pub async fn acknowledge_bench(
    Operator(caller): Operator,
    State(state): State<AppState>,
    ApiPath(bench): ApiPath<String>,
    body: Bytes,
) -> Result<StatusCode, Problem> {
    let request: Acknowledgement = if body.iter().all(u8::is_ascii_whitespace) {
        Acknowledgement::default()
    } else {
        parse_json(&body)?
    };
    // The engine writes the audit entry in the same transaction as the release.
    state
        .engine()?
        .acknowledge(&bench, &caller.name, &request.note)
        .await?;
    Ok(StatusCode::NO_CONTENT)
}
