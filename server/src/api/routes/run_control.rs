//! Changing runs: submit a plan, cancel, resume. Operators only; every change is written to the
//! audit log with the token's name, once, by the engine and the store where it happens
//! (`run.submit`, `run.cancel`, `run.resume`, subject `run:ID`).
//!
//! Submission parses the plan with field-naming errors and hands it to the engine, which checks
//! every field against the bench and the safety limits and reports all invalid ones at once; a
//! refused plan never reaches an instrument.

use crate::api::auth::Operator;
use crate::api::json_body::JsonBody;
use crate::api::params::ApiPath;
use crate::api::problem::Problem;
use crate::api::views::run_control::SubmittedRun;
use crate::api::AppState;
use crate::engine::plan::PlanRequest;
use axum::extract::State;
use axum::http::header::LOCATION;
use axum::http::{HeaderName, StatusCode};
use axum::Json;

/// Queues a calibration run. Every invalid field is reported at once (422); nothing reaches an
/// instrument unless the whole plan is valid.
#[utoipa::path(post, path = "/api/v1/runs", tag = "runs", security(("bearer" = [])),
    request_body(content = PlanRequest, description = "A sweep plan. The schema gives its shape; whether a plan can run is decided against the bench it names (its instruments' ranges, the drive chain, the device's RF input limit and the daemon's ceiling), and every field that fails is named in the 422."),
    responses((status = 201, body = SubmittedRun), (status = 401, body = Problem),
              (status = 403, body = Problem), (status = 413, body = Problem),
              (status = 422, description = "Invalid fields, each named in `errors`", body = Problem),
              (status = 503, description = "Read-only server without an engine", body = Problem)))]
pub async fn submit_run(
    Operator(caller): Operator,
    State(state): State<AppState>,
    JsonBody(plan): JsonBody<PlanRequest>,
) -> Result<(StatusCode, [(HeaderName, String); 1], Json<SubmittedRun>), Problem> {
    let run_id = state
        .engine()?
        .submit_by_token(plan, &caller.name, Some(caller.id))
        .await?;
    let location = format!("/api/v1/runs/{run_id}");
    Ok((
        StatusCode::CREATED,
        [(LOCATION, location.clone())],
        Json(SubmittedRun { run_id, location }),
    ))
}

/// Cancels a queued or running run (the RF output is switched off).
#[utoipa::path(post, path = "/api/v1/runs/{run_id}/cancel", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id")),
    responses((status = 202, description = "Cancellation under way"), (status = 401, body = Problem),
              (status = 403, body = Problem), (status = 404, body = Problem),
              (status = 409, description = "The run has already ended", body = Problem)))]
pub async fn cancel_run(
    Operator(caller): Operator,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
) -> Result<StatusCode, Problem> {
    state.engine()?.cancel(run_id, &caller.name).await?;
    Ok(StatusCode::ACCEPTED)
}

/// Resumes an interrupted run, or a failed run whose cause was a link fault (`resumable`), where
/// it stopped (measured points are kept; the plan is proven again first).
#[utoipa::path(post, path = "/api/v1/runs/{run_id}/resume", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id")),
    responses((status = 202, description = "Queued again"), (status = 401, body = Problem),
              (status = 403, body = Problem), (status = 404, body = Problem),
              (status = 409, description = "The run cannot be resumed in its state", body = Problem)))]
pub async fn resume_run(
    Operator(caller): Operator,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
) -> Result<StatusCode, Problem> {
    state.engine()?.resume(run_id, &caller.name).await?;
    Ok(StatusCode::ACCEPTED)
}
