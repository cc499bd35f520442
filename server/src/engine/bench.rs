//! Building a bench's instruments from the configuration.
//!
//! A bench is a source and an analyzer (and optionally a power sensor) behind the instrument
//! traits; which implementation sits
//! behind each (a generic SCPI driver with its command profile, or the in-process simulated
//! bench) is decided here and nowhere else, so the engine never knows.

use crate::config::{BenchConfig, Config, InstrumentConfig};
use halfwave_drivers::generic::{connect_analyzer, connect_sensor, connect_source};
use halfwave_drivers::sim::{Scenario, SimBench};
use halfwave_drivers::{PowerSensor, RfSource, SpectrumAnalyzer};

use super::EngineError;

/// The two instruments of one bench, and the simulated bench behind them if there is one.
pub struct BenchInstruments {
    pub source: Box<dyn RfSource>,
    pub analyzer: Box<dyn SpectrumAnalyzer>,
    /// The power sensor for chain calibrations, when the bench has one.
    pub sensor: Option<Box<dyn PowerSensor>>,
    /// The simulation, when either instrument is simulated (tests read its truth from it).
    pub simulation: Option<SimBench>,
}

impl BenchInstruments {
    /// Both instruments from one simulated bench.
    pub fn simulated(sim: SimBench) -> BenchInstruments {
        BenchInstruments {
            source: Box::new(sim.rf_source()),
            analyzer: Box::new(sim.analyzer()),
            sensor: Some(Box::new(sim.power_sensor())),
            simulation: Some(sim),
        }
    }
}

/// The start-up interlock for one source: switches its output off and confirms it
/// ([`super::safety::switch_off_source`], the stop paths' budget). A failure is logged and
/// returned: the engine then flags the bench and keeps trying (`rf_safety`).
pub async fn switch_off_at_start(bench: &str, source: &mut dyn RfSource) -> Result<(), String> {
    super::safety::switch_off_source(source).await.map_err(|e| {
        tracing::error!(bench, error = %e, "could not switch the RF output off at start-up; the bench is held and the daemon keeps trying");
        e.to_string()
    })
}

/// A set-up failure of this bench, named.
pub fn setup_error(bench: &BenchConfig, message: String) -> EngineError {
    EngineError::Setup(format!("bench {}: {message}", bench.name))
}

/// The simulated bench behind a bench's simulated instruments, if it has one; the error is the
/// scenario problem (see [`setup_error`] to name the bench).
pub fn simulation(config: &Config, bench: &BenchConfig) -> Result<Option<SimBench>, String> {
    let Some(sim) = &bench.simulation else {
        return Ok(None);
    };
    let scenario = match &sim.scenario {
        Some(path) => Scenario::from_file(&config.resolve(path))
            .map_err(|e| format!("simulation scenario: {e}"))?,
        None => Scenario::builtin().map_err(|e| format!("built-in simulation scenario: {e}"))?,
    };
    Ok(Some(
        SimBench::new(scenario, sim.seed).with_time_factor(sim.time_factor),
    ))
}

/// Connects (or simulates) a bench's RF source.
pub async fn connect_bench_source(
    config: &Config,
    bench: &BenchConfig,
    simulation: Option<&SimBench>,
) -> Result<Box<dyn RfSource>, EngineError> {
    match &bench.source {
        InstrumentConfig::Simulated => match simulation {
            Some(sim) => Ok(Box::new(sim.rf_source())),
            None => Err(setup_error(
                bench,
                "the source is simulated but there is no [bench.simulation]".into(),
            )),
        },
        InstrumentConfig::Scpi { resource, profile } => {
            let profile = profile.as_ref().map(|p| config.resolve(p));
            connect_source(resource, profile.as_deref())
                .await
                .map_err(|source| EngineError::Instrument {
                    bench: bench.name.clone(),
                    source,
                })
        }
    }
}

/// Connects (or simulates) a bench's analyzer.
pub async fn connect_bench_analyzer(
    config: &Config,
    bench: &BenchConfig,
    simulation: Option<&SimBench>,
) -> Result<Box<dyn SpectrumAnalyzer>, EngineError> {
    match &bench.analyzer {
        InstrumentConfig::Simulated => match simulation {
            Some(sim) => Ok(Box::new(sim.analyzer())),
            None => Err(setup_error(
                bench,
                "the analyzer is simulated but there is no [bench.simulation]".into(),
            )),
        },
        InstrumentConfig::Scpi { resource, profile } => {
            let profile = profile.as_ref().map(|p| config.resolve(p));
            connect_analyzer(resource, profile.as_deref())
                .await
                .map_err(|source| EngineError::Instrument {
                    bench: bench.name.clone(),
                    source,
                })
        }
    }
}

/// Connects (or simulates) a bench's power sensor, when it has one.
pub async fn connect_bench_sensor(
    config: &Config,
    bench: &BenchConfig,
    simulation: Option<&SimBench>,
) -> Result<Option<Box<dyn PowerSensor>>, EngineError> {
    match &bench.sensor {
        None => Ok(None),
        Some(InstrumentConfig::Simulated) => match simulation {
            Some(sim) => Ok(Some(Box::new(sim.power_sensor()))),
            None => Err(setup_error(
                bench,
                "the sensor is simulated but there is no [bench.simulation]".into(),
            )),
        },
        Some(InstrumentConfig::Scpi { resource, profile }) => {
            let profile = profile.as_ref().map(|p| config.resolve(p));
            connect_sensor(resource, profile.as_deref())
                .await
                .map(Some)
                .map_err(|source| EngineError::Instrument {
                    bench: bench.name.clone(),
                    source,
                })
        }
    }
}

/// Connects (or simulates) the instruments of one configured bench; nothing is switched.
pub async fn build(config: &Config, bench: &BenchConfig) -> Result<BenchInstruments, EngineError> {
    let simulation = simulation(config, bench).map_err(|m| setup_error(bench, m))?;
    let source = connect_bench_source(config, bench, simulation.as_ref()).await?;
    let analyzer = connect_bench_analyzer(config, bench, simulation.as_ref()).await?;
    let sensor = connect_bench_sensor(config, bench, simulation.as_ref()).await?;
    Ok(BenchInstruments {
        source,
        analyzer,
        sensor,
        simulation,
    })
}
