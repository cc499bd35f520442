//! The route table: one entry per (method, path), one file per resource.
//!
//! Routes are registered from [`route_table`], and the same table is what the OpenAPI test
//! compares with the generated document, so a route cannot be served without being documented
//! (or documented without being served). Paths use the `{name}` template syntax, which is both
//! axum's and OpenAPI's.

pub mod benches;
pub mod chains;
pub mod dashboard;
pub mod devices;
pub mod events;
pub mod pins;
pub mod run_control;
pub mod runs;
pub mod system;
pub mod tokens;

use super::problem::Problem;
use super::{ApiSettings, AppState};
use axum::http::{HeaderValue, Method};
use axum::routing::MethodRouter;
use axum::Router;
use tower_http::cors::{AllowOrigin, CorsLayer};

/// Prefix of every API route.
pub const API_PREFIX: &str = "/api/v1";

/// One served route.
pub struct RouteEntry {
    pub method: Method,
    /// Path under [`API_PREFIX`].
    pub path: &'static str,
    /// True for long-lived responses (server-sent events), which are exempt from the timeout.
    pub streaming: bool,
    handler: MethodRouter<AppState>,
}

fn entry(method: Method, path: &'static str, handler: MethodRouter<AppState>) -> RouteEntry {
    RouteEntry {
        method,
        path,
        streaming: false,
        handler,
    }
}

/// Every API route. Add a route here and its `#[utoipa::path]` to `openapi.rs`.
pub fn route_table() -> Vec<RouteEntry> {
    use axum::routing::{delete, get, post};
    vec![
        entry(Method::GET, "/health", get(system::health)),
        entry(Method::GET, "/metrics", get(system::metrics)),
        entry(Method::GET, "/openapi.json", get(system::openapi_document)),
        entry(Method::GET, "/tokens", get(tokens::list_tokens)),
        entry(Method::POST, "/tokens", post(tokens::create_token)),
        entry(
            Method::DELETE,
            "/tokens/{name}",
            delete(tokens::revoke_token),
        ),
        entry(Method::POST, "/runs", post(run_control::submit_run)),
        entry(
            Method::POST,
            "/runs/{run_id}/cancel",
            post(run_control::cancel_run),
        ),
        entry(
            Method::POST,
            "/runs/{run_id}/resume",
            post(run_control::resume_run),
        ),
        entry(Method::GET, "/benches", get(benches::list_benches)),
        entry(
            Method::POST,
            "/benches/{bench}/acknowledge",
            post(benches::acknowledge_bench),
        ),
        RouteEntry {
            method: Method::GET,
            path: "/events",
            streaming: true,
            handler: get(events::events),
        },
        entry(Method::GET, "/runs", get(runs::list_runs)),
        entry(Method::GET, "/runs/{run_id}", get(runs::get_run)),
        entry(Method::GET, "/runs/{run_id}/points", get(runs::list_points)),
        entry(
            Method::GET,
            "/runs/{run_id}/points/{point_id}/trace",
            get(runs::point_trace),
        ),
        entry(
            Method::GET,
            "/runs/{run_id}/points/{point_id}/spectrum.svg",
            get(runs::point_spectrum_svg),
        ),
        entry(
            Method::GET,
            "/runs/{run_id}/spectrum.svg",
            get(runs::latest_spectrum_svg),
        ),
        entry(
            Method::GET,
            "/runs/{run_id}/plots/modulation-index.svg",
            get(runs::modulation_index_svg),
        ),
        entry(
            Method::GET,
            "/runs/{run_id}/compare/{other_run_id}",
            get(runs::compare_runs),
        ),
        entry(Method::GET, "/devices", get(devices::list_devices)),
        entry(Method::GET, "/devices/{serial}", get(devices::get_device)),
        entry(
            Method::GET,
            "/devices/{serial}/calibrations",
            get(devices::calibration_history),
        ),
        entry(Method::GET, "/devices/{serial}/v-pi", get(devices::vpi_at)),
        entry(Method::GET, "/devices/{serial}/pin", get(pins::get_pin)),
        entry(Method::POST, "/devices/{serial}/pin", post(pins::pin_run)),
        entry(
            Method::POST,
            "/devices/{serial}/unpin",
            post(pins::unpin_device),
        ),
        entry(
            Method::GET,
            "/devices/{serial}/plots/v-pi.svg",
            get(devices::vpi_plot),
        ),
        entry(
            Method::GET,
            "/devices/{serial}/plots/response.svg",
            get(devices::response_plot),
        ),
        entry(
            Method::POST,
            "/chain-calibrations",
            post(chains::upload_chain),
        ),
        entry(Method::GET, "/chain-calibrations", get(chains::list_chains)),
        entry(
            Method::GET,
            "/chain-calibrations/{name}",
            get(chains::get_chain),
        ),
    ]
}

fn build(streaming: bool) -> Router<AppState> {
    let mut router = Router::new();
    for route in route_table()
        .into_iter()
        .filter(|r| r.streaming == streaming)
    {
        let path = format!("{API_PREFIX}{}", route.path);
        router = router.route(&path, route.handler);
    }
    router
}

/// The routes that produce their response promptly (timeout applies).
pub fn timed_routes() -> Router<AppState> {
    build(false)
}

/// The long-lived routes (server-sent events).
pub fn streaming_routes() -> Router<AppState> {
    build(true)
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
