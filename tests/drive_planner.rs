//! Planning a drive from a device's record, over HTTP and through the real `halfwave` binary:
//! `GET /devices/{serial}/drive` (the generator level for a wanted modulation index, and the
//! inverse), its refusals (outside the measured range unless asked to extrapolate, over the
//! device's or the daemon's limit, malformed questions), and `POST /spectrum-prediction` with
//! `halfwave predict`.
//!
//! The stored V_pi values are invented (V_pi(f) = 3 V + f / 4 GHz, stored at 2, 4 and 8 GHz with
//! 1 % uncertainty); the expected levels are worked by hand in the comments with P = V_pk^2 /
//! (2 x 50 ohm) and beta = pi V_pk / V_pi (common practice). The line powers of a single tone are
//! J_n(beta)^2 with values from Abramowitz & Stegun, Table 9.1.

mod api_support;

use api_support::seed::{seed_completed_run, seed_device};
use api_support::{problem, serve_state, spawn_app, TestApp};
use halfwave::api::tokens::Role;
use halfwave::store::NewDevice;
use halfwave::units::{Dbm, Nanometers};
use serde_json::{json, Value};

const SERIAL: &str = "EG-PM-0042";
const BIN: &str = env!("CARGO_BIN_EXE_halfwave");

/// A read-only app with one device calibrated at 2, 4 and 8 GHz; returns it, a viewer token and
/// the run id.
async fn calibrated() -> (TestApp, String, i64) {
    let app = spawn_app().await;
    let (token, run_id) = seed(&app).await;
    (app, token, run_id)
}

/// Seeds the device and its calibration into `app`'s store; returns a viewer token.
async fn seed(app: &TestApp) -> (String, i64) {
    let (device_id, chain_id) = seed_device(app.store(), SERIAL).await;
    let run = seed_completed_run(
        app.store(),
        device_id,
        chain_id,
        &[2e9, 4e9, 8e9],
        &[0.0, 6.0],
        |f| 3.0 + f / 4e9,
        201,
    )
    .await;
    (app.token("viewer", Role::Viewer).await, run.run_id)
}

async fn drive(app: &TestApp, token: &str, query: &str) -> (u16, Value) {
    let response = app
        .get(
            &format!("/api/v1/devices/{SERIAL}/drive?{query}"),
            Some(token),
        )
        .await;
    let status = response.status().as_u16();
    let body = if status == 200 {
        response.json().await.unwrap()
    } else {
        problem(response).await
    };
    (status, body)
}

fn close(value: &Value, expected: f64, tolerance: f64) -> bool {
    value
        .as_f64()
        .is_some_and(|v| (v - expected).abs() <= tolerance)
}

#[tokio::test]
async fn the_planner_answers_from_the_record_both_ways() {
    let (app, token, run_id) = calibrated().await;
    // 6 GHz lies between 4 GHz (4.0 V +- 0.04 V) and 8 GHz (5.0 V +- 0.05 V): 4.5 V +- 0.045 V.
    // beta = 1.2: V_pk = 1.2 x 4.5 / pi = 1.71887 V; P = 1.71887^2 / 100 = 29.545 mW =
    // 14.7049 dBm at the modulator; through a 3 dB loss the generator gives 17.7049 dBm.
    // u = (20 / ln 10) x 0.01 = 0.08686 dB.
    let (status, a) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1.2&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 200, "{a}");
    assert!(close(&a["generator_level_dbm"], 17.7049, 1e-4), "{a}");
    assert!(close(&a["level_at_modulator_dbm"], 14.7049, 1e-4), "{a}");
    assert!(close(&a["v_peak_volts"], 1.71887, 1e-5), "{a}");
    assert!(close(&a["level_uncertainty_db"], 0.08686, 1e-5), "{a}");
    assert_eq!(a["solved_for"], "generator_level");
    assert_eq!(a["v_pi"]["run_id"], run_id);
    assert_eq!(a["v_pi"]["selection"], "newest_covering");
    assert!(close(&a["v_pi"]["v_pi_volts"], 4.5, 1e-12), "{a}");
    assert!(
        close(&a["v_pi"]["v_pi_uncertainty_volts"], 0.045, 1e-12),
        "{a}"
    );
    assert_eq!(a["v_pi"]["interpolated"], true);
    assert_eq!(a["v_pi"]["extrapolated"], false);
    // The read-only server has no engine: the daemon limit is the configuration's default, 24 dBm,
    // below the device's 27 dBm; margin 24 - 14.7049 = 9.2951 dB.
    assert_eq!(a["limits"]["device_limit_dbm"], 27.0);
    assert_eq!(a["limits"]["daemon_limit_dbm"], 24.0);
    assert!(close(&a["limits"]["margin_db"], 9.2951, 1e-4), "{a}");

    // The inverse: that generator level gives beta = 1.2 back, u(beta) = 1.2 x 1 % = 0.012.
    let (status, b) = drive(
        &app,
        &token,
        "frequency_hz=6e9&generator_level_dbm=17.704877742576695&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 200, "{b}");
    assert_eq!(b["solved_for"], "modulation_index");
    assert!(close(&b["modulation_index"], 1.2, 1e-9), "{b}");
    assert!(
        close(&b["modulation_index_uncertainty"], 0.012, 1e-9),
        "{b}"
    );

    // Through the stored chain: gain -1.5 dB at 1 GHz to -4.0 dB at 40 GHz, at 6 GHz
    // -1.5 - 2.5 x 5 / 39 = -1.82051 dB, so the generator gives 14.7049 + 1.8205 = 16.5254 dBm;
    // with a 0.1 dB chain uncertainty u = sqrt(0.08686^2 + 0.1^2) = 0.13245 dB.
    let chain = format!("{SERIAL}%20chain");
    let (status, c) = drive(
        &app,
        &token,
        &format!("frequency_hz=6e9&modulation_index=1.2&chain={chain}&chain_uncertainty_db=0.1"),
    )
    .await;
    assert_eq!(status, 200, "{c}");
    assert!(close(&c["generator_level_dbm"], 16.5254, 1e-4), "{c}");
    assert!(close(&c["chain"]["gain_db"], -1.82051, 1e-5), "{c}");
    assert_eq!(c["chain"]["name"], format!("{SERIAL} chain"));
    assert_eq!(c["chain"]["version"], 1);
    assert_eq!(c["chain"]["outside_table"], false);
    assert!(close(&c["level_uncertainty_db"], 0.13245, 1e-5), "{c}");
    // A stored chain that states its gain's uncertainty (the CSV's third column) lends it when
    // the question gives none: at 6 GHz the larger of the bracketing entries, 0.08 dB (as the V_pi
    // budget takes it), so u = sqrt(0.08686^2 + 0.08^2) = 0.11809 dB; a given value overrides it.
    // The chain without that column stays at 0 (V_pi's part alone, 0.08686 dB).
    app.store()
        .create_chain_calibration(
            "stated chain",
            "test",
            &[
                halfwave::store::ChainCalibrationPoint::new(
                    halfwave::units::Hz(1e9),
                    halfwave::units::Db(-1.5),
                )
                .with_uncertainty(halfwave::units::Db(0.05)),
                halfwave::store::ChainCalibrationPoint::new(
                    halfwave::units::Hz(40e9),
                    halfwave::units::Db(-4.0),
                )
                .with_uncertainty(halfwave::units::Db(0.08)),
            ],
        )
        .await
        .unwrap();
    let (status, stated) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1.2&chain=stated%20chain",
    )
    .await;
    assert_eq!(status, 200, "{stated}");
    assert!(
        close(&stated["chain"]["gain_uncertainty_db"], 0.08, 1e-12),
        "{stated}"
    );
    assert!(
        close(&stated["level_uncertainty_db"], 0.11809, 1e-5),
        "{stated}"
    );
    let (_, given) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1.2&chain=stated%20chain&chain_uncertainty_db=0.1",
    )
    .await;
    assert!(
        close(&given["level_uncertainty_db"], 0.13245, 1e-5),
        "{given}"
    );
    let (_, without) = drive(
        &app,
        &token,
        &format!("frequency_hz=6e9&modulation_index=1.2&chain={chain}"),
    )
    .await;
    assert!(
        close(&without["chain"]["gain_uncertainty_db"], 0.0, 0.0),
        "{without}"
    );
    assert!(
        close(&without["level_uncertainty_db"], 0.08686, 1e-5),
        "{without}"
    );
    // Below both records: the chain's table starts at 1 GHz (its end value held at 0.5 GHz) and
    // V_pi's at 2 GHz (the line through 2 and 4 GHz: 3.5 - 0.25 x 1.5 = 3.125 V).
    let (status, d) = drive(
        &app,
        &token,
        &format!("frequency_hz=5e8&modulation_index=1&chain={chain}&extrapolate=true"),
    )
    .await;
    assert_eq!(status, 200, "{d}");
    assert_eq!(d["chain"]["outside_table"], true);
    assert_eq!(d["chain"]["gain_db"], -1.5);
    assert!(close(&d["v_pi"]["v_pi_volts"], 3.125, 1e-12), "{d}");
    assert_eq!(d["v_pi"]["extrapolated"], true);
}

#[tokio::test]
async fn the_daemon_limit_is_the_engines() {
    use halfwave::api::{ApiSettings, AppState};
    use halfwave::config::Limits;
    use halfwave::engine::Engine;
    // A daemon configured with a 15 dBm ceiling at the modulator (and no bench).
    let dir = tempfile::tempdir().unwrap();
    let store = halfwave::store::Store::open(dir.path().join("h.sqlite").to_str().unwrap())
        .await
        .unwrap();
    let limits = Limits {
        max_level_at_modulator_dbm: Dbm(15.0),
    };
    let engine = Engine::start_with(limits, store, Vec::new()).await.unwrap();
    let app = serve_state(AppState::with_engine(engine, ApiSettings::default()), dir).await;
    let (token, _) = seed(&app).await;
    // beta 1.2 at 6 GHz needs 14.7049 dBm at the modulator (worked above): 0.2951 dB to spare.
    let (status, a) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1.2&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 200, "{a}");
    assert_eq!(a["limits"]["daemon_limit_dbm"], 15.0);
    assert!(close(&a["limits"]["margin_db"], 0.2951, 1e-4), "{a}");
    // beta 1.3 needs 20 log10(1.3 / 1.2) = 0.6952 dB more, 15.4001 dBm: refused.
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1.3&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 422, "{p}");
    let message = p["errors"][0]["message"].as_str().unwrap();
    assert!(
        message.contains("of 15 dBm") && message.contains("15.40 dBm"),
        "{message}"
    );
}

#[tokio::test]
async fn the_planner_refuses_outside_the_range_and_over_the_limits() {
    let (app, token, _) = calibrated().await;
    // 12 GHz is past the 8 GHz end: refused, naming the field and the way out.
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=12e9&modulation_index=1.2&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 422, "{p}");
    assert_eq!(p["errors"][0]["field"], "frequency_hz");
    assert!(
        p["detail"].as_str().unwrap().contains("extrapolate=true"),
        "{p}"
    );
    // Asked to extrapolate: the line through 4 GHz (4.0 V) and 8 GHz (5.0 V) gives 6.0 V at
    // 12 GHz, u = sqrt(0.05^2 + 1.0^2) = 1.00125 V, flagged; the level's uncertainty grows to
    // 8.6859 x 1.00125 / 6.0 = 1.44946 dB. beta 1.2: V_pk = 2.29183 V, 17.2037 dBm at the
    // modulator, 20.2037 dBm from the generator.
    let (status, e) = drive(
        &app,
        &token,
        "frequency_hz=12e9&modulation_index=1.2&chain_loss_db=3&extrapolate=true",
    )
    .await;
    assert_eq!(status, 200, "{e}");
    assert_eq!(e["v_pi"]["extrapolated"], true);
    assert!(close(&e["v_pi"]["v_pi_volts"], 6.0, 1e-12), "{e}");
    assert!(
        close(&e["v_pi"]["v_pi_uncertainty_volts"], 1.00125, 1e-5),
        "{e}"
    );
    assert!(close(&e["level_uncertainty_db"], 1.44946, 1e-5), "{e}");
    assert!(close(&e["generator_level_dbm"], 20.2037, 1e-4), "{e}");

    // beta = 8 at 2 GHz (3.5 V): V_pk = 8.91268 V, 29.0002 dBm at the modulator, above the
    // daemon's 24 dBm (the lower limit here): refused, naming it.
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=2e9&modulation_index=8&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 422, "{p}");
    assert_eq!(p["errors"][0]["field"], "modulation_index");
    let message = p["errors"][0]["message"].as_str().unwrap();
    assert!(
        message.contains("limits.max_level_at_modulator_dbm"),
        "{message}"
    );
    assert!(message.contains("29.00 dBm"), "{message}");
    // The same device recorded with a 20 dBm RF input limit: 22 dBm at the modulator (beta =
    // pi x 3.98107 / 3.5 = 3.5734) is under the daemon's limit but over the device's.
    app.store()
        .upsert_device(&NewDevice {
            serial: SERIAL.to_string(),
            model: "demo phase modulator".to_string(),
            rf_input_limit: Dbm(20.0),
            wavelength: Nanometers(1550.0),
        })
        .await
        .unwrap();
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=2e9&modulation_index=3.5734&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 422, "{p}");
    let message = p["errors"][0]["message"].as_str().unwrap();
    assert!(message.contains("RF input limit of 20 dBm"), "{message}");
    // The inverse is checked too: 25 dBm through a 3 dB loss is 22 dBm at the modulator.
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=2e9&generator_level_dbm=25&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 422, "{p}");
    assert_eq!(p["errors"][0]["field"], "generator_level_dbm");

    // An index too small to give any power in floating point is the asker's mistake, not the
    // server's: 422 naming it.
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=5e-324&chain_loss_db=3",
    )
    .await;
    assert_eq!(status, 422, "{p}");
    assert_eq!(p["errors"][0]["field"], "modulation_index");
    // Malformed questions name every field at once.
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1&generator_level_dbm=0",
    )
    .await;
    assert_eq!(status, 422);
    let fields: Vec<&str> = p["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["field"].as_str().unwrap())
        .collect();
    assert_eq!(fields, ["generator_level_dbm", "chain"], "{p}");
    let (status, p) = drive(
        &app,
        &token,
        "frequency_hz=6e9&modulation_index=1&chain=no%20such%20chain",
    )
    .await;
    assert_eq!(status, 422);
    assert_eq!(p["errors"][0]["field"], "chain");
    let response = app
        .get(
            "/api/v1/devices/NO-SUCH/drive?frequency_hz=6e9&modulation_index=1&chain_loss_db=3",
            Some(&token),
        )
        .await;
    assert_eq!(response.status(), 404);
    let response = app
        .get(
            &format!("/api/v1/devices/{SERIAL}/drive?frequency_hz=6e9&modulation_index=1&chain_loss_db=3"),
            None,
        )
        .await;
    assert_eq!(response.status(), 401);
}

#[tokio::test]
async fn the_spectrum_prediction_route_gives_bessel_squares() {
    let app = spawn_app().await;
    let token = app.token("viewer", Role::Viewer).await;
    // A single tone at beta = 2: J_0(2)^2 = 0.223890779^2, J_1(2)^2 = 0.576724808^2,
    // J_2(2)^2 = 0.352834029^2 (A&S Table 9.1), the same at -n.
    let response = app
        .post_json(
            "/api/v1/spectrum-prediction",
            Some(&token),
            &json!({"modulation_frequency_hz": 7.5e9, "tones": [{"harmonic": 1, "modulation_index": 2.0, "phase_deg": 0}], "orders": 2}),
        )
        .await;
    assert_eq!(response.status(), 200);
    let p: Value = response.json().await.unwrap();
    let lines = p["lines"].as_array().unwrap();
    assert_eq!(lines.len(), 5);
    let expected = [
        0.352_834_029,
        0.576_724_808,
        0.223_890_779,
        0.576_724_808,
        0.352_834_029,
    ];
    for (line, j) in lines.iter().zip(expected) {
        assert!(close(&line["relative_power"], j * j, 1e-9), "{line}");
        assert!(
            close(&line["relative_power_db"], 10.0 * (j * j).log10(), 1e-7),
            "{line}"
        );
    }
    assert_eq!(lines[0]["order"], -2);
    assert_eq!(lines[0]["frequency_offset_hz"], -15e9);
    // Invalid fields are named.
    let response = app
        .post_json(
            "/api/v1/spectrum-prediction",
            Some(&token),
            &json!({"modulation_frequency_hz": 7.5e9, "tones": [{"harmonic": 0, "modulation_index": 1.0}], "orders": 2}),
        )
        .await;
    assert_eq!(response.status(), 422);
    assert_eq!(
        problem(response).await["errors"][0]["field"],
        "tones[0].harmonic"
    );
    let response = app
        .post_json(
            "/api/v1/spectrum-prediction",
            Some(&token),
            &json!({"modulation_frequency_hz": 7.5e9, "tones": [{"harmonic": 1, "modulation_index": 1.0, "colour": 1}], "orders": 2}),
        )
        .await;
    assert_eq!(response.status(), 422);
}

async fn halfwave(args: &[&str]) -> std::process::Output {
    tokio::process::Command::new(BIN)
        .args(args)
        .env_remove("HALFWAVE_TOKEN")
        .env_remove("HALFWAVE_URL")
        .output()
        .await
        .expect("the halfwave binary runs")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn drive_and_predict_through_the_binary() {
    for (command, expected) in [
        ("drive", "--modulation-index"),
        ("drive", "--generator-level-dbm"),
        ("drive", "--extrapolate"),
        ("predict", "DRIVE.json"),
    ] {
        let out = halfwave(&[command, "--help"]).await;
        let text = String::from_utf8_lossy(&out.stdout);
        assert!(
            text.contains(expected),
            "{command} --help lacks {expected}: {text}"
        );
    }
    let (app, token, run_id) = calibrated().await;
    let common = ["--url", app.base.as_str(), "--token", token.as_str()];
    // The generator level for beta 1.2 at 6 GHz through a 3 dB loss (worked above: 17.70 dBm).
    let mut args = vec![
        "drive",
        SERIAL,
        "--frequency",
        "6e9",
        "--modulation-index",
        "1.2",
        "--chain-loss-db",
        "3",
    ];
    args.extend(common);
    let out = halfwave(&args).await;
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        text.contains("set the generator to 17.70 dBm (+- 0.09 dB"),
        "{text}"
    );
    assert!(text.contains(&format!("from run {run_id}")), "{text}");
    assert!(text.contains("rated RF input power"), "{text}");
    // The inverse with --json, a negative level through a 20 dB net gain (chain loss -20 dB):
    // 0 dBm at the modulator is 0.31623 V peak, beta = pi x 0.31623 / 4.5 = 0.22077.
    let mut args = vec![
        "drive",
        SERIAL,
        "--frequency",
        "6e9",
        "--generator-level-dbm",
        "-20",
        "--chain-loss-db",
        "-20",
        "--json",
    ];
    args.extend(common);
    let out = halfwave(&args).await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let answer: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(
        close(&answer["modulation_index"], 0.22077, 1e-5),
        "{answer}"
    );
    assert!(close(&answer["v_peak_volts"], 0.31623, 1e-5), "{answer}");
    // Outside the range: the daemon's refusal reaches the terminal with the way out.
    let mut args = vec![
        "drive",
        SERIAL,
        "--frequency",
        "12e9",
        "--modulation-index",
        "1.2",
        "--chain-loss-db",
        "3",
    ];
    args.extend(common);
    let out = halfwave(&args).await;
    assert!(!out.status.success());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("`halfwave drive --extrapolate`"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // A negative index reaches the daemon's check (not the argument parser's advice to write
    // `-- -1`), and a missing chain names both ways to give one.
    let mut args = vec![
        "drive",
        SERIAL,
        "--frequency",
        "6e9",
        "--modulation-index",
        "-1",
        "--chain-loss-db",
        "3",
    ];
    args.extend(common);
    let out = halfwave(&args).await;
    let said = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        said.contains("modulation_index") && !said.contains("-- -1"),
        "{said}"
    );
    let out = halfwave(&[
        "drive",
        SERIAL,
        "--frequency",
        "6e9",
        "--modulation-index",
        "1",
    ])
    .await;
    let said = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        said.contains("--chain") && said.contains("--chain-loss-db"),
        "{said}"
    );
    // Both chains at once is refused by the command line itself.
    let out = halfwave(&[
        "drive",
        SERIAL,
        "--frequency",
        "6e9",
        "--modulation-index",
        "1",
        "--chain",
        "x",
        "--chain-loss-db",
        "3",
    ])
    .await;
    assert!(!out.status.success());

    // predict: the issue's two-harmonic drive, table and JSON; no daemon involved.
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("drive.json");
    std::fs::write(
        &file,
        r#"{"modulation_frequency_hz": 7.5e9, "tones": [{"harmonic": 1, "modulation_index": 1.3, "phase_deg": 0}, {"harmonic": 2, "modulation_index": 0.4, "phase_deg": 30}], "orders": 6}"#,
    )
    .unwrap();
    let out = halfwave(&["predict", file.to_str().unwrap(), "--json"]).await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let p: Value = serde_json::from_slice(&out.stdout).unwrap();
    let lines = p["lines"].as_array().unwrap();
    assert_eq!(lines.len(), 13);
    let sum: f64 = lines
        .iter()
        .map(|l| l["relative_power"].as_f64().unwrap())
        .sum();
    // Parseval: 6 orders either side hold all but a few 1e-6 of the carrier's power.
    assert!(sum > 0.9999 && sum <= 1.0 + 1e-12, "{sum}");
    let out = halfwave(&["predict", file.to_str().unwrap()]).await;
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("power (dB)") && text.lines().count() == 16,
        "{text}"
    );
    std::fs::write(&file, r#"{"modulation_frequency_hz": 7.5e9, "tones": [{"harmonic": 1, "modulation_index": -1}], "orders": 6}"#).unwrap();
    let out = halfwave(&["predict", file.to_str().unwrap()]).await;
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("tones[0].modulation_index"), "{err}");
}
