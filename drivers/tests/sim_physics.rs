//! The simulated bench's physics checked against references outside the project: Bessel values
//! from Abramowitz & Stegun and NIST DLMF, the 50-ohm level conversion from the domain primer, and
//! line powers in rendered traces against `puruspe`'s J_n.

use halfwave_drivers::sim::physics::{
    bessel_j, comb_lines, peak_voltage, render_linear, OpticalLine, Rendering,
};
use halfwave_drivers::sim::scenario::FilterShape;
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use halfwave_drivers::{RfSource, SpectrumAnalyzer};
use halfwave_units::{Dbm, Hz, Trace};

fn quiet_scenario() -> Scenario {
    let mut s = Scenario::builtin().expect("the built-in scenario parses");
    s.analyzer.display_noise_db = 0.0;
    s.laser.linewidth_hz = 0.0;
    s.laser.drift_step_hz = 0.0;
    s.modulator.residual_am_per_volt = 0.0;
    s
}

#[test]
fn bessel_values_match_abramowitz_and_stegun_table_9_1() {
    // Abramowitz & Stegun, Handbook of Mathematical Functions, Table 9.1 (10 decimals;
    // values from memory of the table, cross-checked by the sum rule below).
    let table = [
        (0, 1.0, 0.765_197_686_6),
        (1, 1.0, 0.440_050_585_7),
        (2, 1.0, 0.114_903_484_9),
        (0, 2.0, 0.223_890_779_1),
        (1, 2.0, 0.576_724_807_8),
        (2, 2.0, 0.352_834_028_6),
    ];
    for (n, x, expected) in table {
        let got = bessel_j(n, x);
        assert!(
            (got - expected).abs() < 2e-10,
            "J_{n}({x}) = {got}, table {expected}"
        );
    }
    // J_{-n} = (-1)^n J_n (DLMF 10.4.1).
    assert!((bessel_j(-1, 1.0) + 0.440_050_585_7).abs() < 2e-10);
    assert!((bessel_j(-2, 1.0) - 0.114_903_484_9).abs() < 2e-10);
    // First zero of J_0 (DLMF Table 10.21.1 / A&S Table 9.5; from memory).
    assert!(bessel_j(0, 2.404_825_557_695_773).abs() < 1e-12);
}

#[test]
fn comb_without_residual_am_is_symmetric_and_conserves_power() {
    for beta in [0.1, 0.8, 1.4347, 2.404_825_557_695_773, 3.5, 7.0] {
        let lines = comb_lines(beta, 0.0, 0.0);
        // Sum rule J_0^2 + 2 sum J_k^2 = 1 (DLMF 10.23.3).
        let total: f64 = lines.iter().map(|l| l.relative_power).sum();
        assert!((total - 1.0).abs() < 1e-12, "beta {beta}: total {total}");
        for l in &lines {
            let mirror = lines.iter().find(|m| m.order == -l.order).unwrap();
            assert!((l.relative_power - mirror.relative_power).abs() < 1e-15);
            // P_n = J_n(beta)^2 (Jacobi-Anger, DLMF 10.12.1), J_n from puruspe.
            let j = puruspe::Jn(l.order.unsigned_abs(), beta);
            assert!((l.relative_power - j * j).abs() < 1e-15);
        }
    }
}

#[test]
fn residual_am_in_quadrature_makes_the_sidebands_unequal() {
    // With AM 1 + m cos(wt + 90 deg) the line amplitudes become J_n (1 + m n / beta) (from
    // J_{n-1} + J_{n+1} = (2n / x) J_n, DLMF 10.6.1): +n grows, -n shrinks.
    let (beta, m) = (1.2, 0.05);
    let lines = comb_lines(beta, m, std::f64::consts::FRAC_PI_2);
    let power = |n: i32| lines.iter().find(|l| l.order == n).unwrap().relative_power;
    for n in [-2i32, -1, 1, 2] {
        let j = puruspe::Jn(n.unsigned_abs(), beta);
        let expected = (j * (1.0 + m * f64::from(n) / beta)).powi(2);
        assert!((power(n) - expected).abs() < 1e-14, "order {n}");
    }
    assert!(power(1) > power(-1));
}

#[test]
fn peak_voltage_into_50_ohm() {
    // Domain primer check values (common practice): 0 dBm is 0.3162 V peak, 20 dBm 3.162 V peak.
    assert!((peak_voltage(Dbm(0.0)).value() - 0.316_227_766).abs() < 1e-8);
    assert!((peak_voltage(Dbm(20.0)).value() - 3.162_277_66).abs() < 1e-7);
}

#[test]
fn v_pi_rises_with_frequency_in_the_builtin_scenario() {
    let s = Scenario::builtin().unwrap();
    let mut last = 0.0;
    for ghz in [0.1, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 30.0, 40.0] {
        let v = s.v_pi_at(Hz::from_ghz(ghz)).value();
        assert!(v > last, "V_pi({ghz} GHz) = {v} is not above {last}");
        last = v;
    }
}

/// Sets up a sweep whose grid lands exactly on every comb line (no drift, offset known).
async fn sweep_with_lines_on_grid(bench: &SimBench, f_m: Hz, level: Dbm) -> Trace {
    let mut source = bench.rf_source();
    let mut analyzer = bench.analyzer();
    source.set_frequency(f_m).await.unwrap();
    source.set_level(level).await.unwrap();
    source.set_output(true).await.unwrap();
    let offset = bench.scenario().analyzer.frequency_offset_hz;
    let center = Hz(bench.laser_frequency().value() + offset);
    analyzer.set_points(10_001).await.unwrap();
    analyzer
        .set_resolution_bandwidth(Hz::from_mhz(5.0))
        .await
        .unwrap();
    analyzer.set_span(Hz::from_ghz(10.0)).await.unwrap();
    analyzer.set_center(center).await.unwrap();
    analyzer.sweep().await.unwrap();
    analyzer.fetch_trace().await.unwrap()
}

#[tokio::test]
async fn trace_line_powers_follow_bessel_squared() {
    let bench = SimBench::new(quiet_scenario(), 11).with_time_factor(0.0);
    let f_m = Hz::from_ghz(1.0);
    let level = Dbm(18.0);
    let trace = sweep_with_lines_on_grid(&bench, f_m, level).await;
    let s = bench.scenario();

    // The expectation, built from the primer's formulas and puruspe, not from the simulator:
    // level at the modulator = set level (rounded to 0.01 dB) + level error - chain loss;
    // V_pk = sqrt(2 * 50 * P); beta = pi V_pk / V_pi(f); P_n = P_out J_n(beta)^2.
    let at_modulator = level.value() + s.level_error_at(f_m).value() - s.chain_loss_at(f_m).value();
    let v_pk = (2.0 * 50.0 * 10f64.powf((at_modulator - 30.0) / 10.0)).sqrt();
    let beta = std::f64::consts::PI * v_pk / s.v_pi_at(f_m).value();
    assert!(beta > 1.0 && beta < 3.0, "beta {beta} should be mid-range");
    assert!((bench.modulation_index() - beta).abs() < 1e-12);
    let p_out_dbm = s.laser.power_dbm - s.modulator.insertion_loss_db;

    let centre_index = trace.len() / 2;
    let step = 1e6; // 10 GHz over 10,000 intervals
    let mut checked = 0;
    for n in -5i32..=5 {
        let index = (centre_index as i64 + i64::from(n) * (f_m.value() / step) as i64) as usize;
        let j = puruspe::Jn(n.unsigned_abs(), beta);
        let expected = p_out_dbm + 10.0 * (j * j).log10();
        if expected < s.analyzer.noise_floor_dbm + 30.0 {
            continue; // too close to the floor to compare to 0.01 dB
        }
        let shown = trace.power_dbm()[index];
        assert!(
            (shown - expected).abs() < 0.01,
            "order {n}: trace {shown:.4} dBm, J_n^2 predicts {expected:.4} dBm"
        );
        checked += 1;
    }
    assert!(checked >= 7, "only {checked} lines were above the floor");

    // Far from every line the trace shows the noise floor.
    let between = centre_index + 500; // 500 MHz from the carrier, midway to the next line
    assert!((trace.power_dbm()[between] - s.analyzer.noise_floor_dbm).abs() < 0.01);
}

#[tokio::test]
async fn the_analyzer_offset_and_laser_position_place_the_carrier() {
    let mut scenario = quiet_scenario();
    scenario.analyzer.frequency_offset_hz = 120e6;
    let bench = SimBench::new(scenario, 3).with_time_factor(0.0);
    let mut analyzer = bench.analyzer();
    analyzer.set_points(2001).await.unwrap();
    analyzer.set_span(Hz::from_ghz(2.0)).await.unwrap();
    analyzer.set_center(bench.laser_frequency()).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    let (peak_index, _) = trace
        .power_dbm()
        .iter()
        .enumerate()
        .max_by(|a, b| a.1.total_cmp(b.1))
        .unwrap();
    let shown_at = trace.frequency_hz()[peak_index] - bench.laser_frequency().value();
    // 1 MHz grid: the RF-off carrier appears 120 MHz above its true frequency.
    assert!(
        (shown_at - 120e6).abs() <= 0.5e6,
        "carrier shown at +{shown_at} Hz"
    );
}

#[tokio::test]
async fn the_same_seed_gives_the_same_traces() {
    async fn two_sweeps(seed: u64) -> Vec<Vec<f64>> {
        let bench = SimBench::new(Scenario::builtin().unwrap(), seed).with_time_factor(0.0);
        let mut source = bench.rf_source();
        let mut analyzer = bench.analyzer();
        source.set_frequency(Hz::from_ghz(2.0)).await.unwrap();
        source.set_level(Dbm(12.0)).await.unwrap();
        source.set_output(true).await.unwrap();
        let mut traces = Vec::new();
        for _ in 0..2 {
            analyzer.sweep().await.unwrap();
            traces.push(analyzer.fetch_trace().await.unwrap().power_dbm().to_vec());
        }
        traces
    }
    let a = two_sweeps(42).await;
    let b = two_sweeps(42).await;
    let c = two_sweeps(43).await;
    assert_eq!(a, b, "same seed, same commands: identical traces");
    assert_ne!(a, c, "another seed gives other noise");
    assert_ne!(a[0], a[1], "noise and drift differ between sweeps");
}

#[tokio::test]
async fn the_laser_random_walks_within_its_limit() {
    let mut scenario = Scenario::builtin().unwrap();
    scenario.laser.drift_step_hz = 200e6;
    scenario.laser.drift_limit_hz = 500e6;
    let bench = SimBench::new(scenario, 5).with_time_factor(0.0);
    let nominal = bench.scenario().laser_frequency().value();
    let mut analyzer = bench.analyzer();
    analyzer.set_points(101).await.unwrap();
    let mut positions = Vec::new();
    for _ in 0..200 {
        analyzer.sweep().await.unwrap();
        positions.push(bench.laser_frequency().value() - nominal);
    }
    assert!(positions.iter().all(|d| d.abs() <= 500e6 + 1.0));
    let moved = positions.windows(2).filter(|w| w[0] != w[1]).count();
    assert!(
        moved > 190,
        "the laser moved between only {moved} of 199 sweep pairs"
    );
}

#[tokio::test]
async fn overdriving_the_modulator_is_recorded() {
    let mut scenario = quiet_scenario();
    scenario.modulator.max_rf_input_dbm = 10.0;
    let bench = SimBench::new(scenario, 1).with_time_factor(0.0);
    let mut source = bench.rf_source();
    source.set_frequency(Hz::from_ghz(1.0)).await.unwrap();
    // A high level with the output off harms nothing.
    source.set_level(Dbm(20.0)).await.unwrap();
    assert!(!bench.overdriven());
    source.set_output(true).await.unwrap();
    assert!(bench.overdriven());
    let events = bench.overdrive_events();
    assert_eq!(events.len(), 1);
    assert!(events[0].level_at_modulator.value() > 10.0);
    source.safe_off().await.unwrap();
    assert!(!bench.rf_output_on());
    assert!(bench.overdriven(), "the flag stays set");
}

#[tokio::test]
async fn out_of_range_requests_are_refused_before_anything_is_sent() {
    let bench = SimBench::new(Scenario::builtin().unwrap(), 1).with_time_factor(0.0);
    let mut source = bench.rf_source();
    let max = source.limits().max_frequency;
    let err = source.set_frequency(max + Hz(1.0)).await.unwrap_err();
    assert!(matches!(
        err,
        halfwave_drivers::InstrumentError::OutOfRange { .. }
    ));
    let err = source.set_level(Dbm(99.0)).await.unwrap_err();
    assert!(matches!(
        err,
        halfwave_drivers::InstrumentError::OutOfRange { .. }
    ));
    assert!(
        bench.command_log(Role::RfSource).is_empty(),
        "no command was sent"
    );
    let mut analyzer = bench.analyzer();
    assert!(analyzer.fetch_trace().await.is_err(), "no sweep taken yet");
    assert!(analyzer.set_points(3).await.is_err());
    assert_eq!(
        bench.command_log(Role::Analyzer),
        vec!["TRAC? TRACE1".to_string()]
    );
}

#[tokio::test]
async fn setters_read_back_what_the_instrument_holds() {
    let bench = SimBench::new(Scenario::builtin().unwrap(), 1).with_time_factor(0.0);
    let mut source = bench.rf_source();
    assert_eq!(source.set_level(Dbm(3.456)).await.unwrap(), Dbm(3.46));
    let mut analyzer = bench.analyzer();
    // RBW rounds to the nearest offered value.
    assert_eq!(
        analyzer.set_resolution_bandwidth(Hz(4.4e6)).await.unwrap(),
        Hz(5e6)
    );
    let id = source.identify().await.unwrap();
    assert_eq!(id.model, "SIM-RF-1");
    assert_eq!(
        bench.command_log(Role::RfSource),
        vec!["POW 3.456".to_string(), "*IDN?".to_string()]
    );
}

fn single_line(filter: FilterShape, linewidth_hz: f64) -> (Vec<f64>, f64) {
    let rendering = Rendering {
        start_hz: 193.4e12 - 5e9,
        stop_hz: 193.4e12 + 5e9,
        points: 100_001,
        resolution_bandwidth_hz: 5e6,
        filter,
        laser_linewidth_hz: linewidth_hz,
        noise_floor_dbm: -150.0,
        display_noise_db: 0.0,
    };
    let line = OpticalLine {
        frequency_hz: 193.4e12,
        power_mw: 1.0,
    };
    let step = 10e9 / 100_000.0;
    (render_linear(&[line], &rendering), step)
}

#[test]
fn the_resolution_filter_keeps_the_line_power() {
    // A line of power P seen through a filter of unit peak shows P at the peak when it is narrow,
    // and the area under the displayed trace divided by the filter's equivalent noise bandwidth
    // is P whatever the laser linewidth (common practice). Equivalent noise bandwidths of
    // unit-peak shapes of FWHM B: Gaussian B sqrt(pi / (4 ln 2)), Lorentzian pi B / 2.
    let rbw = 5e6;
    let gaussian_enbw = rbw * (std::f64::consts::PI / (4.0 * std::f64::consts::LN_2)).sqrt();
    let lorentzian_enbw = std::f64::consts::PI * rbw / 2.0;
    for (filter, enbw) in [
        (FilterShape::Gaussian, gaussian_enbw),
        (FilterShape::Lorentzian, lorentzian_enbw),
    ] {
        for linewidth in [0.0, 200e3, 2e6] {
            let (powers, step) = single_line(filter, linewidth);
            let area: f64 = powers.iter().sum::<f64>() * step;
            let power = area / enbw;
            assert!(
                (power - 1.0).abs() < 0.01,
                "{filter:?}, linewidth {linewidth}: integrated power {power}"
            );
            if linewidth == 0.0 {
                let peak = powers.iter().cloned().fold(0.0, f64::max);
                assert!((peak - 1.0).abs() < 1e-9, "{filter:?}: peak {peak}");
            }
        }
    }
    // Lorentzian (x) Lorentzian is a Lorentzian with the widths added (common practice): a
    // linewidth equal to the RBW halves the peak.
    let (powers, _) = single_line(FilterShape::Lorentzian, 5e6);
    let peak = powers.iter().cloned().fold(0.0, f64::max);
    assert!((peak - 0.5).abs() < 1e-9, "peak {peak}");
}
