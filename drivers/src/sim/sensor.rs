//! The simulated RF power sensor: what it is made of (the scenario's optional `[power_sensor]`
//! table), what it reads, and its in-process handle.
//!
//! It sits where the modulator's RF input is, at the end of the drive chain, as it does when a
//! lab calibrates the chain. Its physics, written apart from the analysis that reads it:
//! - the chain delivers P0 into a matched (50 ohm) load: the scenario's true level at the
//!   modulator, `Scenario::level_at_modulator`;
//! - into the sensor, with the chain's output reflection Gamma_s and the sensor's Gamma_l, the
//!   power its element absorbs is P0 K(f) / |1 - Gamma_s Gamma_l|^2, where K(f) is the sensor's
//!   calibration factor (efficiency times 1 - |Gamma_l|^2, the usual definition; common
//!   practice). The phase of Gamma_s Gamma_l turns with frequency through `mismatch_delay_s`.
//! - the sensor divides by its table's K at the frequency it was told (`SENSe:FREQuency`), so a
//!   reading at the right frequency is P0 / |1 - Gamma_s Gamma_l|^2, and at a wrong one it is off
//!   by K(f) / K(f_told);
//! - its own calibration is off by `calibration_error_percent`, and every reading carries
//!   Gaussian noise of `reading_noise_db` plus an additive floor (`noise_floor_dbm`).
//!
//! Over its range it answers 9.9E37 and queues -222; above its damage level it records a damage
//! event (truth for tests, like the modulator's overdrive).

use super::bench::SimBench;
use super::scenario::{interpolate, ScenarioError};
use super::state::BenchState;
use crate::instrument::{Identity, InstrumentError, PowerSensor, SensorLimits};
use crate::sim::scpi_parser::ScpiError;
use async_trait::async_trait;
use halfwave_units::{Dbm, Hz, Seconds};
use rand::Rng;
use rand_distr::StandardNormal;
use serde::Deserialize;

/// The SCPI overflow value a sensor answers over its range (SCPI-1999 Vol 1, 7.2.1.5; from
/// memory).
pub const OVER_RANGE_REPLY: f64 = 9.9e37;

/// The power sensor of a scenario. Every key has the built-in default's value when the table or
/// the key is left out, so scenarios written before the sensor existed still load.
#[derive(Debug, Clone, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct PowerSensorSpec {
    pub manufacturer: String,
    pub model: String,
    pub serial: String,
    pub firmware: String,
    pub min_frequency_hz: f64,
    pub max_frequency_hz: f64,
    /// Range of average power it measures.
    pub min_power_dbm: f64,
    pub max_power_dbm: f64,
    /// Above this the sensor is damaged (a damage event is recorded).
    pub damage_level_dbm: f64,
    /// Standard deviation of one reading, dB.
    pub reading_noise_db: f64,
    /// Standard deviation of the additive noise of a reading, as a level.
    pub noise_floor_dbm: f64,
    /// Time from the measure query until the reply.
    pub measurement_time_s: f64,
    /// `[frequency_hz, percent]` rows: the calibration factor K(f), interpolated linearly and
    /// held beyond the ends.
    pub calibration_factor_percent: Vec<[f64; 2]>,
    /// The sensor's own calibration error: every reading is high by this many percent.
    pub calibration_error_percent: f64,
    /// |Gamma_l| of the sensor's input.
    pub reflection_magnitude: f64,
    /// |Gamma_s| of the drive chain's output, as the sensor sees it.
    pub source_reflection_magnitude: f64,
    /// Round-trip delay between the two reflections: the phase of Gamma_s Gamma_l is
    /// -2 pi f x this.
    pub mismatch_delay_s: f64,
}

impl Default for PowerSensorSpec {
    fn default() -> Self {
        PowerSensorSpec {
            manufacturer: "Halfwave Simulations".into(),
            model: "SIM-PS-1".into(),
            serial: "EG-PS-0519".into(),
            firmware: "0.9.3".into(),
            min_frequency_hz: 10e6,
            max_frequency_hz: 40e9,
            min_power_dbm: -60.0,
            max_power_dbm: 20.0,
            damage_level_dbm: 25.0,
            reading_noise_db: 0.01,
            noise_floor_dbm: -70.0,
            measurement_time_s: 0.05,
            calibration_factor_percent: vec![
                [10e6, 99.0],
                [1e9, 98.2],
                [10e9, 95.1],
                [18e9, 91.4],
                [26e9, 89.0],
                [40e9, 84.5],
            ],
            calibration_error_percent: 0.8,
            reflection_magnitude: 0.05,
            source_reflection_magnitude: 0.1,
            mismatch_delay_s: 1.7e-9,
        }
    }
}

fn invalid(field: &'static str, value: impl ToString, rule: &'static str) -> ScenarioError {
    ScenarioError::Invalid {
        field,
        value: value.to_string(),
        rule,
    }
}

impl PowerSensorSpec {
    /// Checks every number the reading relies on; errors name the key.
    pub fn validate(&self) -> Result<(), ScenarioError> {
        let finite = [
            ("power_sensor.min_power_dbm", self.min_power_dbm),
            ("power_sensor.max_power_dbm", self.max_power_dbm),
            ("power_sensor.damage_level_dbm", self.damage_level_dbm),
            ("power_sensor.noise_floor_dbm", self.noise_floor_dbm),
            (
                "power_sensor.calibration_error_percent",
                self.calibration_error_percent,
            ),
            ("power_sensor.mismatch_delay_s", self.mismatch_delay_s),
        ];
        for (field, value) in finite {
            if !value.is_finite() {
                return Err(invalid(field, value, "must be a finite number"));
            }
        }
        if !(self.min_frequency_hz > 0.0 && self.min_frequency_hz < self.max_frequency_hz) {
            return Err(invalid(
                "power_sensor.min_frequency_hz",
                self.min_frequency_hz,
                "must be above 0 and below power_sensor.max_frequency_hz",
            ));
        }
        if self.min_power_dbm >= self.max_power_dbm || self.damage_level_dbm < self.max_power_dbm {
            return Err(invalid(
                "power_sensor.max_power_dbm",
                self.max_power_dbm,
                "must lie above min_power_dbm and not above damage_level_dbm",
            ));
        }
        if !(self.reading_noise_db.is_finite() && self.reading_noise_db >= 0.0) {
            return Err(invalid(
                "power_sensor.reading_noise_db",
                self.reading_noise_db,
                "must be a finite number, zero or more",
            ));
        }
        if !(self.measurement_time_s.is_finite()
            && (0.0..=super::scenario::MAX_DURATION_S).contains(&self.measurement_time_s))
        {
            return Err(invalid(
                "power_sensor.measurement_time_s",
                self.measurement_time_s,
                "must be between 0 and 3600 seconds",
            ));
        }
        for (field, value) in [
            (
                "power_sensor.reflection_magnitude",
                self.reflection_magnitude,
            ),
            (
                "power_sensor.source_reflection_magnitude",
                self.source_reflection_magnitude,
            ),
        ] {
            if !(value.is_finite() && (0.0..1.0).contains(&value)) {
                return Err(invalid(
                    field,
                    value,
                    "must be from 0 up to (not including) 1",
                ));
            }
        }
        let table = &self.calibration_factor_percent;
        if table.is_empty()
            || table
                .iter()
                .any(|r| !(r[0].is_finite() && r[0] >= 0.0 && r[1] > 0.0 && r[1] <= 100.0))
            || table.windows(2).any(|w| w[1][0] <= w[0][0])
        {
            return Err(invalid(
                "power_sensor.calibration_factor_percent",
                format!("{table:?}"),
                "give [frequency_hz, percent] rows with increasing frequencies and factors above 0 and at most 100",
            ));
        }
        Ok(())
    }

    /// The calibration factor K(f) as a fraction.
    pub fn calibration_factor_at(&self, f: Hz) -> f64 {
        interpolate(&self.calibration_factor_percent, f.value()) / 100.0
    }

    /// The mismatch factor 1 / |1 - Gamma_s Gamma_l|^2 at `f`: what a reading corrected at the
    /// right frequency shows over the power the chain delivers into a matched load.
    pub fn mismatch_factor_at(&self, f: Hz) -> f64 {
        let product = self.source_reflection_magnitude * self.reflection_magnitude;
        let phase = -2.0 * std::f64::consts::PI * f.value() * self.mismatch_delay_s;
        let (re, im) = (1.0 - product * phase.cos(), -product * phase.sin());
        1.0 / (re * re + im * im)
    }

    /// The sensor's ranges.
    pub fn limits(&self) -> SensorLimits {
        SensorLimits {
            min_frequency: Hz(self.min_frequency_hz),
            max_frequency: Hz(self.max_frequency_hz),
            min_power: Dbm(self.min_power_dbm),
            max_power: Dbm(self.max_power_dbm),
            damage_level: Dbm(self.damage_level_dbm),
        }
    }

    /// The sensor's identity.
    pub fn identity(&self) -> Identity {
        Identity {
            manufacturer: self.manufacturer.clone(),
            model: self.model.clone(),
            serial: self.serial.clone(),
            firmware: self.firmware.clone(),
        }
    }
}

/// A reading the sensor takes now.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Reading {
    /// The corrected average power.
    Power(Dbm),
    /// Over the measuring range (the reply is [`OVER_RANGE_REPLY`] with -222 queued).
    OverRange,
}

impl BenchState {
    /// `*RST` of the sensor: calibration factor at 50 MHz (the usual reference frequency; common
    /// practice), readings in dBm.
    pub fn reset_sensor(&mut self) {
        self.sensor.frequency = Hz(50e6);
        self.sensor.unit_dbm = true;
    }

    /// Sets the calibration-factor frequency; -222 outside the sensor's range.
    pub fn set_sensor_frequency(&mut self, hz: f64) -> Result<Hz, ScpiError> {
        let spec = &self.scenario.power_sensor;
        if !(spec.min_frequency_hz..=spec.max_frequency_hz).contains(&hz) {
            return Err(ScpiError::new(
                crate::sim::scpi_parser::codes::DATA_OUT_OF_RANGE,
                format!(
                    "frequency {hz} Hz outside {} to {} Hz",
                    spec.min_frequency_hz, spec.max_frequency_hz
                ),
            ));
        }
        self.sensor.frequency = Hz(hz);
        Ok(self.sensor.frequency)
    }

    /// The true power at the sensor now, before its correction (with mismatch), as a level; None
    /// with the RF output off.
    pub fn power_at_sensor(&self) -> Option<Dbm> {
        if !self.source.output_on {
            return None;
        }
        let f = self.source.frequency;
        let delivered = self.level_at_modulator().to_milliwatts()
            * self.scenario.power_sensor.mismatch_factor_at(f);
        Some(Dbm(10.0 * delivered.log10()))
    }

    /// Takes one reading: marks the sensor busy for its measurement time, records damage.
    pub fn take_sensor_reading(&mut self) -> Reading {
        let spec = self.scenario.power_sensor.clone();
        self.sensor
            .status
            .busy_for(spec.measurement_time_s, self.time_factor);
        let f = self.source.frequency;
        let signal_mw = match self.power_at_sensor() {
            Some(level) => {
                if level.0 > spec.damage_level_dbm {
                    tracing::warn!(%level, frequency = %f, "simulated power sensor damaged");
                    self.sensor.damage_events.push((f, level));
                }
                if level.0 > spec.max_power_dbm {
                    return Reading::OverRange;
                }
                // The element sees K(f) of it; the sensor divides by its table's K where told.
                level.to_milliwatts() * spec.calibration_factor_at(f)
                    / spec.calibration_factor_at(self.sensor.frequency)
                    * (1.0 + spec.calibration_error_percent / 100.0)
            }
            None => 0.0,
        };
        let gain_noise: f64 = self.rng.sample::<f64, _>(StandardNormal) * spec.reading_noise_db;
        let floor_noise: f64 =
            self.rng.sample::<f64, _>(StandardNormal) * Dbm(spec.noise_floor_dbm).to_milliwatts();
        let reading_mw = signal_mw * 10f64.powf(gain_noise / 10.0) + floor_noise;
        // A meter shows a reading under its noise as its floor, never a negative power.
        let floor = Dbm(spec.noise_floor_dbm).to_milliwatts();
        Reading::Power(Dbm(10.0 * reading_mw.max(floor).log10()))
    }
}

/// The simulated power sensor, in-process. Obtain with [`SimBench::power_sensor`].
#[derive(Debug, Clone)]
pub struct SimPowerSensor {
    bench: SimBench,
    resource: String,
}

impl SimPowerSensor {
    pub(crate) fn new(bench: SimBench) -> SimPowerSensor {
        SimPowerSensor {
            bench,
            resource: "sim://power-sensor".to_string(),
        }
    }
}

#[async_trait]
impl PowerSensor for SimPowerSensor {
    fn resource(&self) -> &str {
        &self.resource
    }

    async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        self.bench.lock().sensor.status.log.push("*IDN?".into());
        Ok(self.bench.scenario().power_sensor.identity())
    }

    fn limits(&self) -> SensorLimits {
        self.bench.scenario().power_sensor.limits()
    }

    async fn set_frequency(&mut self, frequency: Hz) -> Result<Hz, InstrumentError> {
        let limits = self.limits();
        if !(limits.min_frequency..=limits.max_frequency).contains(&frequency) {
            return Err(InstrumentError::OutOfRange {
                resource: self.resource.clone(),
                what: "calibration-factor frequency".into(),
                value: frequency.to_string(),
                min: limits.min_frequency.to_string(),
                max: limits.max_frequency.to_string(),
            });
        }
        let mut state = self.bench.lock();
        state
            .sensor
            .status
            .log
            .push(format!("SENS:FREQ {}", frequency.value()));
        state
            .set_sensor_frequency(frequency.value())
            .map_err(|e| InstrumentError::Scpi {
                resource: self.resource.clone(),
                operation: "SENS:FREQ".into(),
                code: e.code,
                message: e.detail.unwrap_or_default(),
                detail: String::new(),
            })
    }

    async fn measure(&mut self) -> Result<Dbm, InstrumentError> {
        let (reading, wait) = {
            let mut state = self.bench.lock();
            state.sensor.status.log.push("MEAS?".into());
            let reading = state.take_sensor_reading();
            let wait = Seconds(state.scenario.power_sensor.measurement_time_s * state.time_factor)
                .to_duration();
            (reading, wait)
        };
        if !wait.is_zero() {
            tokio::time::sleep(wait).await;
        }
        match reading {
            Reading::Power(level) => Ok(level),
            Reading::OverRange => {
                let l = self.limits();
                Err(InstrumentError::OutOfRange {
                    resource: self.resource.clone(),
                    what: "reading".into(),
                    value: "over range".into(),
                    min: l.min_power.to_string(),
                    max: l.max_power.to_string(),
                })
            }
        }
    }
}
