//! Shared helpers of the engine tests: the calibration plan of the invented modulator, the
//! simulated bench's true chain calibration, and waiting for a run's end.
//!
//! The simulated bench is the reference: its scenario states the modulator's true V_pi at every
//! frequency, and the chain calibration given to the engine is what a lab measures end to end with
//! a power meter: the scenario's cable loss plus the generator's level error at each frequency.

#![allow(dead_code)]

use halfwave::engine::events::ProgressEvent;
use halfwave::engine::plan::{
    AnalyzerSpec, ChainSpec, DeviceSpec, FrequencySpec, LevelSpec, PlanRequest,
};
use halfwave::store::{ChainCalibrationPoint, Store};
use halfwave_drivers::sim::{Scenario, SimBench};
use halfwave_units::{Db, Dbm, Hz};
use std::time::Duration;

/// The plan's frequencies: 0.2 to 20 GHz.
pub const FREQUENCIES_HZ: [f64; 6] = [0.2e9, 0.5e9, 1.5e9, 4e9, 10e9, 20e9];
/// Levels per frequency: 0 to 20 dBm in 2.5 dB steps.
pub const LEVELS: usize = 9;
/// Points of an uninterrupted run.
pub const POINTS: usize = FREQUENCIES_HZ.len() * LEVELS;

/// The calibration plan on bench "sim" with the stored chain calibration `chain_name`.
pub fn plan(chain_name: &str) -> PlanRequest {
    PlanRequest {
        device: DeviceSpec {
            serial: "EG-PM-0042".into(),
            model: "thin-film phase modulator (simulated)".into(),
            rf_input_limit_dbm: Dbm(27.0),
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
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(20.0),
            step_db: Db(2.5),
        },
        settle_s: 0.0,
        averages: 1,
        analyzer: AnalyzerSpec::default(),
        reference_trace: true,
        carrier_tracking: true,
        note: String::new(),
    }
}

/// The chain calibration of the simulated bench at the plan's frequencies, with every gain
/// `offset` off the truth (0 dB: the true chain).
pub fn chain_points_off_by(scenario: &Scenario, offset: Db) -> Vec<ChainCalibrationPoint> {
    FREQUENCIES_HZ
        .iter()
        .map(|&f| {
            let f = Hz(f);
            ChainCalibrationPoint::new(
                f,
                Db(scenario.level_error_at(f).0 - scenario.chain_loss_at(f).0 + offset.0),
            )
        })
        .collect()
}

/// Stores the true chain calibration as "sim-chain" and returns its name.
pub async fn upload_true_chain(store: &Store, scenario: &Scenario) -> String {
    store
        .create_chain_calibration("sim-chain", "test", &chain_points_off_by(scenario, Db(0.0)))
        .await
        .expect("chain calibration stored");
    "sim-chain".into()
}

/// Waits (up to 300 s) for the run's `finished` event and returns its state and cause.
pub async fn wait_for_end(
    events: &mut tokio::sync::broadcast::Receiver<ProgressEvent>,
    run_id: i64,
) -> (String, Option<String>) {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(300);
    loop {
        let ev = tokio::time::timeout_at(deadline, events.recv())
            .await
            .expect("run finished in time");
        if let Ok(ProgressEvent::Finished {
            run_id: id,
            state,
            cause,
        }) = ev
        {
            if id == run_id {
                return (state.as_str().to_string(), cause);
            }
        }
    }
}

/// Asserts that every fitted V_pi of a run is within `tolerance` (relative) of the scenario's.
pub fn assert_v_pi_within(
    results: &[halfwave::store::FrequencyResultRecord],
    scenario: &Scenario,
    tolerance: f64,
) {
    assert_eq!(results.len(), FREQUENCIES_HZ.len());
    for r in results {
        let truth = scenario.v_pi_at(Hz(r.frequency_hz)).0;
        let error = (r.v_pi_volts - truth) / truth;
        assert!(
            error.abs() < tolerance,
            "at {} GHz: V_pi {} V (u {}), scenario {} V, error {:.3} %",
            r.frequency_hz / 1e9,
            r.v_pi_volts,
            r.v_pi_uncertainty_volts,
            truth,
            error * 100.0
        );
    }
}

/// Puts a simulated source's output on, as a crashed process may have left it.
pub async fn leave_rf_on(sim: &SimBench) {
    use halfwave_drivers::RfSource;
    let mut source = sim.rf_source();
    source.set_output(true).await.expect("simulated output on");
    assert!(sim.rf_output_on());
}
