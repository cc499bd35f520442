//! The daemon's memory: resident set size of the real `halfwave serve` process when idle, during a
//! calibration run with 10,001-point traces, and idle again afterwards.
//!
//! Starts the binary Cargo builds beside this benchmark (optimised, as a user runs it) on the
//! simulated bench with a fresh data directory, waits for it to settle and reads `VmRSS` from
//! `/proc/<pid>/status`; then submits a 6-frequency x 9-level run (10,001-point traces, RF-off
//! reference, laser search) through the HTTP API, samples `VmRSS` every 20 ms until the run
//! completes, reads the peak the kernel recorded (`VmHWM`), and samples once more when idle.
//! Targets: under 30 MB idle, under 80 MB during the run. Exits with an error when over.
//!
//! Run: `cargo bench -p halfwave-server --bench daemon_memory` (Linux; about half a minute).

#[path = "support/daemon.rs"]
mod daemon;

use daemon::{halfwave, simulated_config, Daemon};
use std::time::{Duration, Instant};

const IDLE_TARGET_MB: f64 = 30.0;
const RUN_TARGET_MB: f64 = 80.0;

fn main() {
    if !std::env::args().any(|a| a == "--bench") {
        println!("daemon_memory: run with `cargo bench -p halfwave-server --bench daemon_memory`");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let (config, port) = simulated_config(dir.path());
    let token = halfwave()
        .args([
            "token",
            "create",
            "--role",
            "operator",
            "--name",
            "memory-bench",
            "--config",
        ])
        .arg(&config)
        .output()
        .unwrap();
    assert!(
        token.status.success(),
        "{}",
        String::from_utf8_lossy(&token.stderr)
    );
    let token = String::from_utf8(token.stdout).unwrap().trim().to_string();

    let daemon = Daemon::serve(&config);
    std::thread::sleep(Duration::from_secs(2));
    let idle_before = daemon.status_mb("VmRSS:");

    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let base = format!("http://127.0.0.1:{port}");
    let client = reqwest::Client::new();
    let plan = serde_json::json!({
        "device": {"serial": "MEM-PM-0001", "model": "benchmark modulator",
                   "rf_input_limit_dbm": 27.0, "wavelength_nm": 1550.0},
        "bench": "sim",
        "chain": {"kind": "flat_loss", "loss_db": 1.5},
        "frequencies": {"kind": "list", "values_hz": [0.5e9, 1e9, 2e9, 5e9, 10e9, 20e9]},
        "levels": {"kind": "ramp", "start_dbm": 3.0, "stop_dbm": 19.0, "step_db": 2.0},
        "settle_s": 0.0,
        "analyzer": {"points": 10001}
    });
    let run_id = runtime.block_on(async {
        let reply = client
            .post(format!("{base}/api/v1/runs"))
            .bearer_auth(&token)
            .json(&plan)
            .send()
            .await
            .unwrap();
        assert_eq!(
            reply.status(),
            201,
            "{}",
            reply.text().await.unwrap_or_default()
        );
        let body: serde_json::Value = reply.json().await.unwrap();
        body["run_id"].as_i64().unwrap()
    });
    let started = Instant::now();
    let mut peak_sampled = 0f64;
    let mut last_poll = Instant::now() - Duration::from_secs(1);
    let (state, points) = loop {
        peak_sampled = peak_sampled.max(daemon.status_mb("VmRSS:"));
        if last_poll.elapsed() > Duration::from_millis(250) {
            last_poll = Instant::now();
            let run: serde_json::Value = runtime.block_on(async {
                client
                    .get(format!("{base}/api/v1/runs/{run_id}"))
                    .bearer_auth(&token)
                    .send()
                    .await
                    .unwrap()
                    .json()
                    .await
                    .unwrap()
            });
            let state = run["state"].as_str().unwrap_or("").to_string();
            if !matches!(state.as_str(), "queued" | "running") {
                break (state, run["measured_points"].as_u64().unwrap_or(0));
            }
        }
        assert!(
            started.elapsed() < Duration::from_secs(600),
            "the run took over 10 minutes"
        );
        std::thread::sleep(Duration::from_millis(20));
    };
    let peak_kernel = daemon.status_mb("VmHWM:");
    std::thread::sleep(Duration::from_secs(2));
    let idle_after = daemon.status_mb("VmRSS:");
    drop(daemon);

    println!(
        "run {run_id}: {state}, {points} points with 10,001-point traces in {:.1} s",
        started.elapsed().as_secs_f64()
    );
    println!("resident idle before the run: {idle_before:.1} MB (target < {IDLE_TARGET_MB} MB)");
    println!("resident during the run: peak sampled {peak_sampled:.1} MB, kernel high-water mark {peak_kernel:.1} MB (target < {RUN_TARGET_MB} MB)");
    println!("resident idle after the run: {idle_after:.1} MB");
    assert_eq!(state, "completed");
    let peak = peak_sampled.max(peak_kernel);
    if !(idle_before < IDLE_TARGET_MB && idle_after < IDLE_TARGET_MB && peak < RUN_TARGET_MB) {
        eprintln!("over a memory target");
        std::process::exit(1);
    }
}
