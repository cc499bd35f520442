//! What the engine benchmarks share: the plan they run (9 levels from 3 to 19 dBm, 10,001-point
//! traces, RF-off reference, carrier tracking, a flat 1.5 dB chain, no settle time).

#![allow(dead_code)] // each benchmark uses only part of it

use halfwave::engine::plan::{
    AnalyzerSpec, ChainSpec, DeviceSpec, FrequencySpec, LevelSpec, PlanRequest,
};

/// Levels per frequency in [`plan`].
pub const LEVELS: usize = 9;

/// The benchmark plan for an invented device `serial` at `frequencies_hz`, on bench "sim".
pub fn plan(serial: &str, frequencies_hz: &[f64]) -> PlanRequest {
    PlanRequest {
        device: DeviceSpec {
            serial: serial.into(),
            model: "benchmark".into(),
            rf_input_limit_dbm: 27.0,
            wavelength_nm: 1550.0,
        },
        bench: "sim".into(),
        chain: ChainSpec::FlatLoss { loss_db: 1.5 },
        frequencies: FrequencySpec::List {
            values_hz: frequencies_hz.to_vec(),
        },
        levels: LevelSpec::Ramp {
            start_dbm: 3.0,
            stop_dbm: 19.0,
            step_db: 2.0,
        },
        settle_s: 0.0,
        averages: 1,
        analyzer: AnalyzerSpec {
            points: Some(10_001),
            ..AnalyzerSpec::default()
        },
        reference_trace: true,
        carrier_tracking: true,
        note: String::new(),
    }
}
