//! The generic SCPI power sensor: [`PowerSensor`] for any RF power sensor or meter, adapted by a
//! [`SensorProfile`].
//!
//! At connect the driver sends the profile's `configure` (average power) and `set_unit` commands,
//! each checked against the error queue. [`PowerSensor::set_frequency`] is a configuration step
//! (send, read back, drain the error queue) refused before sending outside the profile's
//! frequency range, because a calibration factor outside the sensor's table is a guess.
//! [`PowerSensor::measure`] sends `measure`, waits up to `measure_timeout_ms`, drains the error
//! queue (so a reading the instrument flagged is not used) and checks the reply: the SCPI
//! overflow value 9.9E37 is an over-range reading, 9.91E37 (not a number) and anything that is not
//! a number are parse errors naming the reply, a reading above the profile's `max_power_dbm` is
//! refused as over range, and a linear reading of zero or less is below the sensor's noise.

use super::session::ScpiSession;
use crate::profile::{PowerUnit, SensorProfile};
use crate::scpi::response::parse_number;
use crate::scpi::ParseError;
use crate::{Identity, InstrumentError, PowerSensor, SensorLimits};
use async_trait::async_trait;
use halfwave_units::{Dbm, Hz};
use std::time::Duration;

/// A power sensor reached over SCPI.
#[derive(Debug)]
pub struct ScpiPowerSensor {
    session: ScpiSession,
    profile: SensorProfile,
}

/// Connects a generic power sensor from configuration: the resource string and an optional
/// profile file (the standard SCPI tree when `None`).
pub async fn connect_sensor(
    resource: &str,
    profile: Option<&std::path::Path>,
) -> Result<Box<dyn PowerSensor>, InstrumentError> {
    let profile =
        SensorProfile::from_optional_file(profile).map_err(|e| InstrumentError::BadProfile {
            resource: resource.to_string(),
            reason: e.to_string(),
        })?;
    Ok(Box::new(ScpiPowerSensor::connect(resource, profile).await?))
}

impl ScpiPowerSensor {
    /// Connects to `resource`, clears the status, runs `on_connect`, then `configure` and
    /// `set_unit`.
    pub async fn connect(
        resource: &str,
        profile: SensorProfile,
    ) -> Result<ScpiPowerSensor, InstrumentError> {
        let mut setup = profile.on_connect.clone();
        for command in [&profile.commands.configure, &profile.commands.set_unit] {
            if !command.trim().is_empty() {
                setup.push(command.clone());
            }
        }
        let session = ScpiSession::open(
            resource,
            profile.validate("(given to the power sensor driver)"),
            &profile.connection,
            &profile.common,
            &setup,
        )
        .await?;
        Ok(ScpiPowerSensor { session, profile })
    }

    /// The profile in use.
    pub fn profile(&self) -> &SensorProfile {
        &self.profile
    }

    /// Turns the reply to `measure` into a level, or says what is wrong with it.
    fn reading(&self, reply: &str) -> Result<Dbm, InstrumentError> {
        let query = &self.profile.commands.measure;
        let value = parse_number(reply).map_err(|e| self.session.parse_error(query, e))?;
        let limits = self.profile.sensor_limits();
        let over_range = |value: String| {
            self.session.out_of_range(
                "reading",
                value,
                limits.min_power.to_string(),
                format!(
                    "{} (the sensor is over its range: lower the source level; its damage level is {})",
                    limits.max_power, limits.damage_level
                ),
            )
        };
        if value == f64::INFINITY {
            return Err(over_range(
                "9.9E37 (the SCPI overflow value: over range)".into(),
            ));
        }
        if !value.is_finite() {
            return Err(self.session.parse_error(
                query,
                ParseError::new(format!(
                    "the reading {reply:?} is not a number (9.91E37 or minus infinity): the sensor had no valid reading; zero it and check its connection"
                )),
            ));
        }
        let dbm = match self.profile.commands.reading_unit {
            PowerUnit::Dbm => value,
            unit => {
                if value <= 0.0 {
                    return Err(self.session.parse_error(
                        query,
                        ParseError::new(format!(
                            "the reading {value} {unit:?} is not above zero: the power is below the sensor's noise; zero the sensor or raise the level"
                        )),
                    ));
                }
                let offset = if unit == PowerUnit::Watt { 30.0 } else { 0.0 };
                10.0 * value.log10() + offset
            }
        };
        // A dBm reading far outside any sensor's range is a misread unit, not a power.
        if !(-200.0..=100.0).contains(&dbm) {
            return Err(self.session.parse_error(
                query,
                ParseError::new(format!(
                    "the reading {reply:?} is {dbm} dBm, which no power sensor reports: check commands.reading_unit ({:?}) against the instrument's unit",
                    self.profile.commands.reading_unit
                )),
            ));
        }
        if dbm > limits.max_power.0 {
            return Err(over_range(format!("{} dBm", dbm)));
        }
        Ok(Dbm(dbm))
    }
}

#[async_trait]
impl PowerSensor for ScpiPowerSensor {
    fn resource(&self) -> &str {
        self.session.name()
    }

    async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        self.session.identify().await
    }

    fn limits(&self) -> SensorLimits {
        self.profile.sensor_limits()
    }

    fn reading_time_limit(&self) -> Duration {
        Duration::from_millis(self.profile.measure_timeout_ms)
    }

    async fn set_frequency(&mut self, frequency: Hz) -> Result<Hz, InstrumentError> {
        let l = self.limits();
        if !(frequency.is_finite() && frequency >= l.min_frequency && frequency <= l.max_frequency)
        {
            return Err(self.session.out_of_range(
                "calibration-factor frequency",
                frequency.to_string(),
                l.min_frequency.to_string(),
                l.max_frequency.to_string(),
            ));
        }
        let c = &self.profile.commands;
        let (set, query) = (c.set_frequency.clone(), c.query_frequency.clone());
        let actual = self.session.set_number(&set, &query, frequency.0).await?;
        if !actual.is_finite() || (actual - frequency.0).abs() > self.profile.read_back.frequency_hz
        {
            return Err(self.session.read_back_error(
                "calibration-factor frequency",
                frequency.to_string(),
                Hz(actual).to_string(),
            ));
        }
        Ok(Hz(actual))
    }

    async fn measure(&mut self) -> Result<Dbm, InstrumentError> {
        let query = self.profile.commands.measure.clone();
        let timeout = Duration::from_millis(self.profile.measure_timeout_ms);
        let reply = self.session.query_within(&query, timeout).await?;
        // An entry queued by the reading (over range, no sensor) makes the reading void.
        self.session.check_errors(&query).await?;
        self.reading(&reply)
    }
}
