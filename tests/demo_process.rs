//! `halfwave demo` as a user runs it: the real binary, to completion, in a temporary directory.
//!
//! The reference is the simulated bench's scenario (`Scenario::builtin()`, an invented device):
//! its modulator has a stated V_pi(f), and the V_pi the demo prints, recovered from simulated
//! spectra by the Bessel-sideband analysis (Jacobi-Anger expansion, NIST DLMF 10.12) through the
//! HTTP API, must agree with it within 0.3 % at every frequency, and the stated uncertainty must
//! cover the difference at k = 2 (GUM, JCGM 100:2008, 6.2) at no fewer than 20 of the 21
//! frequencies. The 3 dB response frequency must lie where `response_curve` puts it on the
//! scenario's true V_pi moved by that 0.3 % tolerance.
//! The plots must be SVG documents (W3C SVG: root element `svg` in the SVG namespace).

use halfwave::analysis::{response_curve, VpiAtFrequency};
use halfwave::cli::demo::{FREQUENCY_COUNT, START_HZ, STOP_HZ};
use halfwave::units::{Hz, VoltsPeak};
use halfwave_drivers::sim::Scenario;
use std::process::Command;

fn demo(data_dir: &std::path::Path, extra: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .arg("demo")
        .arg("--data-dir")
        .arg(data_dir)
        .args(extra)
        .output()
        .expect("the halfwave binary runs")
}

#[test]
fn demo_recovers_the_simulated_v_pi_and_writes_svg_plots() {
    let dir = tempfile::tempdir().unwrap();
    let data_dir = dir.path().join("demo");
    let out = demo(&data_dir, &["--json"]);
    assert!(
        out.status.success(),
        "demo failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let report: serde_json::Value =
        serde_json::from_slice(&out.stdout).expect("--json prints one JSON document");
    assert_eq!(report["state"], "completed");
    assert!(data_dir.join("halfwave.db").is_file());

    let scenario = Scenario::builtin().unwrap();
    let rows = report["v_pi"].as_array().expect("a V_pi table");
    assert_eq!(
        rows.len(),
        FREQUENCY_COUNT,
        "one V_pi per planned frequency"
    );
    let mut truth = Vec::new();
    let mut covered = 0;
    let mut table = String::new();
    let mut off = Vec::new();
    for row in rows {
        let f = row["frequency_hz"].as_f64().unwrap();
        let measured = row["v_pi_volts"].as_f64().unwrap();
        let uncertainty = row["v_pi_uncertainty_volts"].as_f64().unwrap();
        assert!((START_HZ * 0.999..=STOP_HZ * 1.001).contains(&f), "{f} Hz");
        let expected = scenario.v_pi_at(Hz(f)).0;
        let error = (measured - expected) / expected;
        table.push_str(&format!(
            "{:>8.3} GHz  V_pi {measured:.5} V  truth {expected:.5} V  error {:+.3} %  u {:.3} %  error/u {:+.2}\n",
            f / 1e9,
            100.0 * error,
            100.0 * uncertainty / measured,
            (measured - expected) / uncertainty
        ));
        if error.abs() >= 0.003 {
            off.push(format!(
                "V_pi at {f} Hz: demo {measured} V, scenario {expected} V ({:+.3} %)",
                100.0 * error
            ));
        }
        assert!(uncertainty > 0.0 && uncertainty < 0.1 * measured);
        if (measured - expected).abs() <= 2.0 * uncertainty {
            covered += 1;
        }
        truth.push(VpiAtFrequency {
            frequency: Hz(f),
            v_pi: VoltsPeak(expected),
            uncertainty: VoltsPeak(0.0),
        });
    }
    println!("{table}");
    assert!(off.is_empty(), "{off:?}\n{table}");
    assert!(
        covered >= 20,
        "the stated uncertainty covers the error at k = 2 at only {covered} of {FREQUENCY_COUNT} frequencies:\n{table}"
    );
    // The frequencies are log-spaced: equal ratios between neighbours.
    let frequencies: Vec<f64> = rows
        .iter()
        .map(|r| r["frequency_hz"].as_f64().unwrap())
        .collect();
    let ratio = (STOP_HZ / START_HZ).powf(1.0 / (FREQUENCY_COUNT - 1) as f64);
    for pair in frequencies.windows(2) {
        assert!((pair[1] / pair[0] - ratio).abs() < 1e-6, "{pair:?}");
    }

    // The 3 dB point must lie where the 0.3 % tolerance on V_pi allows: between the curves of the
    // true V_pi with the reference (lowest frequency) and all others pushed 0.3 % apart either way.
    let expected_curve = response_curve(&truth).unwrap();
    let skewed = |reference: f64, others: f64| {
        let points: Vec<VpiAtFrequency> = truth
            .iter()
            .enumerate()
            .map(|(i, p)| VpiAtFrequency {
                v_pi: VoltsPeak(p.v_pi.0 * if i == 0 { reference } else { others }),
                ..*p
            })
            .collect();
        response_curve(&points)
            .unwrap()
            .f_3db_hz
            .expect("3 dB reached")
            .0
    };
    let (earliest, latest) = (skewed(0.997, 1.003), skewed(1.003, 0.997));
    let f3 = report["response"]["f_3db_hz"]
        .as_f64()
        .expect("3 dB reached");
    let f3_truth = expected_curve.f_3db_hz.expect("the scenario falls 3 dB").0;
    assert!(earliest < f3_truth && f3_truth < latest);
    assert!(
        (earliest..=latest).contains(&f3),
        "3 dB frequency: demo {f3} Hz, scenario {f3_truth} Hz, allowed {earliest}..{latest} Hz"
    );
    // The scenario's V_pi rises by a factor 1.6 (4.1 dB) over the range: no 6 dB point.
    assert_eq!(expected_curve.f_6db_hz, None);
    assert!(report["response"]["f_6db_hz"].is_null());

    let plots = report["plots"].as_array().expect("plot paths");
    assert!(plots.len() >= 3, "{plots:?}");
    for plot in plots {
        let path = std::path::Path::new(plot.as_str().unwrap());
        assert!(
            path.starts_with(&data_dir),
            "{path:?} lies in the data directory"
        );
        let text = std::fs::read_to_string(path).expect("the plot file exists");
        let document = roxmltree::Document::parse(&text).expect("the plot parses as XML");
        let root = document.root_element();
        assert_eq!(root.tag_name().name(), "svg", "{path:?}");
        assert_eq!(
            root.tag_name().namespace(),
            Some("http://www.w3.org/2000/svg")
        );
    }
    // Without --stay the daemon is gone once the JSON is printed: no dead dashboard link.
    assert!(report.get("dashboard_url").is_none(), "{report}");
}

#[test]
fn demo_prints_a_table_for_people_and_runs_again_in_the_same_directory() {
    let dir = tempfile::tempdir().unwrap();
    let data_dir = dir.path().join("demo");
    for round in 1..=2 {
        let out = demo(&data_dir, &[]);
        let stdout = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success(),
            "round {round}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(
            stdout.contains(&format!("run {round} completed")),
            "{stdout}"
        );
        assert!(stdout.contains("3 dB response frequency:"), "{stdout}");
        assert!(stdout.contains("6 dB response frequency:"), "{stdout}");
        assert!(stdout.contains("20.000 GHz"), "{stdout}");
        assert!(stdout.contains("dashboard: http://127.0.0.1:"), "{stdout}");
        assert!(stdout.contains(".svg"), "{stdout}");
    }
}

#[test]
fn demo_refuses_a_data_directory_it_cannot_create() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("a-file");
    std::fs::write(&file, "not a directory").unwrap();
    let out = demo(&file.join("demo"), &[]);
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("cannot create the data directory"),
        "{stderr}"
    );
}
