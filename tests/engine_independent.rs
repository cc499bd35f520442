//! A whole calibration against the independent bench (`independent_support`): SCPI instruments
//! written from the standards, not from the project's simulator, whose analyzer has no
//! `FREQuency:STARt?`/`STOP?` and no `INITiate:CONTinuous`. The daemon is told only the two
//! resource strings and a three-line analyzer profile (`single_sweep_mode = ""`); the axis is
//! found by probing and the source's ranges by its MINimum/MAXimum queries.
//!
//! Check: every fitted V_pi within 0.3 % of the bench's truth (`independent_support::true_v_pi`),
//! a stated 2.9 V x (1 + 0.035 sqrt(f/GHz)) of an invented modulator.

mod api_support;
mod engine_support;
mod independent_support;

use engine_support::{plan, wait_for_end, FREQUENCIES_HZ, POINTS};
use halfwave::config::Config;
use halfwave::engine::Engine;
use halfwave::store::{ChainCalibrationPoint, Store};
use halfwave_units::{Db, Hz};
use independent_support::{true_v_pi, BenchAxis, BenchOptions, IndependentBench, Role};

/// Writes a daemon configuration for the independent bench (with the analyzer profile when
/// `with_profile`) and returns its path.
fn write_config(
    dir: &std::path::Path,
    bench: &IndependentBench,
    with_profile: bool,
) -> std::path::PathBuf {
    let profile = dir.join("analyzer.toml");
    std::fs::write(
        &profile,
        "kind = \"spectrum_analyzer\"\n[commands]\nsingle_sweep_mode = \"\"\n",
    )
    .unwrap();
    let analyzer_profile = if with_profile {
        format!(", profile = \"{}\"", profile.display())
    } else {
        String::new()
    };
    let text = format!(
        "data_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\"{} }}\n",
        dir.join("data").display(),
        bench.resource(Role::Source),
        bench.resource(Role::Analyzer),
        analyzer_profile,
    );
    let path = dir.join(if with_profile {
        "with.toml"
    } else {
        "without.toml"
    });
    std::fs::write(&path, text).unwrap();
    path
}

async fn halfwave(args: &[&str]) -> (bool, String) {
    let out = tokio::process::Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args(args)
        .output()
        .await
        .expect("run halfwave");
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    (out.status.success(), text)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn check_bench_reports_the_choices_and_suggests_the_missing_profile_key() {
    let dir = tempfile::tempdir().unwrap();
    let bench = IndependentBench::start().await;
    // Without a profile the analyzer refuses INITiate:CONTinuous OFF: the check fails and names
    // the key that avoids it.
    let without = write_config(dir.path(), &bench, false);
    let (ok, text) = halfwave(&["check-bench", "--config", without.to_str().unwrap()]).await;
    assert!(!ok, "{text}");
    assert!(text.contains("-113"), "{text}");
    assert!(text.contains("commands.single_sweep_mode = \"\""), "{text}");
    // --suggest-profile prints the fragment that makes it work.
    let (ok, text) = halfwave(&[
        "check-bench",
        "--suggest-profile",
        "--config",
        without.to_str().unwrap(),
    ])
    .await;
    assert!(ok, "{text}");
    assert!(text.contains("single_sweep_mode = \"\""), "{text}");
    assert!(text.contains("method = \"center_span\""), "{text}");
    // With it, the check passes, RF off, and says how the axis is read and where the source's
    // ranges came from.
    let with = write_config(dir.path(), &bench, true);
    let (ok, text) = halfwave(&["check-bench", "--config", with.to_str().unwrap()]).await;
    assert!(ok, "{text}");
    assert!(
        text.contains("frequency axis: center_span via FREQuency:CENTer? / FREQuency:SPAN?"),
        "{text}"
    );
    assert!(
        text.contains("FREQuency:STARt? / FREQuency:STOP? drew -113,\"Undefined header\""),
        "the refused probe is named: {text}"
    );
    assert!(
        text.contains("level range: -110 dBm to 25 dBm (stated by the instrument)"),
        "{text}"
    );
    assert!(
        text.contains(
            "plans are validated against: 100000 Hz to 40000000000 Hz, -110 dBm to 25 dBm"
        ),
        "{text}"
    );
    assert!(text.contains("trace of 1001 points"), "{text}");
    assert!(!bench.truth.lock().unwrap().output_on);
}

/// Runs the test plan against `bench` with `profile_text` as the analyzer's profile and checks
/// every fitted V_pi within 0.3 % of the bench's truth, RF off after the run.
async fn calibrate_and_check(bench: &IndependentBench, profile_text: &str) -> i64 {
    let dir = tempfile::tempdir().unwrap();
    let profile = dir.path().join("analyzer.toml");
    std::fs::write(&profile, profile_text).unwrap();
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
    // The record says how the analyzer's axis was read.
    let instruments = store.run_instruments(run_id).await.unwrap();
    let analyzer = instruments
        .iter()
        .find(|i| i.role == "analyzer")
        .expect("the analyzer is recorded with the run");
    assert!(
        analyzer
            .connection
            .iter()
            .any(|n| n.item == "frequency axis" && n.value.starts_with("center_span via")),
        "{:?}",
        analyzer.connection
    );
    // The same record through the API, as `instruments[].connection` (README, "Connecting your
    // instruments").
    let app = api_support::serve_state(
        halfwave::api::AppState::new(store.clone(), halfwave::api::ApiSettings::default()),
        tempfile::tempdir().unwrap(),
    )
    .await;
    let viewer = app
        .token("lab-b", halfwave::api::tokens::Role::Viewer)
        .await;
    let view = app
        .get_json(&format!("/api/v1/runs/{run_id}"), Some(&viewer))
        .await;
    let notes = view["instruments"]
        .as_array()
        .and_then(|all| all.iter().find(|i| i["role"] == "analyzer"))
        .map(|a| a["connection"].clone())
        .unwrap_or_default();
    assert!(
        notes
            .as_array()
            .is_some_and(|n| n.iter().any(|n| n["item"] == "frequency axis"
                && n["value"]
                    .as_str()
                    .unwrap_or("")
                    .starts_with("center_span via"))),
        "{view}"
    );
    assert!(
        !bench.truth.lock().unwrap().output_on,
        "RF must be off after the run"
    );
    engine.shutdown().await;
    run_id
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_whole_calibration_against_an_independent_bench_by_configuration_only() {
    let bench = IndependentBench::start().await;
    // The only adaptation: this analyzer sweeps only when told to and has no continuous mode.
    calibrate_and_check(
        &bench,
        "kind = \"spectrum_analyzer\"\n[commands]\nsingle_sweep_mode = \"\"\n",
    )
    .await;
    let truth = bench.truth.lock().unwrap();
    // The optional nodes were asked once each at connect, never again.
    let asked = |q: &str| truth.analyzer_log.iter().filter(|c| *c == q).count();
    assert_eq!(asked("FREQuency:STARt?"), 1, "probed once");
    assert_eq!(asked("INITiate:CONTinuous OFF"), 0);
    assert!(truth.source_log.iter().any(|c| c == "POWer? MAXimum"));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_wavelength_analyzer_in_air_with_a_trace_in_watts_calibrates_by_configuration() {
    // An analyzer set and read in air wavelengths (metres), resolution in metres, trace in
    // watts: the profile names its commands, the axis unit and medium, and the power unit. The
    // bench converts with its own air formula (Birch and Downs 1994), the drivers with
    // Edlén 1966; V_pi must still come out within 0.3 % of the truth.
    let bench = IndependentBench::start_with(BenchOptions {
        axis: BenchAxis::Wavelength { air: true },
        trace_in_watts: true,
    })
    .await;
    calibrate_and_check(
        &bench,
        r#"kind = "spectrum_analyzer"
[commands]
single_sweep_mode = ""
set_center = "SENSe:WAVelength:CENTer {value}"
query_center = "SENSe:WAVelength:CENTer?"
set_span = "SENSe:WAVelength:SPAN {value}"
query_span = "SENSe:WAVelength:SPAN?"
query_start = "SENSe:WAVelength:STARt?"
query_stop = "SENSe:WAVelength:STOP?"
[axis]
unit = "m"
medium = "air"
[data]
power_unit = "watt"
"#,
    )
    .await;
    let truth = bench.truth.lock().unwrap();
    // Settings went over in metres: the centre sits near 1550 nm in air.
    assert!(
        (truth.center_m - 1549.7e-9).abs() < 1e-9,
        "centre {} m",
        truth.center_m
    );
    assert!(truth
        .analyzer_log
        .iter()
        .any(|c| c.starts_with("SENSe:WAVelength:SPAN 0.000000")));
}

/// The analyzer profile for the wavelength bench, with the medium given.
fn wavelength_profile(medium: &str) -> halfwave_drivers::AnalyzerProfile {
    halfwave_drivers::AnalyzerProfile::from_toml_str(
        &format!(
            r#"kind = "spectrum_analyzer"
[commands]
single_sweep_mode = ""
set_center = "SENSe:WAVelength:CENTer {{value}}"
query_center = "SENSe:WAVelength:CENTer?"
set_span = "SENSe:WAVelength:SPAN {{value}}"
query_span = "SENSe:WAVelength:SPAN?"
[axis]
unit = "m"
medium = "{medium}"
[data]
power_unit = "watt"
"#
        ),
        "test",
    )
    .expect("profile parses")
}

/// Sweeps the bench's laser (RF off) with the wavelength profile and returns where the line
/// peaks and its level, the trace's ends and its stated resolution bandwidth (hertz, dBm).
async fn laser_line_seen_through(medium: &str) -> (f64, f64, f64, f64, f64) {
    use halfwave_drivers::SpectrumAnalyzer;
    let bench = IndependentBench::start_with(BenchOptions {
        axis: BenchAxis::Wavelength { air: true },
        trace_in_watts: true,
    })
    .await;
    let mut analyzer = halfwave_drivers::ScpiSpectrumAnalyzer::connect(
        &bench.resource(Role::Analyzer),
        wavelength_profile(medium),
    )
    .await
    .expect("connects");
    analyzer
        .set_center(Hz(independent_support::LASER_HZ))
        .await
        .unwrap();
    analyzer.set_span(Hz(20e9)).await.unwrap();
    let rbw = analyzer.set_resolution_bandwidth(Hz(5e6)).await.unwrap();
    assert!((rbw.0 / 5e6 - 1.0).abs() < 0.01, "read back {rbw}");
    analyzer.set_points(2001).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    let f = trace.frequency_hz();
    let p = trace.power_dbm();
    let peak = (0..f.len()).max_by(|&a, &b| p[a].total_cmp(&p[b])).unwrap();
    (
        f[peak],
        p[peak],
        f[0],
        f[f.len() - 1],
        trace.resolution_bandwidth().map_or(f64::NAN, |b| b.0),
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_wavelength_axis_in_air_puts_the_laser_where_it_is() {
    // The bench's laser is at LASER_HZ. Read with the right medium the line sits there within
    // a point (the trace arrives in ascending frequency, 20 GHz wide, its resolution stated in
    // hertz); read as vacuum wavelengths it would be n - 1 = 2.7e-4 of 193 THz (53 GHz) off
    // (Edlén 1966), outside the span.
    let (peak, level, first, last, rbw) = laser_line_seen_through("air").await;
    let step = (last - first) / 2000.0;
    assert!(
        (peak - independent_support::LASER_HZ).abs() <= 1.5 * step,
        "peak at {peak} Hz, laser at {} Hz",
        independent_support::LASER_HZ
    );
    assert!(first < last && ((last - first) / 20e9 - 1.0).abs() < 1e-3);
    assert!((rbw / 5e6 - 1.0).abs() < 0.01, "{rbw}");
    let (_, level_vacuum, ..) = laser_line_seen_through("vacuum").await;
    assert!(
        level > independent_support::OPTICAL_DBM - 3.0 && level_vacuum < level - 30.0,
        "the medium must matter: the laser shows at {level} dBm read as air, and read as vacuum the window misses it ({level_vacuum} dBm at most)"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn check_bench_passes_a_wavelength_analyzer_and_says_how_it_reads_the_axis() {
    let dir = tempfile::tempdir().unwrap();
    let bench = IndependentBench::start_with(BenchOptions {
        axis: BenchAxis::Wavelength { air: true },
        trace_in_watts: true,
    })
    .await;
    let profile = dir.path().join("analyzer.toml");
    std::fs::write(
        &profile,
        toml::to_string(&wavelength_profile("air")).expect("profile as TOML"),
    )
    .unwrap();
    let config = dir.path().join("halfwave.toml");
    std::fs::write(
        &config,
        format!(
            "data_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\", profile = \"{}\" }}\n",
            dir.path().join("data").display(),
            bench.resource(Role::Source),
            bench.resource(Role::Analyzer),
            profile.display(),
        ),
    )
    .unwrap();
    let (ok, text) = halfwave(&["check-bench", "--config", config.to_str().unwrap()]).await;
    assert!(ok, "{text}");
    assert!(
        text.contains("wavelengths in metres in standard air (Edlén 1966)"),
        "{text}"
    );
    assert!(text.contains("values in Watt"), "{text}");
    assert!(!bench.truth.lock().unwrap().output_on);
}
