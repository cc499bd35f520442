//! [`SimBench`]: the handle to one simulated bench, cheap to clone and shared by every way in.
//!
//! Tests hold a `SimBench` to read the truth (the scenario's V_pi, the overdrive flag, the
//! laser's real frequency, what each instrument was told) while the code under test talks to the
//! instruments in-process or over TCP.

use super::in_process::{SimAnalyzer, SimRfSource};
use super::scenario::Scenario;
use super::sensor::SimPowerSensor;
use super::state::{BenchState, OverdriveEvent};
use crate::sim::scpi_parser::ScpiError;
use halfwave_units::{Dbm, Hz, VoltsPeak};
use rand::SeedableRng;
use std::sync::{Arc, Mutex, MutexGuard};

/// The largest time factor (a sweep of an hour would then take 1000 hours, still representable).
pub const MAX_TIME_FACTOR: f64 = 1000.0;

/// Which instrument of the bench.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Role {
    RfSource,
    Analyzer,
    PowerSensor,
}

impl Role {
    /// A short name for logs and resource strings.
    pub fn name(self) -> &'static str {
        match self {
            Role::RfSource => "rf-source",
            Role::Analyzer => "analyzer",
            Role::PowerSensor => "power-sensor",
        }
    }
}

/// One simulated bench (see the module docs of [`crate::sim`]).
#[derive(Clone)]
pub struct SimBench {
    scenario: Arc<Scenario>,
    state: Arc<Mutex<BenchState>>,
}

/// Short on purpose: the state holds whole traces, which have no place in a log line.
impl std::fmt::Debug for SimBench {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SimBench")
            .field("scenario", &self.scenario.name)
            .finish_non_exhaustive()
    }
}

impl SimBench {
    /// A bench from a checked scenario and a seed, with real-time durations (time factor 1).
    pub fn new(scenario: Scenario, seed: u64) -> SimBench {
        let scenario = Arc::new(scenario);
        let state = BenchState::new(
            scenario.clone(),
            rand::rngs::StdRng::seed_from_u64(seed),
            1.0,
        );
        SimBench {
            scenario,
            state: Arc::new(Mutex::new(state)),
        }
    }

    /// The same bench with durations scaled by `factor` (0 = instant; negative or NaN count as 0).
    pub fn with_time_factor(self, factor: f64) -> SimBench {
        self.set_time_factor(factor);
        self
    }

    /// Scales the simulated durations (0 = instant). Values above [`MAX_TIME_FACTOR`] are capped;
    /// negative or NaN values count as 0.
    pub fn set_time_factor(&self, factor: f64) {
        let factor = if factor.is_finite() && factor > 0.0 {
            factor.min(MAX_TIME_FACTOR)
        } else {
            0.0
        };
        self.lock().time_factor = factor;
    }

    /// The current time factor.
    pub fn time_factor(&self) -> f64 {
        self.lock().time_factor
    }

    /// Locks the state. A panic elsewhere while holding the lock leaves the data usable (plain
    /// numbers), so a poisoned lock is taken over rather than propagated.
    pub(crate) fn lock(&self) -> MutexGuard<'_, BenchState> {
        self.state.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// The scenario this bench runs.
    pub fn scenario(&self) -> &Scenario {
        &self.scenario
    }

    /// An in-process handle to the RF source (implements [`crate::RfSource`]).
    pub fn rf_source(&self) -> SimRfSource {
        SimRfSource::new(self.clone())
    }

    /// An in-process handle to the analyzer (implements [`crate::SpectrumAnalyzer`]).
    pub fn analyzer(&self) -> SimAnalyzer {
        SimAnalyzer::new(self.clone())
    }

    /// An in-process handle to the power sensor (implements [`crate::PowerSensor`]).
    pub fn power_sensor(&self) -> SimPowerSensor {
        SimPowerSensor::new(self.clone())
    }

    /// Truth: every time the power sensor saw more than its damage level (frequency, level).
    pub fn sensor_damage_events(&self) -> Vec<(Hz, Dbm)> {
        self.lock().sensor.damage_events.clone()
    }

    /// Truth: the frequency whose calibration factor the sensor applies now.
    pub fn sensor_frequency(&self) -> Hz {
        self.lock().sensor.frequency
    }

    /// Truth: V_pi of the modulator at `f` (same as `scenario().v_pi_at(f)`).
    pub fn v_pi_at(&self, f: Hz) -> VoltsPeak {
        self.scenario.v_pi_at(f)
    }

    /// Truth: true once the modulator's RF input limit has been exceeded (never cleared).
    pub fn overdriven(&self) -> bool {
        !self.lock().overdrive_events.is_empty()
    }

    /// Truth: every time the modulator's RF input limit was exceeded.
    pub fn overdrive_events(&self) -> Vec<OverdriveEvent> {
        self.lock().overdrive_events.clone()
    }

    /// Connects or "unplugs" the fibre from the modulator to the analyzer. Unplugged, the analyzer
    /// shows only its noise floor, as a real one does when the light is lost.
    pub fn set_fibre_connected(&self, connected: bool) {
        self.lock().fibre_connected = connected;
    }

    /// Truth: whether the RF output is on now.
    pub fn rf_output_on(&self) -> bool {
        self.lock().source.output_on
    }

    /// Truth: the source's frequency and set level now.
    pub fn rf_setting(&self) -> (Hz, Dbm) {
        let state = self.lock();
        (state.source.frequency, state.source.level)
    }

    /// Truth: the level at the modulator's input now (as if the output were on).
    pub fn level_at_modulator(&self) -> Dbm {
        self.lock().level_at_modulator()
    }

    /// Truth: the modulation index now (0 with the output off).
    pub fn modulation_index(&self) -> f64 {
        self.lock().modulation_index()
    }

    /// Truth: the laser's optical frequency now, drift included.
    pub fn laser_frequency(&self) -> Hz {
        self.lock().laser_frequency()
    }

    /// Every command an instrument received, in order, as SCPI text. In-process calls are logged
    /// as the equivalent SCPI command; the TCP server logs each message unit as received.
    pub fn command_log(&self, role: Role) -> Vec<String> {
        let state = self.lock();
        match role {
            Role::RfSource => state.source.status.log.clone(),
            Role::Analyzer => state.analyzer.status.log.clone(),
            Role::PowerSensor => state.sensor.status.log.clone(),
        }
    }

    /// How long an instrument has been busy settling or sweeping so far, added up over every
    /// operation (scaled by the time factor).
    pub fn busy_time(&self, role: Role) -> std::time::Duration {
        let state = self.lock();
        match role {
            Role::RfSource => state.source.status.busy_total,
            Role::Analyzer => state.analyzer.status.busy_total,
            Role::PowerSensor => state.sensor.status.busy_total,
        }
    }

    /// Empties an instrument's command log.
    pub fn clear_command_log(&self, role: Role) {
        let mut state = self.lock();
        match role {
            Role::RfSource => state.source.status.log.clear(),
            Role::Analyzer => state.analyzer.status.log.clear(),
            Role::PowerSensor => state.sensor.status.log.clear(),
        }
    }

    /// Puts an error into an instrument's error queue, as if the instrument had raised it.
    pub fn push_error(&self, role: Role, error: ScpiError) {
        let mut state = self.lock();
        match role {
            Role::RfSource => state.source.status.push_error(error),
            Role::Analyzer => state.analyzer.status.push_error(error),
            Role::PowerSensor => state.sensor.status.push_error(error),
        }
    }
}
