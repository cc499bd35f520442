//! The real `halfwave serve` process on a bench reached over SCPI/TCP (the simulator's server,
//! run by this test so that it outlives the daemon and shows what the RF output really does):
//! - killed with SIGKILL mid-run and started again: the run is interrupted, every committed point is
//!   still there, the start-up interlock has switched the RF off, and resuming it through the API
//!   completes it with the same number of points as an uninterrupted run, each measured once;
//! - stopped with SIGTERM mid-run: the process exits cleanly, the run is marked interrupted with its
//!   cause, and the RF output is off.

mod engine_support;

use engine_support::{FREQUENCIES_HZ, LEVELS, POINTS};
use halfwave::store::{RunState, Store};
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use serde_json::{json, Value};
use std::collections::HashSet;
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, BufReader};
use tokio::process::{Child, Command};

/// Simulated time runs at this fraction of real time: a run lasts a few seconds, long enough to be
/// stopped in the middle.
const TIME_FACTOR: f64 = 0.2;

struct Bench {
    dir: tempfile::TempDir,
    config: PathBuf,
    port: u16,
    server: SimServer,
    client: reqwest::Client,
}

fn free_port() -> u16 {
    let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    l.local_addr().unwrap().port()
}

impl Bench {
    async fn new(seed: u64) -> Bench {
        let dir = tempfile::tempdir().unwrap();
        let sim = SimBench::new(Scenario::builtin().unwrap(), seed).with_time_factor(TIME_FACTOR);
        let server = SimServer::start(sim, SimServerConfig::any_free_ports())
            .await
            .unwrap();
        let port = free_port();
        let config = dir.path().join("halfwave.toml");
        std::fs::write(
            &config,
            format!(
                "bind = \"127.0.0.1:{port}\"\ndata_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\" }}\n",
                dir.path().join("data").display(),
                server.resource(Role::RfSource),
                server.resource(Role::Analyzer),
            ),
        )
        .unwrap();
        Bench {
            dir,
            config,
            port,
            server,
            client: reqwest::Client::new(),
        }
    }

    fn database(&self) -> PathBuf {
        self.dir.path().join("data").join("halfwave.db")
    }

    /// Creates an operator token with the real CLI, as an administrator would.
    async fn operator_token(&self) -> String {
        let out = Command::new(env!("CARGO_BIN_EXE_halfwave"))
            .args(["token", "create", "--role", "operator", "--name", "lab-b"])
            .arg("--config")
            .arg(&self.config)
            .output()
            .await
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).unwrap().trim().to_string()
    }

    /// Starts `halfwave serve` and waits for it to listen. Its log goes to a file in the
    /// temporary directory (shown if a check fails).
    async fn serve(&self, log_name: &str) -> Child {
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
        // Keep reading stdout so the daemon never blocks on a full pipe.
        tokio::spawn(async move { while let Ok(Some(_)) = lines.next_line().await {} });
        child
    }

    fn log(&self, name: &str) -> String {
        std::fs::read_to_string(self.dir.path().join(name)).unwrap_or_default()
    }

    fn url(&self, path: &str) -> String {
        format!("http://127.0.0.1:{}{path}", self.port)
    }

    async fn post(&self, path: &str, token: &str, body: &Value) -> reqwest::Response {
        self.client
            .post(self.url(path))
            .bearer_auth(token)
            .json(body)
            .send()
            .await
            .unwrap()
    }

    async fn run(&self, run_id: i64, token: &str) -> Value {
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
    async fn wait_for(
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
fn plan() -> Value {
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

async fn submit(bench: &Bench, token: &str) -> i64 {
    let response = bench.post("/api/v1/runs", token, &plan()).await;
    assert_eq!(response.status(), 201);
    let body: Value = response.json().await.unwrap();
    body["run_id"].as_i64().expect("run_id in the reply")
}

async fn stored_points(database: &Path, run_id: i64) -> Vec<(u32, u32)> {
    let store = Store::open(database.to_str().unwrap()).await.unwrap();
    let points = store.points_of_run(run_id).await.unwrap();
    let indices = points
        .iter()
        .map(|p| (p.frequency_index, p.level_index))
        .collect();
    store.close().await;
    indices
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigkill_mid_run_then_restart_and_resume_completes_every_point_once() {
    let bench = Bench::new(31).await;
    let token = bench.operator_token().await;
    let mut daemon = bench.serve("first.log").await;
    let run_id = submit(&bench, &token).await;
    // Let a dozen points be committed, then kill the process with no chance to clean up.
    bench
        .wait_for(run_id, &token, Duration::from_secs(120), |r| {
            r["measured_points"].as_u64().unwrap_or(0) >= 12
        })
        .await;
    daemon.kill().await.unwrap();
    daemon.wait().await.unwrap();
    // Usually on already (killed mid-point); make sure it is, so that the restart is what
    // switches it off.
    engine_support::leave_rf_on(bench.server.bench()).await;

    let committed = stored_points(&bench.database(), run_id).await;
    assert!(
        committed.len() >= 12 && committed.len() < POINTS,
        "{} points committed before the kill",
        committed.len()
    );

    // Start again: the start-up interlock switches the RF off; the run is interrupted with every
    // committed point intact.
    let _daemon = bench.serve("second.log").await;
    assert!(
        !bench.server.bench().rf_output_on(),
        "RF still on after the restart: {}",
        bench.log("second.log")
    );
    let run = bench.run(run_id, &token).await;
    assert_eq!(run["state"], "interrupted", "{run}");
    assert_eq!(
        run["measured_points"].as_u64(),
        Some(committed.len() as u64)
    );
    let after_restart = stored_points(&bench.database(), run_id).await;
    assert_eq!(after_restart, committed, "committed points changed");

    let resumed = bench
        .post(&format!("/api/v1/runs/{run_id}/resume"), &token, &json!({}))
        .await;
    assert!(resumed.status().is_success(), "{}", resumed.status());
    let run = bench
        .wait_for(run_id, &token, Duration::from_secs(180), |r| {
            !matches!(
                r["state"].as_str(),
                Some("interrupted" | "running" | "queued")
            )
        })
        .await;
    assert_eq!(
        run["state"],
        "completed",
        "{run}: {}",
        bench.log("second.log")
    );
    assert_eq!(run["measured_points"].as_u64(), Some(POINTS as u64));
    assert_eq!(
        run["results"].as_array().map(Vec::len),
        Some(FREQUENCIES_HZ.len())
    );
    let all = stored_points(&bench.database(), run_id).await;
    let distinct: HashSet<_> = all.iter().copied().collect();
    assert_eq!(all.len(), POINTS, "same count as an uninterrupted run");
    assert_eq!(distinct.len(), POINTS, "every point measured once");
    assert!(distinct
        .iter()
        .all(|&(f, l)| (f as usize) < FREQUENCIES_HZ.len() && (l as usize) < LEVELS));
    assert!(!bench.server.bench().rf_output_on());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_mid_run_marks_the_run_interrupted_with_rf_off() {
    let bench = Bench::new(32).await;
    let token = bench.operator_token().await;
    let mut daemon = bench.serve("daemon.log").await;
    let run_id = submit(&bench, &token).await;
    bench
        .wait_for(run_id, &token, Duration::from_secs(120), |r| {
            r["measured_points"].as_u64().unwrap_or(0) >= 5
        })
        .await;
    let pid = daemon.id().expect("the daemon is running") as i32;
    // SAFETY: kill(2) with a valid pid and signal number has no memory-safety preconditions.
    assert_eq!(unsafe { libc::kill(pid, libc::SIGTERM) }, 0);
    let status = tokio::time::timeout(Duration::from_secs(20), daemon.wait())
        .await
        .expect("the daemon exits within 20 s of SIGTERM")
        .unwrap();
    assert!(status.success(), "{status:?}: {}", bench.log("daemon.log"));
    assert!(
        !bench.server.bench().rf_output_on(),
        "RF left on after SIGTERM"
    );
    let store = Store::open(bench.database().to_str().unwrap())
        .await
        .unwrap();
    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.state, RunState::Interrupted);
    let cause = run.cause.unwrap_or_default();
    assert!(cause.contains("shut down"), "{cause}");
    assert!(store.points_of_run(run_id).await.unwrap().len() >= 5);
}
