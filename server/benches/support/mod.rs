//! What the engine benchmarks share: the plan they run (9 levels from 3 to 19 dBm, 10,001-point
//! traces, RF-off reference, carrier tracking, a flat 1.5 dB chain, no settle time), an engine on
//! an in-process simulated bench, and running a plan to its end.

#![allow(dead_code)] // each benchmark uses only part of it

use halfwave::config::Limits;
use halfwave::engine::bench::BenchInstruments;
use halfwave::engine::events::ProgressEvent;
use halfwave::engine::plan::{
    AnalyzerSpec, ChainSpec, DeviceSpec, FrequencySpec, LevelSpec, PlanRequest,
};
use halfwave::engine::Engine;
use halfwave::store::Store;
use halfwave_drivers::sim::{Scenario, SimBench};
use halfwave_units::{Db, Dbm};

/// Levels per frequency in [`plan`].
pub const LEVELS: usize = 9;

/// The benchmark plan for an invented device `serial` at `frequencies_hz`, on bench "sim".
pub fn plan(serial: &str, frequencies_hz: &[f64]) -> PlanRequest {
    PlanRequest {
        device: DeviceSpec {
            serial: serial.into(),
            model: "benchmark".into(),
            rf_input_limit_dbm: Dbm(27.0),
            wavelength_nm: 1550.0,
        },
        bench: "sim".into(),
        chain: ChainSpec::FlatLoss { loss_db: Db(1.5) },
        frequencies: FrequencySpec::List {
            values_hz: frequencies_hz.to_vec(),
        },
        levels: LevelSpec::Ramp {
            start_dbm: Dbm(3.0),
            stop_dbm: Dbm(19.0),
            step_db: Db(2.0),
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

/// An engine on one in-process simulated bench named "sim", storing in the database at `db`.
pub async fn sim_engine(db: &std::path::Path, seed: u64, time_factor: f64) -> (Engine, SimBench) {
    sim_engine_on(db.to_str().expect("a UTF-8 path"), seed, time_factor).await
}

/// [`sim_engine`] on the database at `url_or_path` (a file path or a `postgres://` URL).
pub async fn sim_engine_on(url_or_path: &str, seed: u64, time_factor: f64) -> (Engine, SimBench) {
    let store = Store::open(url_or_path)
        .await
        .expect("open the benchmark database");
    let sim = SimBench::new(Scenario::builtin().expect("built-in scenario"), seed)
        .with_time_factor(time_factor);
    let engine = Engine::start_with(
        Limits::default(),
        store,
        vec![("sim".into(), BenchInstruments::simulated(sim.clone()))],
    )
    .await
    .expect("engine starts");
    (engine, sim)
}

/// Submits `plan` and waits until the run ends; panics unless it completed (or if the event
/// channel closes). Returns the run id.
pub async fn run_to_completion(engine: &Engine, plan: PlanRequest) -> i64 {
    let mut events = engine.subscribe();
    let run_id = engine.submit(plan, "bench").await.expect("plan accepted");
    loop {
        match events.recv().await {
            Ok(ProgressEvent::Finished {
                run_id: id, state, ..
            }) if id == run_id => {
                assert_eq!(state.as_str(), "completed");
                return run_id;
            }
            Ok(_) | Err(tokio::sync::broadcast::error::RecvError::Lagged(_)) => {}
            Err(tokio::sync::broadcast::error::RecvError::Closed) => {
                panic!("the engine stopped before run {run_id} ended")
            }
        }
    }
}
