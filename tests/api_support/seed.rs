//! Stored data for the read tests and the load benchmark, written through the store's own API:
//! a device, a drive-chain calibration and completed runs whose points carry synthetic comb
//! traces (Bessel line powers from the analysis' synthetic generator) and the analysis document
//! the engine would store for them (`analyze_trace` on the same trace, or its error).
//!
//! The numbers are invented for plumbing only: what is checked against them is that the API
//! returns what the store holds, not the physics.

use halfwave::analysis::synthetic::SyntheticComb;
use halfwave::analysis::{analyze_trace, AnalysisOptions};
use halfwave::store::{
    ChainCalibrationPoint, NewDevice, NewFrequencyResult, NewPoint, NewRun, RunState, Store,
};
use halfwave::units::{Db, Dbm, Hz, Nanometers, Volts};

/// What one seeded run holds.
pub struct SeededRun {
    pub run_id: i64,
    pub point_ids: Vec<i64>,
    /// (frequency, V_pi, uncertainty) as stored.
    pub results: Vec<(f64, f64, f64)>,
}

/// Registers `serial` and a flat chain calibration; returns (device id, calibration id).
pub async fn seed_device(store: &Store, serial: &str) -> (i64, i64) {
    let device = store
        .upsert_device(&NewDevice {
            serial: serial.to_string(),
            model: "demo phase modulator".to_string(),
            rf_input_limit: Dbm(27.0),
            wavelength: Nanometers(1550.0),
        })
        .await
        .expect("device stored");
    let chain = store
        .create_chain_calibration(
            &format!("{serial} chain"),
            "seed",
            &[
                ChainCalibrationPoint::new(Hz(1e9), Db(-1.5)),
                ChainCalibrationPoint::new(Hz(40e9), Db(-4.0)),
            ],
        )
        .await
        .expect("chain stored");
    (device.id, chain.id)
}

/// Stores a completed run over `frequencies_hz` x `levels_dbm` whose V_pi at f is
/// `v_pi_at(f)`; `trace_points` sets the size of each stored trace.
pub async fn seed_completed_run(
    store: &Store,
    device_id: i64,
    chain_id: i64,
    frequencies_hz: &[f64],
    levels_dbm: &[f64],
    v_pi_at: impl Fn(f64) -> f64,
    trace_points: usize,
) -> SeededRun {
    let run = store
        .create_run(&NewRun {
            plan: serde_json::json!({"seeded": true, "frequencies_hz": frequencies_hz, "levels_dbm": levels_dbm}),
            device_id,
            bench_name: "bench-a".to_string(),
            chain_calibration_id: chain_id,
            submitted_by: "seed".to_string(),
        })
        .await
        .expect("run stored");
    store
        .transition_run(run.id, RunState::Running, None)
        .await
        .expect("run started");
    let mut point_ids = Vec::new();
    let mut results = Vec::new();
    for (fi, &f) in frequencies_hz.iter().enumerate() {
        let v_pi = v_pi_at(f);
        for (li, &level) in levels_dbm.iter().enumerate() {
            let at_modulator = level - 1.5;
            let v_peak = (2.0 * 50.0 * 10f64.powf((at_modulator - 30.0) / 10.0)).sqrt();
            let beta = std::f64::consts::PI * v_peak / v_pi;
            let mut comb = SyntheticComb::centred(Hz(193.4e12), Hz(0.0), Hz(f), beta, 4.5);
            comb.points = trace_points;
            let trace = comb.trace(&mut || 0.0).expect("synthetic trace");
            // What the engine stores: the whole analysis, or the reason it failed.
            let analysis = match analyze_trace(&trace, Hz(f), None, &AnalysisOptions::default()) {
                Ok(result) => serde_json::to_value(&result).expect("analysis as JSON"),
                Err(e) => serde_json::json!({ "error": e.to_string() }),
            };
            let lines: Vec<serde_json::Value> = (-3..=3)
                .map(|n| {
                    serde_json::json!({
                        "order": n,
                        "frequency_hz": 193.4e12 + f64::from(n) * f,
                        "power_dbm": comb.line_power(n).0,
                        "above_floor": true
                    })
                })
                .collect();
            let point_id = store
                .commit_point(&NewPoint {
                    run_id: run.id,
                    frequency_index: u32::try_from(fi).expect("small index"),
                    level_index: u32::try_from(li).expect("small index"),
                    frequency: Hz(f),
                    generator_level: Dbm(level),
                    level_at_modulator: Dbm(at_modulator),
                    v_peak: Volts(v_peak),
                    modulation_index: Some(beta),
                    modulation_index_uncertainty: Some(0.002),
                    asymmetry: Some(Db(0.0)),
                    line_table: serde_json::Value::Array(lines),
                    analysis,
                    trace: &trace,
                    analyzer_sweeps: 1,
                })
                .await
                .expect("point stored");
            point_ids.push(point_id);
        }
        let uncertainty = 0.01 * v_pi;
        store
            .save_frequency_result(&NewFrequencyResult {
                run_id: run.id,
                frequency_index: u32::try_from(fi).expect("small index"),
                frequency: Hz(f),
                v_pi: Volts(v_pi),
                v_pi_uncertainty: Volts(uncertainty),
                excluded_points: serde_json::json!([]),
                fit: serde_json::json!({"method": "seeded"}),
            })
            .await
            .expect("result stored");
        results.push((f, v_pi, uncertainty));
    }
    store
        .transition_run(run.id, RunState::Completed, None)
        .await
        .expect("run completed");
    SeededRun {
        run_id: run.id,
        point_ids,
        results,
    }
}
