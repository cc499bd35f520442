//! Health, Prometheus metrics and the OpenAPI document.
//!
//! Health is the one call that needs no token (load balancers and systemd probes have none); it
//! answers whether the daemon and its database respond, and turns `degraded` (503) while a bench
//! has an RF safety fault, naming the bench, so an unattended daemon's monitoring sees it. Metrics and the OpenAPI document are
//! readable by any token. Metrics: uptime, runs by state, each bench's queue, points committed,
//! each bench's RF safety gauges, the active runs' progress ([`crate::api::run_gauges`]) and the HTTP counters and latency
//! histograms ([`crate::api::metrics`]).

use crate::api::auth::Viewer;
use crate::api::metrics::{self, Exposition};
use crate::api::problem::Problem;
use crate::api::run_gauges;
use crate::api::AppState;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The daemon's health.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct Health {
    /// `ok` when the database answers and no bench has an RF safety fault; `degraded` (sent
    /// with status 503) while a bench's RF output is unconfirmed or waits for an acknowledgement.
    pub status: String,
    pub version: String,
    pub uptime_s: f64,
    /// The benches that need an operator, with what is wrong (empty when `ok`).
    #[serde(default)]
    pub attention: Vec<BenchAttention>,
}

/// A bench whose RF safety state needs an operator.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct BenchAttention {
    pub bench: String,
    /// `output_unconfirmed` or `awaiting_acknowledgement`.
    pub safety_state: String,
    pub cause: String,
}

/// Whether the daemon and its database respond, and whether a bench needs an operator. No token
/// needed, so monitoring can poll it.
#[utoipa::path(get, path = "/api/v1/health", tag = "system",
    responses((status = 200, description = "The daemon and its database respond; every bench is clear", body = Health),
              (status = 503, description = "Degraded: a bench's RF output is unconfirmed or waits for an acknowledgement (see `attention`)", body = Health),
              (status = 500, description = "The database does not answer", body = Problem)))]
pub async fn health(State(state): State<AppState>) -> Result<(StatusCode, Json<Health>), Problem> {
    crate::store::maintenance::ping(state.pool())
        .await
        .map_err(|e| Problem::internal(format!("the database does not answer: {e}")))?;
    let attention: Vec<BenchAttention> = match state.engine() {
        Ok(engine) => engine
            .benches()
            .into_iter()
            .filter_map(|b| {
                let fault = b.safety_fault?;
                Some(BenchAttention {
                    bench: b.name,
                    safety_state: b.safety_state.as_str().to_string(),
                    cause: fault.cause,
                })
            })
            .collect(),
        Err(_) => Vec::new(),
    };
    let (code, status) = if attention.is_empty() {
        (StatusCode::OK, "ok")
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "degraded")
    };
    Ok((
        code,
        Json(Health {
            status: status.to_string(),
            version: env!("CARGO_PKG_VERSION").to_string(),
            uptime_s: state.uptime_s(),
            attention,
        }),
    ))
}

/// Request counters, latency histograms and run gauges in the Prometheus text format.
#[utoipa::path(get, path = "/api/v1/metrics", tag = "system", security(("bearer" = [])),
    responses((status = 200, description = "Prometheus text exposition format 0.0.4", body = String, content_type = "text/plain"),
              (status = 401, description = "No valid token", body = Problem)))]
pub async fn metrics(_caller: Viewer, State(state): State<AppState>) -> Result<Response, Problem> {
    let runs_by_state = state.store().run_counts_by_state().await?;
    let mut exposition = Exposition::default();
    exposition.gauge(
        "halfwave_uptime_seconds",
        "Seconds since the daemon started.",
        state.uptime_s(),
    );
    run_gauges::expose_runs_by_state(&runs_by_state, &mut exposition);
    if let (Ok(engine), Some(gauges)) = (state.engine(), state.run_gauges()) {
        run_gauges::expose_engine(engine, gauges, &mut exposition);
    }
    let webhooks = state.store().webhook_delivery_counts().await?;
    run_gauges::expose_webhook_deliveries(&webhooks, &mut exposition);
    state.http_metrics().expose(&mut exposition);
    Ok(([(CONTENT_TYPE, metrics::CONTENT_TYPE)], exposition.render()).into_response())
}

/// The OpenAPI 3.1 document of this API, generated from the code.
#[utoipa::path(get, path = "/api/v1/openapi.json", tag = "system", security(("bearer" = [])),
    responses((status = 200, description = "OpenAPI 3.1 document", body = Object),
              (status = 401, description = "No valid token", body = Problem)))]
pub async fn openapi_document(_caller: Viewer) -> Response {
    Json(crate::api::openapi::document()).into_response()
}
