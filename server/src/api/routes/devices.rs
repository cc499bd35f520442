//! Devices (modulators by serial number): the list, one device, its calibration history, V_pi at
//! any frequency from its newest calibration, and the history plots.

use crate::api::auth::Viewer;
use crate::api::plots::{self, VpiCurve, VpiPoint};
use crate::api::problem::Problem;
use crate::api::AppState;
use crate::store::{DeviceRecord, VpiHistoryEntry};
use axum::extract::{Path, Query, State};
use axum::http::header::CONTENT_TYPE;
use axum::response::{IntoResponse, Response};
use axum::Json;
use halfwave_units::Hz;
use serde::{Deserialize, Serialize};
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
    Path(serial): Path<String>,
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
    Path(serial): Path<String>,
) -> Result<Json<Vec<Calibration>>, Problem> {
    let history = state.store().vpi_history(&serial).await?;
    Ok(Json(group_history(&history)))
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
    Path(serial): Path<String>,
    Query(query): Query<VpiQuery>,
) -> Result<Json<VpiAnswer>, Problem> {
    let frequency_hz = check_frequency(query.frequency_hz)?;
    let found = state
        .store()
        .latest_vpi_at(&serial, Hz(frequency_hz))
        .await?;
    Ok(Json(VpiAnswer {
        serial,
        run_id: found.run_id,
        frequency_hz,
        v_pi_volts: found.v_pi_volts.value(),
        v_pi_uncertainty_volts: found.v_pi_uncertainty_volts.value(),
        lower_frequency_hz: found.lower_frequency_hz.value(),
        upper_frequency_hz: found.upper_frequency_hz.value(),
        interpolated: found.lower_frequency_hz != found.upper_frequency_hz,
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

async fn calibrations(state: &AppState, serial: &str) -> Result<Vec<Calibration>, Problem> {
    let history = group_history(&state.store().vpi_history(serial).await?);
    if history.is_empty() {
        return Err(Problem::not_found(format!(
            "device {serial} has no completed calibration yet"
        )));
    }
    Ok(history)
}

/// V_pi versus frequency of the newest calibration with uncertainty bars, earlier ones overlaid.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/plots/v-pi.svg", tag = "plots", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    responses((status = 200, content_type = "image/svg+xml", body = String),
              (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn vpi_plot(
    _caller: Viewer,
    State(state): State<AppState>,
    Path(serial): Path<String>,
) -> Result<Response, Problem> {
    let history = calibrations(&state, &serial).await?;
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
    Path(serial): Path<String>,
) -> Result<Response, Problem> {
    let history = calibrations(&state, &serial).await?;
    svg(plots::response_svg(&curve(&history[0])))
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
