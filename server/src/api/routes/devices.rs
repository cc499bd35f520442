//! Devices (modulators by serial number): the list, one device, its calibration history, V_pi at
//! any frequency from its newest calibration, and the history plots. History, V_pi and plots
//! share one read of the device's completed calibrations, kept in the read cache until the device
//! completes another run (see `api/read_cache.rs`).

use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::plots::{self, VpiCurve, VpiPoint};
use crate::api::problem::Problem;
use crate::api::read_cache::DeviceCalibrations;
use crate::api::routes::runs::json_bytes;
use crate::api::AppState;
use crate::store::history::interpolate_vpi;
use crate::store::{DeviceRecord, StoreError, VpiHistoryEntry};
use axum::body::Bytes;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::response::{IntoResponse, Response};
use axum::Json;
use halfwave_units::Hz;
use serde::{Deserialize, Serialize};
use std::sync::Arc;
use utoipa::{IntoParams, ToSchema};

/// The highest RF frequency a V_pi query accepts (1 THz): far above any modulator's electrode
/// response, so anything beyond is a unit mistake (common practice).
pub const MAX_QUERY_FREQUENCY_HZ: f64 = 1e12;

/// A modulator.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DeviceView {
    pub serial: String,
    pub model: String,
    pub rf_input_limit_dbm: f64,
    pub wavelength_nm: f64,
    pub created_at_unix_ms: i64,
    pub updated_at_unix_ms: i64,
}

impl From<DeviceRecord> for DeviceView {
    fn from(d: DeviceRecord) -> DeviceView {
        DeviceView {
            serial: d.serial,
            model: d.model,
            rf_input_limit_dbm: d.rf_input_limit_dbm,
            wavelength_nm: d.wavelength_nm,
            created_at_unix_ms: d.created_at_unix_ms,
            updated_at_unix_ms: d.updated_at_unix_ms,
        }
    }
}

/// V_pi at one frequency of a calibration.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, ToSchema)]
pub struct CalibrationPoint {
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub v_pi_uncertainty_volts: f64,
}

/// One completed calibration run of a device.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct Calibration {
    pub run_id: i64,
    pub finished_at_unix_ms: i64,
    /// Ascending in frequency.
    pub points: Vec<CalibrationPoint>,
}

/// V_pi at a requested frequency.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct VpiAnswer {
    pub serial: String,
    pub run_id: i64,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    /// Standard uncertainty (k = 1).
    pub v_pi_uncertainty_volts: f64,
    /// The measured frequencies the value is interpolated between (equal when measured there).
    pub lower_frequency_hz: f64,
    pub upper_frequency_hz: f64,
    pub interpolated: bool,
}

/// The frequency of a V_pi query.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct VpiQuery {
    /// RF frequency, Hz.
    pub frequency_hz: Option<f64>,
}

/// Groups a device's history (newest run first) into calibrations.
pub fn group_history(entries: &[VpiHistoryEntry]) -> Vec<Calibration> {
    let mut calibrations: Vec<Calibration> = Vec::new();
    for entry in entries {
        let point = CalibrationPoint {
            frequency_hz: entry.frequency_hz,
            v_pi_volts: entry.v_pi_volts,
            v_pi_uncertainty_volts: entry.v_pi_uncertainty_volts,
        };
        match calibrations.iter_mut().find(|c| c.run_id == entry.run_id) {
            Some(calibration) => calibration.points.push(point),
            None => calibrations.push(Calibration {
                run_id: entry.run_id,
                finished_at_unix_ms: entry.finished_at_unix_ms,
                points: vec![point],
            }),
        }
    }
    for calibration in &mut calibrations {
        calibration
            .points
            .sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    }
    calibrations
}

/// Every device, by serial number.
#[utoipa::path(get, path = "/api/v1/devices", tag = "devices", security(("bearer" = [])),
    responses((status = 200, body = [DeviceView]), (status = 401, body = Problem)))]
pub async fn list_devices(
    _caller: Viewer,
    State(state): State<AppState>,
) -> Result<Json<Vec<DeviceView>>, Problem> {
    let devices = state.store().devices().await?;
    Ok(Json(devices.into_iter().map(DeviceView::from).collect()))
}

/// One device.
#[utoipa::path(get, path = "/api/v1/devices/{serial}", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    responses((status = 200, body = DeviceView), (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn get_device(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
) -> Result<Json<DeviceView>, Problem> {
    Ok(Json(state.store().device_by_serial(&serial).await?.into()))
}

/// The device's completed calibrations, newest first, each with V_pi per frequency.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/calibrations", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    responses((status = 200, body = [Calibration]), (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn calibration_history(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
) -> Result<Response, Problem> {
    let device = device_calibrations(&state, &serial).await?;
    Ok(json_bytes(device.history_json.clone()))
}

/// The device's completed calibrations: kept in the read cache while its completed runs stay the
/// same (one fingerprint query per call), read again from the database when they changed.
async fn device_calibrations(
    state: &AppState,
    serial: &str,
) -> Result<Arc<DeviceCalibrations>, Problem> {
    let store = state.store();
    let fingerprint = store.completed_runs_fingerprint(serial).await?;
    if let Some(kept) = state.read_cache().device(serial, fingerprint) {
        return Ok(kept);
    }
    let history = group_history(&store.vpi_history(serial).await?);
    let newest_results = match history.first() {
        Some(newest) => store.frequency_results(newest.run_id).await?,
        None => Vec::new(),
    };
    let history_json = Bytes::from(serde_json::to_vec(&history).map_err(|e| {
        Problem::internal(format!("the history could not be written as JSON: {e}"))
    })?);
    let device = Arc::new(DeviceCalibrations {
        fingerprint,
        history,
        history_json,
        newest_results,
    });
    state.read_cache().keep_device(serial, device.clone());
    Ok(device)
}

fn check_frequency(frequency_hz: Option<f64>) -> Result<f64, Problem> {
    match frequency_hz {
        None => Err(Problem::invalid_field(
            "frequency_hz",
            "missing; give the RF frequency in hertz, e.g. ?frequency_hz=10e9",
        )),
        Some(f) if !f.is_finite() || f <= 0.0 => Err(Problem::invalid_field(
            "frequency_hz",
            format!("{f} is not a positive frequency in hertz"),
        )),
        Some(f) if f > MAX_QUERY_FREQUENCY_HZ => Err(Problem::invalid_field(
            "frequency_hz",
            format!("{f} Hz is above {MAX_QUERY_FREQUENCY_HZ} Hz; is the unit hertz?"),
        )),
        Some(f) => Ok(f),
    }
}

/// V_pi at any frequency from the newest completed calibration, interpolated linearly between
/// the measured frequencies around it, with its standard uncertainty. No extrapolation.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/v-pi", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number"), VpiQuery),
    responses((status = 200, body = VpiAnswer), (status = 401, body = Problem),
              (status = 404, description = "No such device or no completed calibration", body = Problem),
              (status = 422, description = "Frequency missing, absurd or outside the calibrated range", body = Problem)))]
pub async fn vpi_at(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    ApiQuery(query): ApiQuery<VpiQuery>,
) -> Result<Json<VpiAnswer>, Problem> {
    let frequency_hz = check_frequency(query.frequency_hz)?;
    let device = device_calibrations(&state, &serial).await?;
    // The history holds only runs with results, newest first: the same run the store's
    // `latest_vpi_at` picks.
    let (Some(newest), false) = (device.history.first(), device.newest_results.is_empty()) else {
        return Err(StoreError::NoCompletedRun { serial }.into());
    };
    let results = &device.newest_results;
    let Some((v_pi, uncertainty, lower, upper)) = interpolate_vpi(results, Hz(frequency_hz)) else {
        let frequencies = || results.iter().map(|r| r.frequency_hz);
        return Err(StoreError::OutsideMeasuredRange {
            serial,
            run_id: newest.run_id,
            frequency_hz,
            min_hz: frequencies().fold(f64::INFINITY, f64::min),
            max_hz: frequencies().fold(f64::NEG_INFINITY, f64::max),
        }
        .into());
    };
    Ok(Json(VpiAnswer {
        serial,
        run_id: newest.run_id,
        frequency_hz,
        v_pi_volts: v_pi.value(),
        v_pi_uncertainty_volts: uncertainty.value(),
        lower_frequency_hz: lower.value(),
        upper_frequency_hz: upper.value(),
        interpolated: lower != upper,
    }))
}

fn curve(calibration: &Calibration) -> VpiCurve {
    VpiCurve {
        label: format!("run {}", calibration.run_id),
        points: calibration
            .points
            .iter()
            .map(|p| VpiPoint {
                frequency_hz: p.frequency_hz,
                v_pi_volts: p.v_pi_volts,
                v_pi_uncertainty_volts: p.v_pi_uncertainty_volts,
            })
            .collect(),
    }
}

fn svg(result: Result<String, plots::PlotError>) -> Result<Response, Problem> {
    match result {
        Ok(svg) => Ok(([(CONTENT_TYPE, "image/svg+xml")], svg).into_response()),
        Err(plots::PlotError::Empty(what)) => {
            Err(Problem::not_found(format!("nothing to plot: {what}")))
        }
        Err(e) => Err(Problem::internal(e.to_string())),
    }
}

async fn calibrations(state: &AppState, serial: &str) -> Result<Arc<DeviceCalibrations>, Problem> {
    let device = device_calibrations(state, serial).await?;
    if device.history.is_empty() {
        return Err(Problem::not_found(format!(
            "device {serial} has no completed calibration yet"
        )));
    }
    Ok(device)
}

/// V_pi versus frequency of the newest calibration with uncertainty bars, earlier ones overlaid.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/plots/v-pi.svg", tag = "plots", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    responses((status = 200, content_type = "image/svg+xml", body = String),
              (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn vpi_plot(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
) -> Result<Response, Problem> {
    let device = calibrations(&state, &serial).await?;
    let history = &device.history;
    let newest = curve(&history[0]);
    let earlier: Vec<VpiCurve> = history.iter().skip(1).take(8).map(curve).collect();
    svg(plots::vpi_svg(&newest, &earlier))
}

/// The electro-optic response in dB of the newest calibration (SVG).
#[utoipa::path(get, path = "/api/v1/devices/{serial}/plots/response.svg", tag = "plots", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    responses((status = 200, content_type = "image/svg+xml", body = String),
              (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn response_plot(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
) -> Result<Response, Problem> {
    let device = calibrations(&state, &serial).await?;
    svg(plots::response_svg(&curve(&device.history[0])))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn absurd_frequencies_are_named() {
        for bad in [None, Some(-1.0), Some(0.0), Some(f64::NAN), Some(5e12)] {
            let problem = check_frequency(bad).unwrap_err();
            assert_eq!(problem.status, 422);
            assert_eq!(problem.errors[0].field, "frequency_hz");
        }
        assert_eq!(check_frequency(Some(10e9)).unwrap(), 10e9);
    }

    #[test]
    fn history_groups_by_run_in_order() {
        let entry = |run_id, f| VpiHistoryEntry {
            run_id,
            finished_at_unix_ms: run_id * 1000,
            frequency_hz: f,
            v_pi_volts: 4.0,
            v_pi_uncertainty_volts: 0.1,
        };
        let grouped = group_history(&[entry(9, 2e9), entry(9, 1e9), entry(4, 1e9)]);
        assert_eq!(grouped.len(), 2);
        assert_eq!(grouped[0].run_id, 9);
        assert_eq!(grouped[0].points[0].frequency_hz, 1e9);
        assert_eq!(grouped[1].points.len(), 1);
    }
}
