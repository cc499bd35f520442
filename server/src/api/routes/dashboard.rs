//! The dashboard: one HTML page, one stylesheet and one script, compiled into the binary with
//! `include_str!` so the daemon serves them with no files beside it and no external CDN.
//!
//! These static files hold no data and need no token; every data call the page makes goes to
//! `/api/v1` with the token the user pastes (kept in the tab's sessionStorage).

use axum::http::header::{CACHE_CONTROL, CONTENT_SECURITY_POLICY, CONTENT_TYPE};
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::get;
use axum::Router;

const INDEX_HTML: &str = include_str!("../../../assets/index.html");
const STYLE_CSS: &str = include_str!("../../../assets/style.css");
const APP_JS: &str = include_str!("../../../assets/app.js");

/// Everything the page loads comes from this origin; images may be blob URLs made by the script.
const POLICY: &str = "default-src 'self'; img-src 'self' blob:; style-src 'self'; script-src 'self'; connect-src 'self'; frame-ancestors 'none'";

fn asset(content_type: &'static str, body: &'static str) -> Response {
    (
        [
            (CONTENT_TYPE, content_type),
            (CACHE_CONTROL, "no-cache"),
            (CONTENT_SECURITY_POLICY, POLICY),
        ],
        body,
    )
        .into_response()
}

/// The dashboard routes (`/` redirects to `/dashboard/`).
pub fn dashboard_routes<S: Clone + Send + Sync + 'static>() -> Router<S> {
    Router::new()
        .route("/", get(|| async { Redirect::to("/dashboard/") }))
        .route(
            "/dashboard/",
            get(|| async { asset("text/html; charset=utf-8", INDEX_HTML) }),
        )
        .route("/dashboard", get(|| async { Redirect::to("/dashboard/") }))
        .route(
            "/dashboard/style.css",
            get(|| async { asset("text/css; charset=utf-8", STYLE_CSS) }),
        )
        .route(
            "/dashboard/app.js",
            get(|| async { asset("text/javascript; charset=utf-8", APP_JS) }),
        )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn page_references_only_its_own_assets() {
        for needle in ["http://", "https://", "//cdn"] {
            assert!(
                !INDEX_HTML.contains(needle) && !APP_JS.contains(needle),
                "external reference {needle} in the dashboard"
            );
        }
        assert!(INDEX_HTML.contains("/dashboard/app.js"));
        assert!(INDEX_HTML.contains("/dashboard/style.css"));
    }
}
