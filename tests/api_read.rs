//! The read routes over real HTTP, against data written through the store: runs (filtered,
//! paginated), a run, its points, a point's trace as JSON and CSV, a device's calibration
//! history, V_pi at any frequency (interpolated, with uncertainty), chain calibrations, plots.

mod api_support;

use api_support::seed::{seed_completed_run, seed_device};
use api_support::{problem, spawn_app};
use halfwave::api::tokens::Role;

/// An invented V_pi curve rising with frequency (plumbing data; see the seed module).
fn v_pi_at(f: f64) -> f64 {
    3.0 + 0.25 * (f / 1e9).sqrt()
}

#[tokio::test]
async fn runs_points_traces_history_and_v_pi() {
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let store = app.store();
    let (device_id, chain_id) = seed_device(store, "PM-0042").await;
    let older = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[2e9, 8e9],
        &[0.0, 6.0],
        |f| 1.05 * v_pi_at(f),
        201,
    )
    .await;
    let newer = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[2e9, 6e9, 10e9],
        &[0.0, 4.0, 8.0],
        v_pi_at,
        201,
    )
    .await;

    // List, newest first, with paging and filters.
    let list: serde_json::Value = app
        .get("/api/v1/runs?per_page=1", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(list["total"], 2);
    assert_eq!(list["runs"].as_array().unwrap().len(), 1);
    assert_eq!(list["runs"][0]["id"], newer.run_id);
    let page2: serde_json::Value = app
        .get("/api/v1/runs?per_page=1&page=2", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(page2["runs"][0]["id"], older.run_id);
    let filtered: serde_json::Value = app
        .get(
            "/api/v1/runs?device=PM-0042&state=completed&since=2000-01-01",
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(filtered["total"], 2);
    let none: serde_json::Value = app
        .get("/api/v1/runs?state=failed", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(none["total"], 0);
    let future: serde_json::Value = app
        .get("/api/v1/runs?since=2999-01-01", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(future["total"], 0);

    // Bad filters: every one named at once.
    let bad = app
        .get(
            "/api/v1/runs?state=exploded&since=last-week&per_page=0",
            Some(&viewer),
        )
        .await;
    assert_eq!(bad.status(), 422);
    let body = problem(bad).await;
    let fields: Vec<&str> = body["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["field"].as_str().unwrap())
        .collect();
    assert_eq!(fields, ["state", "since", "per_page"]);

    // One run with its results.
    let run: serde_json::Value = app
        .get(&format!("/api/v1/runs/{}", newer.run_id), Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(run["state"], "completed");
    assert_eq!(run["measured_points"], 9);
    assert_eq!(run["results"].as_array().unwrap().len(), 3);
    // serde_json parses floats to within one unit in the last place (its documented default).
    assert!((run["results"][1]["v_pi_volts"].as_f64().unwrap() - newer.results[1].1).abs() < 1e-12);
    assert_eq!(
        app.get("/api/v1/runs/999999", Some(&viewer)).await.status(),
        404
    );

    // Two runs compared per frequency. At 2 GHz both measured: the older run is 5 % high, so the
    // newer differs from it by 100 * (1 / 1.05 - 1) = -4.762 % (worked by hand). 6 and 10 GHz are
    // only in the newer run, 8 GHz only in the older.
    let comparison: serde_json::Value = app
        .get(
            &format!("/api/v1/runs/{}/compare/{}", older.run_id, newer.run_id),
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    let rows = comparison["rows"].as_array().unwrap();
    let frequencies: Vec<f64> = rows
        .iter()
        .map(|r| r["frequency_hz"].as_f64().unwrap())
        .collect();
    assert_eq!(frequencies, [2e9, 6e9, 8e9, 10e9]);
    assert!((rows[0]["difference_percent"].as_f64().unwrap() + 4.762).abs() < 1e-3);
    assert!(rows[1]["v_pi_a_volts"].is_null() && rows[1]["difference_percent"].is_null());
    assert!(rows[2]["v_pi_b_volts"].is_null());
    // Malformed path and query parameters: the parameter is named, never a bare 400.
    for (path, status, needle) in [
        ("/api/v1/runs/abc".to_string(), 404, "run_id"),
        (
            format!("/api/v1/runs/{}/compare/x", older.run_id),
            404,
            "other_run_id",
        ),
        (
            format!("/api/v1/runs/{}/points/p1/trace", older.run_id),
            404,
            "point_id",
        ),
        ("/api/v1/runs?page=abc".to_string(), 422, "page"),
        (
            "/api/v1/devices/PM-0042/v-pi?frequency_hz=7.5GHz".to_string(),
            422,
            "frequency_hz",
        ),
    ] {
        let response = app.get(&path, Some(&viewer)).await;
        assert_eq!(response.status(), status, "{path}");
        let body = problem(response).await;
        assert!(
            body["detail"].as_str().unwrap().contains(needle),
            "{path}: {body}"
        );
        if status == 422 {
            assert_eq!(body["errors"][0]["field"], needle, "{path}: {body}");
        }
    }

    let missing = app
        .get(
            &format!("/api/v1/runs/{}/compare/999999", older.run_id),
            Some(&viewer),
        )
        .await;
    assert_eq!(missing.status(), 404);
    assert_eq!(
        app.get(
            &format!("/api/v1/runs/{}/compare/{}", older.run_id, newer.run_id),
            None
        )
        .await
        .status(),
        401
    );

    // Points, paginated.
    let points: serde_json::Value = app
        .get(
            &format!("/api/v1/runs/{}/points?per_page=4&page=3", newer.run_id),
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(points["total"], 9);
    assert_eq!(points["points"].as_array().unwrap().len(), 1);
    assert_eq!(points["points"][0]["id"], newer.point_ids[8]);
    assert_eq!(points["points"][0]["lines"].as_array().unwrap().len(), 7);

    // A point's trace as JSON and as CSV carry the same numbers.
    let point_id = newer.point_ids[4];
    let trace: serde_json::Value = app
        .get(
            &format!("/api/v1/runs/{}/points/{point_id}/trace", newer.run_id),
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    let frequencies = trace["frequency_hz"].as_array().unwrap();
    assert_eq!(frequencies.len(), 201);
    let csv_response = app
        .get(
            &format!(
                "/api/v1/runs/{}/points/{point_id}/trace?format=csv",
                newer.run_id
            ),
            Some(&viewer),
        )
        .await;
    assert!(csv_response.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/csv"));
    let csv = csv_response.text().await.unwrap();
    let mut rows = csv.lines();
    assert_eq!(rows.next(), Some("frequency_hz,power_dbm"));
    let first: Vec<f64> = rows
        .next()
        .unwrap()
        .split(',')
        .map(|c| c.parse().unwrap())
        .collect();
    assert!((first[0] - frequencies[0].as_f64().unwrap()).abs() <= 1e-6);
    assert!((first[1] - trace["power_dbm"][0].as_f64().unwrap()).abs() <= 1e-9);
    assert_eq!(csv.lines().count(), 202);
    // A point of another run is not found under this run.
    let foreign = older.point_ids[0];
    assert_eq!(
        app.get(
            &format!("/api/v1/runs/{}/points/{foreign}/trace", newer.run_id),
            Some(&viewer)
        )
        .await
        .status(),
        404
    );

    // History: newest calibration first.
    let history: serde_json::Value = app
        .get("/api/v1/devices/PM-0042/calibrations", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(history.as_array().unwrap().len(), 2);
    assert_eq!(history[0]["run_id"], newer.run_id);
    assert_eq!(history[1]["points"].as_array().unwrap().len(), 2);

    // V_pi at a measured frequency is the stored value; between two it is interpolated linearly
    // (worked by hand: 4 GHz is halfway between 2 and 6 GHz, so the mean of the two).
    let at_6: serde_json::Value = app
        .get(
            "/api/v1/devices/PM-0042/v-pi?frequency_hz=6e9",
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    assert!((at_6["v_pi_volts"].as_f64().unwrap() - newer.results[1].1).abs() < 1e-12);
    assert_eq!(at_6["interpolated"], false);
    let at_4: serde_json::Value = app
        .get(
            "/api/v1/devices/PM-0042/v-pi?frequency_hz=4e9",
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    let expected = 0.5 * (newer.results[0].1 + newer.results[1].1);
    assert!((at_4["v_pi_volts"].as_f64().unwrap() - expected).abs() < 1e-12);
    assert!(at_4["v_pi_uncertainty_volts"].as_f64().unwrap() > 0.0);
    assert_eq!(at_4["run_id"], newer.run_id);
    assert_eq!(at_4["interpolated"], true);

    // Outside the calibrated range, absurd or missing: 422 naming frequency_hz.
    for query in [
        "frequency_hz=40e9",
        "frequency_hz=-5",
        "frequency_hz=1e15",
        "",
    ] {
        let response = app
            .get(
                &format!("/api/v1/devices/PM-0042/v-pi?{query}"),
                Some(&viewer),
            )
            .await;
        assert_eq!(response.status(), 422, "{query}");
        assert_eq!(
            problem(response).await["errors"][0]["field"],
            "frequency_hz"
        );
    }
    assert_eq!(
        app.get(
            "/api/v1/devices/NO-SUCH/v-pi?frequency_hz=1e9",
            Some(&viewer)
        )
        .await
        .status(),
        404
    );

    // Devices.
    let devices: serde_json::Value = app
        .get("/api/v1/devices", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(devices[0]["serial"], "PM-0042");
    assert_eq!(
        app.get("/api/v1/devices/PM-0042", Some(&viewer))
            .await
            .status(),
        200
    );
}

/// The API keeps final runs and device histories in memory (`api/read_cache.rs`); what it serves
/// must still follow the database as runs start, end and complete.
#[tokio::test]
async fn views_follow_runs_that_start_and_complete_after_being_read() {
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let store = app.store();
    let (device_id, chain_id) = seed_device(store, "PM-0077").await;
    let get = |path: String| {
        let app = &app;
        let viewer = viewer.clone();
        async move {
            let response = app.get(&path, Some(&viewer)).await;
            let status = response.status();
            (status, response.json::<serde_json::Value>().await.unwrap())
        }
    };

    // No calibration yet: an empty history, and no V_pi to give.
    let (status, history) = get("/api/v1/devices/PM-0077/calibrations".into()).await;
    assert_eq!(status, 200);
    assert_eq!(history, serde_json::json!([]));
    let (status, _) = get("/api/v1/devices/PM-0077/v-pi?frequency_hz=4e9".into()).await;
    assert_eq!(status, 404);

    let first = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[2e9, 6e9],
        &[0.0, 6.0],
        v_pi_at,
        201,
    )
    .await;
    let (_, history) = get("/api/v1/devices/PM-0077/calibrations".into()).await;
    assert_eq!(history.as_array().unwrap().len(), 1);
    let (_, at_4) = get("/api/v1/devices/PM-0077/v-pi?frequency_hz=4e9".into()).await;
    assert_eq!(at_4["run_id"], first.run_id);

    // A run read while running is read again once it ends; it completes without results, so the
    // newest calibration with results (the store's rule) is still the first run.
    let bare = store
        .create_run(&halfwave::store::NewRun {
            plan: serde_json::json!({"seeded": true}),
            device_id,
            bench_name: "bench-a".into(),
            chain_calibration_id: chain_id,
            submitted_by: "seed".into(),
            provenance: Default::default(),
        })
        .await
        .unwrap();
    store
        .transition_run(bare.id, halfwave::store::RunState::Running, None)
        .await
        .unwrap();
    let (_, running) = get(format!("/api/v1/runs/{}", bare.id)).await;
    assert_eq!(running["state"], "running");
    assert_eq!(running["measured_points"], 0);
    store
        .transition_run(bare.id, halfwave::store::RunState::Completed, None)
        .await
        .unwrap();
    let (_, completed) = get(format!("/api/v1/runs/{}", bare.id)).await;
    assert_eq!(completed["state"], "completed");
    let (_, at_4) = get("/api/v1/devices/PM-0077/v-pi?frequency_hz=4e9".into()).await;
    assert_eq!(at_4["run_id"], first.run_id);
    let (_, same) = get(format!("/api/v1/runs/{}", first.run_id)).await;
    assert_eq!(same["measured_points"], 4);

    // A newer calibration with results replaces it in V_pi answers and heads the history.
    let second = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[2e9, 6e9],
        &[0.0, 6.0],
        |f| 1.1 * v_pi_at(f),
        201,
    )
    .await;
    let (_, history) = get("/api/v1/devices/PM-0077/calibrations".into()).await;
    assert_eq!(history.as_array().unwrap().len(), 2);
    assert_eq!(history[0]["run_id"], second.run_id);
    let (_, at_6) = get("/api/v1/devices/PM-0077/v-pi?frequency_hz=6e9".into()).await;
    assert_eq!(at_6["run_id"], second.run_id);
    assert!((at_6["v_pi_volts"].as_f64().unwrap() - second.results[1].1).abs() < 1e-12);
    // Paging reads only the page asked for, with the run's total.
    let (_, page) = get(format!(
        "/api/v1/runs/{}/points?per_page=3&page=2",
        second.run_id
    ))
    .await;
    assert_eq!(page["total"], 4);
    assert_eq!(page["points"][0]["id"], second.point_ids[3]);
    assert_eq!(page["points"].as_array().unwrap().len(), 1);
}

#[tokio::test]
async fn plots_are_svg_with_one_marker_per_value() {
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let store = app.store();
    let (device_id, chain_id) = seed_device(store, "PM-0007").await;
    seed_completed_run(
        store,
        device_id,
        chain_id,
        &[1e9, 5e9],
        &[0.0, 6.0],
        |f| 1.1 * v_pi_at(f),
        101,
    )
    .await;
    let run = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[1e9, 5e9, 9e9, 13e9],
        &[0.0, 3.0, 6.0],
        v_pi_at,
        101,
    )
    .await;

    let count_circles = |svg: &str| {
        let document = roxmltree::Document::parse(svg).expect("well-formed SVG");
        document
            .descendants()
            .filter(|n| n.has_tag_name("circle"))
            .count()
    };
    let fetch = |path: String| {
        let app = &app;
        let viewer = viewer.clone();
        async move {
            let response = app.get(&path, Some(&viewer)).await;
            assert_eq!(response.status(), 200, "{path}");
            assert_eq!(response.headers()["content-type"], "image/svg+xml");
            response.text().await.unwrap()
        }
    };
    assert_eq!(
        count_circles(&fetch("/api/v1/devices/PM-0007/plots/v-pi.svg".into()).await),
        4
    );
    assert_eq!(
        count_circles(&fetch("/api/v1/devices/PM-0007/plots/response.svg".into()).await),
        4
    );
    assert_eq!(
        count_circles(&fetch(format!("/api/v1/runs/{}/spectrum.svg", run.run_id)).await),
        7
    );
    assert_eq!(
        count_circles(
            &fetch(format!(
                "/api/v1/runs/{}/points/{}/spectrum.svg",
                run.run_id, run.point_ids[0]
            ))
            .await
        ),
        7
    );
    assert_eq!(
        count_circles(
            &fetch(format!(
                "/api/v1/runs/{}/plots/modulation-index.svg?frequency_index=2",
                run.run_id
            ))
            .await
        ),
        3
    );
    assert_eq!(
        app.get("/api/v1/devices/NOBODY/plots/v-pi.svg", Some(&viewer))
            .await
            .status(),
        404
    );
}

#[tokio::test]
async fn chain_calibrations_upload_as_json_or_csv_for_admins() {
    let app = spawn_app().await;
    let admin = app.token("admin-1", Role::Admin).await;
    let operator = app.token("operator-1", Role::Operator).await;
    let json = serde_json::json!({"name": "bench-a amp", "points": [{"frequency_hz": 1e9, "gain_db": 20.5}, {"frequency_hz": 20e9, "gain_db": 18.0}]});

    let refused = app
        .post_json("/api/v1/chain-calibrations", Some(&operator), &json)
        .await;
    assert_eq!(refused.status(), 403);

    let created = app
        .post_json("/api/v1/chain-calibrations", Some(&admin), &json)
        .await;
    assert_eq!(created.status(), 201);
    let created: serde_json::Value = created.json().await.unwrap();
    assert_eq!(created["version"], 1);

    let csv = "frequency_hz,gain_db\n1e9,20.0\n10e9,19.0\n20e9,17.5\n".to_string();
    let second = app
        .post_raw(
            "/api/v1/chain-calibrations?name=bench-a%20amp",
            Some(&admin),
            "text/csv",
            csv,
        )
        .await;
    assert_eq!(second.status(), 201);
    let second: serde_json::Value = second.json().await.unwrap();
    assert_eq!(second["version"], 2);
    assert_eq!(second["points"].as_array().unwrap().len(), 3);

    let latest: serde_json::Value = app
        .get("/api/v1/chain-calibrations/bench-a%20amp", Some(&operator))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(latest["version"], 2);
    let list: serde_json::Value = app
        .get("/api/v1/chain-calibrations", Some(&operator))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(list.as_array().unwrap().len(), 2);

    let bad_csv = "frequency_hz,gain_db\n1e9,20\nnot,a-number\n-5,3\n".to_string();
    let response = app
        .post_raw(
            "/api/v1/chain-calibrations?name=x",
            Some(&admin),
            "text/csv",
            bad_csv,
        )
        .await;
    assert_eq!(response.status(), 422);
    assert_eq!(
        problem(response).await["errors"][0]["field"],
        "body.line[3]"
    );
    let bad_json =
        serde_json::json!({"name": "x", "points": [{"frequency_hz": -1.0, "gain_db": 900.0}]});
    let body = problem(
        app.post_json("/api/v1/chain-calibrations", Some(&admin), &bad_json)
            .await,
    )
    .await;
    let fields: Vec<&str> = body["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["field"].as_str().unwrap())
        .collect();
    assert_eq!(fields, ["points[0].frequency_hz", "points[0].gain_db"]);

    // A name the engine keeps for its flat losses is refused, as JSON and as CSV (a plan with a
    // flat loss reuses the newest row of that name, so a lab's table under it would stand in for
    // the flat loss), and nothing is stored.
    let reserved = serde_json::json!({"name": "flat-loss-2.00dB", "points": [{"frequency_hz": 1e9, "gain_db": -6.0}]});
    let response = app
        .post_json("/api/v1/chain-calibrations", Some(&admin), &reserved)
        .await;
    assert_eq!(response.status(), 422);
    let body = problem(response).await;
    assert_eq!(body["errors"][0]["field"], "name");
    let message = body["errors"][0]["message"].as_str().unwrap();
    assert!(message.contains("\"flat-loss-\""), "{message}");
    let response = app
        .post_raw(
            "/api/v1/chain-calibrations?name=%20flat-loss-6.00dB",
            Some(&admin),
            "text/csv",
            "frequency_hz,gain_db\n1e9,-6\n".to_string(),
        )
        .await;
    assert_eq!(response.status(), 422);
    assert_eq!(problem(response).await["errors"][0]["field"], "name");
    let list = app
        .get_json("/api/v1/chain-calibrations", Some(&operator))
        .await;
    assert_eq!(list.as_array().unwrap().len(), 2);

    // The upload is in the audit log under the token's name.
    let audit = app.store().audit_log(50, None).await.unwrap();
    assert!(audit
        .iter()
        .any(|e| e.actor == "admin-1" && e.action == "chain_calibration.upload"));
}

#[tokio::test]
async fn a_runs_v_pi_budget_combines_the_fit_the_chain_and_the_generator() {
    // GUM (JCGM 100:2008): Type B term of a +/- a limit read as rectangular, u = a / sqrt(3)
    // (4.3.7); uncorrelated inputs combine as the root sum of squares (5.1.2); k = 2 (6.3).
    // V_pi scales as 10^(L/20) with a level error L common to the sweep, so a dB of level error
    // moves V_pi by ln(10)/20 of itself (definition of the decibel). Written out here.
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let store = app.store();
    let (device_id, chain_id) = seed_device(store, "PM-0077").await;
    let run = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[2e9, 8e9],
        &[0.0, 6.0],
        v_pi_at,
        201,
    )
    .await;
    let path = format!(
        "/api/v1/runs/{}/v-pi-budget?chain_uncertainty_db=0.1&source_level_accuracy_db=0.5",
        run.run_id
    );
    let response = app.get(&path, Some(&viewer)).await;
    assert_eq!(response.status(), 200);
    let budget: serde_json::Value = response.json().await.unwrap();
    let frequencies = budget["frequencies"].as_array().unwrap();
    assert_eq!(frequencies.len(), run.results.len());
    for (view, (f, v_pi, u_fit)) in frequencies.iter().zip(&run.results) {
        assert_eq!(view["frequency_hz"].as_f64().unwrap(), *f);
        let per_db = v_pi * std::f64::consts::LN_10 / 20.0;
        let chain = per_db * 0.1;
        let source = per_db * 0.5 / 3f64.sqrt();
        let combined = (u_fit * u_fit + chain * chain + source * source).sqrt();
        let got = view["combined_standard_uncertainty_volts"]
            .as_f64()
            .unwrap();
        assert!(
            (got - combined).abs() < 1e-12 * combined.max(1.0),
            "{got} vs {combined}"
        );
        assert_eq!(
            view["expanded_uncertainty_volts"].as_f64().unwrap(),
            2.0 * got
        );
        let rows = view["rows"].as_array().unwrap();
        let evaluations: Vec<&str> = rows
            .iter()
            .map(|r| r["evaluation"].as_str().unwrap())
            .collect();
        assert_eq!(evaluations, ["A", "B", "B"]);
        assert!((rows[1]["contribution_volts"].as_f64().unwrap() - chain).abs() < 1e-12);
    }
    // Inputs out of range or missing are named; an unknown run is 404.
    let bad = app
        .get(
            &format!(
                "/api/v1/runs/{}/v-pi-budget?chain_uncertainty_db=-1&source_level_accuracy_db=0.5",
                run.run_id
            ),
            Some(&viewer),
        )
        .await;
    assert_eq!(bad.status(), 422);
    assert!(problem(bad)
        .await
        .to_string()
        .contains("chain_uncertainty_db"));
    let missing = app
        .get(
            &format!("/api/v1/runs/{}/v-pi-budget", run.run_id),
            Some(&viewer),
        )
        .await;
    assert_eq!(missing.status(), 422);
    let unknown = app
        .get(
            "/api/v1/runs/9999/v-pi-budget?chain_uncertainty_db=0.1&source_level_accuracy_db=0.5",
            Some(&viewer),
        )
        .await;
    assert_eq!(unknown.status(), 404);
}

#[tokio::test]
async fn the_budget_reads_the_chain_tables_uncertainty_and_the_benchs_stated_level_accuracy() {
    // The stored inputs: the chain table's standard uncertainty per frequency (the larger of the
    // two entries around a frequency) and the bench's configured +/- level accuracy, read as
    // rectangular (GUM 4.3.7) and combined in quadrature (GUM 5.1.2), written out here.
    use halfwave::api::{ApiSettings, AppState};
    use halfwave::config::Config;
    use halfwave::engine::Engine;
    use halfwave::store::ChainCalibrationPoint;
    use halfwave::units::{Db, Hz};

    let dir = tempfile::tempdir().unwrap();
    let store = halfwave::store::Store::open(dir.path().join("h.sqlite").to_str().unwrap())
        .await
        .unwrap();
    let mut config = Config::simulated(dir.path().to_path_buf(), 0.0, 3);
    config.benches[0].name = "bench-a".into(); // the seeded run's bench
    config.benches[0].source_level_accuracy_db = Some(Db(0.7));
    let engine = Engine::start(&config, store.clone()).await.unwrap();
    let app =
        api_support::serve_state(AppState::with_engine(engine, ApiSettings::default()), dir).await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let (device_id, _) = seed_device(&store, "PM-0078").await;
    let chain = store
        .create_chain_calibration(
            "certified chain",
            "seed",
            &[
                ChainCalibrationPoint::new(Hz(1e9), Db(-1.5)).with_uncertainty(Db(0.05)),
                ChainCalibrationPoint::new(Hz(5e9), Db(-2.5)).with_uncertainty(Db(0.08)),
                ChainCalibrationPoint::new(Hz(10e9), Db(-3.5)).with_uncertainty(Db(0.06)),
            ],
        )
        .await
        .unwrap();
    let run = seed_completed_run(
        &store,
        device_id,
        chain.id,
        &[2e9, 10e9],
        &[0.0, 6.0],
        v_pi_at,
        201,
    )
    .await;

    let response = app
        .get(
            &format!("/api/v1/runs/{}/v-pi-budget", run.run_id),
            Some(&viewer),
        )
        .await;
    assert_eq!(response.status(), 200);
    let budget: serde_json::Value = response.json().await.unwrap();
    assert_eq!(
        budget["chain_uncertainty_from"],
        "chain calibration certified chain v1"
    );
    assert_eq!(
        budget["source_level_accuracy_from"],
        "bench bench-a configuration"
    );
    assert_eq!(budget["source_level_accuracy_db"], 0.7);
    let frequencies = budget["frequencies"].as_array().unwrap();
    // 2 GHz lies between the 1 GHz (0.05 dB) and 5 GHz (0.08 dB) entries; 10 GHz is tabulated.
    for (view, ((f, v_pi, u_fit), chain_u)) in
        frequencies.iter().zip(run.results.iter().zip([0.08, 0.06]))
    {
        assert_eq!(view["frequency_hz"].as_f64().unwrap(), *f);
        let rows = view["rows"].as_array().unwrap();
        assert_eq!(rows[1]["standard_uncertainty"].as_f64().unwrap(), chain_u);
        let per_db = v_pi * std::f64::consts::LN_10 / 20.0;
        let combined =
            (u_fit.powi(2) + (per_db * chain_u).powi(2) + (per_db * 0.7 / 3f64.sqrt()).powi(2))
                .sqrt();
        let got = view["combined_standard_uncertainty_volts"]
            .as_f64()
            .unwrap();
        assert!(
            (got - combined).abs() < 1e-12 * combined.max(1.0),
            "{got} vs {combined}"
        );
    }

    // A query value overrides the stored one and says so.
    let overridden: serde_json::Value = app
        .get(
            &format!(
                "/api/v1/runs/{}/v-pi-budget?source_level_accuracy_db=0.2&chain_uncertainty_db=0.01",
                run.run_id
            ),
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(overridden["chain_uncertainty_from"], "query");
    assert_eq!(overridden["source_level_accuracy_from"], "query");
    assert_eq!(
        overridden["frequencies"][0]["rows"][1]["standard_uncertainty"],
        0.01
    );

    // The accuracy recorded with the run at submission (migration 0014) wins over what the
    // configuration says now: a later change of the configuration leaves an old budget alone.
    // (A run queued under a configuration that said 0.3 dB: the column as the engine writes it.)
    sqlx::query("UPDATE runs SET source_level_accuracy_db = 0.3 WHERE id = $1")
        .bind(run.run_id)
        .execute(app.pool.as_sqlite().unwrap())
        .await
        .unwrap();
    let recorded: serde_json::Value = app
        .get(
            &format!("/api/v1/runs/{}/v-pi-budget", run.run_id),
            Some(&viewer),
        )
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(recorded["source_level_accuracy_db"], 0.3);
    assert_eq!(
        recorded["source_level_accuracy_from"],
        "bench bench-a configuration, recorded with the run at submission"
    );
    // The calibration report carries the same budget, one table per frequency.
    let html = app
        .get(
            &format!("/api/v1/runs/{}/report.html", run.run_id),
            Some(&viewer),
        )
        .await
        .text()
        .await
        .unwrap();
    assert!(html.contains("<h2>Uncertainty budget of V_pi</h2>"));
    for f in recorded["frequencies"].as_array().unwrap() {
        let heading = format!(
            "u<sub>c</sub> {:.4} V, U {:.4} V",
            f["combined_standard_uncertainty_volts"].as_f64().unwrap(),
            f["expanded_uncertainty_volts"].as_f64().unwrap()
        );
        assert!(html.contains(&heading), "{heading} missing");
    }
    assert!(html.find("Uncertainty budget").unwrap() < html.find("<h2>Caution</h2>").unwrap());

    // A chain table without uncertainties: the answer names the parameter to give.
    let (_, bare_chain) = seed_device(&store, "PM-0079").await;
    let bare = seed_completed_run(
        &store,
        device_id,
        bare_chain,
        &[2e9],
        &[0.0, 6.0],
        v_pi_at,
        201,
    )
    .await;
    let refused = app
        .get(
            &format!("/api/v1/runs/{}/v-pi-budget", bare.run_id),
            Some(&viewer),
        )
        .await;
    assert_eq!(refused.status(), 422);
    let text = problem(refused).await.to_string();
    assert!(
        text.contains("chain_uncertainty_db") && text.contains("PM-0079 chain"),
        "{text}"
    );
    // Its report says why it has no budget, naming the same input.
    let html = app
        .get(
            &format!("/api/v1/runs/{}/report.html", bare.run_id),
            Some(&viewer),
        )
        .await
        .text()
        .await
        .unwrap();
    let at = html
        .find("<h2>Uncertainty budget of V_pi</h2>\n<p>Not available: ")
        .unwrap();
    assert!(html[at..].contains("chain_uncertainty_db"));
}

/// Markup that must never reach a report unescaped: an element, an attribute breaking out of its
/// quotes, an entity and an apostrophe.
const HOSTILE: &str = "<script>alert(\"x\")</script><img src=x onerror='y'>&amp;";

#[tokio::test]
async fn the_calibration_report_is_one_escaped_self_contained_html_record_of_the_run() {
    use api_support::seed::seed_recorded_run;
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    app.token("lab-a-operator", Role::Operator).await;
    let token_id = halfwave::api::tokens::list(&app.pool)
        .await
        .unwrap()
        .iter()
        .find(|t| t.name == "lab-a-operator")
        .expect("the token is listed with its id")
        .id;
    let seeded = seed_recorded_run(app.store(), HOSTILE, token_id).await;

    // The JSON view carries the same record.
    let view: serde_json::Value = app
        .get(&format!("/api/v1/runs/{}", seeded.run_id), Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    let provenance = &view["provenance"];
    assert_eq!(
        provenance["analysis_method"],
        halfwave::analysis::ANALYSIS_METHOD
    );
    assert_eq!(
        provenance["software_version"],
        "halfwave 0.1.0 (git 0123456789ab)"
    );
    assert_eq!(provenance["submitted_by_token_id"], token_id);
    assert_eq!(provenance["hard_limit_at_modulator_dbm"], 24.0);
    assert_eq!(provenance["planned_max_at_modulator_dbm"], 10.5);

    let response = app
        .get(
            &format!("/api/v1/runs/{}/report.html", seeded.run_id),
            Some(&viewer),
        )
        .await;
    assert_eq!(response.status(), 200);
    let content_type = response.headers()["content-type"]
        .to_str()
        .unwrap()
        .to_string();
    assert!(content_type.starts_with("text/html"), "{content_type}");
    let html = response.text().await.unwrap();
    assert!(html.starts_with("<!DOCTYPE html>"), "{}", &html[..80]);

    // Every V_pi and its uncertainty, as stored, in the table (four decimals of volts).
    for (f, v_pi, u) in &seeded.results {
        let row = format!(
            "<td class=\"num\">{:.6}</td><td class=\"num\">{v_pi:.4}</td><td class=\"num\">{u:.4}</td>",
            f / 1e9
        );
        assert!(html.contains(&row), "no row {row}");
    }
    // The instruments' *IDN? parts, the method and software versions, the operator and the
    // limits in force.
    for identity in &seeded.identities {
        for part in [&identity.manufacturer, &identity.model, &identity.serial] {
            assert!(html.contains(part.as_str()), "{part} missing");
        }
    }
    assert!(html.contains("5.0.3"), "analyzer firmware missing");
    assert!(html.contains(halfwave::analysis::ANALYSIS_METHOD));
    assert!(html.contains("halfwave 0.1.0 (git 0123456789ab)"));
    assert!(html.contains(&format!("lab-a-operator (API token id {token_id})")));
    for limit in ["27.00 dBm", "24.00 dBm", "10.50 dBm"] {
        assert!(html.contains(limit), "limit {limit} missing");
    }
    assert!(html.contains("local codes or licensed practice"));
    // The -3 dB and -6 dB points are those of the response curve of the stored values (the
    // plumbing check: the report shows what the analysis computes, on the same points).
    let curve = halfwave::analysis::response_curve(
        &seeded
            .results
            .iter()
            .map(|&(f, v, u)| halfwave::analysis::VpiAtFrequency {
                frequency: halfwave::units::Hz(f),
                v_pi: halfwave::units::VoltsPeak(v),
                uncertainty: halfwave::units::VoltsPeak(u),
            })
            .collect::<Vec<_>>(),
    )
    .unwrap();
    // 20 log10(3.1234 / 6.4321) = -6.27 dB at 9 GHz: both points are reached.
    for (label, f) in [("-3 dB", curve.f_3db_hz), ("-6 dB", curve.f_6db_hz)] {
        let text = format!(
            "<dt>{label} response</dt><dd>{:.3} GHz</dd>",
            f.expect("reached").0 / 1e9
        );
        assert!(html.contains(&text), "no {text}");
    }
    // The excluded point with its reason, escaped.
    assert!(html.contains("off the line by 5 sigma &lt;script&gt;"));

    // Escaping: the hostile text appears only escaped, wherever it was stored (serial, note,
    // firmware, connection notes, reason), and the document has no script and loads nothing.
    let escaped = "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt;&lt;img src=x onerror=&#39;y&#39;&gt;&amp;amp;";
    assert!(!html.contains(HOSTILE));
    assert!(!html.contains("<script") && !html.contains("<img"));
    assert_eq!(
        html.matches(escaped).count(),
        9,
        "the serial in the title, heading and device list, the chain's name, the note, the \
         firmware, two connection notes and the reason: {html}"
    );
    for external in ["<link", "src=\"", "href=", "url(", "@import"] {
        assert!(!html.contains(external), "{external} in the report");
    }
    // Two inline SVG plots, each well-formed XML with one marker per V_pi.
    let svgs: Vec<&str> = html
        .split("<svg")
        .skip(1)
        .map(|rest| rest.split("</svg>").next().unwrap())
        .collect();
    assert_eq!(svgs.len(), 2);
    for body in svgs {
        let svg = format!("<svg{body}</svg>");
        let document = roxmltree::Document::parse(&svg).expect("well-formed SVG");
        let circles = document
            .descendants()
            .filter(|n| n.has_tag_name("circle"))
            .count();
        assert_eq!(circles, seeded.results.len());
    }

    // Viewer role and a run that exists.
    assert_eq!(
        app.get(&format!("/api/v1/runs/{}/report.html", seeded.run_id), None)
            .await
            .status(),
        401
    );
    let missing = app
        .get("/api/v1/runs/9999/report.html", Some(&viewer))
        .await;
    assert_eq!(missing.status(), 404);
    assert!(problem(missing).await["detail"]
        .as_str()
        .unwrap_or_default()
        .contains("9999"));
}
