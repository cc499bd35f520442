//! Two labs on one PostgreSQL database: two real `halfwave serve` processes, each with its own
//! simulated bench, share a database (a fresh one on the server `HALFWAVE_TEST_POSTGRES_URL`
//! names; run through `.ci/with-postgres`).
//! - both run a calibration, and each daemon's API lists both labs' runs;
//! - a run submitted to one daemon for the other's bench is refused, naming the holder;
//! - a third daemon configuring a held bench exits non-zero naming the holder (host, pid);
//! - the holder killed with SIGKILL mid-run keeps its lease until it expires (2 s here), then a
//!   newcomer takes the bench over, and its start-up interlock marks the killed daemon's running
//!   run interrupted.

mod daemon_support;
mod engine_support;

use daemon_support::free_port;
use halfwave::store::scratch_db::ScratchDatabase;
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, BufReader};
use tokio::process::{Child, Command};

/// The lease expiry the daemons are given: short, so the takeover is seen within the test.
const LEASE_EXPIRY_S: f64 = 2.0;

struct Lab {
    config: PathBuf,
    port: u16,
    log: PathBuf,
}

/// Writes a daemon configuration with one simulated bench named `bench` on the shared database.
fn lab(dir: &Path, name: &str, bench: &str, database_url: &str, time_factor: f64) -> Lab {
    let port = free_port();
    let config = dir.join(format!("{name}.toml"));
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:{port}\"\ndata_dir = \"{}\"\ndatabase_url = \"{database_url}\"\n\
             bench_lease_expiry_s = {LEASE_EXPIRY_S}\n\n\
             [[bench]]\nname = \"{bench}\"\nsource = {{ kind = \"simulated\" }}\n\
             analyzer = {{ kind = \"simulated\" }}\n\
             simulation = {{ seed = 7, time_factor = {time_factor} }}\n",
            dir.join(format!("{name}-data")).display()
        ),
    )
    .unwrap();
    Lab {
        config,
        port,
        log: dir.join(format!("{name}.log")),
    }
}

impl Lab {
    fn url(&self, path: &str) -> String {
        format!("http://127.0.0.1:{}{path}", self.port)
    }

    fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// Starts `halfwave serve` and waits for it to listen.
    async fn serve(&self) -> Child {
        let log = std::fs::File::create(&self.log).unwrap();
        let mut child = Command::new(env!("CARGO_BIN_EXE_halfwave"))
            .args(["serve", "--config"])
            .arg(&self.config)
            .stdout(Stdio::piped())
            .stderr(Stdio::from(log))
            .kill_on_drop(true)
            .spawn()
            .unwrap();
        let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
        let first = tokio::time::timeout(Duration::from_secs(60), lines.next_line())
            .await
            .expect("the daemon started within 60 s")
            .unwrap()
            .unwrap_or_default();
        assert!(first.contains("listening"), "{first}: {}", self.log());
        tokio::spawn(async move { while let Ok(Some(_)) = lines.next_line().await {} });
        child
    }

    /// Runs `halfwave serve` expecting it to refuse to start; returns its stderr.
    async fn serve_refused(&self) -> String {
        let out = tokio::time::timeout(
            Duration::from_secs(60),
            Command::new(env!("CARGO_BIN_EXE_halfwave"))
                .args(["serve", "--config"])
                .arg(&self.config)
                .output(),
        )
        .await
        .expect("a refused daemon exits within 60 s")
        .unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
        assert!(
            !out.status.success(),
            "the daemon started on a held bench: {stderr}"
        );
        stderr
    }
}

fn plan(bench: &str, serial: &str, frequencies_hz: &[f64]) -> Value {
    json!({
        "device": {"serial": serial, "model": "simulated phase modulator",
                   "rf_input_limit_dbm": 27.0, "wavelength_nm": 1550.0},
        "bench": bench,
        "chain": {"kind": "flat_loss", "loss_db": 2.0},
        "frequencies": {"kind": "list", "values_hz": frequencies_hz},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 20.0, "step_db": 2.5},
        "settle_s": 0.0
    })
}

async fn submit(client: &reqwest::Client, lab: &Lab, token: &str, plan: &Value) -> (u16, Value) {
    let response = client
        .post(lab.url("/api/v1/runs"))
        .bearer_auth(token)
        .json(plan)
        .send()
        .await
        .unwrap();
    let status = response.status().as_u16();
    (status, response.json().await.unwrap_or(Value::Null))
}

async fn run(client: &reqwest::Client, lab: &Lab, token: &str, id: i64) -> Value {
    client
        .get(lab.url(&format!("/api/v1/runs/{id}")))
        .bearer_auth(token)
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap()
}

async fn wait_for(
    client: &reqwest::Client,
    lab: &Lab,
    token: &str,
    id: i64,
    done: impl Fn(&Value) -> bool,
) -> Value {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(120);
    loop {
        let run = run(client, lab, token, id).await;
        if done(&run) {
            return run;
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "run {id} did not reach the expected state: {run}\n{}",
            lab.log()
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn listed_benches(client: &reqwest::Client, lab: &Lab, token: &str) -> Vec<String> {
    let list: Value = client
        .get(lab.url("/api/v1/runs"))
        .bearer_auth(token)
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    let mut benches: Vec<String> = list["runs"]
        .as_array()
        .unwrap_or_else(|| panic!("a run list: {list}"))
        .iter()
        .map(|r| r["bench"].as_str().unwrap_or_default().to_string())
        .collect();
    benches.sort();
    benches
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_labs_share_one_postgres_database_with_bench_leases() {
    let database = ScratchDatabase::create("two_labs").await;
    let dir = tempfile::tempdir().unwrap();
    let client = reqwest::Client::new();
    // Lab A's simulated instruments take a fifth of their real time, so a run is still going
    // when its daemon is killed; lab B's take none.
    let a = lab(dir.path(), "lab-a", "north-bench", database.url(), 0.2);
    let b = lab(dir.path(), "lab-b", "south-bench", database.url(), 0.0);

    // Tokens are global: one made through lab A's configuration works on both daemons.
    let token = daemon_support::cli_succeeds(&[
        "token",
        "create",
        "--role",
        "operator",
        "--name",
        "two-labs",
        "--config",
        a.config.to_str().unwrap(),
    ])
    .await;

    let mut daemon_a = a.serve().await;
    let _daemon_b = b.serve().await;
    let a_pid = daemon_a.id().expect("lab A's daemon runs");

    // Both labs calibrate, each on its own bench.
    let (status, body) = submit(
        &client,
        &a,
        &token,
        &plan("north-bench", "EG-PM-0101", &[1.5e9]),
    )
    .await;
    assert_eq!(status, 201, "{body}");
    let run_a = body["run_id"].as_i64().unwrap();
    let (status, body) = submit(
        &client,
        &b,
        &token,
        &plan("south-bench", "EG-PM-0202", &[1.5e9]),
    )
    .await;
    assert_eq!(status, 201, "{body}");
    let run_b = body["run_id"].as_i64().unwrap();
    wait_for(&client, &a, &token, run_a, |r| r["state"] == "completed").await;
    wait_for(&client, &b, &token, run_b, |r| r["state"] == "completed").await;

    // Either daemon's API serves both labs' history.
    for lab in [&a, &b] {
        assert_eq!(
            listed_benches(&client, lab, &token).await,
            vec!["north-bench".to_string(), "south-bench".to_string()]
        );
        let other = run(&client, lab, &token, run_b).await;
        assert_eq!(other["state"], "completed", "{other}");
    }

    // A run for lab B's bench submitted to lab A is refused, naming the daemon that drives it.
    let (status, body) = submit(
        &client,
        &a,
        &token,
        &plan("south-bench", "EG-PM-0202", &[1.5e9]),
    )
    .await;
    assert_eq!(status, 422, "{body}");
    let text = body.to_string();
    assert!(text.contains("driven by another daemon"), "{text}");
    assert!(text.contains(&format!("127.0.0.1:{}", b.port)), "{text}");

    // A third daemon configuring lab A's bench is refused while lab A's daemon lives.
    let c = lab(dir.path(), "lab-c", "north-bench", database.url(), 0.0);
    let refused = c.serve_refused().await;
    assert!(refused.contains("\"north-bench\" is held by"), "{refused}");
    assert!(
        refused.contains(&format!("pid {a_pid} on host ")),
        "{refused}"
    );

    // Lab A starts a long run and is killed mid-run: no clean shutdown, the lease stays.
    let frequencies: Vec<f64> = engine_support::FREQUENCIES_HZ.to_vec();
    let (status, body) = submit(
        &client,
        &a,
        &token,
        &plan("north-bench", "EG-PM-0101", &frequencies),
    )
    .await;
    assert_eq!(status, 201, "{body}");
    let long_run = body["run_id"].as_i64().unwrap();
    wait_for(&client, &a, &token, long_run, |r| {
        r["state"] == "running" && r["measured_points"].as_u64().unwrap_or(0) >= 2
    })
    .await;
    daemon_a.kill().await.unwrap();
    daemon_a.wait().await.unwrap();
    let still_held = c.serve_refused().await;
    assert!(
        still_held.contains(&format!("pid {a_pid} on host ")),
        "{still_held}"
    );
    let stranded = run(&client, &b, &token, long_run).await;
    assert_eq!(stranded["state"], "running", "{stranded}");

    // Once the lease has expired, the newcomer takes the bench over; its start-up interlock
    // marks the dead daemon's run interrupted (its points kept, resumable on the new holder).
    tokio::time::sleep(Duration::from_secs_f64(LEASE_EXPIRY_S + 0.5)).await;
    let _daemon_c = c.serve().await;
    let interrupted = run(&client, &c, &token, long_run).await;
    assert_eq!(interrupted["state"], "interrupted", "{interrupted}");
    assert!(
        interrupted["measured_points"].as_u64().unwrap_or(0) >= 2,
        "{interrupted}"
    );
    assert!(c.log().contains("taken over"), "{}", c.log());
    // Lab B's daemon now names the new holder for the bench.
    let (status, body) = submit(
        &client,
        &b,
        &token,
        &plan("north-bench", "EG-PM-0101", &[1.5e9]),
    )
    .await;
    assert_eq!(status, 422, "{body}");
    assert!(
        body.to_string().contains(&format!("127.0.0.1:{}", c.port)),
        "{body}"
    );
}
