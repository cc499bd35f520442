//! Benches: each bench's instruments, its active run and its queue, as the engine sees them now.

use crate::api::auth::Viewer;
use crate::api::problem::Problem;
use crate::api::AppState;
use axum::extract::State;
use axum::Json;

/// Every bench with its instruments' identity, the active run and the queued runs.
#[utoipa::path(get, path = "/api/v1/benches", tag = "benches", security(("bearer" = [])),
    responses((status = 200, description = "The benches (name, source and analyzer status, active_run_id, queued_run_ids)", body = [Object]),
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
