//! Reading runs: the list (filtered, paginated), one run, its report, its points and each point's
//! trace (JSON, or CSV through `csv_table`). The plots are in [`super::run_plots`], the views in
//! `api::views::runs`, the list's time bounds in `api::time_bound`; submitting, cancelling and
//! resuming are in [`super::run_control`].

use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::time_bound::parse_time_bound;
use crate::api::views::runs::{
    stored_json_array, FrequencyResultView, PointList, PointView, ProvenanceView, RunList,
    RunSummary, RunView, TraceView,
};
use crate::api::AppState;
use crate::store::{PointRecord, RunComparison, RunFilter, RunRecord, RunState};
use axum::body::Bytes;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Deserialize;
use utoipa::IntoParams;

/// The largest page of runs or points.
pub const MAX_PAGE_SIZE: u32 = 1000;

/// Filters of the run list.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct RunListQuery {
    /// Device serial number.
    pub device: Option<String>,
    /// queued, running, completed, failed, cancelled or interrupted (empty: any).
    #[param(pattern = "^(queued|running|completed|failed|cancelled|interrupted)?$")]
    pub state: Option<String>,
    /// Created at or after: a date `YYYY-MM-DD` (UTC midnight) or milliseconds since the epoch
    /// (up to 15 digits); empty: no bound.
    #[param(schema_with = crate::api::time_bound::time_bound_schema)]
    pub since: Option<String>,
    /// Created before: a date `YYYY-MM-DD` (UTC midnight) or milliseconds since the epoch
    /// (up to 15 digits); empty: no bound.
    #[param(schema_with = crate::api::time_bound::time_bound_schema)]
    pub until: Option<String>,
    /// Page number, from 1.
    #[param(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: Option<u32>,
    /// Runs per page, 1 to 1000 (default 50).
    #[param(minimum = 1, maximum = 1000)]
    pub per_page: Option<u32>,
}

/// Paging of a run's points.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct PageQuery {
    /// Page number, from 1.
    #[param(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: Option<u32>,
    /// Items per page, 1 to 1000 (default 200).
    #[param(minimum = 1, maximum = 1000)]
    pub per_page: Option<u32>,
}

/// Format of a trace download.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct TraceQuery {
    /// `json` (default) or `csv`.
    #[param(pattern = "^(json|csv)$")]
    pub format: Option<String>,
    /// `measured` (default): the point's own trace; `reference`: the RF-off reference trace the
    /// engine took at the point's frequency (the laser line as the analyzer shows it, which the
    /// analysis uses as the line shape; 404 when the run took none).
    #[param(pattern = "^(measured|reference)$")]
    pub kind: Option<String>,
}

fn paging(page: Option<u32>, per_page: Option<u32>, default: u32) -> Result<(u32, u32), Problem> {
    let mut errors = Vec::new();
    let page = page.unwrap_or(1);
    let per_page = per_page.unwrap_or(default);
    if page == 0 {
        errors.push(FieldProblem::new("page", "pages are numbered from 1"));
    }
    if per_page == 0 || per_page > MAX_PAGE_SIZE {
        errors.push(FieldProblem::new(
            "per_page",
            format!("{per_page} is outside 1 to {MAX_PAGE_SIZE}"),
        ));
    }
    if errors.is_empty() {
        Ok((page, per_page))
    } else {
        Err(Problem::invalid("invalid paging parameters", errors))
    }
}

/// Lists runs, newest first, filtered by device, state and creation date.
#[utoipa::path(get, path = "/api/v1/runs", tag = "runs", security(("bearer" = [])),
    params(RunListQuery),
    responses((status = 200, body = RunList), (status = 401, body = Problem),
              (status = 422, description = "A filter is invalid", body = Problem)))]
pub async fn list_runs(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiQuery(query): ApiQuery<RunListQuery>,
) -> Result<Json<RunList>, Problem> {
    let mut errors = Vec::new();
    let run_state = match query.state.as_deref() {
        None | Some("") => None,
        Some(word) => match RunState::parse(word) {
            Some(s) => Some(s),
            None => {
                errors.push(FieldProblem::new(
                    "state",
                    format!("unknown state {word:?}; use queued, running, completed, failed, cancelled or interrupted"),
                ));
                None
            }
        },
    };
    let mut bound = |field: &str, value: &Option<String>| match value.as_deref() {
        None | Some("") => None,
        Some(text) => parse_time_bound(field, text)
            .map_err(|e| errors.push(e))
            .ok(),
    };
    let since = bound("since", &query.since);
    let until = bound("until", &query.until);
    let paged = paging(query.page, query.per_page, 50);
    let (page, per_page) = match paged {
        Ok(p) => p,
        Err(problem) => {
            errors.extend(problem.errors);
            (1, 1)
        }
    };
    if !errors.is_empty() {
        return Err(Problem::invalid("invalid run filter", errors));
    }
    let filter = RunFilter {
        device_serial: query.device.filter(|d| !d.is_empty()),
        state: run_state,
        created_from_unix_ms: since,
        created_before_unix_ms: until,
        limit: per_page,
        offset: (page - 1).saturating_mul(per_page),
        ..RunFilter::default()
    };
    let listed = state.store().list_runs(&filter).await?;
    Ok(Json(RunList {
        runs: listed.runs.iter().map(RunSummary::from).collect(),
        page,
        per_page,
        total: listed.total,
    }))
}

/// One run: its plan, state and V_pi per frequency.
#[utoipa::path(get, path = "/api/v1/runs/{run_id}", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id")),
    responses((status = 200, body = RunView), (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn get_run(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
) -> Result<Response, Problem> {
    if let Some(view_json) = state.read_cache().final_run(run_id) {
        return Ok(json_bytes(view_json));
    }
    let (run, view) = run_view(&state, run_id).await?;
    let view_json =
        Bytes::from(serde_json::to_vec(&view).map_err(|e| {
            Problem::internal(format!("the run could not be written as JSON: {e}"))
        })?);
    // A resumable failure can still change; every other final run cannot.
    if run.state.is_final() && !run.resumable {
        state.read_cache().keep_final_run(run_id, view_json.clone());
    }
    Ok(json_bytes(view_json))
}

/// The printable calibration report of a run: one self-contained HTML document (plots as inline
/// SVG, no scripts, no external resources) with the device, dates, instruments, drive chain,
/// analysis method, software, operator, the V_pi table with uncertainties, the response with its
/// -3 dB / -6 dB points, the excluded points with reasons and the limits in force.
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/report.html", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id")),
    responses((status = 200, content_type = "text/html", body = String,
               description = "The report, UTF-8 HTML"),
              (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn run_report(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
) -> Result<Response, Problem> {
    let (_, view) = run_view(&state, run_id).await?;
    let budget =
        super::budget::budget_for_run(&state, run_id, &super::budget::BudgetQuery::default())
            .await
            .map_err(|p| super::budget::unavailable_reason(&p));
    let html = crate::api::calibration_report::report_html_with_budget(
        &view,
        budget.as_ref().map_err(String::as_str),
        crate::store::now_unix_ms(),
    );
    Ok(([(CONTENT_TYPE, "text/html; charset=utf-8")], html).into_response())
}

/// A run's stored record and its view, read from the store.
async fn run_view(state: &AppState, run_id: i64) -> Result<(RunRecord, RunView), Problem> {
    let store = state.store();
    // Read first: if the run is final now, nothing read after this can differ.
    let run = store.run(run_id).await?;
    let measured_points = usize::try_from(store.point_count(run_id).await?).unwrap_or(0);
    let results = store.frequency_results(run_id).await?;
    let instruments = store.run_instruments(run_id).await?;
    let sweeps = store.analyzer_sweeps(run_id).await?;
    let sweeps_at = |index: u32| {
        sweeps
            .iter()
            .find(|(i, _)| *i == index)
            .map(|(_, count)| *count)
    };
    let view = RunView {
        summary: RunSummary::from(&run),
        plan: run.plan().unwrap_or(serde_json::Value::Null),
        measured_points,
        analyzer_sweeps: sweeps.iter().map(|(_, count)| count).sum(),
        instruments,
        provenance: ProvenanceView::from(&run),
        results: results
            .iter()
            .map(|r| FrequencyResultView {
                frequency_index: r.frequency_index,
                frequency_hz: r.frequency_hz,
                v_pi_volts: r.v_pi_volts,
                v_pi_uncertainty_volts: r.v_pi_uncertainty_volts,
                excluded_points: stored_json_array(&r.excluded_points_json),
                analyzer_sweeps: sweeps_at(r.frequency_index),
            })
            .collect(),
    };
    Ok((run, view))
}

/// A response with JSON already serialised.
pub fn json_bytes(body: Bytes) -> Response {
    ([(CONTENT_TYPE, "application/json")], body).into_response()
}

/// The measured points of a run, by frequency then level, one page at a time.
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/points", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id"), PageQuery),
    responses((status = 200, body = PointList), (status = 401, body = Problem),
              (status = 404, body = Problem), (status = 422, body = Problem)))]
pub async fn list_points(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
    ApiQuery(query): ApiQuery<PageQuery>,
) -> Result<Json<PointList>, Problem> {
    let (page, per_page) = paging(query.page, query.per_page, 200)?;
    let store = state.store();
    // A run kept as final exists; any other is looked up so that a wrong id gets 404.
    if state.read_cache().final_run(run_id).is_none() {
        store.run(run_id).await?;
    }
    let total = usize::try_from(store.point_count(run_id).await?).unwrap_or(0);
    let offset = u64::from(page - 1) * u64::from(per_page);
    let points = store.points_page(run_id, per_page, offset).await?;
    Ok(Json(PointList {
        points: points.into_iter().map(PointView::from).collect(),
        page,
        per_page,
        total,
    }))
}

async fn point_of_run(
    state: &AppState,
    run_id: i64,
    point_id: i64,
) -> Result<PointRecord, Problem> {
    point_with_number(state, run_id, point_id)
        .await
        .map(|(p, _)| p)
}

/// The point of the run with its number in measuring order (see [`point_number`]).
pub(super) async fn point_with_number(
    state: &AppState,
    run_id: i64,
    point_id: i64,
) -> Result<(PointRecord, usize), Problem> {
    let points = state.store().points_of_run(run_id).await?;
    let number = point_number(&points, point_id);
    points
        .into_iter()
        .find(|p| p.id == point_id)
        .map(|p| (p, number))
        .ok_or_else(|| Problem::not_found(format!("run {run_id} has no point {point_id}")))
}

/// The number of a point within its run, counted from 1 in the order the points were committed
/// (their ids): the same count as the progress events' `completed_points` when the point was
/// measured, so the dashboard's "19 of 110 points" and a spectrum's "point 19" agree.
pub fn point_number(points: &[PointRecord], point_id: i64) -> usize {
    points.iter().filter(|p| p.id <= point_id).count()
}

/// The RF-off reference trace the engine took at `point`'s frequency, when the run stored one.
pub async fn reference_of_point(
    state: &AppState,
    point: &PointRecord,
) -> Result<Option<crate::units::Trace>, Problem> {
    Ok(state
        .store()
        .reference_trace(point.run_id, point.frequency_index)
        .await?)
}

/// The analyzer trace of one point (or, with `kind=reference`, the RF-off reference trace at its
/// frequency), as JSON or CSV (`frequency_hz,power_dbm`).
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/points/{point_id}/trace", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id"), ("point_id" = i64, Path, description = "Point id"), TraceQuery),
    responses((status = 200, description = "JSON, or text/csv (`frequency_hz,power_dbm`) with format=csv; the point's trace, or with kind=reference the RF-off reference at its frequency",
               content((TraceView = "application/json"), (String = "text/csv"))),
              (status = 401, body = Problem), (status = 404, body = Problem), (status = 422, body = Problem)))]
pub async fn point_trace(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath((run_id, point_id)): ApiPath<(i64, i64)>,
    ApiQuery(query): ApiQuery<TraceQuery>,
) -> Result<Response, Problem> {
    let csv = match query.format.as_deref() {
        None | Some("json") => false,
        Some("csv") => true,
        Some(other) => {
            return Err(Problem::invalid_field(
                "format",
                format!("unknown format {other:?}; use json or csv"),
            ))
        }
    };
    let reference = match query.kind.as_deref() {
        None | Some("measured") => false,
        Some("reference") => true,
        Some(other) => {
            return Err(Problem::invalid_field(
                "kind",
                format!("unknown trace kind {other:?}; use measured or reference"),
            ))
        }
    };
    let point = point_of_run(&state, run_id, point_id).await?;
    let trace = if reference {
        reference_of_point(&state, &point).await?.ok_or_else(|| {
            Problem::not_found(format!(
                "run {run_id} stored no RF-off reference trace at {:.6} GHz (its plan had reference_trace off, or the reference failed)",
                point.frequency_hz / 1e9
            ))
        })?
    } else {
        state.store().point_trace(point_id).await?
    };
    if csv {
        let out = crate::csv_table::write_trace(&trace);
        return Ok(([(CONTENT_TYPE, "text/csv; charset=utf-8")], out).into_response());
    }
    Ok(Json(TraceView {
        point_id,
        resolution_bandwidth_hz: trace.resolution_bandwidth().map(|r| r.value()),
        frequency_hz: trace.frequency_hz().to_vec(),
        power_dbm: trace.power_dbm().to_vec(),
    })
    .into_response())
}

/// Compares two runs: V_pi per frequency and the difference of the other run from this one in
/// percent, e.g. a modulator's calibration against last year's.
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/compare/{other_run_id}", tag = "runs",
    security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run A, the reference"),
           ("other_run_id" = i64, Path, description = "Run B, compared with A")),
    responses((status = 200, body = RunComparison), (status = 401, body = Problem),
              (status = 404, body = Problem)))]
pub async fn compare_runs(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath((run_id, other_run_id)): ApiPath<(i64, i64)>,
) -> Result<Json<RunComparison>, Problem> {
    Ok(Json(
        state.store().compare_runs(run_id, other_run_id).await?,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn paging_names_each_bad_parameter() {
        let problem = paging(Some(0), Some(5000), 50).unwrap_err();
        let fields: Vec<&str> = problem.errors.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(fields, ["page", "per_page"]);
        assert_eq!(paging(None, None, 50).unwrap(), (1, 50));
    }
}
