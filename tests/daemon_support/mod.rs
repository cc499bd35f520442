//! Shared helpers of the tests that run the real `halfwave serve` process on a bench reached over
//! SCPI/TCP: the simulator's server runs in the test process, so it outlives the daemon and shows
//! what the RF output really does; tokens come from the real CLI; the API is read over HTTP.

#![allow(dead_code)]

use crate::engine_support::FREQUENCIES_HZ;
use halfwave::store::Store;
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::sync::atomic::{AtomicU16, Ordering};
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, BufReader};
use tokio::process::{Child, Command};

/// Simulated time runs at this fraction of real time: a run lasts a few seconds, long enough to be
/// stopped in the middle.
pub const TIME_FACTOR: f64 = 0.2;

pub struct Bench {
    pub dir: tempfile::TempDir,
    pub config: PathBuf,
    /// The daemon's HTTP port: 0 until the first [`Bench::serve`] reads it from the daemon.
    port: AtomicU16,
    pub server: SimServer,
    pub client: reqwest::Client,
}

/// The port in the daemon's first stdout line, "halfwave listening on http://127.0.0.1:PORT/ ...".
pub fn listening_port(line: &str) -> u16 {
    line.split("http://127.0.0.1:")
        .nth(1)
        .and_then(|rest| rest.split('/').next())
        .and_then(|port| port.parse().ok())
        .unwrap_or_else(|| panic!("no 127.0.0.1 port in the daemon's first line: {line:?}"))
}

/// Keeps the port a test daemon reported in its first line: in `slot` and pinned in `config` on
/// its first start (see [`pin_bind_port`]); a restart must come back on it.
pub fn record_listening_port(slot: &AtomicU16, config: &Path, first_line: &str) {
    let port = listening_port(first_line);
    match slot.load(Ordering::SeqCst) {
        0 => {
            slot.store(port, Ordering::SeqCst);
            pin_bind_port(config, port);
        }
        pinned => assert_eq!(port, pinned, "the restarted daemon moved to another port"),
    }
}

/// The port [`record_listening_port`] kept (the daemon must have been started).
pub fn known_port(slot: &AtomicU16) -> u16 {
    let port = slot.load(Ordering::SeqCst);
    assert_ne!(
        port, 0,
        "the daemon's port is known once it has been started"
    );
    port
}

/// Daemons in the tests bind port 0 and report the port the system gave them: a port picked in
/// advance and released could be taken by another test's connection before the daemon binds it.
/// Once a daemon has listened, its configuration is pinned to that port (`bind = "127.0.0.1:0"`
/// becomes the port), so a restart comes back on the same address.
fn pin_bind_port(config: &Path, port: u16) {
    let text = std::fs::read_to_string(config).unwrap();
    let pinned = text.replacen(
        "bind = \"127.0.0.1:0\"",
        &format!("bind = \"127.0.0.1:{port}\""),
        1,
    );
    std::fs::write(config, pinned).unwrap();
}

impl Bench {
    pub async fn new(seed: u64) -> Bench {
        Bench::with_scenario(Scenario::builtin().unwrap(), seed).await
    }

    /// A bench like [`Bench::new`] whose simulator plays `scenario`.
    pub async fn with_scenario(scenario: Scenario, seed: u64) -> Bench {
        let dir = tempfile::tempdir().unwrap();
        let sim = SimBench::new(scenario, seed).with_time_factor(TIME_FACTOR);
        let server = SimServer::start(sim, SimServerConfig::any_free_ports())
            .await
            .unwrap();
        let config = dir.path().join("halfwave.toml");
        std::fs::write(
            &config,
            format!(
                "bind = \"127.0.0.1:0\"\ndata_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\" }}\n",
                dir.path().join("data").display(),
                server.resource(Role::RfSource),
                server.resource(Role::Analyzer),
            ),
        )
        .unwrap();
        Bench {
            dir,
            config,
            port: AtomicU16::new(0),
            server,
            client: reqwest::Client::new(),
        }
    }

    pub fn database(&self) -> PathBuf {
        self.dir.path().join("data").join("halfwave.db")
    }

    /// Creates an operator token with the real CLI, as an administrator would.
    pub async fn operator_token(&self) -> String {
        let config = self.config.to_string_lossy().into_owned();
        let args = ["token", "create", "--role", "operator", "--name", "lab-b"];
        cli_succeeds(&[&args[..], &["--config", &config]].concat()).await
    }

    /// Starts `halfwave serve` and waits for it to listen. Its log goes to a file in the
    /// temporary directory (shown if a check fails).
    pub async fn serve(&self, log_name: &str) -> Child {
        let log = std::fs::File::create(self.dir.path().join(log_name)).unwrap();
        let mut child = Command::new(env!("CARGO_BIN_EXE_halfwave"))
            .args(["serve", "--config"])
            .arg(&self.config)
            .stdout(Stdio::piped())
            .stderr(Stdio::from(log))
            .kill_on_drop(true)
            .spawn()
            .unwrap();
        let stdout = child.stdout.take().unwrap();
        let mut lines = BufReader::new(stdout).lines();
        let first = tokio::time::timeout(Duration::from_secs(30), lines.next_line())
            .await
            .expect("the daemon started within 30 s")
            .unwrap()
            .unwrap_or_default();
        assert!(
            first.contains("listening"),
            "{first}: {}",
            self.log(log_name)
        );
        record_listening_port(&self.port, &self.config, &first);
        // Keep reading stdout so the daemon never blocks on a full pipe.
        tokio::spawn(async move { while let Ok(Some(_)) = lines.next_line().await {} });
        child
    }

    pub fn log(&self, name: &str) -> String {
        std::fs::read_to_string(self.dir.path().join(name)).unwrap_or_default()
    }

    /// The daemon's HTTP port (known once it has been served).
    pub fn port(&self) -> u16 {
        known_port(&self.port)
    }

    pub fn url(&self, path: &str) -> String {
        format!("http://127.0.0.1:{}{path}", self.port())
    }

    /// The value on the `/api/v1/metrics` line that starts with `line_start` (a metric's name
    /// with its labels), if there is one.
    pub async fn metric(&self, token: &str, line_start: &str) -> Option<f64> {
        let text = self
            .client
            .get(self.url("/api/v1/metrics"))
            .bearer_auth(token)
            .send()
            .await
            .unwrap()
            .text()
            .await
            .unwrap();
        text.lines()
            .find_map(|l| l.strip_prefix(line_start))
            .and_then(|v| v.trim().parse().ok())
    }

    pub async fn post(&self, path: &str, token: &str, body: &Value) -> reqwest::Response {
        self.client
            .post(self.url(path))
            .bearer_auth(token)
            .json(body)
            .send()
            .await
            .unwrap()
    }

    pub async fn run(&self, run_id: i64, token: &str) -> Value {
        let response = self
            .client
            .get(self.url(&format!("/api/v1/runs/{run_id}")))
            .bearer_auth(token)
            .send()
            .await
            .unwrap();
        assert_eq!(response.status(), 200);
        response.json().await.unwrap()
    }

    /// Polls the run until `done` holds (up to `limit`).
    pub async fn wait_for(
        &self,
        run_id: i64,
        token: &str,
        limit: Duration,
        done: impl Fn(&Value) -> bool,
    ) -> Value {
        let deadline = tokio::time::Instant::now() + limit;
        loop {
            let run = self.run(run_id, token).await;
            if done(&run) {
                return run;
            }
            assert!(
                tokio::time::Instant::now() < deadline,
                "the run did not reach the expected state: {run}"
            );
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }
}

/// The calibration plan of the invented modulator (the same frequencies and levels as the engine
/// tests, with a flat chain loss: this test counts points, it does not judge V_pi).
pub fn plan() -> Value {
    json!({
        "device": {"serial": "EG-PM-0042", "model": "simulated phase modulator",
                   "rf_input_limit_dbm": 27.0, "wavelength_nm": 1550.0},
        "bench": "sim",
        "chain": {"kind": "flat_loss", "loss_db": 2.0},
        "frequencies": {"kind": "list", "values_hz": FREQUENCIES_HZ},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 20.0, "step_db": 2.5},
        "settle_s": 0.0
    })
}

pub async fn submit(bench: &Bench, token: &str) -> i64 {
    let response = bench.post("/api/v1/runs", token, &plan()).await;
    assert_eq!(response.status(), 201);
    let body: Value = response.json().await.unwrap();
    body["run_id"].as_i64().expect("run_id in the reply")
}

/// Starts the daemon (its log in `log_name`), submits [`plan`] and waits (up to 120 s) until
/// `points` are committed: a daemon in the middle of a run, for the stop and kill tests.
pub async fn serve_mid_run(
    bench: &Bench,
    log_name: &str,
    token: &str,
    points: u64,
) -> (Child, i64) {
    let daemon = bench.serve(log_name).await;
    let run_id = submit(bench, token).await;
    bench
        .wait_for(run_id, token, Duration::from_secs(120), |r| {
            r["measured_points"].as_u64().unwrap_or(0) >= points
        })
        .await;
    (daemon, run_id)
}

pub async fn stored_points(database: &Path, run_id: i64) -> Vec<(u32, u32)> {
    let store = Store::open(database.to_str().unwrap()).await.unwrap();
    let points = store.points_of_run(run_id).await.unwrap();
    let indices = points
        .iter()
        .map(|p| (p.frequency_index, p.level_index))
        .collect();
    store.close().await;
    indices
}

/// Runs the real `halfwave` CLI with `args`, asserts that it succeeds and returns its stdout,
/// trimmed.
pub async fn cli_succeeds(args: &[&str]) -> String {
    let out = Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args(args)
        .output()
        .await
        .unwrap();
    assert!(
        out.status.success(),
        "halfwave {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap().trim().to_string()
}

/// A short plan on bench "sim": one frequency, nine levels with RF on for a while at each (the
/// fault tests need time with the output on, not many points).
pub fn small_plan() -> Value {
    json!({
        "device": {"serial": "EG-PM-0042", "model": "simulated phase modulator",
                   "rf_input_limit_dbm": 27.0, "wavelength_nm": 1550.0},
        "bench": "sim",
        "chain": {"kind": "flat_loss", "loss_db": 2.0},
        "frequencies": {"kind": "list", "values_hz": [1.5e9]},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 20.0, "step_db": 2.5},
        "settle_s": 0.3
    })
}

impl Bench {
    /// GET `path` with `token`: the status and the JSON body (`Null` when it is not JSON).
    pub async fn get(&self, path: &str, token: &str) -> (u16, Value) {
        let response = self
            .client
            .get(self.url(path))
            .bearer_auth(token)
            .send()
            .await
            .unwrap();
        let status = response.status().as_u16();
        (status, response.json().await.unwrap_or(Value::Null))
    }

    /// Submits `plan` and returns the run id.
    pub async fn submit_plan(&self, token: &str, plan: &Value) -> i64 {
        let response = self.post("/api/v1/runs", token, plan).await;
        assert_eq!(response.status(), 201);
        let body: Value = response.json().await.unwrap();
        body["run_id"].as_i64().expect("run_id in the reply")
    }

    /// The bench "sim" as `/benches` shows it.
    pub async fn bench_status(&self, token: &str) -> Value {
        let (status, benches) = self.get("/api/v1/benches", token).await;
        assert_eq!(status, 200, "{benches}");
        benches
            .as_array()
            .and_then(|b| b.iter().find(|b| b["name"] == "sim"))
            .cloned()
            .expect("bench sim listed")
    }

    /// Polls `/benches` until bench "sim" is in the safety `state` (up to `limit`); returns its
    /// status. The daemon's log (`daemon.log`) is in the failure message.
    pub async fn wait_for_safety_state(&self, token: &str, state: &str, limit: Duration) -> Value {
        let deadline = std::time::Instant::now() + limit;
        loop {
            let status = self.bench_status(token).await;
            if status["safety_state"] == state {
                return status;
            }
            assert!(
                std::time::Instant::now() < deadline,
                "bench never became {state} within {limit:?}: {status}\n{}",
                self.log("daemon.log")
            );
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
    }
}

impl Bench {
    /// Appends TOML text to the daemon's configuration file (before `serve`).
    pub fn append_config(&self, text: &str) {
        use std::io::Write;
        let mut file = std::fs::OpenOptions::new()
            .append(true)
            .open(&self.config)
            .unwrap();
        file.write_all(text.as_bytes()).unwrap();
    }
}
