//! Request ids: one per HTTP request, in the logs, the `X-Request-Id` response header and every
//! problem document; and 500 responses that tell the client the id, not the daemon's internals.
//!
//! A client's own `X-Request-Id` is kept when it is a plain token (1 to 64 characters of letters,
//! digits, `.`, `_`, `-`), so one id can follow a request through a proxy; anything else is
//! replaced by the daemon's own (`hw-` and 16 random hexadecimal digits). Every log line of the
//! request is inside a `request` span carrying the id. A problem document (RFC 9457) gets the id
//! as the extension member `request_id` (RFC 9457 section 3.2 allows extension members); a 500's
//! `detail`, which may hold a database path or a driver's message, is logged with the id and
//! replaced by a sentence that names the id for the operator to look up.

use super::problem::PROBLEM_JSON;
use axum::body::{to_bytes, Body};
use axum::extract::Request;
use axum::http::{header, HeaderName, HeaderValue, StatusCode};
use axum::middleware::Next;
use axum::response::Response;
use tracing::Instrument;

/// The header that carries the id both ways.
pub static REQUEST_ID: HeaderName = HeaderName::from_static("x-request-id");

/// A problem document larger than this is passed on untouched (ours are far smaller).
const MAX_PROBLEM_BYTES: usize = 256 * 1024;

/// The id of one request, in the request's extensions for handlers that want it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RequestId(pub String);

/// Whether a client-sent id is kept: a short plain token, nothing a log or header could misread.
fn acceptable(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-'))
}

/// A fresh id: 64 random bits from the OS, so ids from several daemons or restarts do not
/// collide in practice (should the OS refuse, a per-process count mixed with the clock).
fn fresh() -> String {
    use rand::rngs::OsRng;
    use rand::TryRngCore;
    static COUNT: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let bits = OsRng.try_next_u64().unwrap_or_else(|_| {
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_nanos() as u64);
        nanos
            ^ COUNT
                .fetch_add(1, std::sync::atomic::Ordering::Relaxed)
                .rotate_left(40)
    });
    format!("hw-{bits:016x}")
}

/// Middleware: assigns the id, runs the request inside a span that carries it, and stamps the
/// response (header, and the problem document if the response is one).
pub async fn assign(mut request: Request, next: Next) -> Response {
    let id = request
        .headers()
        .get(&REQUEST_ID)
        .and_then(|v| v.to_str().ok())
        .filter(|v| acceptable(v))
        .map_or_else(fresh, str::to_string);
    request.extensions_mut().insert(RequestId(id.clone()));
    let span = tracing::info_span!("request", id = %id);
    let response = next.run(request).instrument(span).await;
    stamp(response, &id).await
}

async fn stamp(response: Response, id: &str) -> Response {
    let (mut parts, body) = response.into_parts();
    if let Ok(value) = HeaderValue::from_str(id) {
        parts.headers.insert(REQUEST_ID.clone(), value);
    }
    let is_problem = parts
        .headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.starts_with(PROBLEM_JSON));
    if !is_problem {
        return Response::from_parts(parts, body);
    }
    let Ok(bytes) = to_bytes(body, MAX_PROBLEM_BYTES).await else {
        tracing::warn!(
            request_id = id,
            "a problem document could not be read to add its id"
        );
        return Response::from_parts(parts, Body::empty());
    };
    let Ok(serde_json::Value::Object(mut problem)) = serde_json::from_slice(&bytes) else {
        return Response::from_parts(parts, Body::from(bytes));
    };
    if parts.status == StatusCode::INTERNAL_SERVER_ERROR {
        let detail = problem
            .get("detail")
            .and_then(|d| d.as_str())
            .unwrap_or("")
            .to_string();
        tracing::error!(request_id = id, detail, "internal error answered with 500");
        problem.insert(
            "detail".into(),
            serde_json::Value::String(format!(
                "the daemon could not complete the request; its log has the cause under request id {id}"
            )),
        );
    }
    problem.insert(
        "request_id".into(),
        serde_json::Value::String(id.to_string()),
    );
    match serde_json::to_vec(&problem) {
        Ok(encoded) => {
            parts.headers.remove(header::CONTENT_LENGTH);
            Response::from_parts(parts, Body::from(encoded))
        }
        Err(_) => Response::from_parts(parts, Body::from(bytes)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::problem::Problem;
    use axum::routing::get;
    use axum::Router;

    fn app() -> Router {
        Router::new()
            .route(
                "/fails",
                get(|| async { Problem::internal("database at /var/lib/secret.db is locked") }),
            )
            .route("/missing", get(|| async { Problem::not_found("no run 7") }))
            .route("/fine", get(|| async { "ok" }))
            .layer(axum::middleware::from_fn(assign))
    }

    /// Serves the app on a loopback port and makes one request, as a client would: the status,
    /// the `X-Request-Id` header and the body as JSON (null when it is not JSON).
    async fn call(path: &str, id: Option<&str>) -> (StatusCode, String, serde_json::Value) {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let address = listener.local_addr().unwrap();
        tokio::spawn(async move { axum::serve(listener, app()).await });
        let mut request = reqwest::Client::new().get(format!("http://{address}{path}"));
        if let Some(id) = id {
            request = request.header("x-request-id", id);
        }
        let response = request.send().await.unwrap();
        let status = StatusCode::from_u16(response.status().as_u16()).unwrap();
        let header = response.headers()["x-request-id"]
            .to_str()
            .unwrap()
            .to_string();
        let text = response.text().await.unwrap();
        let json = serde_json::from_str(&text).unwrap_or(serde_json::Value::Null);
        (status, header, json)
    }

    #[tokio::test]
    async fn a_500_names_its_request_id_and_keeps_the_internals_out() {
        let (status, id, problem) = call("/fails", None).await;
        assert_eq!(status, StatusCode::INTERNAL_SERVER_ERROR);
        assert!(id.starts_with("hw-") && id.len() == 19, "{id}");
        assert_eq!(problem["request_id"], id.as_str());
        let detail = problem["detail"].as_str().unwrap();
        assert!(!detail.contains("secret"), "{detail}");
        assert!(detail.contains(&id), "{detail}");
        assert_eq!(problem["type"], "/problems/internal");
    }

    #[tokio::test]
    async fn other_problems_keep_their_detail_and_gain_the_id() {
        let (status, id, problem) = call("/missing", Some("proxy-42.a_b")).await;
        assert_eq!(status, StatusCode::NOT_FOUND);
        assert_eq!(id, "proxy-42.a_b");
        assert_eq!(problem["request_id"], "proxy-42.a_b");
        assert_eq!(problem["detail"], "no run 7");
    }

    #[tokio::test]
    async fn a_strange_client_id_is_replaced_and_plain_answers_get_the_header() {
        let long = "x".repeat(65);
        for bad in ["has space", "quote\"", long.as_str()] {
            let (status, id, _) = call("/fine", Some(bad)).await;
            assert_eq!(status, StatusCode::OK);
            assert!(id.starts_with("hw-"), "{bad:?} gave {id}");
        }
    }
}
