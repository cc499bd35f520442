//! Drive-chain calibrations: the net gain from generator to modulator versus frequency, uploaded
//! by admins as JSON or CSV, versioned by name (an upload never edits an earlier version).
//!
//! CSV form: a header line `frequency_hz,gain_db` (or `frequency_hz,gain_db,gain_uncertainty_db`)
//! and one row per frequency (a loss is a negative gain); the name is the `name` query parameter. Every bad row is reported with its line number.
//!
//! A JSON upload may name the files the table was computed from (`sources`: each a `two_port` or
//! the `load`, with its file name and SHA-256), as `halfwave chain import` does for Touchstone
//! files; they are stored with the version and shown wherever versions are.

use crate::api::audit;
use crate::api::auth::{Admin, Viewer};
use crate::api::json_body::parse_json;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::views::chains::{
    ChainHeaderView, ChainPointBody, ChainSourceBody, ChainView, SourceRole,
};
use crate::api::AppState;
use crate::store::{ChainCalibrationPoint, ChainCalibrationSource};
use axum::body::Bytes;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::http::{HeaderMap, StatusCode};
use axum::Json;
use serde::Deserialize;
use utoipa::{IntoParams, ToSchema};

/// The most rows one calibration may have.
pub const MAX_CHAIN_POINTS: usize = 10_000;

/// The most source files one calibration may name.
pub const MAX_CHAIN_SOURCES: usize = 64;

/// A chain calibration upload (JSON form).
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChainUpload {
    /// 1 to 200 characters, not only spaces, tabs and line breaks, and not starting with
    /// `flat-loss-` (the names of the flat losses the engine stores itself).
    #[schema(min_length = 1, max_length = 200, pattern = "[^ \\t\\r\\n]")]
    pub name: String,
    #[schema(min_items = 1, max_items = 10000)]
    pub points: Vec<ChainPointBody>,
    /// The files the table was computed from, in cascade order from the generator, at most one
    /// `load` (`halfwave chain import`); leave out for a typed table.
    #[serde(default)]
    #[schema(max_items = 64)]
    pub sources: Vec<ChainSourceBody>,
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
    const TWO: [&str; 2] = ["frequency_hz", "gain_db"];
    const THREE: [&str; 3] = ["frequency_hz", "gain_db", "gain_uncertainty_db"];
    const HEADERS: &str = "`frequency_hz,gain_db` or `frequency_hz,gain_db,gain_uncertainty_db`";
    // The three-column header first; a two-column table is read when that header does not fit.
    let rows = match read_numeric(text, &THREE) {
        Err(TableError::Header { .. }) => read_numeric(text, &TWO),
        other => other,
    }
    .map_err(|e| {
        vec![match e {
            TableError::Empty => FieldProblem::new(
                "body",
                format!("empty CSV; send a header {HEADERS} and one row per frequency"),
            ),
            TableError::Header { line, found } => FieldProblem::new(
                format!("body.line[{line}]"),
                format!("header is {found:?}; it must be {HEADERS}"),
            ),
            TableError::Malformed { line, detail } => {
                FieldProblem::new(format!("body.line[{line}]"), format!("not CSV: {detail}"))
            }
        }]
    })?;
    let mut points = Vec::new();
    let mut errors = Vec::new();
    for row in rows {
        let detail = match row.values.as_deref() {
            Ok([frequency_hz, gain_db]) => {
                points.push(ChainPointBody {
                    frequency_hz: *frequency_hz,
                    gain_db: *gain_db,
                    gain_uncertainty_db: None,
                });
                continue;
            }
            Ok([frequency_hz, gain_db, uncertainty_db]) => {
                points.push(ChainPointBody {
                    frequency_hz: *frequency_hz,
                    gain_db: *gain_db,
                    gain_uncertainty_db: Some(*uncertainty_db),
                });
                continue;
            }
            Ok(_) => "a wrong number of values",
            Err(detail) => detail.as_str(),
        };
        errors.push(FieldProblem::new(
            format!("body.line[{}]", row.line),
            format!("{:?} is not the header's numbers: {detail}", row.text),
        ));
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
        if let Some(u) = p
            .gain_uncertainty_db
            .filter(|u| !u.is_finite() || !(0.0..=10.0).contains(u))
        {
            errors.push(FieldProblem::new(
                format!("points[{i}].gain_uncertainty_db"),
                format!("{u} dB is not a standard uncertainty of a chain gain (0 to 10 dB)"),
            ));
        }
    }
    errors
}

/// Checks the source files; all problems at once.
fn check_sources(sources: &[ChainSourceBody]) -> Vec<FieldProblem> {
    let mut errors = Vec::new();
    if sources.len() > MAX_CHAIN_SOURCES {
        errors.push(FieldProblem::new(
            "sources",
            format!("{} files; at most {MAX_CHAIN_SOURCES}", sources.len()),
        ));
    }
    for (i, s) in sources.iter().enumerate() {
        if blank_name(&s.file_name) || s.file_name.chars().count() > 255 {
            errors.push(FieldProblem::new(
                format!("sources[{i}].file_name"),
                "give the file's name, 1 to 255 characters",
            ));
        }
        let hex = s.sha256.len() == 64
            && s.sha256
                .bytes()
                .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b));
        if !hex {
            errors.push(FieldProblem::new(
                format!("sources[{i}].sha256"),
                "give the SHA-256 of the file as 64 lowercase hexadecimal digits",
            ));
        }
    }
    if sources
        .iter()
        .filter(|s| s.role == SourceRole::Load)
        .count()
        > 1
    {
        errors.push(FieldProblem::new(
            "sources",
            "more than one load; a chain ends in one modulator",
        ));
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
    let (name, points, sources) = if content_type == "text/csv" {
        let name = query.name.filter(|n| !blank_name(n)).ok_or_else(|| {
            Problem::invalid_field("name", "a CSV upload needs ?name=<calibration name>")
        })?;
        let text = std::str::from_utf8(&body)
            .map_err(|_| Problem::invalid_field("body", "the CSV is not UTF-8 text"))?;
        let points =
            parse_csv(text).map_err(|errors| Problem::invalid("the CSV has bad lines", errors))?;
        (name, points, Vec::new())
    } else if content_type == "application/json" {
        let upload: ChainUpload = parse_json(&body)?;
        (upload.name, upload.points, upload.sources)
    } else {
        return Err(Problem::for_bare_status(StatusCode::UNSUPPORTED_MEDIA_TYPE));
    };
    let mut errors = check_points(&points);
    errors.extend(check_sources(&sources));
    if blank_name(&name) || name.chars().count() > 200 {
        errors.insert(
            0,
            FieldProblem::new("name", "give a name of 1 to 200 characters"),
        );
    } else if let Some(reason) = crate::engine::reserved_chain_name(&name) {
        errors.insert(0, FieldProblem::new("name", reason));
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
            gain_uncertainty_db: p.gain_uncertainty_db,
        })
        .collect();
    let stored_sources: Vec<ChainCalibrationSource> = sources
        .iter()
        .map(|s| ChainCalibrationSource {
            role: s.role.as_str().to_string(),
            file_name: s.file_name.clone(),
            sha256: s.sha256.clone(),
        })
        .collect();
    let created = state
        .store()
        .create_chain_calibration_with_sources(&name, &caller.name, &rows, &stored_sources)
        .await?;
    audit::record(
        &state,
        &caller.name,
        "chain_calibration.upload",
        &format!("{} v{}", created.name, created.version),
        &format!(
            "{} points, {} source files",
            created.points.len(),
            created.sources.len()
        ),
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
    let mut sources = state.store().chain_calibration_sources().await?;
    Ok(Json(
        headers
            .into_iter()
            .map(|h| {
                let files = sources.remove(&h.id).unwrap_or_default();
                ChainHeaderView::new(h, files)
            })
            .collect(),
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

        // The optional third column: each row's standard uncertainty of the gain.
        let with_u =
            parse_csv("frequency_hz,gain_db,gain_uncertainty_db\n1e9,-1.5,0.05\n2e9,-2,0.07\n")
                .unwrap();
        assert_eq!(with_u[0].gain_uncertainty_db, Some(0.05));
        assert_eq!(with_u[1].gain_uncertainty_db, Some(0.07));
        assert_eq!(good[0].gain_uncertainty_db, None);
        let short = parse_csv("frequency_hz,gain_db,gain_uncertainty_db\n1e9,-1.5\n").unwrap_err();
        assert_eq!(short[0].field, "body.line[2]");
    }

    #[test]
    fn every_bad_point_is_reported() {
        let errors = check_points(&[
            ChainPointBody {
                frequency_hz: -1.0,
                gain_db: 0.0,
                gain_uncertainty_db: None,
            },
            ChainPointBody {
                frequency_hz: 1e9,
                gain_db: 400.0,
                gain_uncertainty_db: Some(0.1),
            },
            ChainPointBody {
                frequency_hz: 2e9,
                gain_db: -3.0,
                gain_uncertainty_db: Some(-0.1),
            },
        ]);
        let fields: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(
            fields,
            [
                "points[0].frequency_hz",
                "points[1].gain_db",
                "points[2].gain_uncertainty_db"
            ]
        );
    }

    #[test]
    fn source_files_are_checked() {
        let good = ChainSourceBody {
            role: SourceRole::TwoPort,
            file_name: "pad.s2p".into(),
            sha256: "0123456789abcdef".repeat(4),
        };
        assert!(check_sources(std::slice::from_ref(&good)).is_empty());
        let errors = check_sources(&[
            ChainSourceBody {
                file_name: " \t".into(),
                sha256: "0123456789ABCDEF".repeat(4),
                ..good.clone()
            },
            ChainSourceBody {
                role: SourceRole::Load,
                ..good.clone()
            },
            ChainSourceBody {
                role: SourceRole::Load,
                ..good.clone()
            },
        ]);
        let fields: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(
            fields,
            ["sources[0].file_name", "sources[0].sha256", "sources"]
        );
    }
}
