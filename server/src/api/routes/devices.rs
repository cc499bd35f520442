//! Devices (modulators by serial number): the list, one device, its calibration history, V_pi at
//! any frequency and the history plots, both by the rules of `store/history.rs` (the pinned
//! reference calibration, else the newest completed run covering what is asked). History, V_pi and
//! plots share one read of the device's completed calibrations and pin, kept in the read cache
//! until the device completes another run or its pin changes (see `api/read_cache.rs`). Pinning
//! itself is in [`super::pins`].

use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::plots::{self, VpiCurve, VpiPoint};
use crate::api::problem::Problem;
use crate::api::read_cache::DeviceCalibrations;
use crate::api::routes::runs::json_bytes;
use crate::api::views::devices::{calibration_views, Calibration, DeviceView, VpiAnswer};
use crate::api::AppState;
use crate::store::RunSelection;
use axum::body::Bytes;
use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::http::HeaderName;
use axum::response::{IntoResponse, Response};
use axum::Json;
use halfwave_units::Hz;
use serde::Deserialize;
use std::sync::Arc;
use utoipa::IntoParams;

/// The highest RF frequency a V_pi query accepts (1 THz): far above any modulator's electrode
/// response, so anything beyond is a unit mistake (common practice).
pub const MAX_QUERY_FREQUENCY_HZ: f64 = 1e12;

/// The frequency of a V_pi query, and optionally the run to answer from.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct VpiQuery {
    /// RF frequency, Hz (required).
    #[param(value_type = f64, required = true, exclusive_minimum = 0, maximum = 1e12)]
    pub frequency_hz: Option<f64>,
    /// Answer from this completed run of the device instead of by the lookup rule.
    pub run_id: Option<i64>,
}

/// Which run a device plot shows.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct PlotQuery {
    /// Draw this completed run of the device instead of the one the plot rule chooses.
    pub run_id: Option<i64>,
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

/// The device's completed calibrations and pin: kept in the read cache while its completed runs
/// and its pin stay the same (one fingerprint query per call), read again from the database
/// when they changed.
pub(crate) async fn device_calibrations(
    state: &AppState,
    serial: &str,
) -> Result<Arc<DeviceCalibrations>, Problem> {
    let store = state.store();
    let fingerprint = store.completed_runs_fingerprint(serial).await?;
    if let Some(kept) = state.read_cache().device(serial, fingerprint) {
        return Ok(kept);
    }
    let set = store.device_calibrations(serial).await?;
    let history = calibration_views(&set);
    let history_json = Bytes::from(serde_json::to_vec(&history).map_err(|e| {
        Problem::internal(format!("the history could not be written as JSON: {e}"))
    })?);
    let device = Arc::new(DeviceCalibrations {
        fingerprint,
        history,
        history_json,
        set,
    });
    state.read_cache().keep_device(serial, device.clone());
    Ok(device)
}

pub(crate) fn check_frequency(frequency_hz: Option<f64>) -> Result<f64, Problem> {
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

/// V_pi at any frequency, interpolated linearly between the measured frequencies around it, with
/// its standard uncertainty and the run that answered. The run: the device's pinned reference
/// calibration when one is pinned, otherwise the newest completed run whose measured range covers
/// the frequency (`run_id` names one instead). No extrapolation.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/v-pi", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number"), VpiQuery),
    responses((status = 200, body = VpiAnswer), (status = 401, body = Problem),
              (status = 404, description = "No such device or no completed calibration", body = Problem),
              (status = 422, description = "Frequency missing, absurd or outside the calibrated range (of the pinned run, when one is pinned); or run_id not a completed calibration of the device", body = Problem)))]
pub async fn vpi_at(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    ApiQuery(query): ApiQuery<VpiQuery>,
) -> Result<Json<VpiAnswer>, Problem> {
    let frequency_hz = check_frequency(query.frequency_hz)?;
    let device = device_calibrations(&state, &serial).await?;
    let answer = device.set.vpi_at(Hz(frequency_hz), query.run_id)?;
    Ok(Json(VpiAnswer {
        serial,
        run_id: answer.run_id,
        pinned: answer.pinned,
        selection: answer.selection,
        frequency_hz,
        v_pi_volts: answer.v_pi_volts.value(),
        v_pi_uncertainty_volts: answer.v_pi_uncertainty_volts.value(),
        lower_frequency_hz: answer.lower_frequency_hz.value(),
        upper_frequency_hz: answer.upper_frequency_hz.value(),
        interpolated: answer.lower_frequency_hz != answer.upper_frequency_hz,
    }))
}

/// The header naming the run a device plot shows.
pub const RUN_ID_HEADER: &str = "halfwave-run-id";
/// The header saying how that run was chosen (`pinned`, `newest_covering`, `newest`,
/// `requested`).
pub const RUN_SELECTION_HEADER: &str = "halfwave-run-selection";
/// The header saying whether that run is the device's pinned reference calibration.
pub const RUN_PINNED_HEADER: &str = "halfwave-run-pinned";

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

/// The run a device plot shows and the sentence that says why.
struct Shown<'a> {
    calibration: &'a Calibration,
    selection: RunSelection,
    subtitle: String,
}

fn shown<'a>(
    device: &'a DeviceCalibrations,
    serial: &str,
    requested: Option<i64>,
) -> Result<Shown<'a>, Problem> {
    let set = &device.set;
    if set.runs.is_empty() {
        return Err(Problem::not_found(format!(
            "device {serial} has no completed calibration yet"
        )));
    }
    let (run, selection) = set.plotted_run(requested)?;
    let calibration = device
        .history
        .iter()
        .find(|c| c.run_id == run.run_id)
        .ok_or_else(|| Problem::internal("the plotted run is missing from the history"))?;
    let range = |(lo, hi): (f64, f64)| {
        format!(
            "{}\u{2013}{} GHz",
            plots::axis::ghz_label(lo / 1e9),
            plots::axis::ghz_label(hi / 1e9)
        )
    };
    let calibrated = set.calibrated_range_hz().map(range).unwrap_or_default();
    let id = run.run_id;
    let subtitle = match selection {
        RunSelection::Pinned => {
            format!("{serial}: run {id}, the pinned reference calibration")
        }
        RunSelection::Requested if calibration.pinned => {
            format!("{serial}: run {id} as requested (the pinned reference calibration)")
        }
        RunSelection::Requested => format!("{serial}: run {id} as requested (not pinned)"),
        RunSelection::NewestCovering => format!(
            "{serial}: run {id}, the newest completed run covering {calibrated} (no run pinned)"
        ),
        RunSelection::Newest => format!(
            "{serial}: run {id}, the newest completed run (none covers all of {calibrated}; no run pinned)"
        ),
    };
    Ok(Shown {
        calibration,
        selection,
        subtitle,
    })
}

fn svg(result: Result<String, plots::PlotError>, shown: &Shown<'_>) -> Result<Response, Problem> {
    match result {
        Ok(svg) => Ok((
            [
                (CONTENT_TYPE, "image/svg+xml".to_string()),
                (
                    HeaderName::from_static(RUN_ID_HEADER),
                    shown.calibration.run_id.to_string(),
                ),
                (
                    HeaderName::from_static(RUN_SELECTION_HEADER),
                    shown.selection.as_str().to_string(),
                ),
                (
                    HeaderName::from_static(RUN_PINNED_HEADER),
                    shown.calibration.pinned.to_string(),
                ),
            ],
            svg,
        )
            .into_response()),
        Err(plots::PlotError::Empty(what)) => {
            Err(Problem::not_found(format!("nothing to plot: {what}")))
        }
        Err(e) => Err(Problem::internal(e.to_string())),
    }
}

/// V_pi versus frequency of one calibration with uncertainty bars, the device's other
/// calibrations overlaid (up to 8, newest first). The run shown: `run_id` if given, else the
/// pinned reference calibration, else the newest completed run covering every calibrated
/// frequency, else the newest; named in the subtitle and in the `Halfwave-Run-Id`,
/// `Halfwave-Run-Selection` and `Halfwave-Run-Pinned` headers. Logarithmic frequency axis when
/// the shown run's points are log-spaced.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/plots/v-pi.svg", tag = "plots", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number"), PlotQuery),
    responses((status = 200, content_type = "image/svg+xml", body = String,
               headers(("Halfwave-Run-Id" = i64, description = "The run shown"),
                       ("Halfwave-Run-Selection" = String, description = "pinned, newest_covering, newest or requested"),
                       ("Halfwave-Run-Pinned" = bool, description = "Whether the run shown is the pinned reference calibration"))),
              (status = 401, body = Problem), (status = 404, body = Problem),
              (status = 422, description = "run_id is not a completed calibration of the device", body = Problem)))]
pub async fn vpi_plot(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    ApiQuery(query): ApiQuery<PlotQuery>,
) -> Result<Response, Problem> {
    let device = device_calibrations(&state, &serial).await?;
    let shown = shown(&device, &serial, query.run_id)?;
    let current = curve(shown.calibration);
    let others: Vec<VpiCurve> = device
        .history
        .iter()
        .filter(|c| c.run_id != shown.calibration.run_id)
        .take(8)
        .map(curve)
        .collect();
    svg(plots::vpi_svg(&current, &others, &shown.subtitle), &shown)
}

/// The electro-optic response in dB of one calibration (SVG), chosen as for the V_pi plot and
/// named the same way.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/plots/response.svg", tag = "plots", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number"), PlotQuery),
    responses((status = 200, content_type = "image/svg+xml", body = String,
               headers(("Halfwave-Run-Id" = i64, description = "The run shown"),
                       ("Halfwave-Run-Selection" = String, description = "pinned, newest_covering, newest or requested"),
                       ("Halfwave-Run-Pinned" = bool, description = "Whether the run shown is the pinned reference calibration"))),
              (status = 401, body = Problem), (status = 404, body = Problem),
              (status = 422, description = "run_id is not a completed calibration of the device", body = Problem)))]
pub async fn response_plot(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    ApiQuery(query): ApiQuery<PlotQuery>,
) -> Result<Response, Problem> {
    let device = device_calibrations(&state, &serial).await?;
    let shown = shown(&device, &serial, query.run_id)?;
    svg(
        plots::response_svg(&curve(shown.calibration), &shown.subtitle),
        &shown,
    )
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
}
