//! The simulated bench and the measurement core agree: spectra rendered by the simulator from
//! the Jacobi-Anger expansion (NIST DLMF 10.12: line powers J_n(beta)^2) and analysed by
//! `analyze_trace` + `fit_v_pi` give back the scenario's V_pi within 1 %.

use halfwave::analysis::{analyze_trace, fit_v_pi, AnalysisOptions, DrivePoint};
use halfwave_drivers::sim::{Scenario, SimBench};
use halfwave_drivers::{AnalyzerSettings, RfSource, SpectrumAnalyzer};
use halfwave_units::{Dbm, Hz};

#[tokio::test]
async fn a_nine_level_sweep_on_the_simulator_gives_its_v_pi_within_one_percent() {
    let scenario = Scenario::builtin().unwrap();
    let bench = SimBench::new(scenario.clone(), 21).with_time_factor(0.0);
    let mut source = bench.rf_source();
    let mut analyzer = bench.analyzer();
    let f = Hz(2e9);
    source.set_frequency(f).await.unwrap();
    let mut points = Vec::new();
    for i in 0..9 {
        let level = Dbm(3.0 + 2.0 * i as f64);
        source.set_level(level).await.unwrap();
        source.set_output(true).await.unwrap();
        analyzer
            .configure(&AnalyzerSettings {
                center: bench.laser_frequency(),
                span: Hz(18.0 * f.0),
                resolution_bandwidth: Hz(100e6),
                points: 10_001,
            })
            .await
            .unwrap();
        analyzer.sweep().await.unwrap();
        let trace = analyzer.fetch_trace().await.unwrap();
        let analysis = analyze_trace(&trace, f, None, &AnalysisOptions::default()).unwrap();
        points.push(DrivePoint {
            v_peak: scenario.level_at_modulator(level, f).to_volts_peak(),
            modulation_index: analysis.modulation_index.value,
            uncertainty: analysis.modulation_index.uncertainty,
        });
    }
    source.safe_off().await.unwrap();
    let fit = fit_v_pi(&points).unwrap();
    let truth = scenario.v_pi_at(f).0;
    let error = (fit.v_pi.0 - truth) / truth;
    assert!(
        error.abs() < 0.01,
        "V_pi {} V against the scenario's {} V ({:.3} %)",
        fit.v_pi.0,
        truth,
        error * 100.0
    );
    assert!(fit.excluded.is_empty(), "{:?}", fit.excluded);
    assert!(!bench.rf_output_on());
}

/// Closely spaced lines at a low modulation frequency (0.2 GHz, 20 MHz resolution): between strong
/// lines the trace never reaches the analyzer's floor, because each line carries the Lorentzian
/// wings of the laser (the scenario's 50 kHz linewidth). That smooth background is not noise; the
/// analysis must still measure every level of the ramp, and the modulation index must agree with
/// the simulator's truth (J_n(beta)^2 line powers, NIST DLMF 10.12) within 2 %.
#[tokio::test]
async fn closely_spaced_lines_over_laser_wings_are_still_measured() {
    let scenario = Scenario::builtin().unwrap();
    let bench = SimBench::new(scenario, 7).with_time_factor(0.0);
    let mut source = bench.rf_source();
    let mut analyzer = bench.analyzer();
    let f = Hz(0.2e9);
    source.set_frequency(f).await.unwrap();
    for level in [10.0, 14.0, 15.0, 17.5, 20.0] {
        source.set_level(Dbm(level)).await.unwrap();
        source.set_output(true).await.unwrap();
        analyzer
            .configure(&AnalyzerSettings {
                center: bench.laser_frequency(),
                span: Hz(14.0 * f.0),
                resolution_bandwidth: Hz(20e6),
                points: 10_001,
            })
            .await
            .unwrap();
        analyzer.sweep().await.unwrap();
        let trace = analyzer.fetch_trace().await.unwrap();
        let analysis = analyze_trace(&trace, f, None, &AnalysisOptions::default())
            .unwrap_or_else(|e| panic!("{level} dBm at 0.2 GHz not analysed: {e}"));
        let truth = bench.modulation_index();
        let error = (analysis.modulation_index.value - truth) / truth;
        assert!(
            error.abs() < 0.02,
            "{level} dBm: beta {} (u {}), truth {truth}",
            analysis.modulation_index.value,
            analysis.modulation_index.uncertainty
        );
    }
    source.safe_off().await.unwrap();
}
