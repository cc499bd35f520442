//! The plots of a run as SVG: one point's spectrum with the fitted lines marked, the latest
//! spectrum, and the modulation index versus drive at one frequency. Reading runs and points is in
//! [`super::runs`].

use super::runs::{point_number, point_with_number, reference_of_point};
use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::plots::{self, MarkedLine, ModulationPlot, ModulationPoint, SpectrumPlot};
use crate::api::problem::Problem;
use crate::api::AppState;
use crate::store::PointRecord;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::response::{IntoResponse, Response};
use serde::Deserialize;
use utoipa::IntoParams;

/// The frequency of a modulation-index plot.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct FrequencyIndexQuery {
    /// Index of the frequency in the run's plan, from 0 (default 0).
    #[param(format = Int64, minimum = 0, maximum = 4294967295_u64)]
    pub frequency_index: Option<u32>,
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
    let reference = reference_of_point(state, point).await.ok().flatten();
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
