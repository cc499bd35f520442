//! Drive-chain calibrations: the net gain from generator to modulator versus frequency, uploaded
//! by admins as JSON or CSV, versioned by name (an upload never edits an earlier version).
//!
//! CSV form: a header line `frequency_hz,gain_db` and one row per frequency (a loss is a negative
//! gain); the name is the `name` query parameter. Every bad row is reported with its line number.

use crate::api::audit;
use crate::api::auth::{Admin, Viewer};
use crate::api::json_body::parse_json;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::AppState;
use crate::store::{ChainCalibration, ChainCalibrationHeader, ChainCalibrationPoint};
use axum::body::Bytes;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::http::{HeaderMap, StatusCode};
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};

/// The most rows one calibration may have.
pub const MAX_CHAIN_POINTS: usize = 10_000;

/// One row of a chain calibration.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChainPointBody {
    #[schema(exclusive_minimum = 0)]
    pub frequency_hz: f64,
    /// Net gain generator -> modulator, dB (negative for a loss).
    #[schema(minimum = -100, maximum = 100)]
    pub gain_db: f64,
}

/// A chain calibration upload (JSON form).
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChainUpload {
    /// 1 to 200 characters, not only spaces, tabs and line breaks.
    #[schema(min_length = 1, max_length = 200, pattern = "[^ \\t\\r\\n]")]
    pub name: String,
    #[schema(min_items = 1, max_items = 10000)]
    pub points: Vec<ChainPointBody>,
}

/// A stored calibration version.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct ChainView {
    pub name: String,
    pub version: i64,
    pub created_at_unix_ms: i64,
    pub created_by: String,
    pub points: Vec<ChainPointBody>,
}

impl From<ChainCalibration> for ChainView {
    fn from(c: ChainCalibration) -> ChainView {
        ChainView {
            name: c.name,
            version: c.version,
            created_at_unix_ms: c.created_at_unix_ms,
            created_by: c.created_by,
            points: c
                .points
                .iter()
                .map(|p| ChainPointBody {
                    frequency_hz: p.frequency_hz,
                    gain_db: p.gain_db,
                })
                .collect(),
        }
    }
}

/// A calibration version as listed (without points).
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct ChainHeaderView {
    pub name: String,
    pub version: i64,
    pub created_at_unix_ms: i64,
    pub created_by: String,
}

impl From<ChainCalibrationHeader> for ChainHeaderView {
    fn from(h: ChainCalibrationHeader) -> ChainHeaderView {
        ChainHeaderView {
            name: h.name,
            version: h.version,
            created_at_unix_ms: h.created_at_unix_ms,
            created_by: h.created_by,
        }
    }
}

/// The name of a CSV upload.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct UploadQuery {
    /// The calibration's name (CSV uploads; JSON uploads carry it in the body).
    pub name: Option<String>,
}

/// True for a name of nothing but spaces, tabs and line breaks (the document's pattern refuses
/// the same ones).
fn blank_name(name: &str) -> bool {
    name.chars().all(|c| matches!(c, ' ' | '\t' | '\r' | '\n'))
}

/// Parses the CSV form (`crate::csv_table`: BOM, `#` comments and blank lines allowed, header
/// in any case); every bad line is reported.
pub fn parse_csv(text: &str) -> Result<Vec<ChainPointBody>, Vec<FieldProblem>> {
    use crate::csv_table::{read_numeric, TableError};
    let rows = read_numeric(text, &["frequency_hz", "gain_db"]).map_err(|e| {
        vec![match e {
            TableError::Empty => FieldProblem::new(
                "body",
                "empty CSV; send a header `frequency_hz,gain_db` and one row per frequency",
            ),
            TableError::Header { line, found } => FieldProblem::new(
                format!("body.line[{line}]"),
                format!("header is {found:?}; it must be `frequency_hz,gain_db`"),
            ),
            TableError::Malformed { line, detail } => {
                FieldProblem::new(format!("body.line[{line}]"), format!("not CSV: {detail}"))
            }
        }]
    })?;
    let mut points = Vec::new();
    let mut errors = Vec::new();
    for row in rows {
        match row.values.as_deref() {
            Ok([frequency_hz, gain_db]) => points.push(ChainPointBody {
                frequency_hz: *frequency_hz,
                gain_db: *gain_db,
            }),
            _ => errors.push(FieldProblem::new(
                format!("body.line[{}]", row.line),
                format!("{:?} is not two numbers `frequency_hz,gain_db`", row.text),
            )),
        }
    }
    if errors.is_empty() {
        Ok(points)
    } else {
        Err(errors)
    }
}

/// Checks every point; all problems at once.
fn check_points(points: &[ChainPointBody]) -> Vec<FieldProblem> {
    let mut errors = Vec::new();
    if points.is_empty() {
        errors.push(FieldProblem::new("points", "at least one point is needed"));
    }
    if points.len() > MAX_CHAIN_POINTS {
        errors.push(FieldProblem::new(
            "points",
            format!("{} points; at most {MAX_CHAIN_POINTS}", points.len()),
        ));
    }
    for (i, p) in points.iter().enumerate() {
        if !p.frequency_hz.is_finite() || p.frequency_hz <= 0.0 {
            errors.push(FieldProblem::new(
                format!("points[{i}].frequency_hz"),
                format!("{} is not a positive frequency in hertz", p.frequency_hz),
            ));
        }
        // A passive chain loses less than 100 dB and an amplifier gains less than 100 dB
        // (common practice); a value beyond is a unit or sign mistake.
        if !p.gain_db.is_finite() || p.gain_db.abs() > 100.0 {
            errors.push(FieldProblem::new(
                format!("points[{i}].gain_db"),
                format!(
                    "{} dB is not a plausible chain gain (-100 to 100 dB)",
                    p.gain_db
                ),
            ));
        }
    }
    errors
}

/// Uploads a new version of a chain calibration, as JSON (`{name, points}`) or CSV.
#[utoipa::path(post, path = "/api/v1/chain-calibrations", tag = "calibrations", security(("bearer" = [])),
    params(UploadQuery),
    request_body(content = ChainUpload, description = "JSON, or text/csv with header frequency_hz,gain_db and ?name="),
    responses((status = 201, body = ChainView), (status = 401, body = Problem), (status = 403, body = Problem),
              (status = 413, body = Problem), (status = 415, body = Problem), (status = 422, body = Problem)))]
pub async fn upload_chain(
    Admin(caller): Admin,
    State(state): State<AppState>,
    ApiQuery(query): ApiQuery<UploadQuery>,
    headers: HeaderMap,
    body: Bytes,
) -> Result<(StatusCode, Json<ChainView>), Problem> {
    let content_type = headers
        .get(CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .map(|v| {
            v.split(';')
                .next()
                .unwrap_or_default()
                .trim()
                .to_ascii_lowercase()
        })
        .unwrap_or_default();
    let (name, points) = if content_type == "text/csv" {
        let name = query.name.filter(|n| !blank_name(n)).ok_or_else(|| {
            Problem::invalid_field("name", "a CSV upload needs ?name=<calibration name>")
        })?;
        let text = std::str::from_utf8(&body)
            .map_err(|_| Problem::invalid_field("body", "the CSV is not UTF-8 text"))?;
        let points =
            parse_csv(text).map_err(|errors| Problem::invalid("the CSV has bad lines", errors))?;
        (name, points)
    } else if content_type == "application/json" {
        let upload: ChainUpload = parse_json(&body)?;
        (upload.name, upload.points)
    } else {
        return Err(Problem::for_bare_status(StatusCode::UNSUPPORTED_MEDIA_TYPE));
    };
    let mut errors = check_points(&points);
    if blank_name(&name) || name.chars().count() > 200 {
        errors.insert(
            0,
            FieldProblem::new("name", "give a name of 1 to 200 characters"),
        );
    }
    if !errors.is_empty() {
        return Err(Problem::invalid(
            format!("{} problem(s) in the chain calibration", errors.len()),
            errors,
        ));
    }
    let rows: Vec<ChainCalibrationPoint> = points
        .iter()
        .map(|p| ChainCalibrationPoint {
            frequency_hz: p.frequency_hz,
            gain_db: p.gain_db,
        })
        .collect();
    let created = state
        .store()
        .create_chain_calibration(&name, &caller.name, &rows)
        .await?;
    audit::record(
        &state,
        &caller.name,
        "chain_calibration.upload",
        &format!("{} v{}", created.name, created.version),
        &format!("{} points", created.points.len()),
    )
    .await;
    Ok((StatusCode::CREATED, Json(created.into())))
}

/// Every chain calibration version, by name then version.
#[utoipa::path(get, path = "/api/v1/chain-calibrations", tag = "calibrations", security(("bearer" = [])),
    responses((status = 200, body = [ChainHeaderView]), (status = 401, body = Problem)))]
pub async fn list_chains(
    _caller: Viewer,
    State(state): State<AppState>,
) -> Result<Json<Vec<ChainHeaderView>>, Problem> {
    let headers = state.store().chain_calibrations().await?;
    Ok(Json(
        headers.into_iter().map(ChainHeaderView::from).collect(),
    ))
}

/// The newest version of a chain calibration, with its points.
#[utoipa::path(get, path = "/api/v1/chain-calibrations/{name}", tag = "calibrations", security(("bearer" = [])),
    params(("name" = String, Path, description = "Calibration name")),
    responses((status = 200, body = ChainView), (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn get_chain(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(name): ApiPath<String>,
) -> Result<Json<ChainView>, Problem> {
    Ok(Json(
        state.store().latest_chain_calibration(&name).await?.into(),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_rows_parse_and_bad_lines_are_numbered() {
        let good = parse_csv("frequency_hz,gain_db\n1e9,-1.5\n# comment\n2e9, -2.0\n").unwrap();
        assert_eq!(good.len(), 2);
        assert_eq!(good[1].gain_db, -2.0);
        let errors = parse_csv("frequency_hz,gain_db\n1e9,-1.5\n2e9\nx,1\n").unwrap_err();
        let fields: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(fields, ["body.line[3]", "body.line[4]"]);
        assert!(parse_csv("f,g\n1,2").is_err());
    }

    #[test]
    fn every_bad_point_is_reported() {
        let errors = check_points(&[
            ChainPointBody {
                frequency_hz: -1.0,
                gain_db: 0.0,
            },
            ChainPointBody {
                frequency_hz: 1e9,
                gain_db: 400.0,
            },
        ]);
        let fields: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(fields, ["points[0].frequency_hz", "points[1].gain_db"]);
    }
}
