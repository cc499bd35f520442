//! The drive planner's answer: the generator level for a wanted modulation index (or back), with what it used.
//!
//! Shared by the route handlers (`api::routes::drive`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use crate::store::RunSelection;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// What the planner solved for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum SolvedFor {
    /// `modulation_index` was given.
    GeneratorLevel,
    /// `generator_level_dbm` was given.
    ModulationIndex,
}

/// The chain the answer went through.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DriveChainUsed {
    /// The stored calibration's name and version (null for a flat loss).
    pub name: Option<String>,
    pub version: Option<i64>,
    /// The flat loss given (null for a stored calibration).
    pub loss_db: Option<f64>,
    /// Net gain generator -> modulator at the frequency, dB.
    pub gain_db: f64,
    /// Its standard uncertainty as given, dB.
    pub gain_uncertainty_db: f64,
    /// True when the frequency lies outside the calibration's table (its end value is held).
    pub outside_table: bool,
}

/// The V_pi the answer used.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DriveVpi {
    pub run_id: i64,
    pub pinned: bool,
    /// How the run was chosen (see `GET /devices/{serial}/v-pi`; when extrapolating, as for the
    /// device plots: `newest` is possible).
    pub selection: RunSelection,
    pub v_pi_volts: f64,
    /// Standard uncertainty (k = 1); when extrapolated it includes the departure of the
    /// extrapolated line from the end value.
    pub v_pi_uncertainty_volts: f64,
    /// The measured frequencies the value comes from.
    pub lower_frequency_hz: f64,
    pub upper_frequency_hz: f64,
    pub interpolated: bool,
    /// True when the frequency is outside the run's measured range (only with `extrapolate`).
    pub extrapolated: bool,
}

/// The limits the level was checked against.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DriveLimits {
    /// The device's RF input limit, dBm at the modulator.
    pub device_limit_dbm: f64,
    /// The daemon's `limits.max_level_at_modulator_dbm`.
    pub daemon_limit_dbm: f64,
    /// The lower of the two.
    pub limit_at_modulator_dbm: f64,
    /// Limit minus the level at the modulator, dB (not negative: a level over a limit is refused).
    pub margin_db: f64,
    /// Always true in an answer (a level over a limit is refused with 422).
    pub within_limits: bool,
}

/// A planned drive.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DriveAnswer {
    pub serial: String,
    pub frequency_hz: f64,
    pub solved_for: SolvedFor,
    /// The modulation index (given, or what the generator level gives).
    pub modulation_index: f64,
    /// Its standard uncertainty (for a given index: of the index the answered level gives).
    pub modulation_index_uncertainty: f64,
    /// The generator level (given, or what the index needs).
    pub generator_level_dbm: f64,
    /// Standard uncertainty of the generator level that gives this index, dB: from u(V_pi) and
    /// the chain's uncertainty in quadrature.
    pub level_uncertainty_db: f64,
    pub level_at_modulator_dbm: f64,
    /// Peak voltage at the modulator into 50 ohm.
    pub v_peak_volts: f64,
    pub chain: DriveChainUsed,
    pub v_pi: DriveVpi,
    pub limits: DriveLimits,
}
