//! Reading runs: the list (filtered, paginated), one run, its points and each point's trace, and
//! the plots of a run (latest spectrum, one point's spectrum, modulation index versus drive at
//! one frequency). Submitting, cancelling and resuming are in [`super::run_control`].

use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::plots::{self, MarkedLine, ModulationPlot, ModulationPoint, SpectrumPlot};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::AppState;
use crate::store::{PointRecord, RunComparison, RunFilter, RunInstrument, RunRecord, RunState};
use axum::body::Bytes;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::{Deserialize, Serialize};
use serde_json::value::RawValue;
use utoipa::{IntoParams, ToSchema};

/// The largest page of runs or points.
pub const MAX_PAGE_SIZE: u32 = 1000;

/// A run as listed.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct RunSummary {
    pub id: i64,
    pub device_serial: String,
    pub bench: String,
    /// The drive-chain calibration the run converts levels with (name and version).
    #[serde(default)]
    pub chain_name: String,
    #[serde(default)]
    pub chain_version: i64,
    /// queued, running, completed, failed, cancelled or interrupted.
    pub state: String,
    pub submitted_by: String,
    pub created_at_unix_ms: i64,
    pub started_at_unix_ms: Option<i64>,
    pub finished_at_unix_ms: Option<i64>,
    /// Why the run ended as it did, when it did not complete.
    pub cause: Option<String>,
    /// True for a failed run whose cause was a link or instrument fault with its points intact:
    /// it can be resumed like an interrupted run.
    #[serde(default)]
    pub resumable: bool,
}

impl From<&RunRecord> for RunSummary {
    fn from(run: &RunRecord) -> RunSummary {
        RunSummary {
            id: run.id,
            device_serial: run.device_serial.clone(),
            bench: run.bench_name.clone(),
            chain_name: run.chain_name.clone(),
            chain_version: run.chain_version,
            state: run.state.as_str().to_string(),
            submitted_by: run.submitted_by.clone(),
            created_at_unix_ms: run.created_at_unix_ms,
            started_at_unix_ms: run.started_at_unix_ms,
            finished_at_unix_ms: run.finished_at_unix_ms,
            cause: run.cause.clone(),
            resumable: run.resumable,
        }
    }
}

/// One page of runs.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct RunList {
    pub runs: Vec<RunSummary>,
    #[schema(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: u32,
    #[schema(minimum = 1, maximum = 1000)]
    pub per_page: u32,
    /// Runs matching the filter, on all pages.
    pub total: i64,
}

/// V_pi at one frequency of a run.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct FrequencyResultView {
    pub frequency_index: u32,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub v_pi_uncertainty_volts: f64,
    /// Points the fit left out, with reasons (as the engine recorded them; empty when none).
    #[schema(value_type = Vec<ExcludedPointView>)]
    pub excluded_points: serde_json::Value,
    /// Analyzer sweeps spent at this frequency (laser search, reference, every point's
    /// averages); null for runs measured before sweeps were counted.
    #[serde(default)]
    pub analyzer_sweeps: Option<i64>,
}

/// A point the V_pi fit left out (the shape the engine stores; documentation of
/// [`FrequencyResultView::excluded_points`], which is passed through as stored).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ExcludedPointView {
    pub level_index: u32,
    /// The generator level of that point (null if it was not a number).
    pub generator_level_dbm: Option<f64>,
    /// Why the fit left it out.
    pub reason: String,
}

/// One row of a point's line table: a comb line the analysis looked for (the shape the engine
/// stores; documentation of [`PointView::lines`], which is passed through as stored).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct LineView {
    /// Sideband order: 0 the carrier, -n and +n the n-th lower and upper sidebands.
    pub order: i32,
    /// Optical frequency of the line, Hz.
    pub frequency_hz: f64,
    /// Line power integrated over the line shape with the floor removed; null when nothing is
    /// left above the floor.
    pub power_dbm: Option<f64>,
    /// Standard uncertainty of the line power, dB (null with the power).
    pub power_uncertainty_db: Option<f64>,
    pub above_floor: Option<bool>,
    /// The line's peak power in the whole-trace fit, which may lie below the floor.
    pub fitted_power_dbm: Option<f64>,
    /// Whether the fitted line's peak rises above the fitted floor.
    pub fitted_above_floor: Option<bool>,
}

/// A stored JSON array as a value: anything else (damaged or not a list) is the empty list, so the
/// view always has the documented shape.
pub fn stored_json_array(text: &str) -> serde_json::Value {
    match serde_json::from_str(text) {
        Ok(array @ serde_json::Value::Array(_)) => array,
        _ => serde_json::Value::Array(Vec::new()),
    }
}

/// One run with its plan and its per-frequency results.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct RunView {
    #[serde(flatten)]
    pub summary: RunSummary,
    /// The plan as submitted (after defaults), in the form `POST /runs` takes; null only if the
    /// stored plan cannot be read.
    #[schema(value_type = Option<crate::engine::plan::PlanRequest>)]
    pub plan: serde_json::Value,
    pub measured_points: usize,
    /// Analyzer sweeps the run spent so far, over every frequency (with or without a V_pi).
    #[serde(default)]
    pub analyzer_sweeps: i64,
    pub results: Vec<FrequencyResultView>,
    /// The source and analyzer that measured the run (their *IDN? identities at its start and
    /// at every resumption), each with the choices its driver made (axis, unit, format).
    #[serde(default)]
    pub instruments: Vec<RunInstrument>,
    /// What else the record says about how the run was made: software, analysis method,
    /// operator token and the safety limits in force.
    #[serde(default)]
    pub provenance: ProvenanceView,
}

/// The software and analysis method that executed a run, the token that submitted it and the
/// limits in force when it was queued; null members are not known (runs queued before they were
/// recorded).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct ProvenanceView {
    /// `halfwave <version> (git <commit>)`; "A then B" when a later version resumed the run.
    pub software_version: Option<String>,
    /// The analysis method's name and version (`analysis::ANALYSIS_METHOD`), joined the same way.
    pub analysis_method: Option<String>,
    /// The id of the API token that submitted the run (its name is `submitted_by`).
    pub submitted_by_token_id: Option<i64>,
    /// The daemon's hard ceiling on the level at the modulator input when the run was queued.
    pub hard_limit_at_modulator_dbm: Option<f64>,
    /// The highest level the proven plan puts on the modulator input (after the drive chain).
    pub planned_max_at_modulator_dbm: Option<f64>,
}

impl From<&RunRecord> for ProvenanceView {
    fn from(run: &RunRecord) -> ProvenanceView {
        ProvenanceView {
            software_version: run.software_version.clone(),
            analysis_method: run.analysis_method.clone(),
            submitted_by_token_id: run.submitted_by_token_id,
            hard_limit_at_modulator_dbm: run.hard_limit_at_modulator_dbm,
            planned_max_at_modulator_dbm: run.planned_max_at_modulator_dbm,
        }
    }
}

/// One measured point.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct PointView {
    pub id: i64,
    pub frequency_index: u32,
    pub level_index: u32,
    pub frequency_hz: f64,
    pub generator_level_dbm: f64,
    pub level_at_modulator_dbm: f64,
    pub v_peak_volts: f64,
    pub modulation_index: Option<f64>,
    pub modulation_index_uncertainty: Option<f64>,
    pub asymmetry_db: Option<f64>,
    /// The comb lines found (order, frequency, power ...), as the analysis reported them. Passed
    /// through as stored (never parsed into a tree and written again); an empty list when the
    /// stored table is not a list.
    #[schema(value_type = Vec<LineView>)]
    pub lines: Box<RawValue>,
    /// Method, residuals and warnings of the analysis, passed through as stored (`{"error": ...}`
    /// when the trace could not be analysed; null if the stored text is damaged).
    #[schema(value_type = Option<Object>)]
    pub analysis: Box<RawValue>,
    pub measured_at_unix_ms: i64,
}

impl From<PointRecord> for PointView {
    fn from(p: PointRecord) -> PointView {
        PointView {
            id: p.id,
            frequency_index: p.frequency_index,
            level_index: p.level_index,
            frequency_hz: p.frequency_hz,
            generator_level_dbm: p.generator_level_dbm,
            level_at_modulator_dbm: p.level_at_modulator_dbm,
            v_peak_volts: p.v_peak_volts,
            modulation_index: p.modulation_index,
            modulation_index_uncertainty: p.modulation_index_uncertainty,
            asymmetry_db: p.asymmetry_db,
            lines: stored_json_list(p.line_table_json),
            analysis: stored_json(p.analysis_json),
            measured_at_unix_ms: p.measured_at_unix_ms,
        }
    }
}

/// A JSON document from the store, checked (not parsed into a tree) and served as it is, without
/// a copy; `null` if it is not valid JSON.
pub fn stored_json(text: String) -> Box<RawValue> {
    RawValue::from_string(text).unwrap_or_else(|_| null_json())
}

/// A JSON list from the store, served as it is like [`stored_json`]; `[]` if it is not a list.
pub fn stored_json_list(text: String) -> Box<RawValue> {
    if text.trim_start().starts_with('[') {
        if let Ok(raw) = RawValue::from_string(text) {
            return raw;
        }
    }
    RawValue::from_string("[]".to_owned()).expect("[] is JSON")
}

/// The JSON `null`, as a raw value.
pub fn null_json() -> Box<RawValue> {
    RawValue::from_string("null".to_owned()).expect("null is JSON")
}

/// One page of a run's points.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct PointList {
    pub points: Vec<PointView>,
    #[schema(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: u32,
    #[schema(minimum = 1, maximum = 1000)]
    pub per_page: u32,
    pub total: usize,
}

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
    #[param(schema_with = time_bound_schema)]
    pub since: Option<String>,
    /// Created before: a date `YYYY-MM-DD` (UTC midnight) or milliseconds since the epoch
    /// (up to 15 digits); empty: no bound.
    #[param(schema_with = time_bound_schema)]
    pub until: Option<String>,
    /// Page number, from 1.
    #[param(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: Option<u32>,
    /// Runs per page, 1 to 1000 (default 50).
    #[param(minimum = 1, maximum = 1000)]
    pub per_page: Option<u32>,
}

/// The schema of a time bound: a date, or milliseconds since the epoch as digits, or empty.
fn time_bound_schema() -> utoipa::openapi::schema::Schema {
    use utoipa::openapi::schema::{AnyOfBuilder, KnownFormat, ObjectBuilder, SchemaFormat, Type};
    AnyOfBuilder::new()
        .item(
            ObjectBuilder::new()
                .schema_type(Type::String)
                .format(Some(SchemaFormat::KnownFormat(KnownFormat::Date))),
        )
        .item(
            ObjectBuilder::new()
                .schema_type(Type::String)
                .pattern(Some(TIME_BOUND_MS_PATTERN)),
        )
        .build()
        .into()
}

/// Milliseconds since the epoch in a time bound: up to 15 digits (beyond the year 9999), or
/// nothing.
const TIME_BOUND_MS_PATTERN: &str = "^[0-9]{0,15}$";

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
}

/// The frequency of a modulation-index plot.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct FrequencyIndexQuery {
    /// Index of the frequency in the run's plan, from 0 (default 0).
    #[param(format = Int64, minimum = 0, maximum = 4294967295_u64)]
    pub frequency_index: Option<u32>,
}

/// A trace as JSON.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct TraceView {
    pub point_id: i64,
    pub resolution_bandwidth_hz: Option<f64>,
    pub frequency_hz: Vec<f64>,
    pub power_dbm: Vec<f64>,
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

/// Parses `YYYY-MM-DD` (UTC midnight) or milliseconds since the epoch (1 to 15 digits, as the
/// document's pattern says).
pub fn parse_time_bound(field: &str, text: &str) -> Result<i64, FieldProblem> {
    if !text.is_empty() && text.len() <= 15 && text.bytes().all(|b| b.is_ascii_digit()) {
        if let Ok(ms) = text.parse::<i64>() {
            return Ok(ms);
        }
    }
    let bad = || {
        FieldProblem::new(
            field,
            format!("{text:?} is neither a date YYYY-MM-DD nor milliseconds since 1970-01-01 UTC"),
        )
    };
    crate::calendar::utc_midnight_ms(text).ok_or_else(bad)
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
async fn point_with_number(
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

/// The analyzer trace of one point, as JSON or CSV (`frequency_hz,power_dbm`).
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/points/{point_id}/trace", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id"), ("point_id" = i64, Path, description = "Point id"), TraceQuery),
    responses((status = 200, description = "JSON, or text/csv (`frequency_hz,power_dbm`) with format=csv",
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
    point_of_run(&state, run_id, point_id).await?;
    let trace = state.store().point_trace(point_id).await?;
    if csv {
        let mut out = String::with_capacity(trace.len() * 32 + 32);
        out.push_str("frequency_hz,power_dbm\n");
        for (f, p) in trace.frequency_hz().iter().zip(trace.power_dbm()) {
            out.push_str(&format!("{f},{p}\n"));
        }
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

fn svg(result: Result<String, plots::PlotError>) -> Result<Response, Problem> {
    match result {
        Ok(svg) => Ok(([(CONTENT_TYPE, "image/svg+xml")], svg).into_response()),
        Err(plots::PlotError::Empty(what)) => {
            Err(Problem::not_found(format!("nothing to plot yet: {what}")))
        }
        Err(e) => Err(Problem::internal(e.to_string())),
    }
}

/// Reads the fitted lines out of a point's line table, whatever extra members it carries.
fn marked_lines(point: &PointRecord) -> Vec<MarkedLine> {
    let Ok(value) = serde_json::from_str::<serde_json::Value>(&point.line_table_json) else {
        return Vec::new();
    };
    let rows = match &value {
        serde_json::Value::Array(rows) => rows.clone(),
        serde_json::Value::Object(map) => map
            .get("lines")
            .and_then(|l| l.as_array())
            .cloned()
            .unwrap_or_default(),
        _ => Vec::new(),
    };
    rows.iter()
        .filter_map(|row| {
            let order = row.get("order")?.as_i64()?;
            let frequency_hz = row.get("frequency_hz")?.as_f64()?;
            let power_dbm = row
                .get("power_dbm")
                .or_else(|| row.get("peak_power_dbm"))?
                .as_f64()?;
            Some(MarkedLine {
                order: i32::try_from(order).ok()?,
                frequency_hz,
                power_dbm,
                above_floor: row
                    .get("fitted_above_floor")
                    .or_else(|| row.get("above_floor"))
                    .and_then(|v| v.as_bool())
                    .unwrap_or(true),
            })
        })
        .collect()
}

async fn spectrum_of(
    state: &AppState,
    point: &PointRecord,
    number: usize,
) -> Result<Response, Problem> {
    let trace = state.store().point_trace(point.id).await?;
    let title = format!(
        "run {}, point {number}: {:.3} GHz, {:.1} dBm",
        point.run_id,
        point.frequency_hz / 1e9,
        point.generator_level_dbm,
    );
    // The fitted model is drawn over the trace: the analysis is run again on the stored trace
    // (with the frequency's RF-off reference when one was stored), a millisecond's work.
    let reference = state
        .store()
        .reference_traces(point.run_id)
        .await
        .ok()
        .and_then(|r| {
            r.into_iter()
                .find(|r| r.frequency_index == point.frequency_index)
        })
        .map(|r| r.trace);
    let fitted = crate::analysis::analyze_trace_with_model(
        &trace,
        point.frequency(),
        reference.as_ref(),
        &crate::analysis::AnalysisOptions::default(),
    )
    .ok();
    let model_dbm = fitted
        .as_ref()
        .map(|(_, model)| model.levels_dbm(trace.frequency_hz()));
    let floor_dbm = fitted.as_ref().map(|(a, _)| a.fit.floor_dbm);
    let (frequency_hz, power_dbm, _) = trace.into_parts();
    let plot = SpectrumPlot {
        title,
        frequency_hz,
        power_dbm,
        lines: marked_lines(point),
        model_dbm,
        floor_dbm,
    };
    svg(plots::spectrum_svg(&plot))
}

/// The spectrum of one point with the fitted lines marked (SVG).
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/points/{point_id}/spectrum.svg", tag = "plots", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id"), ("point_id" = i64, Path, description = "Point id")),
    responses((status = 200, content_type = "image/svg+xml", body = String),
              (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn point_spectrum_svg(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath((run_id, point_id)): ApiPath<(i64, i64)>,
) -> Result<Response, Problem> {
    let (point, number) = point_with_number(&state, run_id, point_id).await?;
    spectrum_of(&state, &point, number).await
}

/// The spectrum of the run's most recently measured point (SVG): what the dashboard shows live.
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/spectrum.svg", tag = "plots", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id")),
    responses((status = 200, content_type = "image/svg+xml", body = String),
              (status = 401, body = Problem), (status = 404, description = "No such run, or nothing measured yet", body = Problem)))]
pub async fn latest_spectrum_svg(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
) -> Result<Response, Problem> {
    state.store().run(run_id).await?;
    let points = state.store().points_of_run(run_id).await?;
    let latest = points
        .iter()
        .max_by_key(|p| (p.measured_at_unix_ms, p.id))
        .ok_or_else(|| Problem::not_found(format!("run {run_id} has no measured point yet")))?;
    spectrum_of(&state, latest, point_number(&points, latest.id)).await
}

/// Modulation index versus peak drive voltage at one frequency of a run, with the V_pi fit (SVG).
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/plots/modulation-index.svg", tag = "plots", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id"), FrequencyIndexQuery),
    responses((status = 200, content_type = "image/svg+xml", body = String),
              (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn modulation_index_svg(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
    ApiQuery(query): ApiQuery<FrequencyIndexQuery>,
) -> Result<Response, Problem> {
    let frequency_index = query.frequency_index.unwrap_or(0);
    let store = state.store();
    store.run(run_id).await?;
    let points: Vec<PointRecord> = store
        .points_of_run(run_id)
        .await?
        .into_iter()
        .filter(|p| p.frequency_index == frequency_index)
        .collect();
    let Some(first) = points.first() else {
        return Err(Problem::not_found(format!(
            "run {run_id} has no point at frequency index {frequency_index}"
        )));
    };
    let result = store
        .frequency_results(run_id)
        .await?
        .into_iter()
        .find(|r| r.frequency_index == frequency_index);
    let excluded_levels: Vec<u32> = result
        .as_ref()
        .and_then(|r| serde_json::from_str::<serde_json::Value>(&r.excluded_points_json).ok())
        .and_then(|v| v.as_array().cloned())
        .unwrap_or_default()
        .iter()
        .filter_map(|e| e.get("level_index").and_then(|l| l.as_u64()))
        .filter_map(|l| u32::try_from(l).ok())
        .collect();
    let plot = ModulationPlot {
        title: format!("run {run_id} at {:.3} GHz", first.frequency_hz / 1e9),
        points: points
            .iter()
            .filter_map(|p| {
                Some(ModulationPoint {
                    v_peak_volts: p.v_peak_volts,
                    modulation_index: p.modulation_index?,
                    modulation_index_uncertainty: p.modulation_index_uncertainty.unwrap_or(0.0),
                    excluded: excluded_levels.contains(&p.level_index),
                })
            })
            .collect(),
        v_pi_volts: result.map(|r| r.v_pi_volts),
    };
    svg(plots::modulation_index_svg(&plot))
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
    fn dates_convert_to_epoch_milliseconds() {
        // Worked by hand: 1970..1999 are 30 years with 7 leap days, so 2000-01-01 is day
        // 30 * 365 + 7 = 10957; January (31) and February 2000 (29, a leap year) add 60.
        assert_eq!(parse_time_bound("since", "1970-01-01").unwrap(), 0);
        assert_eq!(
            parse_time_bound("since", "2000-03-01").unwrap(),
            11_017 * 86_400_000
        );
        assert_eq!(
            parse_time_bound("since", "1700000000000").unwrap(),
            1_700_000_000_000
        );
        assert_eq!(
            parse_time_bound("until", "2023-02-29").unwrap_err().field,
            "until"
        );
        assert!(parse_time_bound("until", "yesterday").is_err());
        // Only what the document's pattern allows: digits (at most 15) or a date.
        assert!(parse_time_bound("since", "+5").is_err());
        assert!(parse_time_bound("since", " 5").is_err());
        assert!(parse_time_bound("since", "-5").is_err());
        assert!(parse_time_bound("since", "1000000000000000").is_err());
        assert_eq!(
            parse_time_bound("since", "999999999999999").unwrap(),
            999_999_999_999_999
        );
    }

    #[test]
    fn stored_json_passes_through_unchanged_and_damage_becomes_null() {
        let stored = r#"[{"order":-1,"power_dbm":-12.5},{"order":0,"power_dbm":-3.25e0}]"#;
        let view = serde_json::to_string(&stored_json(stored.to_string())).unwrap();
        assert_eq!(view, stored, "byte for byte, number formatting included");
        assert_eq!(
            serde_json::to_string(&stored_json("{\"cut".to_string())).unwrap(),
            "null"
        );
        assert_eq!(
            serde_json::to_string(&stored_json(String::new())).unwrap(),
            "null"
        );
    }

    #[test]
    fn stored_lists_keep_their_shape() {
        let stored = r#"[{"order":0,"frequency_hz":1.0}]"#;
        assert_eq!(stored_json_list(stored.to_string()).get(), stored);
        for damaged in ["", "null", "{\"lines\":[]}", "[1,"] {
            assert_eq!(
                stored_json_list(damaged.to_string()).get(),
                "[]",
                "{damaged:?}"
            );
            assert_eq!(
                stored_json_array(damaged),
                serde_json::json!([]),
                "{damaged:?}"
            );
        }
        assert_eq!(
            stored_json_array(r#"[{"level_index":2,"reason":"outlier"}]"#)[0]["level_index"],
            2
        );
    }

    #[test]
    fn paging_names_each_bad_parameter() {
        let problem = paging(Some(0), Some(5000), 50).unwrap_err();
        let fields: Vec<&str> = problem.errors.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(fields, ["page", "per_page"]);
        assert_eq!(paging(None, None, 50).unwrap(), (1, 50));
    }
}
