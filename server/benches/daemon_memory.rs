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

use std::io::{BufRead, BufReader};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

const IDLE_TARGET_MB: f64 = 30.0;
const RUN_TARGET_MB: f64 = 80.0;

/// The daemon process; killed if the benchmark stops early.
struct Daemon(Child);

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// A field of `/proc/<pid>/status` in MB (the kernel reports kB).
fn status_mb(pid: u32, field: &str) -> f64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap_or_default();
    status
        .lines()
        .find(|l| l.starts_with(field))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|kb| kb.parse::<f64>().ok())
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

fn halfwave() -> Command {
    Command::new(env!("CARGO_BIN_EXE_halfwave"))
}

fn main() {
    if !std::env::args().any(|a| a == "--bench") {
        println!("daemon_memory: run with `cargo bench -p halfwave-server --bench daemon_memory`");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let config = dir.path().join("halfwave.toml");
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:{port}\"\ndata_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"simulated\" }}\nanalyzer = {{ kind = \"simulated\" }}\n[bench.simulation]\nseed = 3\ntime_factor = 0.02\n",
            dir.path().join("data").display()
        ),
    )
    .unwrap();
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

    let mut child = halfwave()
        .args(["serve", "--config"])
        .arg(&config)
        .env("RUST_LOG", "warn")
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let pid = child.id();
    let mut stdout = BufReader::new(child.stdout.take().unwrap());
    let daemon = Daemon(child);
    let mut line = String::new();
    stdout.read_line(&mut line).unwrap();
    assert!(line.contains("listening"), "{line}");
    std::thread::spawn(move || {
        let mut sink = String::new();
        while stdout.read_line(&mut sink).map(|n| n > 0).unwrap_or(false) {
            sink.clear();
        }
    });
    std::thread::sleep(Duration::from_secs(2));
    let idle_before = status_mb(pid, "VmRSS:");

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
        peak_sampled = peak_sampled.max(status_mb(pid, "VmRSS:"));
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
    let peak_kernel = status_mb(pid, "VmHWM:");
    std::thread::sleep(Duration::from_secs(2));
    let idle_after = status_mb(pid, "VmRSS:");
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
