//! Chain calibration runs on the simulated bench over SCPI/TCP, as the daemon drives a real one:
//! source, analyzer and power sensor through the generic drivers, built from a configuration.
//!
//! The simulator is the oracle: its scenario states the true gain from the generator's set level
//! to the modulator's input at every frequency (`Scenario::generator_to_modulator_gain_at`: the
//! generator's level error less the cable loss). Its sensor adds what a real one adds: its own
//! 0.8 % calibration error, mismatch with the chain's output (|Gamma_s| = 0.1 against the
//! sensor's 0.05, phase turning with frequency) and reading noise. The stored chain must recover
//! the true gain within its stated expanded uncertainty (k = 2), and RF must be off after
//! completion, cancel, a fault and the in-run range interlock.

use halfwave::config::Config;
use halfwave::engine::chain_run::{ChainCalibrationRequest, ChainRunResult};
use halfwave::engine::events::{ChainRunEnd, ProgressEvent};
use halfwave::engine::{Engine, SubmitError};
use halfwave::store::{ChainRunRecord, Store};
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use halfwave_units::Hz;
use std::path::Path;
use std::time::Duration;

const FREQUENCIES_HZ: [f64; 5] = [0.2e9, 1e9, 5e9, 10e9, 18e9];

/// One SCPI bench "sim" with the simulator's three instruments; the sensor's profile has short
/// timeouts so a silent sensor is found quickly.
fn scpi_config(dir: &Path, server: &SimServer, sensor_figures: bool) -> Config {
    scpi_config_with(dir, server, sensor_figures, "")
}

fn scpi_config_with(dir: &Path, server: &SimServer, sensor_figures: bool, extra: &str) -> Config {
    let profile = dir.join("sensor.toml");
    std::fs::write(
        &profile,
        "kind = \"power_sensor\"\nmeasure_timeout_ms = 600\n[connection]\ntimeout_ms = 600\nconnect_timeout_ms = 600\nreconnect_backoff_ms = 10\n",
    )
    .unwrap();
    let figures = if sensor_figures {
        "sensor_accuracy_percent = 3.0\nsensor_reflection_coefficient = 0.05\n"
    } else {
        ""
    };
    let figures = format!("{figures}{extra}");
    let text = format!(
        "data_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\n{figures}source = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\" }}\nsensor = {{ kind = \"scpi\", resource = \"{}\", profile = \"sensor.toml\" }}\n",
        dir.join("data").display(),
        server.resource(Role::RfSource),
        server.resource(Role::Analyzer),
        server.resource(Role::PowerSensor),
    );
    Config::from_toml(&text, &dir.join("halfwave.toml"), dir.to_path_buf())
        .expect("configuration parses")
}

async fn start(
    time_factor: f64,
    seed: u64,
    sensor_figures: bool,
) -> (tempfile::TempDir, SimServer, Store, Engine) {
    let dir = tempfile::tempdir().unwrap();
    let bench = SimBench::new(Scenario::builtin().unwrap(), seed).with_time_factor(time_factor);
    let server = SimServer::start(bench, SimServerConfig::any_free_ports())
        .await
        .unwrap();
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    let config = scpi_config(dir.path(), &server, sensor_figures);
    let engine = Engine::start(&config, store.clone()).await.unwrap();
    (dir, server, store, engine)
}

fn request(name: &str) -> ChainCalibrationRequest {
    ChainCalibrationRequest {
        bench: "sim".into(),
        name: name.into(),
        frequencies_hz: FREQUENCIES_HZ.to_vec(),
        levels_dbm: vec![-10.0, 0.0],
        readings_per_level: 5,
        max_expected_gain_db: 0.0,
        source_reflection_coefficient: 0.1,
        sensor_accuracy_percent: None,
        sensor_reflection_coefficient: None,
    }
}

/// Waits (up to 60 s) for the chain run to end.
async fn wait_for_end(store: &Store, id: i64) -> ChainRunRecord {
    for _ in 0..3000 {
        let run = store.chain_run(id).await.unwrap();
        if !matches!(run.state.as_str(), "queued" | "running") {
            return run;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    panic!("chain run {id} did not end within 60 s");
}

/// Waits (up to 10 s) until the simulated RF output is on.
async fn wait_for_rf_on(sim: &SimBench) {
    for _ in 0..1000 {
        if sim.rf_output_on() {
            return;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("the RF output never went on");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_stored_chain_recovers_the_true_gain_within_its_expanded_uncertainty() {
    let (_dir, server, store, engine) = start(0.0, 31, true).await;
    let sim = server.bench().clone();
    let mut events = engine.subscribe();
    let id = engine
        .submit_chain_calibration(request("bench-sim chain"), "test")
        .await
        .unwrap();
    let run = wait_for_end(&store, id).await;
    assert_eq!(run.state, "completed", "cause: {:?}", run.cause);
    // Its progress went out as events: one per frequency, then the end with the chain version.
    let mut seen = Vec::new();
    let finished = tokio::time::timeout(Duration::from_secs(10), async {
        loop {
            match events.recv().await.unwrap() {
                ProgressEvent::ChainFrequency {
                    chain_run_id,
                    completed_frequencies,
                    total_frequencies,
                    frequency_hz,
                    gain_db,
                    ..
                } if chain_run_id == id => {
                    assert_eq!(total_frequencies, FREQUENCIES_HZ.len());
                    assert_eq!(completed_frequencies, seen.len() + 1);
                    seen.push((frequency_hz, gain_db));
                }
                ProgressEvent::ChainFinished {
                    chain_run_id,
                    state,
                    chain_id,
                    bench,
                    ..
                } if chain_run_id == id => break (state, chain_id, bench),
                _ => {}
            }
        }
    })
    .await
    .expect("the chain calibration's events arrive");
    assert_eq!(
        finished,
        (
            ChainRunEnd::Completed,
            run.chain_calibration_id,
            "sim".to_string()
        )
    );
    assert!(!sim.rf_output_on(), "RF must be off after the calibration");
    assert!(sim.sensor_damage_events().is_empty());
    assert!(!sim.overdriven());

    let chain = store
        .chain_calibration(run.chain_calibration_id.unwrap())
        .await
        .unwrap();
    assert_eq!((chain.name.as_str(), chain.version), ("bench-sim chain", 1));
    assert_eq!(chain.points.len(), FREQUENCIES_HZ.len());
    // The events carried the stored gains.
    let stored: Vec<(f64, f64)> = chain
        .points
        .iter()
        .map(|p| (p.frequency_hz, p.gain_db))
        .collect();
    assert_eq!(seen, stored);
    let scenario = sim.scenario();
    for point in &chain.points {
        let truth = scenario.generator_to_modulator_gain_at(point.frequency()).0;
        let u = point
            .gain_uncertainty_db
            .expect("the sensor run states its uncertainty");
        let error = point.gain_db - truth;
        eprintln!(
            "{:>8.2} GHz  stored {:+.4} dB  true {truth:+.4} dB  error {error:+.4} dB  U(k=2) {:.4} dB",
            point.frequency_hz / 1e9,
            point.gain_db,
            2.0 * u
        );
        assert!(
            error.abs() <= 2.0 * u,
            "at {}: stored {:.4} dB, true {truth:.4} dB, error {error:.4} dB, U(k=2) {:.4} dB",
            point.frequency(),
            point.gain_db,
            2.0 * u
        );
        // The Type B terms dominate: 3 % rectangular is 0.074 dB, mismatch 0.1 x 0.05 is
        // 0.031 dB (U-shaped), so u is about 0.08 dB (hand computation).
        assert!((0.075..0.09).contains(&u), "u = {u} dB");
    }
    let result: ChainRunResult = serde_json::from_str(run.result.as_deref().unwrap()).unwrap();
    assert_eq!(result.frequencies.len(), FREQUENCIES_HZ.len());
    assert!(result.frequencies.iter().all(|f| f.readings.len() == 10));
    // Each frequency's calibration factor was set before its readings.
    let log = sim.command_log(Role::PowerSensor);
    for f in FREQUENCIES_HZ {
        let set = format!("SENSe:FREQuency {}", f as u64);
        assert!(log.contains(&set), "{set} not sent");
    }

    // A second calibration under the same name is its next version.
    let id = engine
        .submit_chain_calibration(request("bench-sim chain"), "test")
        .await
        .unwrap();
    let run = wait_for_end(&store, id).await;
    let chain = store
        .chain_calibration(run.chain_calibration_id.unwrap())
        .await
        .unwrap();
    assert_eq!(chain.version, 2);
    engine.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cancel_and_a_silent_sensor_leave_the_rf_off() {
    // Real instrument times: 50 ms a reading, so a calibration takes seconds.
    let (_dir, server, store, engine) = start(1.0, 32, true).await;
    let sim = server.bench().clone();
    let id = engine
        .submit_chain_calibration(request("cancelled"), "test")
        .await
        .unwrap();
    wait_for_rf_on(&sim).await;
    engine.cancel_chain_calibration(id, "test").await.unwrap();
    let run = wait_for_end(&store, id).await;
    assert_eq!(run.state, "cancelled", "cause: {:?}", run.cause);
    assert!(!sim.rf_output_on(), "RF must be off after cancel");
    assert!(run.chain_calibration_id.is_none());
    let err = engine
        .cancel_chain_calibration(id, "test")
        .await
        .unwrap_err();
    assert!(err.to_string().contains("cancelled"), "{err}");

    let id = engine
        .submit_chain_calibration(request("fault"), "test")
        .await
        .unwrap();
    wait_for_rf_on(&sim).await;
    server.faults(Role::PowerSensor).stop_answering();
    let silent = std::time::Instant::now();
    while sim.rf_output_on() {
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    let rf_on_for = silent.elapsed();
    println!("sensor silent: RF off after {rf_on_for:?}");
    let run = wait_for_end(&store, id).await;
    assert_eq!(run.state, "failed");
    let cause = run.cause.unwrap();
    // The reading is watched: the sensor's profile waits 600 ms for a reading, so the output
    // goes off 1.6 s after the reading began (that wait plus a second) and the cause says so.
    // Unwatched, the driver's error-queue check and its retry on a fresh connection held RF on
    // for about twice as long before the run's stop path could act.
    assert!(
        cause.contains("gave no reading within 1.6 s with the RF output on")
            && cause.contains("switched off first"),
        "{cause}"
    );
    // 1.6 s, plus the switch-off's 1.5 s budget and a loaded machine's delays.
    assert!(
        rf_on_for < Duration::from_millis(1600 + 1500 + 3000),
        "RF on for {rf_on_for:?} after the sensor fell silent"
    );
    assert!(!sim.rf_output_on(), "RF must be off after a sensor fault");
    server.faults(Role::PowerSensor).resume();
    engine.shutdown().await;
}

/// A source that stops answering with its output on during a chain calibration is given up on
/// after the step limit, as in a measurement run (README, "Safety under faults"): the run fails
/// naming the level change, the bench is held as `output_unconfirmed` while the daemon keeps
/// trying, and the output goes off once the source answers again. Before the limit, the driver's
/// timeouts, retries and reconnect checks held the run (and the bench's flag) for about a minute.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_silent_source_is_given_up_after_the_step_limit_and_held() {
    use halfwave::engine::safety::SOURCE_STEP_LIMIT;
    // Real instrument times: 20 readings of 50 ms at the first level (1 s) before the level
    // change the silence falls on.
    let (_dir, server, store, engine) = start(1.0, 34, true).await;
    let sim = server.bench().clone();
    let mut plan = request("silent source");
    plan.readings_per_level = 20;
    let id = engine.submit_chain_calibration(plan, "test").await.unwrap();
    wait_for_rf_on(&sim).await;
    server.faults(Role::RfSource).stop_answering();
    let silent = std::time::Instant::now();
    let run = wait_for_end(&store, id).await;
    let ended_after = silent.elapsed();
    println!("source silent: run ended after {ended_after:?}");
    assert_eq!(run.state, "failed");
    let cause = run.cause.unwrap_or_default();
    assert_eq!(SOURCE_STEP_LIMIT, Duration::from_secs(2));
    assert!(
        cause.contains("did not complete a level change within 2.0 s with the output on")
            && cause.contains("could not be confirmed off"),
        "{cause}"
    );
    // The rest of the level's readings (1 s), the step limit (2 s), the end of the frequency's
    // and the guard's switch-off budgets (1.5 s each), with a loaded machine's delays.
    assert!(
        ended_after < Duration::from_millis(1000 + 2000 + 3000 + 4000),
        "the run ended {ended_after:?} after the source fell silent"
    );
    let benches = engine.benches();
    let held = benches.iter().find(|b| b.name == "sim").unwrap();
    assert_eq!(
        held.safety_state,
        halfwave::engine::rf_safety::SafetyState::OutputUnconfirmed,
        "{held:?}"
    );
    // Once the source answers again, the keeper switches the output off.
    server.faults(Role::RfSource).resume();
    let answering = std::time::Instant::now();
    while sim.rf_output_on() {
        assert!(
            answering.elapsed() < Duration::from_secs(10),
            "RF still on 10 s after the source answers again"
        );
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    engine.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_range_interlock_stops_before_a_level_the_sensor_cannot_take() {
    let (_dir, server, store, engine) = start(0.0, 33, true).await;
    let sim = server.bench().clone();
    // The operator claims the chain loses at least 10 dB; it loses about 1 dB at 1 GHz, so
    // 15 dBm gives about 14 dBm and 25 dBm would give about 24 dBm, over the sensor's +20 dBm.
    let mut req = request("too much gain");
    req.frequencies_hz = vec![1e9];
    req.levels_dbm = vec![15.0, 25.0];
    req.max_expected_gain_db = -10.0;
    let id = engine.submit_chain_calibration(req, "test").await.unwrap();
    let run = wait_for_end(&store, id).await;
    assert_eq!(run.state, "failed");
    let cause = run.cause.unwrap();
    assert!(cause.contains("above its range"), "{cause}");
    assert!(!sim.rf_output_on());
    assert!(sim.sensor_damage_events().is_empty());
    let (_, level) = sim.rf_setting();
    assert!(level.0 < 20.0, "the 25 dBm level was never set ({level})");
    engine.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn requests_outside_the_limits_are_refused_naming_each_field() {
    let (_dir, server, _store, engine) = start(0.0, 34, false).await;
    let mut req = request("refused");
    req.levels_dbm = vec![15.0, 22.0];
    req.frequencies_hz = vec![1e9, 30e9];
    req.source_reflection_coefficient = 1.5;
    let Err(SubmitError::Invalid(invalid)) = engine.submit_chain_calibration(req, "test").await
    else {
        panic!("the request must be refused");
    };
    let fields: Vec<&str> = invalid.errors.iter().map(|e| e.field.as_str()).collect();
    for field in [
        "levels_dbm",
        "frequencies_hz",
        "source_reflection_coefficient",
        // The bench states no sensor figures and the request gives none.
        "sensor_accuracy_percent",
        "sensor_reflection_coefficient",
    ] {
        assert!(fields.contains(&field), "{field} not in {fields:?}");
    }
    // The engine's own flat-loss names are refused: a plan with a flat loss would take the
    // chain stored under one for its loss.
    let Err(SubmitError::Invalid(invalid)) = engine
        .submit_chain_calibration(request("flat-loss-2.00dB"), "test")
        .await
    else {
        panic!("a flat-loss name must be refused");
    };
    assert!(
        invalid
            .errors
            .iter()
            .any(|e| e.field == "name" && e.message.contains("\"flat-loss-\"")),
        "{:?}",
        invalid.errors
    );
    let mut req = request("no bench");
    req.bench = "elsewhere".into();
    let err = engine
        .submit_chain_calibration(req, "test")
        .await
        .unwrap_err();
    assert!(err.to_string().contains("no bench named"), "{err}");
    assert!(server
        .bench()
        .command_log(Role::PowerSensor)
        .iter()
        .all(|c| !c.starts_with("MEAS")));
    engine.shutdown().await;
}

mod api_support;

/// The whole path an operator takes: `halfwave chain calibrate` (the real binary) against the
/// daemon's API on the in-process simulated bench; the API's roles, 422s and OpenAPI entry.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_cli_and_the_api_run_a_chain_calibration() {
    use halfwave::api::tokens::Role as TokenRole;
    use halfwave::api::views::chain_runs::ChainRunView;

    let engine_app = api_support::spawn_app_with_engine(0.0).await;
    let app = &engine_app.app;
    let operator = app.token("lab-op", TokenRole::Operator).await;
    let viewer = app.token("lab-view", TokenRole::Viewer).await;
    let output = tokio::process::Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args([
            "chain",
            "calibrate",
            "sim bench chain",
            "--bench",
            "sim-bench",
            "--frequencies-hz",
            "1e9,10e9",
            "--levels-dbm=-5,0",
            "--max-expected-gain-db",
            "0",
            "--source-reflection",
            "0.1",
            "--sensor-accuracy-percent",
            "3",
            "--sensor-reflection",
            "0.05",
            "--url",
            &app.base,
            "--token",
            &operator,
            "--json",
        ])
        .env_remove("HALFWAVE_TOKEN")
        .output()
        .await
        .unwrap();
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let view: ChainRunView = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(view.state, "completed");
    assert!(!engine_app.sim.rf_output_on());
    assert!(view.chain_calibration_id.is_some());
    let chain: serde_json::Value = app
        .get(
            "/api/v1/chain-calibrations/sim%20bench%20chain",
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(chain["name"], "sim bench chain");
    let points = chain["points"].as_array().unwrap();
    assert_eq!(points.len(), 2);
    for p in points {
        let f = Hz(p["frequency_hz"].as_f64().unwrap());
        let truth = engine_app
            .sim
            .scenario()
            .generator_to_modulator_gain_at(f)
            .0;
        let u = p["gain_uncertainty_db"].as_f64().unwrap();
        assert!((p["gain_db"].as_f64().unwrap() - truth).abs() <= 2.0 * u);
    }

    // A viewer may read but not submit; a refused request names its fields.
    let body = serde_json::json!({
        "bench": "sim-bench", "name": "x", "frequencies_hz": [1e9], "levels_dbm": [0.0],
        "max_expected_gain_db": 0.0, "source_reflection_coefficient": 0.1
    });
    let response = app
        .post_json("/api/v1/chain-calibration-runs", Some(&viewer), &body)
        .await;
    assert_eq!(response.status(), 403);
    let response = app
        .post_json("/api/v1/chain-calibration-runs", Some(&operator), &body)
        .await;
    assert_eq!(response.status(), 422);
    let problem = api_support::problem(response).await.to_string();
    assert!(problem.contains("sensor_accuracy_percent"), "{problem}");
    // The same refusal through the CLI names the flags to change, with the request's fields.
    let refused = tokio::process::Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args([
            "chain",
            "calibrate",
            "x",
            "--bench",
            "sim-bench",
            "--frequencies-hz",
            "1e9",
            "--levels-dbm=0",
            "--readings",
            "1",
            "--max-expected-gain-db",
            "0",
            "--source-reflection",
            "0.1",
            "--url",
            &app.base,
            "--token",
            &operator,
        ])
        .env_remove("HALFWAVE_TOKEN")
        .output()
        .await
        .unwrap();
    assert!(!refused.status.success());
    let said = String::from_utf8_lossy(&refused.stderr);
    for flag in [
        "--readings (readings_per_level): must be 2 to 100, got 1",
        "--sensor-accuracy-percent (sensor_accuracy_percent): bench",
        "--sensor-reflection (sensor_reflection_coefficient): bench",
    ] {
        assert!(said.contains(flag), "{flag} in {said}");
    }
    let response = app
        .get(
            &format!("/api/v1/chain-calibration-runs/{}", view.id),
            Some(&viewer),
        )
        .await;
    assert_eq!(response.status(), 200);
    let response = app
        .post_json(
            &format!("/api/v1/chain-calibration-runs/{}/cancel", view.id),
            Some(&operator),
            &serde_json::json!({}),
        )
        .await;
    assert_eq!(
        response.status(),
        409,
        "a completed run cannot be cancelled"
    );
    let document = app
        .get("/api/v1/openapi.json", Some(&viewer))
        .await
        .text()
        .await
        .unwrap();
    assert!(document.contains("/api/v1/chain-calibration-runs/{chain_run_id}/cancel"));
}

mod engine_support;

/// A measurement run records the generator level accuracy the configuration states when it is
/// submitted; a daemon started later with another figure leaves the recorded one alone.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_run_keeps_the_source_level_accuracy_of_its_submission() {
    let dir = tempfile::tempdir().unwrap();
    let scenario = Scenario::builtin().unwrap();
    let bench = SimBench::new(scenario.clone(), 35).with_time_factor(1.0);
    let server = SimServer::start(bench, SimServerConfig::any_free_ports())
        .await
        .unwrap();
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    let chain = engine_support::upload_true_chain(&store, &scenario).await;
    let config = scpi_config_with(
        dir.path(),
        &server,
        true,
        "source_level_accuracy_db = 0.6\n",
    );
    let engine = Engine::start(&config, store.clone()).await.unwrap();
    let run_id = engine
        .submit(engine_support::plan(&chain), "test")
        .await
        .unwrap();
    engine.cancel(run_id, "test").await.unwrap();
    engine.shutdown().await;
    let recorded = store.run(run_id).await.unwrap().source_level_accuracy_db;
    assert_eq!(recorded, Some(0.6));
    let config = scpi_config_with(
        dir.path(),
        &server,
        true,
        "source_level_accuracy_db = 0.2\n",
    );
    let engine = Engine::start(&config, store.clone()).await.unwrap();
    assert_eq!(engine.source_level_accuracy("sim").map(|d| d.0), Some(0.2));
    let recorded = store.run(run_id).await.unwrap().source_level_accuracy_db;
    assert_eq!(recorded, Some(0.6));
    engine.shutdown().await;
}
