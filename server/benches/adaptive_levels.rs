//! Adaptive levels against the blind ramp: analyzer sweeps, wall time and V_pi, side by side.
//!
//! The same simulated modulator (the built-in scenario's, on the in-process simulated bench with
//! its realistic instrument times: 0.4 s per analyzer sweep, 20 ms per source change) is
//! calibrated at the demo's 21 frequencies, 0.2 to 20 GHz, through the demo's measured drive
//! chain, three times:
//! 1. the blind ramp: 0 to 20 dBm in 1.25 dB steps (17 levels), as the demo;
//! 2. adaptive levels over the same range with target u(V_pi)/V_pi = 0.003, on a device record
//!    with no history (the engine starts low at the first frequency, then from the previous
//!    frequency's V_pi);
//! 3. the same with the blind run's record as history (the engine starts from the stored V_pi).
//!
//! Targets (the plan form's purpose): adaptive spends at most a third of the blind ramp's
//! analyzer sweeps, and its V_pi agrees with the blind run's within 0.3 % at every frequency.
//! Exits non-zero if either is missed.
//!
//! Run: `cargo bench -p halfwave-server --bench adaptive_levels` (about four minutes at real
//! instrument times; `HALFWAVE_BENCH_TIME_FACTOR=0.1` scales the simulated instrument times for a
//! quicker look, which leaves the sweep counts and V_pi unchanged).

mod support;

use halfwave::cli::demo::{demo_frequencies_hz, RAMP_START_DBM, RAMP_STEP_DB, RAMP_STOP_DBM, SEED};
use halfwave::engine::plan::{ChainSpec, FrequencySpec, LevelSpec, PlanRequest};
use halfwave::engine::Engine;
use halfwave::store::ChainCalibrationPoint;
use halfwave_drivers::sim::Scenario;
use halfwave_units::{Db, Dbm, Hz};
use std::time::Instant;

const CHAIN: &str = "adaptive benchmark chain";
const TARGET: f64 = 0.003;
const MAX_SWEEP_SHARE: f64 = 1.0 / 3.0;
const MAX_V_PI_DIFFERENCE: f64 = 0.003;

struct Outcome {
    name: &'static str,
    sweeps: i64,
    points: usize,
    wall_s: f64,
    /// (frequency, V_pi, u(V_pi)) per frequency.
    v_pi: Vec<(f64, f64, f64)>,
}

fn plan(serial: &str, levels: LevelSpec, rf_limit_dbm: f64) -> PlanRequest {
    let frequencies = demo_frequencies_hz();
    let mut plan = support::plan(serial, &frequencies);
    plan.device.rf_input_limit_dbm = Dbm(rf_limit_dbm);
    plan.chain = ChainSpec::Stored {
        name: CHAIN.into(),
        version: None,
    };
    plan.frequencies = FrequencySpec::List {
        values_hz: frequencies,
    };
    plan.levels = levels;
    plan
}

async fn calibrate(engine: &Engine, name: &'static str, plan: PlanRequest) -> Outcome {
    let started = Instant::now();
    let run_id = support::run_to_completion(engine, plan).await;
    let wall_s = started.elapsed().as_secs_f64();
    let store = engine.store();
    let sweeps = store
        .analyzer_sweeps(run_id)
        .await
        .unwrap()
        .iter()
        .map(|(_, n)| n)
        .sum();
    let points = store.points_of_run(run_id).await.unwrap().len();
    let v_pi = store
        .frequency_results(run_id)
        .await
        .unwrap()
        .iter()
        .map(|r| (r.frequency_hz, r.v_pi_volts, r.v_pi_uncertainty_volts))
        .collect();
    Outcome {
        name,
        sweeps,
        points,
        wall_s,
        v_pi,
    }
}

fn main() {
    if !std::env::args().any(|a| a == "--bench") {
        println!(
            "adaptive_levels: run with `cargo bench -p halfwave-server --bench adaptive_levels`"
        );
        return;
    }
    let time_factor: f64 = std::env::var("HALFWAVE_BENCH_TIME_FACTOR")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(1.0);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let dir = tempfile::tempdir().unwrap();
    let outcomes = runtime.block_on(async {
        let (engine, _sim) =
            support::sim_engine(&dir.path().join("adaptive.db"), SEED, time_factor).await;
        let scenario = Scenario::builtin().unwrap();
        let chain: Vec<ChainCalibrationPoint> = demo_frequencies_hz()
            .into_iter()
            .map(|f| {
                ChainCalibrationPoint::new(
                    Hz(f),
                    Db(scenario.level_error_at(Hz(f)).0 - scenario.chain_loss_at(Hz(f)).0),
                )
            })
            .collect();
        engine
            .store()
            .create_chain_calibration(CHAIN, "bench", &chain)
            .await
            .unwrap();
        let limit = scenario.modulator.max_rf_input_dbm;
        let ramp = LevelSpec::Ramp {
            start_dbm: Dbm(RAMP_START_DBM),
            stop_dbm: Dbm(RAMP_STOP_DBM),
            step_db: Db(RAMP_STEP_DB),
        };
        let adaptive = LevelSpec::Adaptive {
            min_dbm: Dbm(RAMP_START_DBM),
            max_dbm: Dbm(RAMP_STOP_DBM),
            target_relative_uncertainty: TARGET,
            max_points: None,
            max_step_db: None,
        };
        let serial = scenario.modulator.serial.clone();
        let blind = calibrate(&engine, "blind ramp", plan(&serial, ramp, limit)).await;
        let fresh = calibrate(
            &engine,
            "adaptive, no history",
            plan("ADAPTIVE-FRESH-RECORD", adaptive.clone(), limit),
        )
        .await;
        let known = calibrate(
            &engine,
            "adaptive, with history",
            plan(&serial, adaptive, limit),
        )
        .await;
        engine.shutdown().await;
        vec![blind, fresh, known]
    });

    let blind = &outcomes[0];
    println!(
        "instrument time factor {time_factor}; target u(V_pi)/V_pi {TARGET} for the adaptive runs"
    );
    println!(
        "{:<24} {:>8} {:>7} {:>10} {:>12} {:>14} {:>16}",
        "plan", "sweeps", "points", "wall s", "sweep share", "median u/V_pi", "max |dV_pi| %"
    );
    let mut ok = true;
    for o in &outcomes {
        let mut rel: Vec<f64> = o.v_pi.iter().map(|(_, v, u)| u / v).collect();
        rel.sort_by(f64::total_cmp);
        let median = rel.get(rel.len() / 2).copied().unwrap_or(f64::NAN);
        let worst = blind
            .v_pi
            .iter()
            .map(|(f, v, _)| {
                o.v_pi
                    .iter()
                    .find(|(g, _, _)| g == f)
                    .map_or(f64::INFINITY, |(_, w, _)| ((w - v) / v).abs())
            })
            .fold(0.0, f64::max);
        let share = o.sweeps as f64 / blind.sweeps as f64;
        println!(
            "{:<24} {:>8} {:>7} {:>10.1} {:>12.3} {:>14.2e} {:>16.3}",
            o.name,
            o.sweeps,
            o.points,
            o.wall_s,
            share,
            median,
            worst * 100.0
        );
        if o.name != blind.name {
            ok &= share <= MAX_SWEEP_SHARE && worst <= MAX_V_PI_DIFFERENCE;
            ok &= o.v_pi.len() == blind.v_pi.len();
        }
    }
    if !ok {
        eprintln!(
            "target missed: adaptive must use at most {:.3} of the blind ramp's sweeps and agree within {:.1} % at every frequency",
            MAX_SWEEP_SHARE,
            MAX_V_PI_DIFFERENCE * 100.0
        );
        std::process::exit(1);
    }
}
