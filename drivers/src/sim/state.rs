//! The state of the simulated bench and the operations on it, shared by every way in.
//!
//! The in-process handles ([`super::SimRfSource`], [`super::SimAnalyzer`]) and the SCPI server
//! both change the bench through the methods here, so a setting means the same thing whichever
//! way it arrives: the same range checks (SCPI -222 when out of range), the same rounding, the
//! same overdrive watch on the modulator, the same command log. The state sits behind one
//! `Mutex` in [`super::SimBench`]; no method here waits or sleeps, so the lock is held for
//! microseconds (a sweep renders in well under a millisecond).

use super::physics::{self, OpticalLine, Rendering};
use super::scenario::Scenario;
use crate::scpi::block::{ByteOrder, DataFormat};
use crate::sim::scpi_parser::{codes, ErrorQueue, ScpiError};
use halfwave_units::{Dbm, Hz};
use rand::rngs::StdRng;
use rand::Rng;
use rand_distr::StandardNormal;
use std::sync::Arc;
use tokio::time::Instant;

/// How many entries an instrument's error queue holds (including the overflow marker).
pub const ERROR_QUEUE_CAPACITY: usize = 16;

/// The modulator's RF input went above its damage threshold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OverdriveEvent {
    /// Drive frequency at the time.
    pub frequency: Hz,
    /// The true level at the modulator's input.
    pub level_at_modulator: Dbm,
    /// The threshold from the scenario.
    pub limit: Dbm,
}

/// IEEE 488.2 status of one instrument: error queue, event status register, command log.
#[derive(Debug, Clone)]
pub struct InstrumentStatus {
    pub errors: ErrorQueue,
    /// Standard event status register (IEEE 488.2, 11.5.1).
    pub event_status: u8,
    /// Every command received, as text, in order.
    pub log: Vec<String>,
    /// When the operation in progress (settling, sweep) completes.
    pub busy_until: Option<Instant>,
    /// Every settling and sweep time so far, added up (scaled by the time factor): what a run
    /// cannot go faster than, the reference of the wall-time benchmark.
    pub busy_total: std::time::Duration,
}

impl InstrumentStatus {
    fn new() -> InstrumentStatus {
        InstrumentStatus {
            errors: ErrorQueue::new(ERROR_QUEUE_CAPACITY),
            event_status: 0,
            log: Vec::new(),
            busy_until: None,
            busy_total: std::time::Duration::ZERO,
        }
    }

    /// Queues an error and sets its event status bit: command error (bit 5) for -1xx, execution
    /// error (bit 4) for -2xx, device-dependent (bit 3) for -3xx, query error (bit 2) for -4xx
    /// (IEEE 488.2, 11.5.1.1; from memory).
    pub fn push_error(&mut self, error: ScpiError) {
        self.event_status |= match error.code {
            -199..=-100 => 1 << 5,
            -299..=-200 => 1 << 4,
            -399..=-300 => 1 << 3,
            -499..=-400 => 1 << 2,
            _ => 1 << 3,
        };
        self.errors.push(error);
    }

    /// Marks the instrument busy for `seconds` of simulated time from now.
    pub(crate) fn busy_for(&mut self, seconds: f64, time_factor: f64) {
        let wait = halfwave_units::Seconds(seconds * time_factor).to_duration();
        let until = Instant::now() + wait;
        self.busy_total += wait;
        self.busy_until = Some(self.busy_until.map_or(until, |b| b.max(until)));
    }
}

/// The RF source's settings.
#[derive(Debug, Clone)]
pub struct SourceState {
    pub frequency: Hz,
    pub level: Dbm,
    pub output_on: bool,
    pub status: InstrumentStatus,
}

/// One completed sweep: the displayed axis and the powers.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepData {
    pub start: Hz,
    pub stop: Hz,
    pub resolution_bandwidth: Hz,
    pub power_dbm: Vec<f64>,
}

impl SweepData {
    /// The frequency of each point (linear from start to stop).
    pub fn frequencies_hz(&self) -> Vec<f64> {
        let n = self.power_dbm.len();
        let step = if n > 1 {
            (self.stop - self.start).value() / (n - 1) as f64
        } else {
            0.0
        };
        (0..n)
            .map(|i| self.start.value() + step * i as f64)
            .collect()
    }
}

/// The analyzer's settings and its last sweep.
#[derive(Debug, Clone)]
pub struct AnalyzerState {
    pub center: Hz,
    pub span: Hz,
    pub resolution_bandwidth: Hz,
    pub points: usize,
    pub continuous: bool,
    pub format: DataFormat,
    pub byte_order: ByteOrder,
    pub last_sweep: Option<SweepData>,
    pub status: InstrumentStatus,
}

/// The power sensor's settings.
#[derive(Debug, Clone)]
pub struct SensorState {
    /// The frequency whose calibration factor corrects the readings.
    pub frequency: Hz,
    /// Readings in dBm (else watts).
    pub unit_dbm: bool,
    /// Every time the sensor saw more than its damage level: frequency and level.
    pub damage_events: Vec<(Hz, Dbm)>,
    pub status: InstrumentStatus,
}

/// Everything that changes while the bench runs.
#[derive(Debug)]
pub struct BenchState {
    pub scenario: Arc<Scenario>,
    pub rng: StdRng,
    /// Simulated time runs this many times slower than the scenario's durations (0 = instant).
    pub time_factor: f64,
    /// How far the laser has drifted from its nominal frequency.
    pub laser_drift: Hz,
    pub source: SourceState,
    pub analyzer: AnalyzerState,
    pub sensor: SensorState,
    pub overdrive_events: Vec<OverdriveEvent>,
    /// False while the fibre from the modulator to the analyzer is "unplugged": no light arrives,
    /// the analyzer sees its noise floor (a fault for testing what the engine does then).
    pub fibre_connected: bool,
}

fn out_of_range(what: &str, value: f64, unit: &str, min: f64, max: f64) -> ScpiError {
    ScpiError::new(
        codes::DATA_OUT_OF_RANGE,
        format!("{what} {value} {unit} outside {min} to {max} {unit}"),
    )
}

impl BenchState {
    /// A bench in its reset state.
    pub fn new(scenario: Arc<Scenario>, rng: StdRng, time_factor: f64) -> BenchState {
        let source = SourceState {
            frequency: Hz(0.0),
            level: Dbm(0.0),
            output_on: false,
            status: InstrumentStatus::new(),
        };
        let analyzer = AnalyzerState {
            center: Hz(0.0),
            span: Hz(0.0),
            resolution_bandwidth: Hz(0.0),
            points: 0,
            continuous: true,
            format: DataFormat::Ascii,
            byte_order: ByteOrder::Normal,
            last_sweep: None,
            status: InstrumentStatus::new(),
        };
        let sensor = SensorState {
            frequency: Hz(0.0),
            unit_dbm: true,
            damage_events: Vec::new(),
            status: InstrumentStatus::new(),
        };
        let mut state = BenchState {
            scenario,
            rng,
            time_factor,
            laser_drift: Hz(0.0),
            source,
            analyzer,
            sensor,
            overdrive_events: Vec::new(),
            fibre_connected: true,
        };
        state.reset_source();
        state.reset_analyzer();
        state.reset_sensor();
        state
    }

    /// `*RST` of the RF source: output off, 1 GHz (or the nearest allowed), the lowest of
    /// -20 dBm and the maximum level.
    pub fn reset_source(&mut self) {
        let spec = &self.scenario.rf_source;
        self.source.output_on = false;
        self.source.frequency = Hz(1e9_f64.clamp(spec.min_frequency_hz, spec.max_frequency_hz));
        self.source.level = Dbm((-20.0_f64).clamp(spec.min_level_dbm, spec.max_level_dbm));
    }

    /// `*RST` of the analyzer: centred on the laser's nominal frequency, default span, RBW and
    /// points, continuous sweep, ASCII data, normal byte order.
    pub fn reset_analyzer(&mut self) {
        let spec = &self.scenario.analyzer;
        self.analyzer.center = self.scenario.laser_frequency();
        self.analyzer.span = Hz(spec.default_span_hz);
        self.analyzer.resolution_bandwidth = self.nearest_rbw(spec.default_resolution_bandwidth_hz);
        self.analyzer.points = spec.default_points;
        self.analyzer.continuous = true;
        self.analyzer.format = DataFormat::Ascii;
        self.analyzer.byte_order = ByteOrder::Normal;
    }

    fn nearest_rbw(&self, requested: f64) -> Hz {
        let offered = &self.scenario.analyzer.resolution_bandwidths_hz;
        let best = offered.iter().copied().min_by(|a, b| {
            let da = (a.ln() - requested.ln()).abs();
            let db = (b.ln() - requested.ln()).abs();
            da.total_cmp(&db)
        });
        Hz(best.unwrap_or(requested))
    }

    /// The true level at the modulator now (only meaningful while the output is on).
    pub fn level_at_modulator(&self) -> Dbm {
        self.scenario
            .level_at_modulator(self.source.level, self.source.frequency)
    }

    /// Records an overdrive if the output is on and the modulator sees more than its limit.
    fn watch_modulator(&mut self) {
        if !self.source.output_on {
            return;
        }
        let level = self.level_at_modulator();
        let limit = Dbm(self.scenario.modulator.max_rf_input_dbm);
        if level.value() > limit.value() {
            tracing::warn!(
                %level, %limit, frequency = %self.source.frequency,
                "simulated modulator overdriven"
            );
            self.overdrive_events.push(OverdriveEvent {
                frequency: self.source.frequency,
                level_at_modulator: level,
                limit,
            });
        }
    }

    /// Sets the CW frequency (rounded to the source's resolution); -222 when out of range.
    pub fn set_source_frequency(&mut self, hz: f64) -> Result<Hz, ScpiError> {
        let spec = &self.scenario.rf_source;
        if !(spec.min_frequency_hz..=spec.max_frequency_hz).contains(&hz) {
            return Err(out_of_range(
                "frequency",
                hz,
                "Hz",
                spec.min_frequency_hz,
                spec.max_frequency_hz,
            ));
        }
        let step = spec.frequency_resolution_hz;
        let settling = spec.settling_time_s;
        self.source.frequency = Hz((hz / step).round() * step);
        self.source.status.busy_for(settling, self.time_factor);
        self.watch_modulator();
        Ok(self.source.frequency)
    }

    /// Sets the output level (rounded to the source's resolution); -222 when out of range.
    pub fn set_source_level(&mut self, dbm: f64) -> Result<Dbm, ScpiError> {
        let spec = &self.scenario.rf_source;
        if !(spec.min_level_dbm..=spec.max_level_dbm).contains(&dbm) {
            return Err(out_of_range(
                "level",
                dbm,
                "dBm",
                spec.min_level_dbm,
                spec.max_level_dbm,
            ));
        }
        let step = spec.level_resolution_db;
        let settling = spec.settling_time_s;
        self.source.level = Dbm((dbm / step).round() * step);
        self.source.status.busy_for(settling, self.time_factor);
        self.watch_modulator();
        Ok(self.source.level)
    }

    /// Switches the RF output.
    pub fn set_source_output(&mut self, on: bool) -> bool {
        self.source.output_on = on;
        if on {
            let settling = self.scenario.rf_source.settling_time_s;
            self.source.status.busy_for(settling, self.time_factor);
        }
        self.watch_modulator();
        self.source.output_on
    }

    /// Sets the analyzer's centre; -222 outside its frequency range.
    pub fn set_center(&mut self, hz: f64) -> Result<Hz, ScpiError> {
        let spec = &self.scenario.analyzer;
        if !(spec.min_frequency_hz..=spec.max_frequency_hz).contains(&hz) {
            return Err(out_of_range(
                "centre frequency",
                hz,
                "Hz",
                spec.min_frequency_hz,
                spec.max_frequency_hz,
            ));
        }
        self.analyzer.center = Hz(hz);
        Ok(self.analyzer.center)
    }

    /// Sets the span; -222 outside the analyzer's span range.
    pub fn set_span(&mut self, hz: f64) -> Result<Hz, ScpiError> {
        let spec = &self.scenario.analyzer;
        if !(spec.min_span_hz..=spec.max_span_hz).contains(&hz) {
            return Err(out_of_range(
                "span",
                hz,
                "Hz",
                spec.min_span_hz,
                spec.max_span_hz,
            ));
        }
        self.analyzer.span = Hz(hz);
        Ok(self.analyzer.span)
    }

    /// Sets the resolution bandwidth to the nearest offered one (on a log scale); -222 for a
    /// value that is not above zero.
    pub fn set_resolution_bandwidth(&mut self, hz: f64) -> Result<Hz, ScpiError> {
        if !(hz > 0.0 && hz.is_finite()) {
            return Err(ScpiError::new(
                codes::DATA_OUT_OF_RANGE,
                format!("resolution bandwidth {hz} Hz must be above zero"),
            ));
        }
        self.analyzer.resolution_bandwidth = self.nearest_rbw(hz);
        Ok(self.analyzer.resolution_bandwidth)
    }

    /// Sets the number of points; -222 outside the analyzer's range.
    pub fn set_points(&mut self, points: i64) -> Result<usize, ScpiError> {
        let spec = &self.scenario.analyzer;
        let allowed = spec.min_points as i64..=spec.max_points as i64;
        if !allowed.contains(&points) {
            return Err(out_of_range(
                "points",
                points as f64,
                "",
                spec.min_points as f64,
                spec.max_points as f64,
            ));
        }
        self.analyzer.points = points as usize;
        Ok(self.analyzer.points)
    }

    /// Start of the displayed axis (centre - span / 2).
    pub fn start(&self) -> Hz {
        self.analyzer.center - self.analyzer.span / 2.0
    }

    /// End of the displayed axis (centre + span / 2).
    pub fn stop(&self) -> Hz {
        self.analyzer.center + self.analyzer.span / 2.0
    }

    /// The true current optical frequency of the laser.
    pub fn laser_frequency(&self) -> Hz {
        self.scenario.laser_frequency() + self.laser_drift
    }

    /// The true modulation index now (0 with the output off).
    pub fn modulation_index(&self) -> f64 {
        if !self.source.output_on {
            return 0.0;
        }
        self.scenario
            .modulation_index_at(self.source.level, self.source.frequency)
    }

    /// The lines reaching the analyzer now, at their true optical frequencies.
    pub fn optical_lines(&self) -> Vec<OpticalLine> {
        if !self.fibre_connected {
            return Vec::new();
        }
        let total_mw = self.scenario.optical_power_out().to_milliwatts();
        let carrier = self.laser_frequency().value();
        if !self.source.output_on {
            return vec![OpticalLine {
                frequency_hz: carrier,
                power_mw: total_mw,
            }];
        }
        let beta = self.modulation_index();
        let v_peak = physics::peak_voltage(self.level_at_modulator()).value();
        let m = &self.scenario.modulator;
        let am_depth = m.residual_am_per_volt * v_peak;
        let f_m = self.source.frequency.value();
        physics::comb_lines(beta, am_depth, m.residual_am_phase_deg.to_radians())
            .into_iter()
            .map(|line| OpticalLine {
                frequency_hz: carrier + f64::from(line.order) * f_m,
                power_mw: total_mw * line.relative_power,
            })
            .collect()
    }

    /// Moves the laser one random-walk step, reflected at the scenario's limit.
    fn drift(&mut self) {
        let laser = &self.scenario.laser;
        if laser.drift_step_hz <= 0.0 {
            return;
        }
        let step: f64 = self.rng.sample::<f64, _>(StandardNormal) * laser.drift_step_hz;
        let limit = laser.drift_limit_hz;
        let mut drift = self.laser_drift.value() + step;
        if limit <= 0.0 {
            drift = 0.0;
        } else {
            // Reflect at +-limit (a few reflections at most for a sane step).
            for _ in 0..8 {
                if drift > limit {
                    drift = 2.0 * limit - drift;
                } else if drift < -limit {
                    drift = -2.0 * limit - drift;
                } else {
                    break;
                }
            }
            drift = drift.clamp(-limit, limit);
        }
        self.laser_drift = Hz(drift);
    }

    /// Takes one sweep: the laser drifts, the analyzer renders what it sees, the data become the
    /// last sweep, and the analyzer is busy for the sweep time.
    pub fn take_sweep(&mut self) -> &SweepData {
        self.drift();
        let spec = &self.scenario.analyzer;
        let offset = spec.frequency_offset_hz;
        let rendering = Rendering {
            start_hz: self.start().value(),
            stop_hz: self.stop().value(),
            points: self.analyzer.points,
            resolution_bandwidth_hz: self.analyzer.resolution_bandwidth.value(),
            filter: spec.filter_shape,
            laser_linewidth_hz: self.scenario.laser.linewidth_hz,
            noise_floor_dbm: spec.noise_floor_dbm,
            display_noise_db: spec.display_noise_db,
        };
        let sweep_time = spec.sweep_time_s;
        // The analyzer shows a line at its true frequency plus its axis offset.
        let lines: Vec<OpticalLine> = self
            .optical_lines()
            .into_iter()
            .map(|l| OpticalLine {
                frequency_hz: l.frequency_hz + offset,
                ..l
            })
            .collect();
        let power_dbm = physics::render_trace(&lines, &rendering, &mut self.rng);
        self.analyzer.status.busy_for(sweep_time, self.time_factor);
        self.analyzer.last_sweep.insert(SweepData {
            start: self.start(),
            stop: self.stop(),
            resolution_bandwidth: self.analyzer.resolution_bandwidth,
            power_dbm,
        })
    }
}
