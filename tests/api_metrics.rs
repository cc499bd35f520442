//! Run and queue gauges in `/api/v1/metrics`, scraped while a run is measured on the simulated
//! bench and after it ended, and compared with what the engine reported in its progress events.
//! Parsed as the Prometheus text exposition format 0.0.4 (`name{labels} value` per line).

mod api_support;

use api_support::spawn_app_with_engine;
use halfwave::api::tokens::Role;
use halfwave::engine::events::ProgressEvent;
use halfwave::store::RunState;
use std::time::Duration;

/// 3 frequencies x 6 levels (0, 4, ..., 20 dBm) = 18 points.
fn plan(serial: &str) -> serde_json::Value {
    serde_json::json!({
        "device": {"serial": serial, "model": "simulated phase modulator", "rf_input_limit_dbm": 27.0},
        "bench": "sim-bench",
        "chain": {"kind": "flat_loss", "loss_db": 1.5},
        "frequencies": {"kind": "list", "values_hz": [2e9, 4e9, 6e9]},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 20.0, "step_db": 4.0},
        "settle_s": 0.0
    })
}

/// The value of the sample `name{labels}` (labels exactly as rendered), if present.
fn sample(text: &str, series: &str) -> Option<f64> {
    text.lines().filter(|l| !l.starts_with('#')).find_map(|l| {
        l.strip_prefix(series)?
            .strip_prefix(' ')?
            .trim()
            .parse()
            .ok()
    })
}

async fn scrape(app: &api_support::TestApp, token: &str) -> String {
    let response = app.get("/api/v1/metrics", Some(token)).await;
    assert_eq!(response.status(), 200);
    response.text().await.unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn run_and_queue_gauges_follow_a_run() {
    // Instrument times scaled to 5 % (a point takes some 25 ms), except from the submission until
    // the queued run's cancel is answered: real times then (a sweep takes 0.4 s), so the first
    // run's fifteen points after its third (over 6 s) keep it running through the scrape below
    // and the second run queued until its cancel arrives, with seconds to spare on a loaded
    // machine.
    let bench = spawn_app_with_engine(0.05).await;
    let app = &bench.app;
    let operator = app.token("lab-b", Role::Operator).await;
    let viewer = app.token("watcher", Role::Viewer).await;
    let mut events = app.state.engine().expect("engine").subscribe();

    let idle = scrape(app, &viewer).await;
    assert_eq!(sample(&idle, "halfwave_runs{state=\"running\"}"), Some(0.0));
    assert_eq!(
        sample(&idle, "halfwave_bench_queued_runs{bench=\"sim-bench\"}"),
        Some(0.0)
    );
    assert_eq!(
        sample(&idle, "halfwave_bench_busy{bench=\"sim-bench\"}"),
        Some(0.0)
    );
    assert_eq!(sample(&idle, "halfwave_points_committed_total"), Some(0.0));

    bench.sim.set_time_factor(1.0);
    let mut run_ids = Vec::new();
    for serial in ["EG-PM-0101", "EG-PM-0102"] {
        let submitted = app
            .post_json("/api/v1/runs", Some(&operator), &plan(serial))
            .await;
        assert_eq!(submitted.status(), 201);
        let body: serde_json::Value = submitted.json().await.unwrap();
        run_ids.push(body["run_id"].as_i64().unwrap());
    }
    let (first, second) = (run_ids[0], run_ids[1]);

    // During the first run: after its third committed point, scrape.
    let seen = loop {
        let event = tokio::time::timeout(Duration::from_secs(60), events.recv())
            .await
            .expect("progress in time")
            .expect("event channel open");
        if let ProgressEvent::Point {
            run_id,
            completed_points,
            ..
        } = event
        {
            if run_id == first && completed_points >= 3 {
                break completed_points;
            }
        }
    };
    // The gauges follow the events in their own task, which may not have read the third point's
    // event yet on a loaded machine: scrape until they have (or the run moved on).
    let completed_series =
        format!("halfwave_run_points_completed{{bench=\"sim-bench\",run_id=\"{first}\"}}");
    let mut during = String::new();
    for _ in 0..100 {
        during = scrape(app, &viewer).await;
        if sample(&during, &completed_series).is_some_and(|c| c >= seen as f64) {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    let seen_series = signatures(&during);
    let (types, names): (Vec<&str>, Vec<&str>) =
        SERIES_BEFORE.iter().partition(|s| s.starts_with('#'));
    let names: std::collections::BTreeSet<String> = names.iter().map(|s| s.to_string()).collect();
    assert_eq!(seen_series, names, "{during}");
    for kind in types {
        assert!(
            during.lines().any(|l| l == kind),
            "{kind} missing: {during}"
        );
    }
    let total_series =
        format!("halfwave_run_points_total{{bench=\"sim-bench\",run_id=\"{first}\"}}");
    assert_eq!(
        sample(&during, "halfwave_runs{state=\"running\"}"),
        Some(1.0),
        "{during}"
    );
    assert_eq!(
        sample(&during, "halfwave_runs{state=\"queued\"}"),
        Some(1.0)
    );
    assert_eq!(
        sample(&during, "halfwave_bench_queued_runs{bench=\"sim-bench\"}"),
        Some(1.0)
    );
    assert_eq!(
        sample(&during, "halfwave_bench_busy{bench=\"sim-bench\"}"),
        Some(1.0)
    );
    assert_eq!(sample(&during, &total_series), Some(18.0), "{during}");
    let completed = sample(&during, &completed_series).expect("progress of the active run");
    assert!(
        completed >= seen as f64 && completed <= 18.0,
        "completed {completed}, the events had reached {seen}"
    );
    let committed = sample(&during, "halfwave_points_committed_total").unwrap();
    assert!(
        committed >= seen as f64 && committed <= 18.0,
        "committed {committed}"
    );

    // Cancel the queued one; wait for both to end.
    let cancel = app
        .client
        .post(app.url(&format!("/api/v1/runs/{second}/cancel")))
        .bearer_auth(&operator)
        .send()
        .await
        .unwrap();
    assert!(cancel.status().is_success(), "{}", cancel.status());
    bench.sim.set_time_factor(0.05);
    let mut ended = Vec::new();
    while ended.len() < 2 {
        let event = tokio::time::timeout(Duration::from_secs(120), events.recv())
            .await
            .expect("both runs end in time")
            .expect("event channel open");
        if let ProgressEvent::Finished { run_id, state, .. } = event {
            ended.push((run_id, state));
        }
    }
    ended.sort_by_key(|(run_id, _)| *run_id);
    assert_eq!(
        ended,
        vec![(first, RunState::Completed), (second, RunState::Cancelled)]
    );

    // The metrics follow the events: give the gauges' follower a moment to read the last ones
    // (the bench is released just after the run's end event, so its gauge is waited for too;
    // on a loaded machine that took over the second this loop used to allow).
    let mut after = String::new();
    for _ in 0..250 {
        after = scrape(app, &viewer).await;
        if sample(&after, "halfwave_points_committed_total") == Some(18.0)
            && sample(&after, "halfwave_bench_busy{bench=\"sim-bench\"}") == Some(0.0)
            && sample(&after, "halfwave_runs{state=\"running\"}") == Some(0.0)
        {
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert_eq!(
        sample(&after, "halfwave_points_committed_total"),
        Some(18.0),
        "{after}"
    );
    assert_eq!(
        sample(&after, "halfwave_runs{state=\"completed\"}"),
        Some(1.0)
    );
    assert_eq!(
        sample(&after, "halfwave_runs{state=\"cancelled\"}"),
        Some(1.0)
    );
    assert_eq!(
        sample(&after, "halfwave_runs{state=\"running\"}"),
        Some(0.0)
    );
    assert_eq!(sample(&after, "halfwave_runs{state=\"queued\"}"), Some(0.0));
    assert_eq!(
        sample(&after, "halfwave_bench_queued_runs{bench=\"sim-bench\"}"),
        Some(0.0)
    );
    assert_eq!(
        sample(&after, "halfwave_bench_busy{bench=\"sim-bench\"}"),
        Some(0.0)
    );
    assert_eq!(
        sample(&after, &completed_series),
        None,
        "no progress once nothing runs"
    );
    // The database agrees with the counter: 18 points stored for the completed run.
    let stored: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM points WHERE run_id = $1")
        .bind(first)
        .fetch_one(app.pool.as_sqlite().unwrap())
        .await
        .unwrap();
    assert_eq!(stored, 18);
}

/// Sends `count` requests with made-up methods (`AAAA{i}`, from `first` on) to the health route
/// and as many GETs to paths no route serves, without a token.
async fn made_up_requests(app: &api_support::TestApp, first: usize, count: usize) {
    let client = reqwest::Client::new();
    for i in first..first + count {
        let method = reqwest::Method::from_bytes(format!("AAAA{i}").as_bytes()).unwrap();
        let _ = client
            .request(method, app.url("/api/v1/health"))
            .send()
            .await
            .unwrap();
        let _ = client
            .get(app.url(&format!("/api/v1/no-such-thing-{i}/{}", i * 7919)))
            .send()
            .await
            .unwrap();
    }
}

/// The sample lines (series) of the HTTP families.
fn http_series(text: &str) -> Vec<&str> {
    text.lines()
        .filter(|l| l.starts_with("halfwave_http_"))
        .map(|l| l.rsplit_once(' ').map_or(l, |(series, _)| series))
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn made_up_methods_and_paths_do_not_add_series() {
    // Any token is a valid HTTP method (RFC 9110 section 9.1) and any path can be asked for:
    // each must not become a label value of its own, or clients without a token could grow
    // the daemon's memory for good.
    let app = api_support::spawn_app().await;
    let viewer = app.token("watcher", Role::Viewer).await;
    made_up_requests(&app, 0, 3).await;
    // The scrape itself adds its own series once; scrape twice so the count is settled.
    let _ = scrape(&app, &viewer).await;
    let before = scrape(&app, &viewer).await;
    made_up_requests(&app, 3, 40).await;
    let text = scrape(&app, &viewer).await;
    assert_eq!(
        http_series(&before),
        http_series(&text),
        "40 more made-up requests added series:\n{before}\n---\n{text}"
    );
    assert!(!text.contains("AAAA"), "{text}");
    assert!(!text.contains("no-such-thing"), "{text}");
    let series = |needle: &str| {
        text.lines()
            .filter(|l| l.starts_with("halfwave_http_requests_total{") && l.contains(needle))
            .count()
    };
    assert_eq!(series("method=\"other\""), 1, "{text}");
    // Paths no route serves are answered before the metrics layer (it wraps routes only), or
    // at most under the one `unmatched` label.
    assert!(series("route=\"unmatched\"") <= 1, "{text}");
}

/// The series names and label names of the hand-written exposition before `prometheus-client`
/// (as it rendered a scrape during a run), so scrapers' dashboards and alerts keep working.
const SERIES_BEFORE: [&str; 17] = [
    "halfwave_bench_awaiting_acknowledgement{bench}",
    "halfwave_bench_busy{bench}",
    "halfwave_bench_queued_runs{bench}",
    "halfwave_bench_rf_output_unconfirmed{bench}",
    "halfwave_http_request_duration_seconds_bucket{route,method,le}",
    "halfwave_http_request_duration_seconds_count{route,method}",
    "halfwave_http_request_duration_seconds_sum{route,method}",
    "halfwave_http_requests_total{route,method,status}",
    "halfwave_points_committed_total",
    "halfwave_run_points_completed{bench,run_id}",
    "halfwave_run_points_total{bench,run_id}",
    "halfwave_runs{state}",
    "halfwave_uptime_seconds",
    "halfwave_webhook_deliveries{state}",
    // TYPE lines: the kind of each family.
    "# TYPE halfwave_http_requests_total counter",
    "# TYPE halfwave_http_request_duration_seconds histogram",
    "# TYPE halfwave_points_committed_total counter",
];

/// Each sample line as `name{label,names}` (labels in their order, values dropped).
fn signatures(text: &str) -> std::collections::BTreeSet<String> {
    text.lines()
        .filter(|l| !l.starts_with('#') && !l.is_empty())
        .map(|l| {
            let series = l.rsplit_once(' ').map_or(l, |(series, _)| series);
            match series.split_once('{') {
                None => series.to_string(),
                Some((name, labels)) => {
                    let keys: Vec<&str> = labels
                        .split("\",")
                        .filter_map(|kv| kv.split_once('=').map(|(k, _)| k))
                        .collect();
                    format!("{name}{{{}}}", keys.join(","))
                }
            }
        })
        .collect()
}
