//! The scenario: everything the simulated bench is made of, read from TOML.
//!
//! A scenario is plain data (laser, modulator, drive chain, RF source, analyzer) plus the
//! functions that give the truth the tests compare against: [`Scenario::v_pi_at`],
//! [`Scenario::chain_loss_at`] and [`Scenario::level_at_modulator`]. It is checked once when read
//! ([`Scenario::from_toml_str`]) so that the physics never meets a NaN, an empty table or a
//! negative bandwidth. The built-in default lives in `drivers/scenarios/default.toml` and is
//! embedded in the binary.

use crate::instrument::{Identity, SourceLimits};
use halfwave_units::{Db, Dbm, Hz, Nanometers, Seconds, VoltsPeak};
use serde::Deserialize;
use std::path::Path;

/// The built-in scenario's TOML text.
pub const DEFAULT_SCENARIO_TOML: &str = include_str!("../../scenarios/default.toml");

/// A second example scenario: driver amplifier (the source can overdrive the modulator), tabulated
/// V_pi with a resonance, residual AM, Lorentzian filter. Handy for interlock and asymmetry tests.
pub const AMPLIFIED_SCENARIO_TOML: &str = include_str!("../../scenarios/amplified.toml");

/// Why a scenario was refused.
#[derive(Debug, thiserror::Error)]
pub enum ScenarioError {
    #[error("could not read the scenario file {path}: {source}")]
    Read {
        path: String,
        #[source]
        source: std::io::Error,
    },
    #[error("the scenario is not valid TOML or has a wrong or unknown key: {0}")]
    Toml(String),
    #[error("scenario value {field} = {value} is not allowed: {rule}")]
    Invalid {
        field: &'static str,
        value: String,
        rule: &'static str,
    },
}

fn invalid(field: &'static str, value: impl ToString, rule: &'static str) -> ScenarioError {
    ScenarioError::Invalid {
        field,
        value: value.to_string(),
        rule,
    }
}

/// The laser.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LaserSpec {
    /// Nominal vacuum wavelength.
    pub wavelength_nm: f64,
    /// Optical power into the modulator.
    pub power_dbm: f64,
    /// Lorentzian linewidth (full width at half maximum).
    pub linewidth_hz: f64,
    /// Standard deviation of the random-walk step of the optical frequency between sweeps.
    pub drift_step_hz: f64,
    /// The walk is reflected at this distance from the nominal frequency.
    pub drift_limit_hz: f64,
}

/// How V_pi depends on the drive frequency.
#[derive(Debug, Clone, Deserialize)]
#[serde(tag = "model", rename_all = "lowercase", deny_unknown_fields)]
pub enum VPiModel {
    /// V_pi(f) = V0 * (1 + a * sqrt(f / 1 GHz) + b * f / 1 GHz): electrode loss grows with
    /// sqrt(f), mismatch roughly with f.
    Formula {
        low_frequency_volts: f64,
        sqrt_coefficient: f64,
        linear_coefficient: f64,
    },
    /// `[frequency_hz, v_pi_volts]` rows, interpolated linearly and held beyond the ends.
    Table { points: Vec<[f64; 2]> },
}

/// The phase modulator under test.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModulatorSpec {
    pub serial: String,
    /// Optical insertion loss.
    pub insertion_loss_db: f64,
    /// RF input damage threshold; exceeding it sets the overdrive flag.
    pub max_rf_input_dbm: f64,
    /// Residual amplitude-modulation depth per volt of peak drive.
    #[serde(default)]
    pub residual_am_per_volt: f64,
    /// Phase of the residual AM relative to the drive, degrees (90 gives the largest asymmetry).
    #[serde(default)]
    pub residual_am_phase_deg: f64,
    pub v_pi: VPiModel,
}

/// The RF path from the generator to the modulator.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DriveChainSpec {
    /// `[frequency_hz, loss_db]` rows (negative loss = gain).
    pub loss_db: Vec<[f64; 2]>,
}

/// The RF signal generator.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RfSourceSpec {
    pub manufacturer: String,
    pub model: String,
    pub serial: String,
    pub firmware: String,
    pub min_frequency_hz: f64,
    pub max_frequency_hz: f64,
    pub min_level_dbm: f64,
    pub max_level_dbm: f64,
    pub frequency_resolution_hz: f64,
    pub level_resolution_db: f64,
    pub settling_time_s: f64,
    /// Level error at 0 Hz (real output = set level + error).
    pub level_error_db: f64,
    /// Change of the level error per GHz.
    pub level_error_db_per_ghz: f64,
}

/// Shape of the analyzer's resolution filter.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum FilterShape {
    Gaussian,
    Lorentzian,
}

/// The optical spectrum analyzer.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AnalyzerSpec {
    pub manufacturer: String,
    pub model: String,
    pub serial: String,
    pub firmware: String,
    pub min_frequency_hz: f64,
    pub max_frequency_hz: f64,
    pub min_span_hz: f64,
    pub max_span_hz: f64,
    /// The resolution bandwidths offered, ascending.
    pub resolution_bandwidths_hz: Vec<f64>,
    pub min_points: usize,
    pub max_points: usize,
    pub filter_shape: FilterShape,
    /// Displayed noise floor.
    pub noise_floor_dbm: f64,
    /// Standard deviation of the displayed level (dB).
    pub display_noise_db: f64,
    pub sweep_time_s: f64,
    /// A line at true frequency f is shown at f + this offset.
    pub frequency_offset_hz: f64,
    pub default_span_hz: f64,
    pub default_resolution_bandwidth_hz: f64,
    pub default_points: usize,
}

/// A whole simulated bench.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    pub name: String,
    pub laser: LaserSpec,
    pub modulator: ModulatorSpec,
    pub drive_chain: DriveChainSpec,
    pub rf_source: RfSourceSpec,
    pub analyzer: AnalyzerSpec,
    /// Optional: the power sensor used to calibrate the drive chain (the built-in one when left
    /// out; see [`super::sensor`]).
    #[serde(default)]
    pub power_sensor: super::sensor::PowerSensorSpec,
}

/// Linear interpolation in an ascending `[x, y]` table, constant beyond the ends.
pub(crate) fn interpolate(table: &[[f64; 2]], x: f64) -> f64 {
    let (Some(first), Some(last)) = (table.first(), table.last()) else {
        return 0.0;
    };
    if x <= first[0] {
        return first[1];
    }
    if x >= last[0] {
        return last[1];
    }
    for pair in table.windows(2) {
        let [[x0, y0], [x1, y1]] = [pair[0], pair[1]];
        if x <= x1 {
            return y0 + (y1 - y0) * (x - x0) / (x1 - x0);
        }
    }
    last[1]
}

fn check_table(
    field: &'static str,
    table: &[[f64; 2]],
    positive_values: bool,
) -> Result<(), ScenarioError> {
    if table.is_empty() {
        return Err(invalid(
            field,
            "[]",
            "give at least one [frequency_hz, value] row",
        ));
    }
    for row in table {
        if !row[0].is_finite() || !row[1].is_finite() || row[0] < 0.0 {
            return Err(invalid(
                field,
                format!("{row:?}"),
                "every row needs a finite frequency >= 0 and a finite value",
            ));
        }
        if positive_values && row[1] <= 0.0 {
            return Err(invalid(
                field,
                format!("{row:?}"),
                "values must be above zero",
            ));
        }
    }
    if table.windows(2).any(|w| w[1][0] <= w[0][0]) {
        return Err(invalid(
            field,
            format!("{table:?}"),
            "frequencies must strictly increase from row to row",
        ));
    }
    Ok(())
}

fn check_finite(field: &'static str, value: f64) -> Result<(), ScenarioError> {
    if value.is_finite() {
        Ok(())
    } else {
        Err(invalid(field, value, "must be a finite number"))
    }
}

fn check_positive(field: &'static str, value: f64) -> Result<(), ScenarioError> {
    if value.is_finite() && value > 0.0 {
        Ok(())
    } else {
        Err(invalid(field, value, "must be a finite number above zero"))
    }
}

fn check_non_negative(field: &'static str, value: f64) -> Result<(), ScenarioError> {
    if value.is_finite() && value >= 0.0 {
        Ok(())
    } else {
        Err(invalid(
            field,
            value,
            "must be a finite number, zero or more",
        ))
    }
}

/// The longest simulated duration accepted (one hour), so that scaled waits stay representable.
pub const MAX_DURATION_S: f64 = 3600.0;

fn check_duration(field: &'static str, value: f64) -> Result<(), ScenarioError> {
    if value.is_finite() && (0.0..=MAX_DURATION_S).contains(&value) {
        Ok(())
    } else {
        Err(invalid(field, value, "must be between 0 and 3600 seconds"))
    }
}

impl Scenario {
    /// Reads and checks a scenario from TOML text.
    pub fn from_toml_str(text: &str) -> Result<Scenario, ScenarioError> {
        let scenario: Scenario =
            toml::from_str(text).map_err(|e| ScenarioError::Toml(e.to_string()))?;
        scenario.validate()?;
        Ok(scenario)
    }

    /// Reads and checks a scenario file.
    pub fn from_file(path: &Path) -> Result<Scenario, ScenarioError> {
        let text = std::fs::read_to_string(path).map_err(|source| ScenarioError::Read {
            path: path.display().to_string(),
            source,
        })?;
        Scenario::from_toml_str(&text)
    }

    /// The built-in scenario (`drivers/scenarios/default.toml`).
    pub fn builtin() -> Result<Scenario, ScenarioError> {
        Scenario::from_toml_str(DEFAULT_SCENARIO_TOML)
    }

    /// The amplified example scenario (`drivers/scenarios/amplified.toml`).
    pub fn amplified_example() -> Result<Scenario, ScenarioError> {
        Scenario::from_toml_str(AMPLIFIED_SCENARIO_TOML)
    }

    /// Checks every number the physics relies on.
    pub fn validate(&self) -> Result<(), ScenarioError> {
        let l = &self.laser;
        check_positive("laser.wavelength_nm", l.wavelength_nm)?;
        check_finite("laser.power_dbm", l.power_dbm)?;
        check_non_negative("laser.linewidth_hz", l.linewidth_hz)?;
        check_non_negative("laser.drift_step_hz", l.drift_step_hz)?;
        check_non_negative("laser.drift_limit_hz", l.drift_limit_hz)?;

        let m = &self.modulator;
        check_finite("modulator.insertion_loss_db", m.insertion_loss_db)?;
        check_finite("modulator.max_rf_input_dbm", m.max_rf_input_dbm)?;
        check_non_negative("modulator.residual_am_per_volt", m.residual_am_per_volt)?;
        check_finite("modulator.residual_am_phase_deg", m.residual_am_phase_deg)?;
        match &m.v_pi {
            VPiModel::Formula {
                low_frequency_volts,
                sqrt_coefficient,
                linear_coefficient,
            } => {
                check_positive("modulator.v_pi.low_frequency_volts", *low_frequency_volts)?;
                check_non_negative("modulator.v_pi.sqrt_coefficient", *sqrt_coefficient)?;
                check_non_negative("modulator.v_pi.linear_coefficient", *linear_coefficient)?;
            }
            VPiModel::Table { points } => check_table("modulator.v_pi.points", points, true)?,
        }

        check_table("drive_chain.loss_db", &self.drive_chain.loss_db, false)?;

        let s = &self.rf_source;
        check_non_negative("rf_source.min_frequency_hz", s.min_frequency_hz)?;
        check_positive("rf_source.max_frequency_hz", s.max_frequency_hz)?;
        if s.max_frequency_hz <= s.min_frequency_hz {
            return Err(invalid(
                "rf_source.max_frequency_hz",
                s.max_frequency_hz,
                "must be above rf_source.min_frequency_hz",
            ));
        }
        check_finite("rf_source.min_level_dbm", s.min_level_dbm)?;
        check_finite("rf_source.max_level_dbm", s.max_level_dbm)?;
        if s.max_level_dbm <= s.min_level_dbm {
            return Err(invalid(
                "rf_source.max_level_dbm",
                s.max_level_dbm,
                "must be above rf_source.min_level_dbm",
            ));
        }
        check_positive(
            "rf_source.frequency_resolution_hz",
            s.frequency_resolution_hz,
        )?;
        check_positive("rf_source.level_resolution_db", s.level_resolution_db)?;
        check_duration("rf_source.settling_time_s", s.settling_time_s)?;
        check_finite("rf_source.level_error_db", s.level_error_db)?;
        check_finite("rf_source.level_error_db_per_ghz", s.level_error_db_per_ghz)?;

        let a = &self.analyzer;
        check_positive("analyzer.min_frequency_hz", a.min_frequency_hz)?;
        check_positive("analyzer.max_frequency_hz", a.max_frequency_hz)?;
        if a.max_frequency_hz <= a.min_frequency_hz {
            return Err(invalid(
                "analyzer.max_frequency_hz",
                a.max_frequency_hz,
                "must be above analyzer.min_frequency_hz",
            ));
        }
        check_positive("analyzer.min_span_hz", a.min_span_hz)?;
        check_positive("analyzer.max_span_hz", a.max_span_hz)?;
        if a.max_span_hz < a.min_span_hz {
            return Err(invalid(
                "analyzer.max_span_hz",
                a.max_span_hz,
                "must not be below analyzer.min_span_hz",
            ));
        }
        if a.resolution_bandwidths_hz.is_empty()
            || a.resolution_bandwidths_hz
                .iter()
                .any(|b| !b.is_finite() || *b <= 0.0)
            || a.resolution_bandwidths_hz.windows(2).any(|w| w[1] <= w[0])
        {
            return Err(invalid(
                "analyzer.resolution_bandwidths_hz",
                format!("{:?}", a.resolution_bandwidths_hz),
                "give at least one bandwidth, each above zero, in ascending order",
            ));
        }
        if a.min_points < 3 || a.max_points < a.min_points || a.max_points > 1_000_001 {
            return Err(invalid(
                "analyzer.min_points/max_points",
                format!("{}..{}", a.min_points, a.max_points),
                "need 3 <= min_points <= max_points <= 1000001",
            ));
        }
        if !(-200.0..=30.0).contains(&a.noise_floor_dbm) {
            return Err(invalid(
                "analyzer.noise_floor_dbm",
                a.noise_floor_dbm,
                "must lie between -200 and +30 dBm",
            ));
        }
        check_non_negative("analyzer.display_noise_db", a.display_noise_db)?;
        check_duration("analyzer.sweep_time_s", a.sweep_time_s)?;
        check_finite("analyzer.frequency_offset_hz", a.frequency_offset_hz)?;
        if !(a.min_span_hz..=a.max_span_hz).contains(&a.default_span_hz) {
            return Err(invalid(
                "analyzer.default_span_hz",
                a.default_span_hz,
                "must lie between min_span_hz and max_span_hz",
            ));
        }
        check_positive(
            "analyzer.default_resolution_bandwidth_hz",
            a.default_resolution_bandwidth_hz,
        )?;
        if !(a.min_points..=a.max_points).contains(&a.default_points) {
            return Err(invalid(
                "analyzer.default_points",
                a.default_points,
                "must lie between min_points and max_points",
            ));
        }
        self.power_sensor.validate()?;
        let centre = self.laser_frequency().value();
        if !(a.min_frequency_hz..=a.max_frequency_hz).contains(&centre) {
            return Err(invalid(
                "laser.wavelength_nm",
                l.wavelength_nm,
                "the laser's frequency must lie within the analyzer's frequency range",
            ));
        }
        Ok(())
    }

    /// The laser's nominal optical frequency (c / wavelength).
    pub fn laser_frequency(&self) -> Hz {
        Nanometers(self.laser.wavelength_nm).to_frequency()
    }

    /// The true V_pi of the modulator at drive frequency `f`.
    pub fn v_pi_at(&self, f: Hz) -> VoltsPeak {
        match &self.modulator.v_pi {
            VPiModel::Formula {
                low_frequency_volts,
                sqrt_coefficient,
                linear_coefficient,
            } => {
                let ghz = f.ghz().max(0.0);
                VoltsPeak(
                    low_frequency_volts
                        * (1.0 + sqrt_coefficient * ghz.sqrt() + linear_coefficient * ghz),
                )
            }
            VPiModel::Table { points } => VoltsPeak(interpolate(points, f.value())),
        }
    }

    /// The true drive-chain loss at `f` (generator output to modulator input).
    pub fn chain_loss_at(&self, f: Hz) -> Db {
        Db(interpolate(&self.drive_chain.loss_db, f.value()))
    }

    /// The RF source's true level error at `f` (real output minus set level).
    pub fn level_error_at(&self, f: Hz) -> Db {
        Db(self.rf_source.level_error_db + self.rf_source.level_error_db_per_ghz * f.ghz())
    }

    /// The true level at the modulator for a generator set to `level` at `f`.
    pub fn level_at_modulator(&self, level: Dbm, f: Hz) -> Dbm {
        level + self.level_error_at(f) - self.chain_loss_at(f)
    }

    /// The true gain from the generator's set level to the level at the modulator's input at `f`
    /// (the generator's level error less the chain's loss): what a power-sensor calibration of
    /// the chain, made with this generator, should find.
    pub fn generator_to_modulator_gain_at(&self, f: Hz) -> Db {
        self.level_error_at(f) - self.chain_loss_at(f)
    }

    /// The true modulation index for a generator set to `level` at `f` with the output on:
    /// beta = pi V_pk / V_pi(f), V_pk from the level at the modulator into 50 ohm.
    pub fn modulation_index_at(&self, level: Dbm, f: Hz) -> f64 {
        let v_peak = super::physics::peak_voltage(self.level_at_modulator(level, f));
        super::physics::modulation_index(v_peak, self.v_pi_at(f))
    }

    /// The optical power reaching the analyzer (laser power minus insertion loss).
    pub fn optical_power_out(&self) -> Dbm {
        Dbm(self.laser.power_dbm) - Db(self.modulator.insertion_loss_db)
    }

    /// The RF source's ranges.
    pub fn source_limits(&self) -> SourceLimits {
        SourceLimits {
            min_frequency: Hz(self.rf_source.min_frequency_hz),
            max_frequency: Hz(self.rf_source.max_frequency_hz),
            min_level: Dbm(self.rf_source.min_level_dbm),
            max_level: Dbm(self.rf_source.max_level_dbm),
        }
    }

    /// The RF source's identity.
    pub fn source_identity(&self) -> Identity {
        let s = &self.rf_source;
        Identity {
            manufacturer: s.manufacturer.clone(),
            model: s.model.clone(),
            serial: s.serial.clone(),
            firmware: s.firmware.clone(),
        }
    }

    /// The analyzer's identity.
    pub fn analyzer_identity(&self) -> Identity {
        let a = &self.analyzer;
        Identity {
            manufacturer: a.manufacturer.clone(),
            model: a.model.clone(),
            serial: a.serial.clone(),
            firmware: a.firmware.clone(),
        }
    }

    /// The analyzer's sweep time.
    pub fn sweep_time(&self) -> Seconds {
        Seconds(self.analyzer.sweep_time_s)
    }
}
