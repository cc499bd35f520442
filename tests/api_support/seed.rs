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
    ChainCalibrationPoint, NewDevice, NewFrequencyResult, NewPoint, NewRun, RunProvenance,
    RunState, Store,
};
use halfwave::units::{Db, Dbm, Hz, Nanometers, VoltsPeak};

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
            provenance: Default::default(),
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
                    v_peak: VoltsPeak(v_peak),
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
        let excluded = serde_json::json!([]);
        save_result(store, run.id, fi, (f, v_pi, uncertainty), excluded).await;
        results.push((f, v_pi, uncertainty));
    }
    complete(store, run.id).await;
    SeededRun {
        run_id: run.id,
        point_ids,
        results,
    }
}

/// What [`seed_recorded_run`] stored, for the report checks.
pub struct RecordedRun {
    pub run_id: i64,
    /// (frequency, V_pi, uncertainty) as stored.
    pub results: Vec<(f64, f64, f64)>,
    /// The source's and analyzer's invented identities, in that order.
    pub identities: [halfwave::units::Identity; 2],
    pub token_id: i64,
}

/// A completed run with everything a calibration record holds, written through the store as the
/// engine would: provenance (software, method, token id, limits), both instruments linked with
/// their connection notes, three V_pi results (one with an excluded point) and a plan note.
/// `hostile` (markup) goes into the device serial, the note, an instrument's firmware, the
/// connection notes and the excluded point's reason, so a report must escape every one of them.
pub async fn seed_recorded_run(store: &Store, hostile: &str, token_id: i64) -> RecordedRun {
    let serial = format!("PM-9{hostile}");
    let (device_id, chain_id) = seed_device(store, &serial).await;
    let plan = serde_json::json!({
        "device": {"serial": serial, "model": "demo phase modulator", "rf_input_limit_dbm": 27.0, "wavelength_nm": 1550.0},
        "bench": "bench-a",
        "chain": {"kind": "stored", "name": format!("{serial} chain")},
        "frequencies": {"kind": "list", "values_hz": [1e9, 5e9, 9e9]},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 12.0, "step_db": 3.0},
        "settle_s": 0.2,
        "averages": 2,
        "note": format!("overnight check {hostile}"),
    });
    let run = store
        .create_run(&NewRun {
            plan,
            device_id,
            bench_name: "bench-a".to_string(),
            chain_calibration_id: chain_id,
            submitted_by: "lab-a-operator".to_string(),
            provenance: RunProvenance {
                software_version: Some("halfwave 0.1.0 (git 0123456789ab)".to_string()),
                analysis_method: Some(halfwave::analysis::ANALYSIS_METHOD.to_string()),
                submitted_by_token_id: Some(token_id),
                hard_limit_at_modulator: Some(Dbm(24.0)),
                planned_max_at_modulator: Some(Dbm(10.5)),
                source_level_accuracy: None,
            },
        })
        .await
        .expect("run stored");
    store
        .transition_run(run.id, RunState::Running, None)
        .await
        .expect("run started");
    let identities = [
        halfwave::units::Identity {
            manufacturer: "Example Signal Works".to_string(),
            model: "SG-40".to_string(),
            serial: "SGW-000123".to_string(),
            firmware: format!("2.1{hostile}"),
        },
        halfwave::units::Identity {
            manufacturer: "Example Optics Lab".to_string(),
            model: "HR-OSA-7".to_string(),
            serial: "EOL-004567".to_string(),
            firmware: "5.0.3".to_string(),
        },
    ];
    for (role, identity, port) in [
        ("source", &identities[0], 5025),
        ("analyzer", &identities[1], 5026),
    ] {
        let instrument = store
            .record_instrument_seen(identity, &format!("TCPIP::192.0.2.10::{port}::SOCKET"))
            .await
            .expect("instrument stored");
        let notes = serde_json::json!([{"item": "frequency axis", "value": format!("start_stop in hz {hostile}")}]);
        store
            .link_run_instrument(run.id, role, instrument.id, &notes.to_string())
            .await
            .expect("instrument linked");
    }
    let mut results = Vec::new();
    for (fi, (f, v_pi, u)) in [
        (1e9, 3.1234, 0.0123),
        (5e9, 4.5678, 0.0234),
        (9e9, 6.4321, 0.0456),
    ]
    .into_iter()
    .enumerate()
    {
        let excluded = if fi == 1 {
            serde_json::json!([{"level_index": 4, "generator_level_dbm": 12.0, "reason": format!("off the line by 5 sigma {hostile}")}])
        } else {
            serde_json::json!([])
        };
        save_result(store, run.id, fi, (f, v_pi, u), excluded).await;
        results.push((f, v_pi, u));
    }
    complete(store, run.id).await;
    RecordedRun {
        run_id: run.id,
        results,
        identities,
        token_id,
    }
}

/// Stores one frequency's V_pi result, `(frequency_hz, v_pi, uncertainty)`, as the engine's fit
/// would.
async fn save_result(
    store: &Store,
    run_id: i64,
    frequency_index: usize,
    (f, v_pi, u): (f64, f64, f64),
    excluded_points: serde_json::Value,
) {
    store
        .save_frequency_result(&NewFrequencyResult {
            run_id,
            frequency_index: u32::try_from(frequency_index).expect("small index"),
            frequency: Hz(f),
            v_pi: VoltsPeak(v_pi),
            v_pi_uncertainty: VoltsPeak(u),
            excluded_points,
            fit: serde_json::json!({"method": "seeded"}),
        })
        .await
        .expect("result stored");
}

/// Marks a seeded run completed.
async fn complete(store: &Store, run_id: i64) {
    store
        .transition_run(run_id, RunState::Completed, None)
        .await
        .expect("run completed");
}
