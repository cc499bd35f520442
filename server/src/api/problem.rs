//! Errors as RFC 9457 problem details (`application/problem+json`).
//!
//! Every error the API returns, from a handler or from a layer (body too large, timeout, unknown
//! route), leaves as one JSON object with `type`, `title`, `status`, `detail` and, for input
//! errors, an `errors` array of `{field, message}` naming each offending field. Status codes are
//! used as their RFCs define them: 401 no or bad credentials (RFC 9110 15.5.2, with a
//! `WWW-Authenticate: Bearer` challenge per RFC 6750), 403 credentials without the right, 404 no
//! such resource, 409 a state conflict, 413 body too large, 422 well-formed but invalid content.
//! `type` is a relative URI under `/problems/` naming the kind of problem, stable for clients to
//! match on.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// The media type of problem details (RFC 9457 section 3).
pub const PROBLEM_JSON: &str = "application/problem+json";

/// One offending input field and what is wrong with it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct FieldProblem {
    /// Path of the field in the request, dotted (`levels.stop_dbm`), or the query parameter name.
    pub field: String,
    /// What is wrong and what would be accepted.
    pub message: String,
}

impl FieldProblem {
    pub fn new(field: impl Into<String>, message: impl Into<String>) -> Self {
        FieldProblem {
            field: field.into(),
            message: message.into(),
        }
    }
}

/// A problem-details document (RFC 9457). As sent, every problem also carries the extension
/// member `request_id` (the `X-Request-Id` header's value), added by `api::request_id` on the
/// way out; the daemon's log lines of the request carry the same id.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct Problem {
    /// A URI reference naming the kind of problem (relative, under `/problems/`).
    #[serde(rename = "type")]
    pub kind: String,
    /// A short summary of the kind of problem; the same for every occurrence.
    pub title: String,
    /// The HTTP status code.
    pub status: u16,
    /// What happened this time and what to do about it.
    pub detail: String,
    /// The offending fields, when the problem is in the request's content.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<FieldProblem>,
}

impl Problem {
    /// A problem of a given status; `kind` is the last segment of its type URI.
    pub fn new(status: StatusCode, kind: &str, title: &str, detail: impl Into<String>) -> Self {
        Problem {
            kind: format!("/problems/{kind}"),
            title: title.to_string(),
            status: status.as_u16(),
            detail: detail.into(),
            errors: Vec::new(),
        }
    }

    /// 401: no token, an unknown token or a revoked one.
    pub fn unauthorized(detail: impl Into<String>) -> Self {
        Problem::new(
            StatusCode::UNAUTHORIZED,
            "unauthorized",
            "Missing or invalid credentials",
            detail,
        )
    }

    /// 403: a valid token whose role does not allow the call.
    pub fn forbidden(detail: impl Into<String>) -> Self {
        Problem::new(
            StatusCode::FORBIDDEN,
            "forbidden",
            "Role does not allow this call",
            detail,
        )
    }

    /// 404: nothing under this identifier.
    pub fn not_found(detail: impl Into<String>) -> Self {
        Problem::new(StatusCode::NOT_FOUND, "not-found", "Not found", detail)
    }

    /// 409: the resource's current state forbids the request.
    pub fn conflict(detail: impl Into<String>) -> Self {
        Problem::new(
            StatusCode::CONFLICT,
            "conflict",
            "Conflicts with the current state",
            detail,
        )
    }

    /// 422: the request was understood but some fields are invalid; each is listed.
    pub fn invalid(detail: impl Into<String>, errors: Vec<FieldProblem>) -> Self {
        let mut problem = Problem::new(
            StatusCode::UNPROCESSABLE_ENTITY,
            "invalid-request",
            "Invalid request fields",
            detail,
        );
        problem.errors = errors;
        problem
    }

    /// 422 for a single field.
    pub fn invalid_field(field: &str, message: impl Into<String>) -> Self {
        let message = message.into();
        Problem::invalid(
            format!("{field}: {message}"),
            vec![FieldProblem::new(field, message)],
        )
    }

    /// 500: something failed inside the daemon; the detail says what for the log (the client
    /// gets the request id instead: `api::request_id`).
    pub fn internal(detail: impl Into<String>) -> Self {
        Problem::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal",
            "Internal error",
            detail,
        )
    }

    /// The status as an HTTP status code (500 when the number is not a valid status).
    pub fn status_code(&self) -> StatusCode {
        StatusCode::from_u16(self.status).unwrap_or(StatusCode::INTERNAL_SERVER_ERROR)
    }

    /// The problem for an error response that a layer or the router produced with no body of
    /// ours (413 from the size limit, 408 from the timeout, 404/405 from routing).
    pub fn for_bare_status(status: StatusCode) -> Self {
        match status {
            StatusCode::PAYLOAD_TOO_LARGE => Problem::new(
                status,
                "body-too-large",
                "Request body too large",
                format!(
                    "the request body exceeds the limit of {} bytes; send a smaller plan or calibration",
                    super::MAX_BODY_BYTES
                ),
            ),
            StatusCode::REQUEST_TIMEOUT => Problem::new(
                status,
                "timeout",
                "Request took too long",
                format!(
                    "the request did not complete within {} s; retry, or narrow the query",
                    super::REQUEST_TIMEOUT.as_secs()
                ),
            ),
            StatusCode::NOT_FOUND => Problem::not_found(
                "no such route; the OpenAPI document at /api/v1/openapi.json lists them",
            ),
            StatusCode::METHOD_NOT_ALLOWED => Problem::new(
                status,
                "method-not-allowed",
                "Method not allowed",
                "this route exists but not with this HTTP method; see /api/v1/openapi.json",
            ),
            StatusCode::UNSUPPORTED_MEDIA_TYPE => Problem::new(
                status,
                "unsupported-media-type",
                "Unsupported media type",
                "send the body as application/json (or text/csv where the route says so)",
            ),
            other => Problem::new(
                other,
                "http-error",
                other.canonical_reason().unwrap_or("HTTP error"),
                format!("the request ended with status {}", other.as_u16()),
            ),
        }
    }
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} ({}): {}", self.title, self.status, self.detail)
    }
}

impl IntoResponse for Problem {
    fn into_response(self) -> Response {
        let status = self.status_code();
        let body = match serde_json::to_vec(&self) {
            Ok(body) => body,
            Err(e) => format!(
                "{{\"type\":\"/problems/internal\",\"title\":\"Internal error\",\"status\":500,\"detail\":\"could not encode a problem: {e}\"}}"
            )
            .into_bytes(),
        };
        let mut response = (status, body).into_response();
        response
            .headers_mut()
            .insert(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON));
        if status == StatusCode::UNAUTHORIZED {
            response.headers_mut().insert(
                header::WWW_AUTHENTICATE,
                HeaderValue::from_static("Bearer realm=\"halfwave\""),
            );
        }
        response
    }
}

/// Middleware: turns error responses that carry no JSON document (produced by layers and
/// the router itself) into problem details, so clients see one error format everywhere.
pub async fn problems_for_bare_errors(
    request: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let response = next.run(request).await;
    let status = response.status();
    if !(status.is_client_error() || status.is_server_error()) {
        return response;
    }
    // A problem document, or a JSON body a handler chose to send with an error status (the
    // degraded health report), is kept as it is.
    let is_deliberate = response
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.starts_with(PROBLEM_JSON) || v.starts_with("application/json"));
    if is_deliberate {
        return response;
    }
    Problem::for_bare_status(status).into_response()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn problem_serialises_with_rfc9457_member_names() {
        // RFC 9457 section 3.1: members "type", "title", "status", "detail".
        let problem = Problem::invalid(
            "two fields are invalid",
            vec![
                FieldProblem::new("levels.stop_dbm", "above the limit"),
                FieldProblem::new("frequencies.values_hz[0]", "not positive"),
            ],
        );
        let value = serde_json::to_value(&problem).unwrap();
        assert_eq!(value["type"], "/problems/invalid-request");
        assert_eq!(value["status"], 422);
        assert_eq!(value["title"], "Invalid request fields");
        assert_eq!(value["errors"][1]["field"], "frequencies.values_hz[0]");
    }

    #[test]
    fn unauthorized_response_has_bearer_challenge_and_problem_type() {
        // RFC 6750 section 3: a 401 carries WWW-Authenticate with the Bearer scheme.
        let response = Problem::unauthorized("no token").into_response();
        assert_eq!(response.status(), StatusCode::UNAUTHORIZED);
        assert_eq!(
            response.headers()[header::CONTENT_TYPE],
            HeaderValue::from_static(PROBLEM_JSON)
        );
        assert!(response.headers()[header::WWW_AUTHENTICATE]
            .to_str()
            .unwrap()
            .starts_with("Bearer"));
    }
}
