//! The simulated instruments as in-process implementations of [`RfSource`] and
//! [`SpectrumAnalyzer`], for tests and demos that need no TCP.
//!
//! They behave like a careful client driver talking to the simulated instruments: a request
//! outside the instrument's range is refused before anything is "sent" ([`InstrumentError::OutOfRange`],
//! nothing logged), every accepted call is logged as the SCPI command a driver would send, and
//! settling and sweep times are slept (scaled by the bench's time factor).

use super::bench::SimBench;
use super::state::BenchState;
use crate::instrument::{
    AnalyzerCapabilities, Identity, InstrumentError, RfSource, SourceLimits, SpectrumAnalyzer,
};
use crate::sim::scpi_parser::{codes, standard_message, ScpiError};
use async_trait::async_trait;
use halfwave_units::{Dbm, Hz, Seconds, Trace};

/// Waits `seconds` of simulated time (scaled by the bench's time factor).
async fn pause(seconds: f64, time_factor: f64) {
    let wait = Seconds(seconds * time_factor).to_duration();
    if !wait.is_zero() {
        tokio::time::sleep(wait).await;
    }
}

fn scpi_to_instrument(resource: &str, operation: &str, e: ScpiError) -> InstrumentError {
    InstrumentError::Scpi {
        resource: resource.to_string(),
        operation: operation.to_string(),
        code: e.code,
        message: match e.detail {
            Some(d) => format!("{};{d}", standard_message(e.code)),
            None => standard_message(e.code).to_string(),
        },
        detail: String::new(),
    }
}

fn range_error(
    resource: &str,
    what: &str,
    value: String,
    min: String,
    max: String,
) -> InstrumentError {
    InstrumentError::OutOfRange {
        resource: resource.to_string(),
        what: what.to_string(),
        value,
        min,
        max,
    }
}

/// The simulated RF source, in-process. Obtain with [`SimBench::rf_source`].
#[derive(Debug, Clone)]
pub struct SimRfSource {
    bench: SimBench,
    resource: String,
}

impl SimRfSource {
    pub(crate) fn new(bench: SimBench) -> SimRfSource {
        SimRfSource {
            bench,
            resource: "sim://rf-source".to_string(),
        }
    }

    fn log(state: &mut BenchState, command: String) {
        state.source.status.log.push(command);
    }

    fn settle(&self) -> (f64, f64) {
        let state = self.bench.lock();
        (state.scenario.rf_source.settling_time_s, state.time_factor)
    }
}

#[async_trait]
impl RfSource for SimRfSource {
    fn resource(&self) -> &str {
        &self.resource
    }

    async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        Self::log(&mut self.bench.lock(), "*IDN?".into());
        Ok(self.bench.scenario().source_identity())
    }

    fn limits(&self) -> SourceLimits {
        self.bench.scenario().source_limits()
    }

    async fn set_frequency(&mut self, frequency: Hz) -> Result<Hz, InstrumentError> {
        let limits = self.limits();
        if !(limits.min_frequency..=limits.max_frequency).contains(&frequency) {
            return Err(range_error(
                &self.resource,
                "frequency",
                frequency.to_string(),
                limits.min_frequency.to_string(),
                limits.max_frequency.to_string(),
            ));
        }
        let result = {
            let mut state = self.bench.lock();
            Self::log(&mut state, format!("FREQ {}", frequency.value()));
            state.set_source_frequency(frequency.value())
        };
        let read_back = result.map_err(|e| scpi_to_instrument(&self.resource, "FREQ", e))?;
        let (settling, factor) = self.settle();
        pause(settling, factor).await;
        Ok(read_back)
    }

    async fn set_level(&mut self, level: Dbm) -> Result<Dbm, InstrumentError> {
        let limits = self.limits();
        if !(limits.min_level..=limits.max_level).contains(&level) {
            return Err(range_error(
                &self.resource,
                "level",
                level.to_string(),
                limits.min_level.to_string(),
                limits.max_level.to_string(),
            ));
        }
        let result = {
            let mut state = self.bench.lock();
            Self::log(&mut state, format!("POW {}", level.value()));
            state.set_source_level(level.value())
        };
        let read_back = result.map_err(|e| scpi_to_instrument(&self.resource, "POW", e))?;
        let (settling, factor) = self.settle();
        pause(settling, factor).await;
        Ok(read_back)
    }

    async fn set_output(&mut self, on: bool) -> Result<bool, InstrumentError> {
        let state_now = {
            let mut state = self.bench.lock();
            Self::log(
                &mut state,
                format!("OUTP {}", if on { "ON" } else { "OFF" }),
            );
            state.set_source_output(on)
        };
        if on {
            let (settling, factor) = self.settle();
            pause(settling, factor).await;
        }
        Ok(state_now)
    }

    async fn output_enabled(&mut self) -> Result<bool, InstrumentError> {
        let mut state = self.bench.lock();
        Self::log(&mut state, "OUTP?".into());
        Ok(state.source.output_on)
    }

    async fn safe_off(&mut self) -> Result<(), InstrumentError> {
        let mut state = self.bench.lock();
        Self::log(&mut state, "OUTP OFF".into());
        if state.set_source_output(false) {
            // Unreachable with the simulated state, but a stop path must never pass silently.
            return Err(InstrumentError::ReadBack {
                resource: self.resource.clone(),
                setting: "RF output".into(),
                requested: "off".into(),
                actual: "on".into(),
            });
        }
        Ok(())
    }
}

/// The simulated optical spectrum analyzer, in-process. Obtain with [`SimBench::analyzer`].
#[derive(Debug, Clone)]
pub struct SimAnalyzer {
    bench: SimBench,
    resource: String,
}

impl SimAnalyzer {
    pub(crate) fn new(bench: SimBench) -> SimAnalyzer {
        SimAnalyzer {
            bench,
            resource: "sim://analyzer".to_string(),
        }
    }

    fn log(state: &mut BenchState, command: String) {
        state.analyzer.status.log.push(command);
    }
}

#[async_trait]
impl SpectrumAnalyzer for SimAnalyzer {
    fn resource(&self) -> &str {
        &self.resource
    }

    async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        Self::log(&mut self.bench.lock(), "*IDN?".into());
        Ok(self.bench.scenario().analyzer_identity())
    }

    fn capabilities(&self) -> AnalyzerCapabilities {
        let a = &self.bench.scenario().analyzer;
        AnalyzerCapabilities {
            min_frequency: Hz(a.min_frequency_hz),
            max_frequency: Hz(a.max_frequency_hz),
            min_span: Hz(a.min_span_hz),
            max_span: Hz(a.max_span_hz),
            resolution_bandwidths: a.resolution_bandwidths_hz.iter().copied().map(Hz).collect(),
            max_points: a.max_points,
            typical_sweep_time: Seconds(a.sweep_time_s),
        }
    }

    async fn set_center(&mut self, center: Hz) -> Result<Hz, InstrumentError> {
        let caps = self.capabilities();
        if !(caps.min_frequency..=caps.max_frequency).contains(&center) {
            return Err(range_error(
                &self.resource,
                "centre frequency",
                center.to_string(),
                caps.min_frequency.to_string(),
                caps.max_frequency.to_string(),
            ));
        }
        let mut state = self.bench.lock();
        Self::log(&mut state, format!("FREQ:CENT {}", center.value()));
        state
            .set_center(center.value())
            .map_err(|e| scpi_to_instrument(&self.resource, "FREQ:CENT", e))
    }

    async fn set_span(&mut self, span: Hz) -> Result<Hz, InstrumentError> {
        let caps = self.capabilities();
        if !(caps.min_span..=caps.max_span).contains(&span) {
            return Err(range_error(
                &self.resource,
                "span",
                span.to_string(),
                caps.min_span.to_string(),
                caps.max_span.to_string(),
            ));
        }
        let mut state = self.bench.lock();
        Self::log(&mut state, format!("FREQ:SPAN {}", span.value()));
        state
            .set_span(span.value())
            .map_err(|e| scpi_to_instrument(&self.resource, "FREQ:SPAN", e))
    }

    async fn set_resolution_bandwidth(&mut self, rbw: Hz) -> Result<Hz, InstrumentError> {
        if !(rbw.is_finite() && rbw.value() > 0.0) {
            return Err(range_error(
                &self.resource,
                "resolution bandwidth",
                rbw.to_string(),
                "above 0 Hz".into(),
                "the widest offered".into(),
            ));
        }
        let mut state = self.bench.lock();
        Self::log(&mut state, format!("BAND {}", rbw.value()));
        state
            .set_resolution_bandwidth(rbw.value())
            .map_err(|e| scpi_to_instrument(&self.resource, "BAND", e))
    }

    async fn set_points(&mut self, points: usize) -> Result<usize, InstrumentError> {
        let a = &self.bench.scenario().analyzer;
        if !(a.min_points..=a.max_points).contains(&points) {
            return Err(range_error(
                &self.resource,
                "points",
                points.to_string(),
                a.min_points.to_string(),
                a.max_points.to_string(),
            ));
        }
        let mut state = self.bench.lock();
        Self::log(&mut state, format!("SWE:POIN {points}"));
        state
            .set_points(points as i64)
            .map_err(|e| scpi_to_instrument(&self.resource, "SWE:POIN", e))
    }

    async fn sweep(&mut self) -> Result<(), InstrumentError> {
        let (sweep_time, factor) = {
            let mut state = self.bench.lock();
            Self::log(&mut state, "INIT".into());
            state.take_sweep();
            (state.scenario.analyzer.sweep_time_s, state.time_factor)
        };
        pause(sweep_time, factor).await;
        Ok(())
    }

    async fn fetch_trace(&mut self) -> Result<Trace, InstrumentError> {
        let sweep = {
            let mut state = self.bench.lock();
            Self::log(&mut state, "TRAC? TRACE1".into());
            state.analyzer.last_sweep.clone()
        };
        let Some(sweep) = sweep else {
            return Err(scpi_to_instrument(
                &self.resource,
                "TRAC? TRACE1",
                ScpiError::new(codes::DATA_STALE, "no sweep taken yet; call sweep() first"),
            ));
        };
        let frequencies = sweep.frequencies_hz();
        Trace::new(
            frequencies,
            sweep.power_dbm,
            Some(sweep.resolution_bandwidth),
        )
        .map_err(|e| InstrumentError::Parse {
            resource: self.resource.clone(),
            operation: "TRAC? TRACE1".into(),
            detail: e.to_string(),
        })
    }
}
