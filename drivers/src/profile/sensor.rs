//! The command profile of an RF power sensor (or meter): how the generic sensor driver
//! ([`crate::generic::sensor`]) talks to one model.
//!
//! Same rules as the source's and the analyzer's profiles (see [`crate::profile`]): every key has
//! a default (the standard SCPI power-meter tree: `CONFigure`, `MEASure[:SCALar][:POWer][:AC]?`,
//! `[SENSe:]FREQuency` for the calibration factor, `UNIT:POWer`), unknown keys are refused and
//! [`SensorProfile::validate`] names the key to fix.

use super::{parse_toml, read_file, Checker, CommonCommands, ConnectionProfile, ProfileError};
use super::{PowerUnit, ProfileKind};
use crate::instrument::SensorLimits;
use halfwave_units::{Dbm, Hz};
use serde::{Deserialize, Serialize};
use std::path::Path;

/// Command strings of a power sensor.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SensorCommands {
    /// Sent once at connect (checked against the error queue): selects average-power
    /// measurement. Empty: not sent.
    pub configure: String,
    /// Sent once at connect: the unit of the readings, which must match `reading_unit`.
    /// Empty: not sent (the instrument's own unit must then be `reading_unit`).
    pub set_unit: String,
    /// Sets the frequency of the calibration factor; `{value}` in hertz.
    pub set_frequency: String,
    pub query_frequency: String,
    /// Takes one reading and returns it (waits up to `measure_timeout_ms`).
    pub measure: String,
    /// The unit of the reply to `measure`: `dbm` (default), `milliwatt` or `watt`.
    pub reading_unit: PowerUnit,
}

impl Default for SensorCommands {
    fn default() -> Self {
        SensorCommands {
            configure: "CONFigure:SCALar:POWer:AC".into(),
            set_unit: "UNIT:POWer DBM".into(),
            set_frequency: "SENSe:FREQuency {value}".into(),
            query_frequency: "SENSe:FREQuency?".into(),
            measure: "MEASure:SCALar:POWer:AC?".into(),
            reading_unit: PowerUnit::Dbm,
        }
    }
}

/// The sensor's ranges, from its data sheet. Requests and readings outside them are refused.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SensorLimitsProfile {
    pub min_frequency_hz: f64,
    pub max_frequency_hz: f64,
    pub min_power_dbm: f64,
    pub max_power_dbm: f64,
    pub damage_level_dbm: f64,
}

impl Default for SensorLimitsProfile {
    /// 10 MHz to 18 GHz, -60 to +20 dBm, damage at +23 dBm: a narrow common ground of
    /// average-power sensors (common practice; from memory). A profile should state its own.
    fn default() -> Self {
        SensorLimitsProfile {
            min_frequency_hz: 10e6,
            max_frequency_hz: 18e9,
            min_power_dbm: -60.0,
            max_power_dbm: 20.0,
            damage_level_dbm: 23.0,
        }
    }
}

/// How far a read-back may differ from the request.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SensorReadBack {
    pub frequency_hz: f64,
}

impl Default for SensorReadBack {
    fn default() -> Self {
        SensorReadBack { frequency_hz: 1.0 }
    }
}

/// Everything the generic power-sensor driver needs to know about one model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SensorProfile {
    /// Must be `power_sensor`.
    pub kind: ProfileKind,
    pub description: String,
    pub connection: ConnectionProfile,
    pub common: CommonCommands,
    pub commands: SensorCommands,
    pub limits: SensorLimitsProfile,
    pub read_back: SensorReadBack,
    /// Time limit for one reading (`commands.measure`), in milliseconds: averaging at low
    /// levels takes seconds.
    pub measure_timeout_ms: u64,
    /// Commands sent once after connecting (each followed by an error-queue check).
    pub on_connect: Vec<String>,
}

impl Default for SensorProfile {
    fn default() -> Self {
        SensorProfile {
            kind: ProfileKind::PowerSensor,
            description: "standard SCPI power sensor".into(),
            connection: ConnectionProfile::default(),
            common: CommonCommands::default(),
            commands: SensorCommands::default(),
            limits: SensorLimitsProfile::default(),
            read_back: SensorReadBack::default(),
            measure_timeout_ms: 10_000,
            on_connect: Vec::new(),
        }
    }
}

impl SensorProfile {
    /// The standard SCPI command set with default settings.
    pub fn standard() -> SensorProfile {
        SensorProfile::default()
    }

    /// Parses and validates a profile; `origin` names it in errors.
    pub fn from_toml_str(text: &str, origin: &str) -> Result<SensorProfile, ProfileError> {
        let profile: SensorProfile = parse_toml(text, origin)?;
        profile.validate(origin)?;
        Ok(profile)
    }

    /// Reads, parses and validates a profile file.
    pub fn from_file(path: &Path) -> Result<SensorProfile, ProfileError> {
        let text = read_file(path)?;
        SensorProfile::from_toml_str(&text, &path.display().to_string())
    }

    /// The profile in the file at `path`, or the standard SCPI tree when there is none.
    pub fn from_optional_file(path: Option<&Path>) -> Result<SensorProfile, ProfileError> {
        path.map_or_else(|| Ok(SensorProfile::standard()), SensorProfile::from_file)
    }

    /// Checks what serde cannot.
    pub fn validate(&self, origin: &str) -> Result<(), ProfileError> {
        let mut check = Checker { problem: None };
        check.require(
            "kind",
            self.kind == ProfileKind::PowerSensor,
            "must be \"power_sensor\" for a power sensor profile",
        );
        self.connection.validate(&mut check);
        self.common.validate(&mut check);
        let c = &self.commands;
        check.setter("commands.set_frequency", &c.set_frequency);
        check.non_empty("commands.query_frequency", &c.query_frequency);
        check.non_empty("commands.measure", &c.measure);
        let l = &self.limits;
        let finite = [
            l.min_frequency_hz,
            l.max_frequency_hz,
            l.min_power_dbm,
            l.max_power_dbm,
            l.damage_level_dbm,
        ]
        .iter()
        .all(|v| v.is_finite());
        check.require("limits", finite, "every limit must be a finite number");
        check.require(
            "limits.min_frequency_hz",
            l.min_frequency_hz > 0.0 && l.min_frequency_hz < l.max_frequency_hz,
            "must be above 0 and below limits.max_frequency_hz",
        );
        check.require(
            "limits.min_power_dbm",
            l.min_power_dbm < l.max_power_dbm,
            "must be below limits.max_power_dbm",
        );
        check.require(
            "limits.damage_level_dbm",
            l.damage_level_dbm >= l.max_power_dbm,
            "must not be below limits.max_power_dbm (a sensor is not damaged inside its range)",
        );
        check.require(
            "read_back.frequency_hz",
            self.read_back.frequency_hz >= 0.0,
            "must be 0 or more",
        );
        check.require(
            "measure_timeout_ms",
            self.measure_timeout_ms > 0,
            "must be more than 0",
        );
        check.finish(origin)
    }

    /// The limits as the trait reports them.
    pub fn sensor_limits(&self) -> SensorLimits {
        let l = &self.limits;
        SensorLimits {
            min_frequency: Hz(l.min_frequency_hz),
            max_frequency: Hz(l.max_frequency_hz),
            min_power: Dbm(l.min_power_dbm),
            max_power: Dbm(l.max_power_dbm),
            damage_level: Dbm(l.damage_level_dbm),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_empty_sensor_profile_is_the_standard_tree() {
        let p = SensorProfile::from_toml_str("kind = \"power_sensor\"", "inline").unwrap();
        assert_eq!(p, SensorProfile::standard());
        assert_eq!(p.commands.measure, "MEASure:SCALar:POWer:AC?");
        assert_eq!(p.sensor_limits().damage_level, Dbm(23.0));
    }

    #[test]
    fn sensor_profile_mistakes_name_the_key() {
        let cases = [
            ("kind = \"rf_source\"", "kind"),
            (
                "kind = \"power_sensor\"\n[commands]\nset_frequency = \"FREQ\"",
                "commands.set_frequency",
            ),
            (
                "kind = \"power_sensor\"\n[limits]\nmax_power_dbm = 30.0",
                "limits.damage_level_dbm",
            ),
            (
                "kind = \"power_sensor\"\n[commands]\nmeasure = \" \"",
                "commands.measure",
            ),
        ];
        for (text, key) in cases {
            match SensorProfile::from_toml_str(text, "inline") {
                Err(ProfileError::Invalid { key: k, .. }) => assert_eq!(k, key, "{text}"),
                other => panic!("{text}: expected an invalid-key error, got {other:?}"),
            }
        }
        let err = SensorProfile::from_toml_str(
            "kind = \"power_sensor\"\n[commands]\nreading_unit = \"volt\"",
            "inline",
        )
        .unwrap_err();
        assert!(err.to_string().contains("volt"), "{err}");
    }
}
