//! The whole flow over HTTP against the engine on the simulated bench (time factor 0): submit ->
//! progress events -> completed -> history -> V_pi query; roles allowed and refused; invalid plans
//! refused with every field named and nothing sent to the instruments.
//!
//! The reference is the simulated bench's scenario: its modulator has a known V_pi at every
//! frequency, and the V_pi the API reports (recovered from spectra by the Bessel-sideband
//! analysis, Jacobi-Anger expansion per NIST DLMF 10.12) must agree with it.

mod api_support;

use api_support::{problem, read_events, spawn_app_with_engine, true_chain_upload};
use halfwave::api::tokens::Role;
use halfwave_drivers::sim::Role as Instrument;
use std::time::Duration;

const FREQUENCIES_HZ: [f64; 3] = [1e9, 5e9, 10e9];

fn plan(chain: &str) -> serde_json::Value {
    serde_json::json!({
        "device": {"serial": "EG-PM-0042", "model": "simulated phase modulator", "rf_input_limit_dbm": 27.0},
        "bench": "sim-bench",
        "chain": {"kind": "stored", "name": chain},
        "frequencies": {"kind": "list", "values_hz": FREQUENCIES_HZ},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 20.0, "step_db": 4.0},
        "settle_s": 0.0
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn submit_follow_complete_history_and_v_pi() {
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let admin = app.token("admin-1", Role::Admin).await;
    let operator = app.token("lab-b", Role::Operator).await;
    let viewer = app.token("viewer-1", Role::Viewer).await;

    let chain = app
        .post_json(
            "/api/v1/chain-calibrations",
            Some(&admin),
            &true_chain_upload(&bench.sim, "sim chain", &FREQUENCIES_HZ),
        )
        .await;
    assert_eq!(chain.status(), 201);

    // Benches: the simulated one, idle.
    let benches: serde_json::Value = app
        .get("/api/v1/benches", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(benches[0]["name"], "sim-bench");

    // Watch the events (EventSource style: a one-time ticket in the query, asked for with the
    // bearer header) before submitting.
    let ticket = event_ticket(app, &viewer).await;
    let stream = app
        .client
        .get(app.url(&format!("/api/v1/events?ticket={ticket}")))
        .send()
        .await
        .unwrap();
    assert_eq!(stream.status(), 200);
    assert!(stream.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/event-stream"));

    let submitted = app
        .post_json("/api/v1/runs", Some(&operator), &plan("sim chain"))
        .await;
    assert_eq!(submitted.status(), 201);
    let submitted: serde_json::Value = submitted.json().await.unwrap();
    let run_id = submitted["run_id"].as_i64().unwrap();

    let events = read_events(stream, Duration::from_secs(300), |e| {
        e["event"] == "finished" && e["run_id"] == run_id
    })
    .await;
    let points: Vec<&serde_json::Value> = events
        .iter()
        .filter(|e| e["event"] == "point" && e["run_id"] == run_id)
        .collect();
    let failed = events
        .iter()
        .filter(|e| e["event"] == "point_failed" && e["run_id"] == run_id)
        .count();
    let total = 3 * 6; // 3 frequencies x levels 0, 4, ..., 20 dBm
                       // Every grid point is reported once, measured or (a line lost in the floor) failed.
    assert_eq!(points.len() + failed, total);
    assert!(
        points.len() >= total - 3,
        "at most one weak point per frequency may fail"
    );
    let completed: Vec<i64> = points
        .iter()
        .map(|p| p["completed_points"].as_i64().unwrap())
        .collect();
    assert!(
        completed.windows(2).all(|w| w[1] > w[0]),
        "progress only moves forward"
    );
    assert!(points.iter().all(|p| p["total_points"] == total));
    let frequencies = events
        .iter()
        .filter(|e| e["event"] == "frequency" && e["run_id"] == run_id)
        .count();
    assert_eq!(frequencies, 3);
    assert_eq!(events.last().unwrap()["state"], "completed");

    // The run, its history and V_pi from the API.
    let run: serde_json::Value = app
        .get(&format!("/api/v1/runs/{run_id}"), Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(run["state"], "completed");
    assert_eq!(run["submitted_by"], "lab-b");
    assert_eq!(run["results"].as_array().unwrap().len(), 3);
    let history: serde_json::Value = app
        .get("/api/v1/devices/EG-PM-0042/calibrations", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(history[0]["run_id"], run_id);
    for f in [5e9, 7.5e9] {
        let answer: serde_json::Value = app
            .get(
                &format!("/api/v1/devices/EG-PM-0042/v-pi?frequency_hz={f}"),
                Some(&viewer),
            )
            .await
            .json()
            .await
            .unwrap();
        let measured = answer["v_pi_volts"].as_f64().unwrap();
        let truth = bench.sim.v_pi_at(halfwave::units::Hz(f)).0;
        // Between measured frequencies the interpolation adds its own error on a curved V_pi;
        // 3 % covers that and the measurement (the scenario's curve is gentle).
        assert!(
            (measured - truth).abs() / truth < 0.03,
            "V_pi at {f} Hz: {measured} V vs {truth} V"
        );
        assert!(answer["v_pi_uncertainty_volts"].as_f64().unwrap() > 0.0);
    }

    // The submission is in the audit log under the token's name; the RF output is off.
    let audit = app.store().audit_log(100, None).await.unwrap();
    // One row per action (the engine, the store and the API once each wrote their own); the
    // state changes that follow are rows of their own (`run.state`, by the daemon).
    let submits: Vec<_> = audit
        .iter()
        .filter(|e| e.subject == format!("run:{run_id}") && e.action != "run.state")
        .collect();
    assert_eq!(submits.len(), 1, "{submits:?}");
    assert_eq!(submits[0].actor, "lab-b");
    assert_eq!(submits[0].action, "run.submit");
    assert!(
        audit.iter().all(|e| !e.subject.starts_with("run ")),
        "{audit:?}"
    );
    assert!(!bench.sim.rf_output_on());

    // A finished run cannot be cancelled or resumed: 409; an unknown one: 404.
    let cancel = app
        .post_json(
            &format!("/api/v1/runs/{run_id}/cancel"),
            Some(&operator),
            &serde_json::json!({}),
        )
        .await;
    assert_eq!(cancel.status(), 409);
    assert_eq!(problem(cancel).await["type"], "/problems/conflict");
    let resume = app
        .post_json(
            &format!("/api/v1/runs/{run_id}/resume"),
            Some(&operator),
            &serde_json::json!({}),
        )
        .await;
    assert_eq!(resume.status(), 409);
    let missing = app
        .post_json(
            "/api/v1/runs/987654/cancel",
            Some(&operator),
            &serde_json::json!({}),
        )
        .await;
    assert_eq!(missing.status(), 404);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn roles_are_enforced_on_every_kind_of_call() {
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let operator = app.token("operator-1", Role::Operator).await;
    let admin = app.token("admin-1", Role::Admin).await;
    let chain = true_chain_upload(&bench.sim, "c", &FREQUENCIES_HZ);

    // Viewers read but cannot submit, cancel, resume, upload or manage tokens.
    assert_eq!(app.get("/api/v1/runs", Some(&viewer)).await.status(), 200);
    assert_eq!(
        app.get("/api/v1/benches", Some(&viewer)).await.status(),
        200
    );
    assert_eq!(
        app.post_json("/api/v1/runs", Some(&viewer), &plan("c"))
            .await
            .status(),
        403
    );
    assert_eq!(
        app.post_json(
            "/api/v1/runs/1/cancel",
            Some(&viewer),
            &serde_json::json!({})
        )
        .await
        .status(),
        403
    );
    assert_eq!(
        app.post_json(
            "/api/v1/runs/1/resume",
            Some(&viewer),
            &serde_json::json!({})
        )
        .await
        .status(),
        403
    );
    assert_eq!(
        app.post_json("/api/v1/chain-calibrations", Some(&viewer), &chain)
            .await
            .status(),
        403
    );
    // Operators run sweeps but cannot upload calibrations or manage tokens.
    assert_eq!(
        app.post_json("/api/v1/chain-calibrations", Some(&operator), &chain)
            .await
            .status(),
        403
    );
    assert_eq!(
        app.get("/api/v1/tokens", Some(&operator)).await.status(),
        403
    );
    // Admins can do all of it.
    assert_eq!(
        app.post_json("/api/v1/chain-calibrations", Some(&admin), &chain)
            .await
            .status(),
        201
    );
    assert_eq!(
        app.post_json("/api/v1/runs", Some(&admin), &plan("c"))
            .await
            .status(),
        201
    );
    // No token, or a made-up one: 401 everywhere, the event stream included.
    assert_eq!(
        app.post_json("/api/v1/runs", None, &plan("c"))
            .await
            .status(),
        401
    );
    assert_eq!(app.get("/api/v1/events", None).await.status(), 401);
    assert_eq!(
        app.get("/api/v1/events?ticket=hwe_forged", None)
            .await
            .status(),
        401
    );
    // A token in the URL is refused everywhere, the event stream included (proxies log URLs).
    for path in ["/api/v1/runs", "/api/v1/events"] {
        let response = app
            .get(&format!("{path}?access_token={viewer}"), None)
            .await;
        assert_eq!(response.status(), 401, "{path}");
    }
}

/// Asks for a one-time event-stream ticket with `token` in the Authorization header.
async fn event_ticket(app: &api_support::TestApp, token: &str) -> String {
    let response = app
        .client
        .post(app.url("/api/v1/events/ticket"))
        .bearer_auth(token)
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 200);
    let body: serde_json::Value = response.json().await.unwrap();
    assert_eq!(body["expires_in_s"], 30);
    body["ticket"].as_str().unwrap().to_string()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_event_ticket_opens_one_stream_once() {
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let viewer = app.token("screen", Role::Viewer).await;
    // Without a token no ticket.
    let refused = app
        .client
        .post(app.url("/api/v1/events/ticket"))
        .send()
        .await
        .unwrap();
    assert_eq!(refused.status(), 401);

    let ticket = event_ticket(app, &viewer).await;
    assert!(ticket.starts_with("hwe_"), "{ticket}");
    // The ticket is not a token: it opens nothing else.
    assert_eq!(app.get("/api/v1/runs", Some(&ticket)).await.status(), 401);
    let url = app.url(&format!("/api/v1/events?ticket={ticket}&timeout_s=0.2"));
    let first = app.client.get(url.clone()).send().await.unwrap();
    assert_eq!(first.status(), 200);
    assert!(first.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/event-stream"));
    drop(first);
    // Spent: the same ticket again is refused, with a problem that says what to do.
    let again = app.client.get(url).send().await.unwrap();
    assert_eq!(again.status(), 401);
    let problem: serde_json::Value = again.json().await.unwrap();
    assert!(
        problem["detail"]
            .as_str()
            .unwrap()
            .contains("POST /api/v1/events/ticket"),
        "{problem}"
    );
    // Each ticket is its own: a second one works once too.
    let second = event_ticket(app, &viewer).await;
    assert_ne!(second, ticket);
    let opened = app
        .client
        .get(app.url(&format!("/api/v1/events?ticket={second}&timeout_s=0.2")))
        .send()
        .await
        .unwrap();
    assert_eq!(opened.status(), 200);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn invalid_plans_are_refused_with_fields_named_and_nothing_sent() {
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let operator = app.token("operator-1", Role::Operator).await;
    // Start-up switched the RF off (logged); from here on nothing may reach the instruments.
    bench.sim.clear_command_log(Instrument::RfSource);
    bench.sim.clear_command_log(Instrument::Analyzer);

    let malformed = app
        .post_raw(
            "/api/v1/runs",
            Some(&operator),
            "application/json",
            "{\"device\": {".into(),
        )
        .await;
    assert_eq!(malformed.status(), 422);
    assert_eq!(problem(malformed).await["errors"][0]["field"], "body");

    let mut unknown = plan("c");
    unknown["levels"]["max_power_w"] = serde_json::json!(2);
    let body = problem(
        app.post_json("/api/v1/runs", Some(&operator), &unknown)
            .await,
    )
    .await;
    assert_eq!(body["status"], 422);
    assert!(
        body["errors"][0]["field"]
            .as_str()
            .unwrap()
            .starts_with("levels"),
        "{body}"
    );

    // Levels past the safety limit and an absurd frequency, in one plan: both named at once.
    let mut dangerous = plan("c");
    dangerous["chain"] = serde_json::json!({"kind": "flat_loss", "loss_db": 1.0});
    dangerous["levels"] = serde_json::json!({"kind": "list", "values_dbm": [0.0, 10.0, 40.0]});
    dangerous["frequencies"] = serde_json::json!({"kind": "list", "values_hz": [1e9, 5e15]});
    let response = app
        .post_json("/api/v1/runs", Some(&operator), &dangerous)
        .await;
    assert_eq!(response.status(), 422);
    let body = problem(response).await;
    let fields: Vec<String> = body["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["field"].as_str().unwrap().to_string())
        .collect();
    assert!(fields.iter().any(|f| f.starts_with("levels")), "{fields:?}");
    assert!(
        fields.iter().any(|f| f.starts_with("frequencies")),
        "{fields:?}"
    );

    // Levels the source can make, at frequencies it covers, but over this device's RF input
    // limit after the chain: 20 dBm - 1 dB = 19 dBm at the modulator against a 10 dBm limit.
    let mut over_device = plan("c");
    over_device["device"]["rf_input_limit_dbm"] = serde_json::json!(10.0);
    over_device["chain"] = serde_json::json!({"kind": "flat_loss", "loss_db": 1.0});
    over_device["levels"] = serde_json::json!({"kind": "list", "values_dbm": [0.0, 10.0, 20.0]});
    let response = app
        .post_json("/api/v1/runs", Some(&operator), &over_device)
        .await;
    assert_eq!(response.status(), 422);
    let body = problem(response).await;
    let errors = body["errors"].as_array().unwrap();
    assert_eq!(errors.len(), 1, "{body}");
    assert!(
        errors[0]["field"].as_str().unwrap().starts_with("levels"),
        "{body}"
    );
    assert!(
        errors[0]["message"]
            .as_str()
            .unwrap()
            .contains("device's RF input limit"),
        "{body}"
    );

    // Plans that cannot give a V_pi: a ramp step so small its level count overflows (it used to
    // wrap to 0 levels and "complete" empty), one level given twice, one level.
    let absurd = [
        (
            serde_json::json!({"kind": "ramp", "start_dbm": -5.0, "stop_dbm": 20.0, "step_db": 1e-18}),
            "levels.step_db",
        ),
        (
            serde_json::json!({"kind": "list", "values_dbm": [3.0, 3.0]}),
            "levels.values_dbm",
        ),
        (
            serde_json::json!({"kind": "list", "values_dbm": [3.0]}),
            "levels.values_dbm",
        ),
    ];
    for (levels, field) in absurd {
        let mut request = plan("c");
        request["chain"] = serde_json::json!({"kind": "flat_loss", "loss_db": 1.0});
        request["levels"] = levels.clone();
        let response = app
            .post_json("/api/v1/runs", Some(&operator), &request)
            .await;
        assert_eq!(response.status(), 422, "{levels}");
        let body = problem(response).await;
        assert_eq!(body["errors"][0]["field"], field, "{levels}: {body}");
    }

    assert!(
        bench.sim.command_log(Instrument::RfSource).is_empty(),
        "{:?}",
        bench.sim.command_log(Instrument::RfSource)
    );
    assert!(bench.sim.command_log(Instrument::Analyzer).is_empty());
    assert!(!bench.sim.overdriven());
    let runs: serde_json::Value = app
        .get("/api/v1/runs", Some(&operator))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(runs["total"], 0);
}

#[tokio::test]
async fn a_plan_with_six_mistakes_names_them_all_at_once_and_stores_nothing() {
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let operator = app.token("operator-1", Role::Operator).await;
    let chains_before: serde_json::Value = app
        .get("/api/v1/chain-calibrations", Some(&operator))
        .await
        .json()
        .await
        .unwrap();

    // An unknown bench, a chain that does not exist, a settling time and an average count out
    // of range, a bad serial and an absurd wavelength: six mistakes, one answer.
    let mut wrong = plan("no such chain");
    wrong["bench"] = serde_json::json!("bench-nope");
    wrong["settle_s"] = serde_json::json!(-1.0);
    wrong["averages"] = serde_json::json!(0);
    wrong["device"]["serial"] = serde_json::json!("bad serial!");
    wrong["device"]["wavelength_nm"] = serde_json::json!(1.0);
    let response = app.post_json("/api/v1/runs", Some(&operator), &wrong).await;
    assert_eq!(response.status(), 422);
    let body = problem(response).await;
    let mut fields: Vec<&str> = body["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["field"].as_str().unwrap())
        .collect();
    fields.sort();
    assert_eq!(
        fields,
        [
            "averages",
            "bench",
            "chain",
            "device.serial",
            "device.wavelength_nm",
            "settle_s"
        ],
        "{body}"
    );
    let bench_message = body["errors"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["field"] == "bench")
        .unwrap()["message"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(
        bench_message.contains("sim-bench"),
        "names the benches: {bench_message}"
    );

    // A flat-loss plan refused for its levels leaves no `flat-loss-...` chain behind.
    let mut refused = plan("unused");
    refused["chain"] = serde_json::json!({"kind": "flat_loss", "loss_db": -30.0});
    refused["levels"] = serde_json::json!({"kind": "list", "values_dbm": [0.0, 10.0]});
    let response = app
        .post_json("/api/v1/runs", Some(&operator), &refused)
        .await;
    assert_eq!(response.status(), 422);
    let chains_after: serde_json::Value = app
        .get("/api/v1/chain-calibrations", Some(&operator))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(
        chains_after, chains_before,
        "a refused plan stores no chain"
    );
    let runs: serde_json::Value = app
        .get("/api/v1/runs", Some(&operator))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(runs["total"], 0);
}

#[tokio::test]
async fn the_event_stream_ends_after_timeout_s() {
    // A sampling client (a script, a test tool) asks for a bounded stream and gets a response
    // that ends; without `timeout_s` the stream stays open (the dashboard's case).
    let app = spawn_app_with_engine(0.0).await.app;
    let viewer = app.token("sampler", Role::Viewer).await;
    let started = std::time::Instant::now();
    let response = app.get("/api/v1/events?timeout_s=0.3", Some(&viewer)).await;
    assert_eq!(response.status(), 200);
    assert!(response.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/event-stream"));
    let body = tokio::time::timeout(Duration::from_secs(10), response.text())
        .await
        .expect("the stream ends after timeout_s")
        .expect("the stream ends cleanly");
    assert!(started.elapsed() >= Duration::from_millis(300));
    assert!(
        !body.contains("data:"),
        "nothing happened on the bench: {body:?}"
    );

    let open = app.get("/api/v1/events", Some(&viewer)).await;
    assert_eq!(open.status(), 200);
    let mut open = open;
    assert!(
        tokio::time::timeout(Duration::from_millis(500), open.chunk())
            .await
            .is_err(),
        "without timeout_s the stream stays open"
    );

    for bad in ["0", "-1", "86401", "NaN", "soon"] {
        let response = app
            .get(&format!("/api/v1/events?timeout_s={bad}"), Some(&viewer))
            .await;
        assert_eq!(response.status(), 422, "timeout_s={bad}");
        assert_eq!(problem(response).await["errors"][0]["field"], "timeout_s");
    }
}
