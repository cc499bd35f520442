//! A whole calibration against the independent bench (`independent_support`): SCPI instruments
//! written from the standards, not from the project's simulator, whose analyzer has no
//! `FREQuency:STARt?`/`STOP?` and no `INITiate:CONTinuous`. The daemon is told only the two
//! resource strings and a three-line analyzer profile (`single_sweep_mode = ""`); the axis is
//! found by probing and the source's ranges by its MINimum/MAXimum queries.
//!
//! Check: every fitted V_pi within 0.3 % of the bench's truth (`independent_support::true_v_pi`),
//! a stated 2.9 V x (1 + 0.035 sqrt(f/GHz)) of an invented modulator.

mod engine_support;
mod independent_support;

use engine_support::{plan, wait_for_end, FREQUENCIES_HZ, POINTS};
use halfwave::config::Config;
use halfwave::engine::Engine;
use halfwave::store::{ChainCalibrationPoint, Store};
use halfwave_units::{Db, Hz};
use independent_support::{true_v_pi, IndependentBench, Role};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_whole_calibration_against_an_independent_bench_by_configuration_only() {
    let dir = tempfile::tempdir().unwrap();
    let bench = IndependentBench::start().await;
    // The only adaptation: this analyzer sweeps only when told to and has no continuous mode.
    let profile = dir.path().join("analyzer.toml");
    std::fs::write(
        &profile,
        "kind = \"spectrum_analyzer\"\n[commands]\nsingle_sweep_mode = \"\"\n",
    )
    .unwrap();
    let text = format!(
        "data_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\", profile = \"{}\" }}\n",
        dir.path().join("data").display(),
        bench.resource(Role::Source),
        bench.resource(Role::Analyzer),
        profile.display(),
    );
    let config = Config::from_toml(&text, &dir.path().join("halfwave.toml"), dir.path().into())
        .expect("configuration parses");
    let store = Store::open(dir.path().join("h.db").to_str().unwrap())
        .await
        .unwrap();
    // The generator drives the modulator directly: a flat 0 dB chain.
    let chain: Vec<ChainCalibrationPoint> = FREQUENCIES_HZ
        .iter()
        .map(|&f| ChainCalibrationPoint::new(Hz(f), Db(0.0)))
        .collect();
    store
        .create_chain_calibration("direct", "test", &chain)
        .await
        .unwrap();
    let engine = Engine::start(&config, store.clone()).await.unwrap();
    let mut events = engine.subscribe();
    let run_id = engine.submit(plan("direct"), "test").await.unwrap();
    let (state, cause) = wait_for_end(&mut events, run_id).await;
    assert_eq!(state, "completed", "cause: {cause:?}");
    assert_eq!(store.points_of_run(run_id).await.unwrap().len(), POINTS);

    let results = store.frequency_results(run_id).await.unwrap();
    assert_eq!(results.len(), FREQUENCIES_HZ.len());
    for r in &results {
        let truth = true_v_pi(r.frequency_hz);
        let error = (r.v_pi_volts - truth) / truth;
        println!(
            "{:>5} GHz: V_pi {:.5} V (u {:.5}), truth {:.5} V, error {:+.4} %",
            r.frequency_hz / 1e9,
            r.v_pi_volts,
            r.v_pi_uncertainty_volts,
            truth,
            error * 100.0
        );
        assert!(
            error.abs() < 0.003,
            "at {} GHz: V_pi {} V (u {}), truth {} V, error {:.3} %",
            r.frequency_hz / 1e9,
            r.v_pi_volts,
            r.v_pi_uncertainty_volts,
            truth,
            error * 100.0
        );
    }
    {
        let truth = bench.truth.lock().unwrap();
        assert!(!truth.output_on, "RF must be off after the run");
        // The optional nodes were asked once each at connect, never again.
        let asked = |q: &str| truth.analyzer_log.iter().filter(|c| *c == q).count();
        assert_eq!(asked("FREQuency:STARt?"), 1, "probed once");
        assert_eq!(asked("INITiate:CONTinuous OFF"), 0);
        assert!(truth.source_log.iter().any(|c| c == "POWer? MAXimum"));
    }
    engine.shutdown().await;
}
