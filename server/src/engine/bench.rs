//! Building a bench's instruments from the configuration.
//!
//! A bench is a source and an analyzer behind the instrument traits; which implementation sits
//! behind each (a generic SCPI driver with its command profile, or the in-process simulated
//! bench) is decided here and nowhere else, so the engine never knows.

use crate::config::{BenchConfig, Config, InstrumentConfig};
use halfwave_drivers::generic::{connect_analyzer, connect_source};
use halfwave_drivers::sim::{Scenario, SimBench};
use halfwave_drivers::{RfSource, SpectrumAnalyzer};

use super::EngineError;

/// The two instruments of one bench, and the simulated bench behind them if there is one.
pub struct BenchInstruments {
    pub source: Box<dyn RfSource>,
    pub analyzer: Box<dyn SpectrumAnalyzer>,
    /// The simulation, when either instrument is simulated (tests read its truth from it).
    pub simulation: Option<SimBench>,
}

impl BenchInstruments {
    /// Both instruments from one simulated bench.
    pub fn simulated(sim: SimBench) -> BenchInstruments {
        BenchInstruments {
            source: Box::new(sim.rf_source()),
            analyzer: Box::new(sim.analyzer()),
            simulation: Some(sim),
        }
    }
}

/// Connects (or simulates) the instruments of one configured bench.
pub async fn build(config: &Config, bench: &BenchConfig) -> Result<BenchInstruments, EngineError> {
    let setup = |message: String| EngineError::Setup(format!("bench {}: {message}", bench.name));
    let simulation = match &bench.simulation {
        Some(sim) => {
            let scenario = match &sim.scenario {
                Some(path) => Scenario::from_file(&config.resolve(path))
                    .map_err(|e| setup(format!("simulation scenario: {e}")))?,
                None => Scenario::builtin()
                    .map_err(|e| setup(format!("built-in simulation scenario: {e}")))?,
            };
            Some(SimBench::new(scenario, sim.seed).with_time_factor(sim.time_factor))
        }
        None => None,
    };
    let source: Box<dyn RfSource> = match &bench.source {
        InstrumentConfig::Simulated => match &simulation {
            Some(sim) => Box::new(sim.rf_source()),
            None => {
                return Err(setup(
                    "the source is simulated but there is no [bench.simulation]".into(),
                ))
            }
        },
        InstrumentConfig::Scpi { resource, profile } => {
            let profile = profile.as_ref().map(|p| config.resolve(p));
            connect_source(resource, profile.as_deref())
                .await
                .map_err(|source| EngineError::Instrument {
                    bench: bench.name.clone(),
                    source,
                })?
        }
    };
    let analyzer: Box<dyn SpectrumAnalyzer> = match &bench.analyzer {
        InstrumentConfig::Simulated => match &simulation {
            Some(sim) => Box::new(sim.analyzer()),
            None => {
                return Err(setup(
                    "the analyzer is simulated but there is no [bench.simulation]".into(),
                ))
            }
        },
        InstrumentConfig::Scpi { resource, profile } => {
            let profile = profile.as_ref().map(|p| config.resolve(p));
            connect_analyzer(resource, profile.as_deref())
                .await
                .map_err(|source| EngineError::Instrument {
                    bench: bench.name.clone(),
                    source,
                })?
        }
    };
    Ok(BenchInstruments {
        source,
        analyzer,
        simulation,
    })
}
