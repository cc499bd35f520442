//! Path and query-string extractors whose errors name the parameter.
//!
//! axum's own `Path` and `Query` reject a malformed value with a bare 400. Here a path parameter
//! that cannot be what the route expects (`/runs/abc`) is a 404 that names the parameter and says
//! what it must be, because no resource has that address; a query parameter of the wrong type
//! (`?page=abc`) is a 422 whose `errors` entry names the parameter, like every other invalid
//! field.

use super::problem::{FieldProblem, Problem};
use axum::extract::path::ErrorKind;
use axum::extract::rejection::PathRejection;
use axum::extract::{FromRequestParts, MatchedPath, Path};
use axum::http::request::Parts;
use serde::de::DeserializeOwned;

/// Path parameters; a value of the wrong type is a 404 naming the parameter.
#[derive(Debug, Clone)]
pub struct ApiPath<T>(pub T);

impl<T, S> FromRequestParts<S> for ApiPath<T>
where
    T: DeserializeOwned + Send,
    S: Send + Sync,
{
    type Rejection = Problem;

    async fn from_request_parts(parts: &mut Parts, state: &S) -> Result<Self, Problem> {
        let template = parts
            .extensions
            .get::<MatchedPath>()
            .map(|m| m.as_str().to_string());
        match Path::<T>::from_request_parts(parts, state).await {
            Ok(Path(value)) => Ok(ApiPath(value)),
            Err(rejection) => Err(path_problem(&rejection, template.as_deref())),
        }
    }
}

/// Query-string parameters; a value of the wrong type is a 422 naming the parameter.
#[derive(Debug, Clone)]
pub struct ApiQuery<T>(pub T);

impl<T, S> FromRequestParts<S> for ApiQuery<T>
where
    T: DeserializeOwned + Send,
    S: Send + Sync,
{
    type Rejection = Problem;

    async fn from_request_parts(parts: &mut Parts, _state: &S) -> Result<Self, Problem> {
        parse_query(parts.uri.query().unwrap_or_default()).map(ApiQuery)
    }
}

/// Parses a query string into `T`, naming the offending parameter on failure.
pub fn parse_query<T: DeserializeOwned>(query: &str) -> Result<T, Problem> {
    let deserializer =
        serde_urlencoded::Deserializer::new(form_urlencoded::parse(query.as_bytes()));
    serde_path_to_error::deserialize(deserializer).map_err(|e| {
        let field = e.path().to_string();
        let field = if field == "." {
            "query".to_string()
        } else {
            field
        };
        let message = format!("{}", e.into_inner());
        Problem::invalid(
            format!("query parameter {field}: {message}"),
            vec![FieldProblem::new(field, message)],
        )
    })
}

/// What a Rust type name means to someone writing a URL.
fn expected(type_name: &str) -> String {
    match type_name {
        "i8" | "i16" | "i32" | "i64" | "u8" | "u16" | "u32" | "u64" | "usize" | "isize" => {
            "a whole number".to_string()
        }
        "f32" | "f64" => "a number".to_string(),
        other => format!("a value of type {other}"),
    }
}

/// The `{name}` parameters of a route template, in order.
fn parameter_names(template: &str) -> Vec<&str> {
    template
        .split('/')
        .filter_map(|segment| segment.strip_prefix('{')?.strip_suffix('}'))
        .collect()
}

fn path_problem(rejection: &PathRejection, template: Option<&str>) -> Problem {
    let names = template.map(parameter_names).unwrap_or_default();
    let named = |index: usize| {
        names
            .get(index)
            .map_or_else(|| format!("number {}", index + 1), |n| (*n).to_string())
    };
    let (name, value, expected_type) = match rejection {
        PathRejection::FailedToDeserializePathParams(e) => match e.kind() {
            ErrorKind::ParseErrorAtKey {
                key,
                value,
                expected_type,
            } => (key.clone(), value.clone(), *expected_type),
            ErrorKind::ParseErrorAtIndex {
                index,
                value,
                expected_type,
            } => (named(*index), value.clone(), *expected_type),
            ErrorKind::ParseError {
                value,
                expected_type,
            } => (named(0), value.clone(), *expected_type),
            other => {
                return Problem::not_found(format!("no such resource: {other}"));
            }
        },
        other => return Problem::not_found(format!("no such resource: {}", other.body_text())),
    };
    Problem::not_found(format!(
        "no such resource: the path parameter {name} is {value:?}, which is not {}",
        expected(expected_type)
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde::Deserialize;

    #[derive(Debug, Deserialize)]
    #[allow(dead_code)]
    struct Paging {
        page: Option<u32>,
        frequency_hz: Option<f64>,
    }

    #[test]
    fn a_bad_query_parameter_is_named() {
        let problem = parse_query::<Paging>("page=abc").unwrap_err();
        assert_eq!(problem.status, 422);
        assert_eq!(problem.errors[0].field, "page");
        let problem = parse_query::<Paging>("page=2&frequency_hz=7.5GHz").unwrap_err();
        assert_eq!(problem.errors[0].field, "frequency_hz");
        assert!(parse_query::<Paging>("page=2&frequency_hz=7.5e9").is_ok());
    }

    #[test]
    fn route_templates_give_parameter_names() {
        assert_eq!(
            parameter_names("/api/v1/runs/{run_id}/points/{point_id}/trace"),
            ["run_id", "point_id"]
        );
        assert_eq!(expected("i64"), "a whole number");
    }
}
