//! History a lab can trust, end to end: calibrations measured by the engine on the simulated
//! bench and read over HTTP, then pinned and unpinned through the API and through the real
//! `halfwave` binary's `pin` / `unpin`.
//!
//! The lookup rule under test (`store/history.rs`): V_pi at a frequency comes from the device's
//! pinned reference calibration when one is pinned, otherwise from the newest completed run whose
//! measured range covers the frequency; device plots show the pinned run, otherwise the newest
//! completed run covering every calibrated frequency, and say which run in the subtitle and the
//! `Halfwave-Run-*` headers. The V_pi values are checked against the simulated modulator's stated
//! V_pi(f) (the measurement recovers it from Bessel sidebands, NIST DLMF 10.12).

mod api_support;

use api_support::seed::{seed_completed_run, seed_device};
use api_support::{problem, spawn_app, spawn_app_with_engine, true_chain_upload, TestApp};
use halfwave::api::tokens::Role;
use halfwave::store::{NewRun, RunState};
use serde_json::{json, Value};
use std::time::Duration;

const SERIAL: &str = "EG-PM-0042";
/// The wide calibration: 0.5 to 16 GHz.
const WIDE_HZ: [f64; 4] = [0.5e9, 2e9, 8e9, 16e9];
/// The quick check that comes after it: 1 to 5 GHz.
const QUICK_HZ: [f64; 2] = [1e9, 5e9];

fn plan(frequencies_hz: &[f64]) -> Value {
    json!({
        "device": {"serial": SERIAL, "model": "simulated phase modulator", "rf_input_limit_dbm": 27.0},
        "bench": "sim-bench",
        "chain": {"kind": "stored", "name": "sim chain"},
        "frequencies": {"kind": "list", "values_hz": frequencies_hz},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 20.0, "step_db": 4.0},
        "settle_s": 0.0
    })
}

async fn get_json(app: &TestApp, path: &str, token: &str) -> (u16, Value) {
    let response = app.get(path, Some(token)).await;
    let status = response.status().as_u16();
    (status, response.json().await.unwrap_or(Value::Null))
}

async fn submit_and_wait(app: &TestApp, token: &str, frequencies_hz: &[f64]) -> i64 {
    let response = app
        .post_json("/api/v1/runs", Some(token), &plan(frequencies_hz))
        .await;
    assert_eq!(response.status(), 201);
    let run_id = response.json::<Value>().await.unwrap()["run_id"]
        .as_i64()
        .unwrap();
    let deadline = tokio::time::Instant::now() + Duration::from_secs(300);
    loop {
        let (_, run) = get_json(app, &format!("/api/v1/runs/{run_id}"), token).await;
        if run["state"] == "completed" {
            return run_id;
        }
        assert!(
            !matches!(run["state"].as_str(), Some("failed" | "cancelled")),
            "{run}"
        );
        assert!(
            tokio::time::Instant::now() < deadline,
            "run did not end: {run}"
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn v_pi(app: &TestApp, token: &str, query: &str) -> (u16, Value) {
    get_json(
        app,
        &format!("/api/v1/devices/{SERIAL}/v-pi?{query}"),
        token,
    )
    .await
}

/// The run a device plot shows, from its headers, and the plot's text.
async fn plot(app: &TestApp, token: &str, which: &str) -> (i64, String, bool, String) {
    let response = app
        .get(
            &format!("/api/v1/devices/{SERIAL}/plots/{which}"),
            Some(token),
        )
        .await;
    assert_eq!(response.status(), 200, "{which}");
    let header = |name: &str| {
        response
            .headers()
            .get(name)
            .unwrap_or_else(|| panic!("{which} without the {name} header"))
            .to_str()
            .unwrap()
            .to_string()
    };
    let run_id = header("halfwave-run-id").parse().unwrap();
    let selection = header("halfwave-run-selection");
    let pinned = header("halfwave-run-pinned") == "true";
    let svg = response.text().await.unwrap();
    let document = roxmltree::Document::parse(&svg).expect("well-formed SVG");
    let text: String = document
        .descendants()
        .filter(|n| n.is_text())
        .filter_map(|n| n.text())
        .collect::<Vec<_>>()
        .join("|");
    (run_id, selection, pinned, text)
}

fn audit_actions(entries: &[halfwave::store::AuditEntry]) -> Vec<(String, String, String)> {
    entries
        .iter()
        .rev()
        .filter(|e| e.action.starts_with("device."))
        .map(|e| (e.action.clone(), e.actor.clone(), e.subject.clone()))
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_quick_check_does_not_hide_a_wide_calibration_and_a_pin_decides() {
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let admin = app.token("admin-1", Role::Admin).await;
    let operator = app.token("lab-b", Role::Operator).await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let all_hz: Vec<f64> = WIDE_HZ.iter().chain(QUICK_HZ.iter()).copied().collect();
    let chain = app
        .post_json(
            "/api/v1/chain-calibrations",
            Some(&admin),
            &true_chain_upload(&bench.sim, "sim chain", &all_hz),
        )
        .await;
    assert_eq!(chain.status(), 201);

    // A wide calibration, then a quick narrow check of the same device.
    let wide = submit_and_wait(app, &operator, &WIDE_HZ).await;
    let quick = submit_and_wait(app, &operator, &QUICK_HZ).await;

    // 12 GHz lies outside the quick check: the older wide calibration answers (today's rule,
    // "the newest run decides", refused this with 422 naming the quick run).
    let (status, at_12) = v_pi(app, &viewer, "frequency_hz=12e9").await;
    assert_eq!(status, 200, "{at_12}");
    assert_eq!(at_12["run_id"], wide, "{at_12}");
    assert_eq!(at_12["pinned"], false);
    assert_eq!(at_12["selection"], "newest_covering");
    let truth = bench.sim.v_pi_at(halfwave::units::Hz(12e9)).0;
    let measured = at_12["v_pi_volts"].as_f64().unwrap();
    // Interpolated between 8 and 16 GHz on a gently curved V_pi: within 3 % of the scenario.
    assert!(
        (measured - truth).abs() / truth < 0.03,
        "{measured} V vs {truth} V"
    );
    // Inside the quick check's range the newest covering run is the quick check.
    let (_, at_3) = v_pi(app, &viewer, "frequency_hz=3e9").await;
    assert_eq!(at_3["run_id"], quick, "{at_3}");
    // The device plots show the wide run: it covers every calibrated frequency (0.5-16 GHz).
    let (shown, selection, pinned, text) = plot(app, &viewer, "v-pi.svg").await;
    assert_eq!(
        (shown, selection.as_str(), pinned),
        (wide, "newest_covering", false)
    );
    assert!(text.contains(&format!("run {wide}")), "{text}");
    // 0.5, 2, 8 and 16 GHz are closer to log spacing than to linear: a logarithmic axis.
    assert!(text.contains("logarithmic"), "{text}");

    // Refused pins: a viewer; a run that is not completed; another device's run; no such run.
    let store = app.store();
    let device = store.device_by_serial(SERIAL).await.unwrap();
    let chain_id = store
        .latest_chain_calibration("sim chain")
        .await
        .unwrap()
        .id;
    let failed = store
        .create_run(&NewRun {
            plan: json!({"seeded": true}),
            device_id: device.id,
            bench_name: "sim-bench".into(),
            chain_calibration_id: chain_id,
            submitted_by: "seed".into(),
            provenance: Default::default(),
        })
        .await
        .unwrap();
    store
        .transition_run(failed.id, RunState::Failed, Some("a limit"))
        .await
        .unwrap();
    let (other_device, other_chain) = seed_device(store, "EG-PM-0099").await;
    let foreign = seed_completed_run(
        store,
        other_device,
        other_chain,
        &[2e9, 6e9],
        &[0.0, 6.0],
        |_| 4.0,
        51,
    )
    .await;
    let pin_path = format!("/api/v1/devices/{SERIAL}/pin");
    let response = app
        .post_json(&pin_path, Some(&viewer), &json!({"run_id": wide}))
        .await;
    assert_eq!(response.status(), 403);
    let response = app
        .post_json(&pin_path, Some(&operator), &json!({"run_id": failed.id}))
        .await;
    assert_eq!(response.status(), 409);
    let body = problem(response).await;
    assert!(
        body["detail"].as_str().unwrap().contains("failed"),
        "{body}"
    );
    let response = app
        .post_json(
            &pin_path,
            Some(&operator),
            &json!({"run_id": foreign.run_id}),
        )
        .await;
    assert_eq!(response.status(), 422);
    let body = problem(response).await;
    assert_eq!(body["errors"][0]["field"], "run_id", "{body}");
    assert!(
        body["detail"].as_str().unwrap().contains("EG-PM-0099"),
        "{body}"
    );
    let response = app
        .post_json(&pin_path, Some(&operator), &json!({"run_id": 987654}))
        .await;
    assert_eq!(response.status(), 404);
    let response = app
        .post_json(
            &format!("/api/v1/devices/{SERIAL}/unpin"),
            Some(&operator),
            &json!({}),
        )
        .await;
    assert_eq!(response.status(), 409, "nothing pinned yet");
    let (_, pin) = get_json(app, &pin_path, &viewer).await;
    assert_eq!(pin, json!({"serial": SERIAL, "pinned": null}));

    // Pin the wide calibration: it answers even where the newer quick check covers the frequency.
    let response = app
        .post_json(
            &pin_path,
            Some(&operator),
            &json!({"run_id": wide, "note": "accredited"}),
        )
        .await;
    assert_eq!(response.status(), 200);
    let pinned_view: Value = response.json().await.unwrap();
    assert_eq!(pinned_view["pinned"]["run_id"], wide);
    assert_eq!(pinned_view["pinned"]["pinned_by"], "lab-b");
    let (_, at_3) = v_pi(app, &viewer, "frequency_hz=3e9").await;
    assert_eq!(at_3["run_id"], wide, "{at_3}");
    assert_eq!(at_3["pinned"], true);
    assert_eq!(at_3["selection"], "pinned");
    // The quick run can still be asked for by id.
    let (_, asked) = v_pi(app, &viewer, &format!("frequency_hz=3e9&run_id={quick}")).await;
    assert_eq!(
        (asked["run_id"].as_i64(), asked["pinned"].as_bool()),
        (Some(quick), Some(false))
    );
    assert_eq!(asked["selection"], "requested");
    // Outside the pinned run's range: refused, naming it.
    let (status, outside) = v_pi(app, &viewer, "frequency_hz=18e9").await;
    assert_eq!(status, 422);
    let detail = outside["detail"].as_str().unwrap();
    assert!(
        detail.contains("pinned reference calibration and no other completed run covers"),
        "{outside}"
    );
    assert!(!detail.contains("  "), "no run of spaces inside: {detail}");
    // The history marks it and both plots say so.
    let (_, history) = get_json(
        app,
        &format!("/api/v1/devices/{SERIAL}/calibrations"),
        &viewer,
    )
    .await;
    let marked: Vec<(i64, bool)> = history
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            (
                c["run_id"].as_i64().unwrap(),
                c["pinned"].as_bool().unwrap(),
            )
        })
        .collect();
    assert_eq!(marked, [(quick, false), (wide, true)]);
    for which in ["v-pi.svg", "response.svg"] {
        let (shown, selection, pinned, text) = plot(app, &viewer, which).await;
        assert_eq!(
            (shown, selection.as_str(), pinned),
            (wide, "pinned", true),
            "{which}"
        );
        assert!(
            text.contains("pinned reference calibration"),
            "{which}: {text}"
        );
    }
    // A plot of a named run.
    let response = app
        .get(
            &format!("/api/v1/devices/{SERIAL}/plots/v-pi.svg?run_id={quick}"),
            Some(&viewer),
        )
        .await;
    assert_eq!(
        response.headers()["halfwave-run-id"],
        quick.to_string().as_str()
    );
    assert_eq!(response.headers()["halfwave-run-selection"], "requested");

    // Unpin: the newest-covering rule is back.
    let response = app
        .post_json(
            &format!("/api/v1/devices/{SERIAL}/unpin"),
            Some(&operator),
            &json!({"note": "re-measured"}),
        )
        .await;
    assert_eq!(response.status(), 200);
    let unpinned: Value = response.json().await.unwrap();
    assert_eq!(
        (
            unpinned["pinned"].clone(),
            unpinned["previous_run_id"].as_i64()
        ),
        (Value::Null, Some(wide))
    );
    let (_, at_3) = v_pi(app, &viewer, "frequency_hz=3e9").await;
    assert_eq!(
        (at_3["run_id"].as_i64(), at_3["pinned"].as_bool()),
        (Some(quick), Some(false))
    );

    // One audit row per pin and unpin, under the operator's name; none for the refusals.
    let audit = app.store().audit_log(500, None).await.unwrap();
    let subject = format!("device:{SERIAL}");
    assert_eq!(
        audit_actions(&audit),
        [
            (
                "device.pin".to_string(),
                "lab-b".to_string(),
                subject.clone()
            ),
            ("device.unpin".to_string(), "lab-b".to_string(), subject),
        ]
    );

    // The spectrum's title numbers points as the progress does: the quick run's last point is
    // its last of all (the count the progress events reach), not its database id.
    let (_, run) = get_json(app, &format!("/api/v1/runs/{quick}"), &viewer).await;
    let measured = run["measured_points"].as_i64().unwrap();
    let spectrum = app
        .get(&format!("/api/v1/runs/{quick}/spectrum.svg"), Some(&viewer))
        .await
        .text()
        .await
        .unwrap();
    assert!(
        spectrum.contains(&format!("run {quick}, point {measured}:")),
        "title of the latest spectrum: {}",
        spectrum
            .lines()
            .filter(|l| l.contains("point"))
            .collect::<Vec<_>>()
            .join("\n")
    );
}

const BIN: &str = env!("CARGO_BIN_EXE_halfwave");

async fn halfwave(args: &[&str]) -> std::process::Output {
    tokio::process::Command::new(BIN)
        .args(args)
        .env_remove("HALFWAVE_TOKEN")
        .output()
        .await
        .expect("the halfwave binary runs")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn pin_and_unpin_from_the_command_line() {
    let app = spawn_app().await;
    let operator = app.token("lab-b", Role::Operator).await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let store = app.store();
    let (device_id, chain_id) = seed_device(store, "PM-0042").await;
    let wide = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[0.5e9, 4e9, 16e9],
        &[0.0, 6.0],
        |f| 3.0 + 0.1 * (f / 1e9),
        51,
    )
    .await;
    let quick = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[1e9, 5e9],
        &[0.0, 6.0],
        |f| 3.05 + 0.1 * (f / 1e9),
        51,
    )
    .await;
    let client = ["--url", app.base.as_str(), "--token", operator.as_str()];
    let with = |words: &[&str]| -> Vec<String> {
        words
            .iter()
            .chain(client.iter())
            .map(|s| s.to_string())
            .collect()
    };
    let run = |args: Vec<String>| async move {
        let refs: Vec<&str> = args.iter().map(String::as_str).collect();
        halfwave(&refs).await
    };
    let text = |out: &std::process::Output| {
        (
            String::from_utf8_lossy(&out.stdout).into_owned(),
            String::from_utf8_lossy(&out.stderr).into_owned(),
        )
    };

    // Both verbs are listed and explain themselves.
    let top = halfwave(&["--help"]).await;
    let top = String::from_utf8_lossy(&top.stdout).into_owned();
    assert!(top.contains("pin") && top.contains("unpin"), "{top}");
    for (verb, expected) in [("pin", "<RUN>"), ("unpin", "<SERIAL>")] {
        let help = halfwave(&[verb, "--help"]).await;
        let help = String::from_utf8_lossy(&help.stdout).into_owned();
        assert!(
            help.contains(expected) && help.contains("HALFWAVE_TOKEN"),
            "{help}"
        );
    }

    let wide_id = wide.run_id.to_string();
    let pinned = run(with(&["pin", &wide_id, "--note", "accredited"])).await;
    let (out, err) = text(&pinned);
    assert!(pinned.status.success(), "{err}");
    assert!(
        out.contains(&format!(
            "run {wide_id} is the reference calibration of PM-0042"
        )),
        "{out}"
    );
    let (_, at_3) = get_json(
        &app,
        "/api/v1/devices/PM-0042/v-pi?frequency_hz=3e9",
        &viewer,
    )
    .await;
    assert_eq!(
        (at_3["run_id"].as_i64(), at_3["pinned"].as_bool()),
        (Some(wide.run_id), Some(true))
    );

    // `devices` names the pinned run, in its table and in its JSON.
    let listed = run(with(&["devices"])).await;
    let (out, err) = text(&listed);
    assert!(listed.status.success(), "{err}");
    let header = out.lines().next().unwrap_or_default();
    let row = out
        .lines()
        .find(|l| l.starts_with("PM-0042"))
        .unwrap_or_default();
    assert!(header.trim_end().ends_with("pinned"), "{out}");
    assert!(row.trim_end().ends_with(&format!("run {wide_id}")), "{out}");
    let listed = run(with(&["devices", "--json"])).await;
    let listed: Value = serde_json::from_slice(&listed.stdout).unwrap();
    assert_eq!(listed[0]["pinned_run_id"], wide.run_id);

    // Pinning the quick check replaces it (JSON for scripts).
    let repinned = run(with(&["pin", &quick.run_id.to_string(), "--json"])).await;
    let (out, err) = text(&repinned);
    assert!(repinned.status.success(), "{err}");
    let answer: Value = serde_json::from_str(&out).unwrap();
    assert_eq!(answer["pinned"]["run_id"], quick.run_id);
    assert_eq!(answer["previous_run_id"], wide.run_id);

    let unpinned = run(with(&["unpin", "PM-0042", "--note", "done"])).await;
    let (out, err) = text(&unpinned);
    assert!(unpinned.status.success(), "{err}");
    assert!(
        out.contains(&format!("run {} unpinned", quick.run_id)),
        "{out}"
    );
    let listed = run(with(&["devices", "--json"])).await;
    let listed: Value = serde_json::from_slice(&listed.stdout).unwrap();
    assert_eq!(listed[0]["pinned_run_id"], Value::Null, "nothing pinned");
    // Nothing left to unpin; a run that does not exist; a viewer's token: each said plainly.
    let again = run(with(&["unpin", "PM-0042"])).await;
    let (_, err) = text(&again);
    assert!(!again.status.success());
    assert!(err.contains("no pinned run"), "{err}");
    let missing = run(with(&["pin", "987654"])).await;
    let (_, err) = text(&missing);
    assert!(!missing.status.success());
    assert!(err.contains("404") && err.contains("987654"), "{err}");
    let as_viewer = halfwave(&[
        "pin",
        &wide_id,
        "--url",
        app.base.as_str(),
        "--token",
        viewer.as_str(),
    ])
    .await;
    let (_, err) = text(&as_viewer);
    assert!(!as_viewer.status.success());
    assert!(err.contains("operator"), "{err}");

    // Two pins and one unpin through the CLI: three audit rows under the token's name.
    let audit = store.audit_log(100, None).await.unwrap();
    let actions: Vec<(String, String)> = audit_actions(&audit)
        .into_iter()
        .map(|(action, actor, _)| (action, actor))
        .collect();
    assert_eq!(
        actions,
        [
            ("device.pin".to_string(), "lab-b".to_string()),
            ("device.pin".to_string(), "lab-b".to_string()),
            ("device.unpin".to_string(), "lab-b".to_string()),
        ]
    );
}
