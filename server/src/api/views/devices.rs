//! Devices, their calibrations and V_pi at a frequency, as the API shows them.
//!
//! Shared by the route handlers (`api::routes::devices`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use crate::store::{DeviceCalibrationSet, DeviceRecord, RunSelection};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

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
    /// True for the device's pinned reference calibration.
    #[serde(default)]
    pub pinned: bool,
    /// Ascending in frequency.
    pub points: Vec<CalibrationPoint>,
}

/// V_pi at a requested frequency, with the run that answered.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct VpiAnswer {
    pub serial: String,
    /// The run that answered.
    pub run_id: i64,
    /// True when that run is the device's pinned reference calibration.
    pub pinned: bool,
    /// How the run was chosen: `pinned` (the device's reference calibration), `newest_covering`
    /// (no run pinned: the newest completed run whose measured range covers the frequency) or
    /// `requested` (`run_id` given).
    pub selection: RunSelection,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    /// Standard uncertainty (k = 1).
    pub v_pi_uncertainty_volts: f64,
    /// The measured frequencies the value is interpolated between (equal when measured there).
    pub lower_frequency_hz: f64,
    pub upper_frequency_hz: f64,
    pub interpolated: bool,
}

/// The device's calibrations as the history route serves them (newest first).
pub fn calibration_views(set: &DeviceCalibrationSet) -> Vec<Calibration> {
    let pinned = set.pinned_run_id();
    set.runs
        .iter()
        .map(|run| Calibration {
            run_id: run.run_id,
            finished_at_unix_ms: run.finished_at_unix_ms,
            pinned: pinned == Some(run.run_id),
            points: run
                .values
                .iter()
                .map(|v| CalibrationPoint {
                    frequency_hz: v.frequency_hz,
                    v_pi_volts: v.v_pi_volts,
                    v_pi_uncertainty_volts: v.v_pi_uncertainty_volts,
                })
                .collect(),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::history::group_history;
    use crate::store::{PinRecord, VpiHistoryEntry};

    #[test]
    fn history_views_mark_the_pinned_run() {
        let entry = |run_id, f| VpiHistoryEntry {
            run_id,
            finished_at_unix_ms: run_id * 1000,
            frequency_hz: f,
            v_pi_volts: 4.0,
            v_pi_uncertainty_volts: 0.1,
        };
        let set = DeviceCalibrationSet {
            serial: "PM-1".into(),
            pinned: Some(PinRecord {
                device_id: 1,
                run_id: 4,
                pinned_by: "lab".into(),
                pinned_at_unix_ms: 0,
                note: String::new(),
            }),
            runs: group_history(vec![entry(9, 2e9), entry(9, 1e9), entry(4, 1e9)]),
        };
        let views = calibration_views(&set);
        assert_eq!(views.len(), 2);
        assert_eq!(views[0].run_id, 9);
        assert!(!views[0].pinned && views[1].pinned);
        assert_eq!(views[0].points[0].frequency_hz, 1e9);
        assert_eq!(views[1].points.len(), 1);
    }
}
