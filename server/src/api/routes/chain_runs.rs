//! Chain calibration runs: submit one (operators), read it, cancel it. The engine proves the
//! request against the bench's source, its power sensor and the daemon's limits and reports every
//! invalid field at once (422); a refused request never reaches an instrument. A completed run
//! names the chain calibration version it stored (`GET /chain-calibrations/{id}`) and carries its
//! readings and per-frequency uncertainty budget.

use crate::api::auth::{Operator, Viewer};
use crate::api::json_body::JsonBody;
use crate::api::params::ApiPath;
use crate::api::problem::Problem;
use crate::api::views::chain_runs::{ChainRunView, SubmittedChainRun};
use crate::api::AppState;
use crate::engine::chain_run::ChainCalibrationRequest;
use axum::extract::State;
use axum::http::header::LOCATION;
use axum::http::{HeaderName, StatusCode};
use axum::Json;

/// Queues a chain calibration: the bench's RF source drives through the drive chain into its
/// power sensor, and the gains with their uncertainties become the next version of the named
/// chain calibration. Every invalid field is reported at once (422).
#[utoipa::path(post, path = "/api/v1/chain-calibration-runs", tag = "calibrations", security(("bearer" = [])),
    request_body(content = ChainCalibrationRequest, description = "What to measure. Whether it can run is decided against the bench it names (its source's and sensor's ranges, the chain's largest expected gain, the daemon's ceiling) and every field that fails is named in the 422."),
    responses((status = 201, body = SubmittedChainRun), (status = 401, body = Problem),
              (status = 403, body = Problem), (status = 413, body = Problem),
              (status = 422, description = "Invalid fields, each named in `errors`", body = Problem),
              (status = 503, description = "Read-only server without an engine", body = Problem)))]
pub async fn submit_chain_run(
    Operator(caller): Operator,
    State(state): State<AppState>,
    JsonBody(request): JsonBody<ChainCalibrationRequest>,
) -> Result<
    (
        StatusCode,
        [(HeaderName, String); 1],
        Json<SubmittedChainRun>,
    ),
    Problem,
> {
    let id = state
        .engine()?
        .submit_chain_calibration(request, &caller.name)
        .await?;
    let location = format!("/api/v1/chain-calibration-runs/{id}");
    Ok((
        StatusCode::CREATED,
        [(LOCATION, location.clone())],
        Json(SubmittedChainRun {
            chain_run_id: id,
            location,
        }),
    ))
}

/// A chain calibration run: its state, and once completed the version it stored and its budget.
#[utoipa::path(get, path = "/api/v1/chain-calibration-runs/{chain_run_id}", tag = "calibrations", security(("bearer" = [])),
    params(("chain_run_id" = i64, Path, description = "Chain calibration run id")),
    responses((status = 200, body = ChainRunView), (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn get_chain_run(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(id): ApiPath<i64>,
) -> Result<Json<ChainRunView>, Problem> {
    let record = state.store().chain_run(id).await?;
    Ok(Json(ChainRunView::of(record)?))
}

/// Cancels a queued or running chain calibration (the RF output is switched off).
#[utoipa::path(post, path = "/api/v1/chain-calibration-runs/{chain_run_id}/cancel", tag = "calibrations", security(("bearer" = [])),
    params(("chain_run_id" = i64, Path, description = "Chain calibration run id")),
    responses((status = 202, description = "Cancellation under way"), (status = 401, body = Problem),
              (status = 403, body = Problem), (status = 404, body = Problem),
              (status = 409, description = "The run has already ended", body = Problem),
              (status = 503, description = "Read-only server without an engine", body = Problem)))]
pub async fn cancel_chain_run(
    Operator(caller): Operator,
    State(state): State<AppState>,
    ApiPath(id): ApiPath<i64>,
) -> Result<StatusCode, Problem> {
    state
        .engine()?
        .cancel_chain_calibration(id, &caller.name)
        .await?;
    Ok(StatusCode::ACCEPTED)
}
