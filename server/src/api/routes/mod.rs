//! The route table: one entry per handler, one file per resource.
//!
//! Each route is registered with utoipa-axum's `routes!`, which takes the method and path from the
//! handler's `#[utoipa::path]` attribute: the same entry serves the route and puts its operation
//! into the OpenAPI document ([`crate::api::openapi::document`]), so a route cannot be served
//! without being documented. Paths use the `{name}` template syntax, which is both axum's and
//! OpenAPI's.

pub mod benches;
pub mod budget;
pub mod chain_runs;
pub mod chains;
pub mod dashboard;
pub mod devices;
pub mod drive;
pub mod events;
pub mod pins;
pub mod prediction;
pub mod run_control;
pub mod run_plots;
pub mod runs;
pub mod system;
pub mod tokens;

use super::problem::Problem;
use super::{ApiSettings, AppState};
use axum::http::{HeaderValue, Method};
use tower_http::cors::{AllowOrigin, CorsLayer};
use utoipa_axum::router::OpenApiRouter;
use utoipa_axum::routes;

/// Prefix of every API route.
pub const API_PREFIX: &str = "/api/v1";

/// The routes that produce their response promptly (the request timeout applies to them). Add a
/// route here, with its `#[utoipa::path]` attribute on the handler; nothing else lists it.
pub fn timed_routes() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(system::health))
        .routes(routes!(system::metrics))
        .routes(routes!(system::openapi_document))
        .routes(routes!(tokens::list_tokens, tokens::create_token))
        .routes(routes!(tokens::revoke_token))
        .routes(routes!(run_control::submit_run, runs::list_runs))
        .routes(routes!(run_control::cancel_run))
        .routes(routes!(run_control::resume_run))
        .routes(routes!(benches::list_benches))
        .routes(routes!(benches::acknowledge_bench))
        .routes(routes!(events::event_ticket))
        .routes(routes!(runs::get_run))
        .routes(routes!(runs::run_report))
        .routes(routes!(runs::list_points))
        .routes(routes!(runs::point_trace))
        .routes(routes!(run_plots::point_spectrum_svg))
        .routes(routes!(run_plots::latest_spectrum_svg))
        .routes(routes!(run_plots::modulation_index_svg))
        .routes(routes!(runs::compare_runs))
        .routes(routes!(devices::list_devices))
        .routes(routes!(devices::get_device))
        .routes(routes!(devices::calibration_history))
        .routes(routes!(devices::vpi_at))
        .routes(routes!(drive::plan_drive))
        .routes(routes!(prediction::predict))
        .routes(routes!(pins::get_pin, pins::pin_run))
        .routes(routes!(pins::unpin_device))
        .routes(routes!(devices::vpi_plot))
        .routes(routes!(devices::response_plot))
        .routes(routes!(chains::upload_chain, chains::list_chains))
        .routes(routes!(chains::get_chain))
        .routes(routes!(budget::run_budget))
        .routes(routes!(chain_runs::submit_chain_run))
        .routes(routes!(chain_runs::get_chain_run))
        .routes(routes!(chain_runs::cancel_chain_run))
}

/// The long-lived routes (server-sent events), exempt from the request timeout.
pub fn streaming_routes() -> OpenApiRouter<AppState> {
    OpenApiRouter::new().routes(routes!(events::events))
}

/// Every API route with its operation, without the layers [`crate::api::router`] adds: what the
/// OpenAPI document is made from.
pub fn all_routes() -> OpenApiRouter<AppState> {
    timed_routes().merge(streaming_routes())
}

/// 404 for paths that match no route.
pub async fn unknown_route() -> Problem {
    Problem::for_bare_status(axum::http::StatusCode::NOT_FOUND)
}

/// The CORS layer when origins are configured; none (no CORS headers) by default.
pub fn cors_layer(settings: &ApiSettings) -> Option<CorsLayer> {
    if settings.cors_allowed_origins.is_empty() {
        return None;
    }
    let origins: Vec<HeaderValue> = settings
        .cors_allowed_origins
        .iter()
        .filter_map(|o| HeaderValue::from_str(o).ok())
        .collect();
    Some(
        CorsLayer::new()
            .allow_origin(AllowOrigin::list(origins))
            .allow_methods([Method::GET, Method::POST, Method::DELETE])
            .allow_headers([
                axum::http::header::AUTHORIZATION,
                axum::http::header::CONTENT_TYPE,
            ]),
    )
}
