//! A whole calibration run on the simulated bench, through the real engine and store.
//!
//! The simulated bench is the reference here: its scenario states the modulator's true V_pi at
//! every frequency (V_pi(f) = V0 (1 + a sqrt(f/GHz) + b f/GHz), with the laser drifting between
//! sweeps), and the engine must recover it from spectra alone, through the Bessel-sideband
//! analysis (Jacobi-Anger, NIST DLMF 10.12) and the drive chain. The chain calibration given to
//! the engine is what a lab measures end to end with a power meter: the scenario's cable loss
//! plus the generator's level error at each frequency.

use halfwave::config::Limits;
use halfwave::engine::bench::BenchInstruments;
use halfwave::engine::events::ProgressEvent;
use halfwave::engine::plan::{
    AnalyzerSpec, ChainSpec, DeviceSpec, FrequencySpec, LevelSpec, PlanRequest,
};
use halfwave::engine::Engine;
use halfwave::store::{ChainCalibrationPoint, RunState, Store};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use halfwave_units::{Db, Hz};
use std::time::Duration;

const FREQUENCIES_HZ: [f64; 6] = [0.2e9, 0.5e9, 1.5e9, 4e9, 10e9, 20e9];

fn plan(chain_name: &str) -> PlanRequest {
    PlanRequest {
        device: DeviceSpec {
            serial: "EG-PM-0042".into(),
            model: "thin-film phase modulator (simulated)".into(),
            rf_input_limit_dbm: 27.0,
            wavelength_nm: 1550.0,
        },
        bench: "sim".into(),
        chain: ChainSpec::Stored {
            name: chain_name.into(),
            version: None,
        },
        frequencies: FrequencySpec::List {
            values_hz: FREQUENCIES_HZ.to_vec(),
        },
        levels: LevelSpec::Ramp {
            start_dbm: 0.0,
            stop_dbm: 20.0,
            step_db: 2.5,
        },
        settle_s: 0.0,
        averages: 1,
        analyzer: AnalyzerSpec::default(),
        reference_trace: true,
        carrier_tracking: true,
        note: String::new(),
    }
}

/// The end-to-end chain calibration of the simulated bench at the plan's frequencies.
async fn upload_true_chain(store: &Store, scenario: &Scenario) -> String {
    let points: Vec<ChainCalibrationPoint> = FREQUENCIES_HZ
        .iter()
        .map(|&f| {
            let f = Hz(f);
            ChainCalibrationPoint::new(
                f,
                Db(scenario.level_error_at(f).0 - scenario.chain_loss_at(f).0),
            )
        })
        .collect();
    store
        .create_chain_calibration("sim-chain", "test", &points)
        .await
        .expect("chain calibration stored");
    "sim-chain".into()
}

/// An engine on one simulated bench named "sim".
async fn start_engine(limits: Limits, store: Store, sim: &SimBench) -> Engine {
    Engine::start_with(
        limits,
        store,
        vec![("sim".into(), BenchInstruments::simulated(sim.clone()))],
    )
    .await
    .unwrap()
}

async fn wait_for_end(
    events: &mut tokio::sync::broadcast::Receiver<ProgressEvent>,
    run_id: i64,
) -> String {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(300);
    loop {
        let ev = tokio::time::timeout_at(deadline, events.recv())
            .await
            .expect("run finished in time");
        if let Ok(ProgressEvent::Finished {
            run_id: id, state, ..
        }) = ev
        {
            if id == run_id {
                return state;
            }
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn whole_run_recovers_the_scenario_v_pi_within_two_percent() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    let scenario = Scenario::builtin().unwrap();
    let sim = SimBench::new(scenario.clone(), 7).with_time_factor(0.0);
    let chain = upload_true_chain(&store, &scenario).await;
    let engine = start_engine(Limits::default(), store.clone(), &sim).await;
    let mut events = engine.subscribe();
    let laser_before = sim.laser_frequency();
    let run_id = engine.submit(plan(&chain), "test").await.unwrap();
    assert_eq!(wait_for_end(&mut events, run_id).await, "completed");

    // The laser really drifted while the run measured (the scenario's random walk).
    assert_ne!(sim.laser_frequency(), laser_before);
    assert!(!sim.rf_output_on(), "RF must be off after the run");
    assert!(
        !sim.overdriven(),
        "the run must never exceed the modulator's RF limit"
    );

    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.state, RunState::Completed);
    let points = store.points_of_run(run_id).await.unwrap();
    assert_eq!(points.len(), FREQUENCIES_HZ.len() * 9);
    let results = store.frequency_results(run_id).await.unwrap();
    assert_eq!(results.len(), FREQUENCIES_HZ.len());
    for r in &results {
        let truth = scenario.v_pi_at(Hz(r.frequency_hz)).0;
        let error = (r.v_pi_volts - truth) / truth;
        assert!(
            error.abs() < 0.02,
            "at {} GHz: V_pi {} V (u {}), scenario {} V, error {:.3} %",
            r.frequency_hz / 1e9,
            r.v_pi_volts,
            r.v_pi_uncertainty_volts,
            truth,
            error * 100.0
        );
    }
    engine.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn plan_over_the_limit_is_refused_before_any_command() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    let scenario = Scenario::builtin().unwrap();
    let sim = SimBench::new(scenario.clone(), 3).with_time_factor(0.0);
    let chain = upload_true_chain(&store, &scenario).await;
    let engine = start_engine(
        Limits {
            max_level_at_modulator_dbm: 10.0,
        },
        store.clone(),
        &sim,
    )
    .await;
    // Start-up talks to the instruments (identify, RF off); only what follows must be silent.
    sim.clear_command_log(Role::RfSource);
    sim.clear_command_log(Role::Analyzer);
    let err = engine.submit(plan(&chain), "test").await.unwrap_err();
    assert!(err.to_string().contains("hard limit"), "{err}");
    assert!(sim.command_log(Role::RfSource).is_empty());
    assert!(sim.command_log(Role::Analyzer).is_empty());
    engine.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cancel_leaves_the_output_off_within_a_second() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    let scenario = Scenario::builtin().unwrap();
    // Realistic instrument timings so that the run is mid-way when cancelled.
    let sim = SimBench::new(scenario.clone(), 5).with_time_factor(1.0);
    let chain = upload_true_chain(&store, &scenario).await;
    let engine = start_engine(Limits::default(), store.clone(), &sim).await;
    let mut events = engine.subscribe();
    let run_id = engine.submit(plan(&chain), "test").await.unwrap();
    // Wait until RF is on and a point has been measured.
    let deadline = tokio::time::Instant::now() + Duration::from_secs(60);
    loop {
        match tokio::time::timeout_at(deadline, events.recv()).await {
            Ok(Ok(ProgressEvent::Point { .. })) if sim.rf_output_on() => break,
            Ok(_) => continue,
            Err(_) => panic!("no point measured with RF on within 60 s"),
        }
    }
    let asked = tokio::time::Instant::now();
    engine.cancel(run_id, "test").await.unwrap();
    while sim.rf_output_on() {
        assert!(
            asked.elapsed() < Duration::from_secs(1),
            "RF still on 1 s after cancel"
        );
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(wait_for_end(&mut events, run_id).await, "cancelled");
    assert!(!sim.rf_output_on());
    engine.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_interrupts_and_resume_completes_with_every_point_once() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("h.db");
    let store = Store::open(db.to_str().unwrap()).await.unwrap();
    let scenario = Scenario::builtin().unwrap();
    let sim = SimBench::new(scenario.clone(), 11).with_time_factor(0.2);
    let chain = upload_true_chain(&store, &scenario).await;
    let engine = start_engine(Limits::default(), store.clone(), &sim).await;
    let mut events = engine.subscribe();
    let run_id = engine.submit(plan(&chain), "test").await.unwrap();
    // Let a dozen points be committed, then stop the daemon's engine as SIGTERM would.
    let mut seen = 0;
    while seen < 12 {
        if let Ok(Ok(ProgressEvent::Point { .. })) =
            tokio::time::timeout(Duration::from_secs(60), events.recv()).await
        {
            seen += 1;
        }
    }
    engine.shutdown().await;
    assert!(!sim.rf_output_on(), "RF must be off after shutdown");
    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.state, RunState::Interrupted);
    let before = store.points_of_run(run_id).await.unwrap().len();
    assert!(
        before >= 12 && before < FREQUENCIES_HZ.len() * 9,
        "{before} points"
    );

    // A new engine on the same database and bench: the run is still interrupted; resume it.
    sim.set_time_factor(0.0);
    let engine = start_engine(
        Limits::default(),
        Store::open(db.to_str().unwrap()).await.unwrap(),
        &sim,
    )
    .await;
    let mut events = engine.subscribe();
    engine.resume(run_id, "test").await.unwrap();
    assert_eq!(wait_for_end(&mut events, run_id).await, "completed");
    let points = store.points_of_run(run_id).await.unwrap();
    assert_eq!(
        points.len(),
        FREQUENCIES_HZ.len() * 9,
        "same count as an uninterrupted run"
    );
    let results = store.frequency_results(run_id).await.unwrap();
    assert_eq!(results.len(), FREQUENCIES_HZ.len());
    for r in &results {
        let truth = scenario.v_pi_at(Hz(r.frequency_hz)).0;
        assert!(((r.v_pi_volts - truth) / truth).abs() < 0.02);
    }
    // A completed run cannot be resumed again.
    assert!(engine.resume(run_id, "test").await.is_err());
    engine.shutdown().await;
}
