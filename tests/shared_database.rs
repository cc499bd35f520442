//! Two labs on one PostgreSQL database: two real `halfwave serve` processes, each with its own
//! simulated bench, share a database (a fresh one on the server `HALFWAVE_TEST_POSTGRES_URL`
//! names; run through `.ci/with-postgres`).
//! - both run a calibration, and each daemon's API lists both labs' runs;
//! - a run submitted to one daemon for the other's bench is refused, naming the holder;
//! - a third daemon configuring a held bench exits non-zero naming the holder (host, pid);
//! - the holder killed with SIGKILL mid-run keeps its lease until it expires (15 s here), then a
//!   newcomer takes the bench over, and its start-up interlock marks the killed daemon's running
//!   run interrupted.
//! - webhooks from two daemons on one database: a receiver both are configured with gets each
//!   event once, and a receiver only lab A has (down at first) is left to lab A (lab B neither
//!   sends nor fails its pending row), which delivers it once the receiver is up.

mod daemon_support;
mod engine_support;
mod webhook_support;

use daemon_support::{known_port, record_listening_port};
use halfwave::store::scratch_db::ScratchDatabase;
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::sync::atomic::AtomicU16;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, BufReader};
use tokio::process::{Child, Command};
use webhook_support::Receiver;

/// The lease expiry the daemons are given: short, so the takeover is seen within the test, yet
/// long enough that a daemon started right after the holder's kill is surely refused while the
/// lease lives. The holder renews every third of it, so as little as two thirds (10 s) may be
/// left at the kill; the refused daemon must start, connect and be refused within that, which
/// can take seconds on a loaded machine (with 2 s, only 1.33 s were sure).
const LEASE_EXPIRY_S: f64 = 15.0;

struct Lab {
    config: PathBuf,
    /// 0 until the daemon has listened (see [`record_listening_port`]).
    port: AtomicU16,
    log: PathBuf,
}

/// Writes a daemon configuration with one simulated bench named `bench` on the shared database.
fn lab(dir: &Path, name: &str, bench: &str, database_url: &str, time_factor: f64) -> Lab {
    let config = dir.join(format!("{name}.toml"));
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:0\"\ndata_dir = \"{}\"\ndatabase_url = \"{database_url}\"\n\
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
        port: AtomicU16::new(0),
        log: dir.join(format!("{name}.log")),
    }
}

impl Lab {
    /// The daemon's HTTP port (known once it has been served).
    fn port(&self) -> u16 {
        known_port(&self.port)
    }

    fn url(&self, path: &str) -> String {
        format!("http://127.0.0.1:{}{path}", self.port())
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
        record_listening_port(&self.port, &self.config, &first);
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

/// An operator token made through `lab`'s configuration (tokens are global on a shared database).
async fn operator_token(lab: &Lab, name: &str) -> String {
    daemon_support::cli_succeeds(&[
        "token",
        "create",
        "--role",
        "operator",
        "--name",
        name,
        "--config",
        lab.config.to_str().unwrap(),
    ])
    .await
}

/// Submits a one-frequency calibration of `serial` on `bench` to `lab`, waits for it to complete
/// and returns its id.
async fn calibrate(
    client: &reqwest::Client,
    lab: &Lab,
    token: &str,
    bench: &str,
    serial: &str,
) -> i64 {
    let (status, body) = submit(client, lab, token, &plan(bench, serial, &[1.5e9])).await;
    assert_eq!(status, 201, "{body}");
    let id = body["run_id"].as_i64().unwrap();
    wait_for(client, lab, token, id, |r| r["state"] == "completed").await;
    id
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
    let token = operator_token(&a, "two-labs").await;

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
    assert!(text.contains(&format!("127.0.0.1:{}", b.port())), "{text}");

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
        body.to_string()
            .contains(&format!("127.0.0.1:{}", c.port())),
        "{body}"
    );
}

/// The JSON bodies `receiver` got once at least `count` requests have come (within 60 s) and
/// `settle` more has passed (so that a duplicate would be seen).
async fn bodies(receiver: &Receiver, count: usize, settle: Duration) -> Vec<Value> {
    receiver.wait_for(count, Duration::from_secs(60)).await;
    tokio::time::sleep(settle).await;
    receiver
        .received()
        .iter()
        .map(|r| serde_json::from_str(&r.body).unwrap_or(Value::Null))
        .collect()
}

/// Appends a `[[webhook]]` for run events to a lab's configuration (one retry a second).
fn add_webhook(lab: &Lab, dir: &Path, url: &str) {
    let secret = dir.join("webhook.secret");
    std::fs::write(&secret, "shared-webhook-secret-of-the-two-labs-0123\n").unwrap();
    let mut config = std::fs::read_to_string(&lab.config).unwrap();
    config.push_str(&format!(
        "\n[[webhook]]\nurl = \"{url}\"\nsecret_file = \"{}\"\n\
         events = [\"run.completed\"]\nfirst_retry_s = 1.0\nmax_retry_s = 1.0\nmax_attempts = 60\n",
        secret.display()
    ));
    std::fs::write(&lab.config, config).unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn webhooks_of_two_daemons_on_one_database_are_each_sent_once_by_their_own_daemon() {
    let database = ScratchDatabase::create("two_labs_webhooks").await;
    let dir = tempfile::tempdir().unwrap();
    let client = reqwest::Client::new();
    let a = lab(dir.path(), "lab-a", "north-bench", database.url(), 0.0);
    let b = lab(dir.path(), "lab-b", "south-bench", database.url(), 0.0);
    let both = Receiver::start(0);
    let both_url = both.url("/both");
    let a_only_port = webhook_support::reserved_port();
    let a_only_url = format!("http://127.0.0.1:{}/lab-a", a_only_port.port);
    add_webhook(&a, dir.path(), &both_url);
    add_webhook(&a, dir.path(), &a_only_url);
    add_webhook(&b, dir.path(), &both_url);

    let token = operator_token(&a, "two-labs-webhooks").await;
    let _daemon_a = a.serve().await;
    let _daemon_b = b.serve().await;

    // Lab A calibrates while its own receiver is down: that delivery stays pending, retried.
    let run_a = calibrate(&client, &a, &token, "north-bench", "EG-PM-0101").await;
    bodies(&both, 1, Duration::ZERO).await;

    // Lab B calibrates: its sender passes over the outbox while lab A's row is pending.
    let run_b = calibrate(&client, &b, &token, "south-bench", "EG-PM-0202").await;

    // The receiver both daemons have gets each run once (no event sent by both daemons).
    let got = bodies(&both, 2, Duration::from_secs(2)).await;
    let mut runs: Vec<i64> = got.iter().map(|b| b["run_id"].as_i64().unwrap()).collect();
    runs.sort_unstable();
    assert_eq!(runs, vec![run_a, run_b], "{got:?}");

    // Lab A's own receiver comes up: lab A delivers its row (lab B left it alone).
    let store = halfwave::store::Store::open(database.url()).await.unwrap();
    let counts = store.webhook_delivery_counts().await.unwrap();
    assert_eq!(
        counts.failed, 0,
        "lab B failed a row it has no receiver for"
    );
    assert_eq!(counts.pending, 1, "{counts:?}");
    let a_only = Receiver::start_reserved(a_only_port, 0);
    let got = bodies(&a_only, 1, Duration::from_secs(2)).await;
    assert_eq!(got.len(), 1, "{got:?}");
    assert_eq!(got[0]["run_id"].as_i64(), Some(run_a), "{got:?}");
    assert_eq!(got[0]["event_type"], "run.completed");
    let counts = store.webhook_delivery_counts().await.unwrap();
    assert_eq!((counts.delivered, counts.pending, counts.failed), (3, 0, 0));
    store.close().await;
}
