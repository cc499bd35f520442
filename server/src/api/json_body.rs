//! A JSON body extractor whose errors name the field.
//!
//! axum's own `Json` rejects a bad body with a plain-text message. Here the body is parsed with
//! `serde_path_to_error`, so an unknown field, a wrong type or a missing member comes back as a
//! 422 problem whose `errors` entry names the dotted path of the offending field
//! (`levels.stop_dbm`); a body that is not JSON at all is named as the field `body`. A body over the
//! size limit is a 413, a wrong content type a 415.

use super::problem::{FieldProblem, Problem};
use axum::body::Bytes;
use axum::extract::{FromRequest, Request};
use axum::http::header::CONTENT_TYPE;
use axum::http::StatusCode;
use serde::de::DeserializeOwned;
use serde::Deserialize;

/// A request body parsed from JSON, with field-naming errors.
#[derive(Debug, Clone)]
pub struct JsonBody<T>(pub T);

/// Parses JSON bytes into `T`, naming the offending field on failure. A number with a fraction of
/// zero (`12.0`) is taken as the integer it is, as JSON Schema counts it, so a client that writes
/// every number as a float is understood; any other fraction still fails for an integer field.
pub fn parse_json<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, Problem> {
    let mut deserializer = serde_json::Deserializer::from_slice(bytes);
    let mut tree = serde_json::Value::deserialize(&mut deserializer).map_err(|e| {
        let message = format!("the body is not valid JSON: {e}");
        Problem::invalid(
            format!("body: {message}"),
            vec![FieldProblem::new("body", message)],
        )
    })?;
    deserializer.end().map_err(|e| {
        Problem::invalid_field(
            "body",
            format!("unexpected content after the JSON value: {e}"),
        )
    })?;
    whole_numbers_as_integers(&mut tree);
    let parsed: Result<T, _> = serde_path_to_error::deserialize(tree);
    let value = match parsed {
        Ok(value) => value,
        Err(e) => {
            let path = e.path().to_string();
            let inner = e.into_inner();
            let syntax = matches!(
                inner.classify(),
                serde_json::error::Category::Syntax | serde_json::error::Category::Eof
            );
            let field = if syntax || path == "." {
                "body".to_string()
            } else {
                path
            };
            let message = if syntax {
                format!("the body is not valid JSON: {inner}")
            } else {
                in_words(&field, &strip_position(&inner.to_string()))
            };
            return Err(Problem::invalid(
                format!("{field}: {message}"),
                vec![FieldProblem::new(field, message)],
            ));
        }
    };
    Ok(value)
}

/// Turns every float with a zero fraction that an `i64` holds exactly into that integer.
fn whole_numbers_as_integers(value: &mut serde_json::Value) {
    match value {
        serde_json::Value::Number(n) if !n.is_i64() && !n.is_u64() => {
            if let Some(f) = n.as_f64() {
                // 2^63 is the first float above i64::MAX; every float in [-2^63, 2^63) with a
                // zero fraction converts exactly.
                const TWO_TO_63: f64 = (1u64 << 63) as f64;
                if f.fract() == 0.0 && (-TWO_TO_63..TWO_TO_63).contains(&f) {
                    *value = serde_json::Value::from(f as i64);
                }
            }
        }
        serde_json::Value::Array(items) => items.iter_mut().for_each(whole_numbers_as_integers),
        serde_json::Value::Object(members) => {
            members.values_mut().for_each(whole_numbers_as_integers)
        }
        _ => {}
    }
}

/// serde's "invalid type: null, expected usize" (or "invalid value: ...") as a sentence that names
/// the field and the kind of value it takes: "frequencies.count must be a whole number (0 or
/// more), not null". Other messages (unknown or missing fields) are kept as they are.
fn in_words(field: &str, message: &str) -> String {
    let rest = message
        .strip_prefix("invalid type: ")
        .or_else(|| message.strip_prefix("invalid value: "));
    let Some((got, expected)) = rest.and_then(|r| r.split_once(", expected ")) else {
        return message.to_string();
    };
    let expected = match expected {
        "usize" | "u8" | "u16" | "u32" | "u64" => "a whole number (0 or more)",
        "isize" | "i8" | "i16" | "i32" | "i64" => "a whole number",
        "f32" | "f64" => "a number",
        "a boolean" => "true or false",
        other => other,
    };
    format!("{field} must be {expected}, not {got}")
}

/// serde_json appends " at line L column C"; the field path says more, so drop it for fields.
fn strip_position(message: &str) -> String {
    match message.rfind(" at line ") {
        Some(at) => message[..at].to_string(),
        None => message.to_string(),
    }
}

impl<S, T> FromRequest<S> for JsonBody<T>
where
    S: Send + Sync,
    T: DeserializeOwned,
{
    type Rejection = Problem;

    async fn from_request(request: Request, state: &S) -> Result<Self, Self::Rejection> {
        let is_json = request
            .headers()
            .get(CONTENT_TYPE)
            .and_then(|v| v.to_str().ok())
            .map(|v| {
                let essence = v.split(';').next().unwrap_or_default().trim();
                essence.eq_ignore_ascii_case("application/json")
                    || essence.to_ascii_lowercase().ends_with("+json")
            })
            .unwrap_or(false);
        if !is_json {
            return Err(Problem::for_bare_status(StatusCode::UNSUPPORTED_MEDIA_TYPE));
        }
        let bytes = Bytes::from_request(request, state)
            .await
            .map_err(|rejection| Problem::for_bare_status(rejection.status()))?;
        parse_json(&bytes).map(JsonBody)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde::Deserialize;

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Inner {
        stop_dbm: f64,
    }

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Outer {
        levels: Inner,
    }

    #[test]
    fn wrong_type_names_the_nested_field() {
        let problem = parse_json::<Outer>(br#"{"levels":{"stop_dbm":"hot"}}"#).unwrap_err();
        assert_eq!(problem.status, 422);
        assert_eq!(problem.errors[0].field, "levels.stop_dbm");
    }

    #[test]
    fn unknown_field_is_named() {
        let problem =
            parse_json::<Outer>(br#"{"levels":{"stop_dbm":1.0,"power_w":3}}"#).unwrap_err();
        assert_eq!(problem.errors[0].field, "levels.power_w");
        assert!(problem.errors[0].message.contains("unknown field"));
    }

    #[derive(Debug, Deserialize)]
    #[allow(dead_code)]
    struct Counted {
        count: usize,
    }

    #[test]
    fn a_wrong_type_is_said_in_words_with_the_field() {
        // What the dashboard sent for "abc" in a number field: the browser gives "" and the page
        // sent null.
        let problem = parse_json::<Counted>(br#"{"count":null}"#).unwrap_err();
        assert_eq!(problem.errors[0].field, "count");
        assert_eq!(
            problem.errors[0].message,
            "count must be a whole number (0 or more), not null"
        );
        let problem = parse_json::<Counted>(br#"{"count":-3}"#).unwrap_err();
        assert_eq!(
            problem.errors[0].message,
            "count must be a whole number (0 or more), not integer `-3`"
        );
        let problem = parse_json::<Outer>(br#"{"levels":{"stop_dbm":"hot"}}"#).unwrap_err();
        assert_eq!(
            problem.errors[0].message,
            "levels.stop_dbm must be a number, not string \"hot\""
        );
    }

    #[test]
    fn a_whole_number_written_as_a_float_is_an_integer() {
        // JSON Schema (2020-12, section 6.1.1 of the validation vocabulary) counts 12.0 as an
        // integer; a client that writes every number as a float must be understood.
        assert_eq!(
            parse_json::<Counted>(br#"{"count":12.0}"#).unwrap().count,
            12
        );
        assert_eq!(
            parse_json::<Counted>(br#"{"count":1e3}"#).unwrap().count,
            1000
        );
        let problem = parse_json::<Counted>(br#"{"count":12.5}"#).unwrap_err();
        assert_eq!(problem.errors[0].field, "count");
        let problem = parse_json::<Counted>(br#"{"count":-1.0}"#).unwrap_err();
        assert_eq!(problem.errors[0].field, "count");
        // Floats stay floats where a float is wanted.
        let outer = parse_json::<Outer>(br#"{"levels":{"stop_dbm":3}}"#).unwrap();
        assert_eq!(outer.levels.stop_dbm, 3.0);
        let problem = parse_json::<Counted>(br#"{"count":1} trailing"#).unwrap_err();
        assert!(problem.errors[0].message.contains("unexpected content"));
    }

    #[test]
    fn malformed_json_is_the_body_field() {
        let problem = parse_json::<Outer>(br#"{"levels": "#).unwrap_err();
        assert_eq!(problem.status, 422);
        assert_eq!(problem.errors[0].field, "body");
    }
}
