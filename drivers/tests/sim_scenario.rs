//! Scenario files: the built-in one parses and holds only invented names; bad files are refused
//! with a message naming the key; the tabulated V_pi model and the drive-chain table interpolate.

use halfwave_drivers::sim::scenario::{ScenarioError, DEFAULT_SCENARIO_TOML};
use halfwave_drivers::sim::Scenario;
use halfwave_units::{Dbm, Hz};

fn with_replaced(from: &str, to: &str) -> Result<Scenario, ScenarioError> {
    assert!(
        DEFAULT_SCENARIO_TOML.contains(from),
        "{from} not in the default"
    );
    Scenario::from_toml_str(&DEFAULT_SCENARIO_TOML.replacen(from, to, 1))
}

fn message_of(result: Result<Scenario, ScenarioError>) -> String {
    match result {
        Ok(_) => panic!("the scenario was accepted"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn the_builtin_scenario_parses_and_is_plausible() {
    let s = Scenario::builtin().unwrap();
    assert!(s.name.contains("invented"));
    // 1550.12 nm is 193.4 THz (f = c / lambda; c exact by SI definition).
    assert!((s.laser_frequency().value() - 193.398_6e12).abs() < 0.05e12);
    // The modulator is not overdriven by the source's own maximum in the built-in bench.
    let worst = s.level_at_modulator(
        Dbm(s.rf_source.max_level_dbm),
        Hz(s.rf_source.min_frequency_hz),
    );
    assert!(worst.value() < s.modulator.max_rf_input_dbm);
}

#[test]
fn bad_values_are_refused_naming_the_key() {
    let m = message_of(with_replaced(
        "wavelength_nm = 1550.12",
        "wavelength_nm = -1550.12",
    ));
    assert!(m.contains("laser.wavelength_nm"), "{m}");
    let m = message_of(with_replaced("sweep_time_s = 0.4", "sweep_time_s = 1e30"));
    assert!(m.contains("analyzer.sweep_time_s"), "{m}");
    let m = message_of(with_replaced("min_points = 101", "min_points = 1"));
    assert!(m.contains("min_points"), "{m}");
    let m = message_of(with_replaced(
        "resolution_bandwidths_hz = [1e6, 2e6",
        "resolution_bandwidths_hz = [2e6, 1e6",
    ));
    assert!(m.contains("resolution_bandwidths_hz"), "{m}");
    let m = message_of(with_replaced(
        "[[1e8, 0.6], [1e9, 1.1]",
        "[[1e9, 0.6], [1e8, 1.1]",
    ));
    assert!(m.contains("drive_chain.loss_db"), "{m}");
    // The laser must sit inside the analyzer's range.
    let m = message_of(with_replaced(
        "wavelength_nm = 1550.12",
        "wavelength_nm = 1310.0",
    ));
    assert!(m.contains("analyzer's frequency range"), "{m}");
}

#[test]
fn unknown_keys_and_wrong_types_are_refused() {
    let m = message_of(with_replaced(
        "linewidth_hz = 50e3",
        "linewidth_hz = 50e3\ncolour = 3",
    ));
    assert!(m.contains("colour"), "{m}");
    let m = message_of(with_replaced("power_dbm = 10.0", "power_dbm = \"ten\""));
    assert!(m.contains("power_dbm") || m.contains("string"), "{m}");
    let m = message_of(with_replaced(
        "filter_shape = \"gaussian\"",
        "filter_shape = \"boxcar\"",
    ));
    assert!(m.contains("boxcar"), "{m}");
}

#[test]
fn tabulated_v_pi_and_chain_loss_interpolate_linearly() {
    let table = r#"[modulator.v_pi]
model = "table"
points = [[1e9, 3.0], [11e9, 5.0]]
"#;
    let start = DEFAULT_SCENARIO_TOML.find("[modulator.v_pi]").unwrap();
    let end = DEFAULT_SCENARIO_TOML.find("[drive_chain]").unwrap();
    let text = format!(
        "{}{}\n{}",
        &DEFAULT_SCENARIO_TOML[..start],
        table,
        &DEFAULT_SCENARIO_TOML[end..]
    );
    let s = Scenario::from_toml_str(&text).unwrap();
    assert!((s.v_pi_at(Hz::from_ghz(6.0)).value() - 4.0).abs() < 1e-12);
    assert_eq!(
        s.v_pi_at(Hz::from_ghz(0.1)).value(),
        3.0,
        "held below the table"
    );
    assert_eq!(
        s.v_pi_at(Hz::from_ghz(30.0)).value(),
        5.0,
        "held above the table"
    );
    // Chain loss between the rows 10 GHz (3.1 dB) and 20 GHz (4.4 dB) of the default.
    assert!((s.chain_loss_at(Hz::from_ghz(15.0)).value() - 3.75).abs() < 1e-12);
}

#[test]
fn formula_v_pi_matches_its_definition() {
    // V_pi(f) = V0 (1 + a sqrt(f/GHz) + b f/GHz) with the default's V0 = 3.2, a = 0.08,
    // b = 0.015: at 4 GHz, 3.2 * (1 + 0.16 + 0.06) = 3.904 V.
    let s = Scenario::builtin().unwrap();
    assert!((s.v_pi_at(Hz::from_ghz(4.0)).value() - 3.904).abs() < 1e-12);
}

#[tokio::test]
async fn the_amplified_example_can_overdrive_and_shows_asymmetric_sidebands() {
    use halfwave_drivers::sim::SimBench;
    use halfwave_drivers::{RfSource, SpectrumAnalyzer};
    let mut s = Scenario::amplified_example().unwrap();
    s.analyzer.display_noise_db = 0.0;
    // The generator's maximum plus the amplifier exceeds the modulator's limit at 1 GHz, so
    // this bench is the one to test interlocks with.
    let f = Hz::from_ghz(1.0);
    assert!(
        s.level_at_modulator(Dbm(s.rf_source.max_level_dbm), f)
            .value()
            > s.modulator.max_rf_input_dbm
    );
    let bench = SimBench::new(s, 4).with_time_factor(0.0);
    let mut source = bench.rf_source();
    let mut analyzer = bench.analyzer();
    source.set_frequency(f).await.unwrap();
    source.set_level(Dbm(-22.0)).await.unwrap();
    source.set_output(true).await.unwrap();
    assert!(!bench.overdriven());
    let beta = bench.modulation_index();
    assert!(beta > 0.3 && beta < 2.0, "beta {beta}");
    analyzer.set_points(20_001).await.unwrap();
    analyzer.set_span(Hz::from_ghz(10.0)).await.unwrap();
    analyzer.set_center(bench.laser_frequency()).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    // Residual AM in quadrature: the +1 line is stronger than the -1 line. Compare the maxima
    // within 100 MHz of where each line sits (axis offset and drift are well inside that).
    let carrier = bench.laser_frequency().value() + bench.scenario().analyzer.frequency_offset_hz;
    let peak_near = |centre: f64| -> f64 {
        trace
            .frequency_hz()
            .iter()
            .zip(trace.power_dbm())
            .filter(|(x, _)| (**x - centre).abs() < 100e6)
            .map(|(_, p)| *p)
            .fold(f64::MIN, f64::max)
    };
    let upper = peak_near(carrier + f.value());
    let lower = peak_near(carrier - f.value());
    assert!(
        upper - lower > 0.5,
        "+1 at {upper:.2} dBm, -1 at {lower:.2} dBm"
    );
    source.set_level(Dbm(10.0)).await.unwrap();
    assert!(
        bench.overdriven(),
        "+10 dBm through the amplifier exceeds the limit"
    );
}

/// The busy-time account the wall-time benchmark compares against: every settling and sweep of
/// the scenario, scaled by the time factor, added up per instrument.
#[tokio::test]
async fn busy_time_adds_up_the_scenario_settling_and_sweep_times() {
    use halfwave_drivers::sim::{Role, SimBench};
    use halfwave_drivers::{RfSource, SpectrumAnalyzer};
    let scenario = Scenario::builtin().unwrap();
    let settling = scenario.rf_source.settling_time_s;
    let sweep = scenario.analyzer.sweep_time_s;
    let bench = SimBench::new(scenario, 1).with_time_factor(0.01);
    let mut source = bench.rf_source();
    let mut analyzer = bench.analyzer();
    source.set_frequency(Hz(2e9)).await.unwrap();
    source.set_level(Dbm(0.0)).await.unwrap();
    source.set_output(true).await.unwrap();
    analyzer.sweep().await.unwrap();
    analyzer.sweep().await.unwrap();
    let expect_source = 3.0 * settling * 0.01;
    let expect_analyzer = 2.0 * sweep * 0.01;
    let got_source = bench.busy_time(Role::RfSource).as_secs_f64();
    let got_analyzer = bench.busy_time(Role::Analyzer).as_secs_f64();
    assert!((got_source - expect_source).abs() < 1e-6, "{got_source} s");
    assert!(
        (got_analyzer - expect_analyzer).abs() < 1e-6,
        "{got_analyzer} s"
    );
    source.safe_off().await.unwrap();
}
