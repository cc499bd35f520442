//! A whole calibration run on the simulated bench, through the real engine and store.
//!
//! The simulated bench is the reference here: its scenario states the modulator's true V_pi at
//! every frequency (V_pi(f) = V0 (1 + a sqrt(f/GHz) + b f/GHz), with the laser drifting between
//! sweeps), and the engine must recover it from spectra alone, through the Bessel-sideband
//! analysis (Jacobi-Anger, NIST DLMF 10.12) and the drive chain. The chain calibration given to
//! the engine is what a lab measures end to end with a power meter: the scenario's cable loss
//! plus the generator's level error at each frequency.

mod engine_support;

use engine_support::{assert_v_pi_within, plan, upload_true_chain, wait_for_end, POINTS};
use halfwave::config::Limits;
use halfwave::engine::bench::BenchInstruments;
use halfwave::engine::events::ProgressEvent;
use halfwave::engine::Engine;
use halfwave::store::{RunState, Store};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use std::time::Duration;

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
    assert_eq!(wait_for_end(&mut events, run_id).await.0, "completed");

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
    assert_eq!(points.len(), POINTS);
    let results = store.frequency_results(run_id).await.unwrap();
    assert_v_pi_within(&results, &scenario, 0.02);
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
    assert_eq!(wait_for_end(&mut events, run_id).await.0, "cancelled");
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
    let deadline = tokio::time::Instant::now() + Duration::from_secs(120);
    while seen < 12 {
        match tokio::time::timeout_at(deadline, events.recv()).await {
            Ok(Ok(ProgressEvent::Point { .. })) => seen += 1,
            Ok(Ok(ProgressEvent::Finished { state, cause, .. })) => {
                panic!("the run ended early: {state} ({cause:?})")
            }
            Ok(_) => {}
            Err(_) => panic!("only {seen} points within 120 s"),
        }
    }
    engine.shutdown().await;
    assert!(!sim.rf_output_on(), "RF must be off after shutdown");
    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.state, RunState::Interrupted);
    let before = store.points_of_run(run_id).await.unwrap().len();
    assert!((12..POINTS).contains(&before), "{before} points");

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
    assert_eq!(wait_for_end(&mut events, run_id).await.0, "completed");
    let points = store.points_of_run(run_id).await.unwrap();
    assert_eq!(points.len(), POINTS, "same count as an uninterrupted run");
    let results = store.frequency_results(run_id).await.unwrap();
    assert_v_pi_within(&results, &scenario, 0.02);
    // A completed run cannot be resumed again.
    assert!(engine.resume(run_id, "test").await.is_err());
    engine.shutdown().await;
}

/// Light lost mid-run (the fibre to the analyzer unplugged): the spectra show only the noise
/// floor, the points cannot be analysed, and after three in a row the run stops with the RF
/// already off when it is reported, the cause recorded and the points kept.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn analysis_failures_in_a_row_stop_the_run_with_rf_off_first() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    let scenario = Scenario::builtin().unwrap();
    let sim = SimBench::new(scenario.clone(), 13).with_time_factor(0.2);
    let chain = upload_true_chain(&store, &scenario).await;
    let engine = start_engine(Limits::default(), store.clone(), &sim).await;
    let mut events = engine.subscribe();
    let run_id = engine.submit(plan(&chain), "test").await.unwrap();
    // Unplug early in a frequency's ramp (levels 0 to 20 dBm in 2.5 dB steps), so that at least
    // three more levels of that frequency remain.
    let deadline = tokio::time::Instant::now() + Duration::from_secs(120);
    loop {
        match tokio::time::timeout_at(deadline, events.recv()).await {
            Ok(Ok(ProgressEvent::Point {
                generator_level_dbm,
                completed_points,
                ..
            })) if generator_level_dbm < 8.0 && completed_points >= 2 => break,
            Ok(_) => continue,
            Err(_) => panic!("no early point within 120 s"),
        }
    }
    sim.set_fibre_connected(false);
    let (state, cause) = wait_for_end(&mut events, run_id).await;
    assert!(
        !sim.rf_output_on(),
        "RF must be off when the stop is reported"
    );
    assert_eq!(state, "failed");
    let cause = cause.unwrap_or_default();
    assert!(cause.contains("in a row could not be analysed"), "{cause}");
    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.cause.as_deref(), Some(cause.as_str()));
    let points = store.points_of_run(run_id).await.unwrap();
    let unanalysed = points
        .iter()
        .filter(|p| p.modulation_index.is_none())
        .count();
    assert!(unanalysed >= 3, "the failed points are kept ({unanalysed})");
    assert!(points.len() < POINTS);
    engine.shutdown().await;
}
