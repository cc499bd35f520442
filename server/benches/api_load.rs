//! The read API under load, with a run in progress: requests per second, latency percentiles and
//! errors, and whether the run's point timing changes while the API is busy.
//!
//! What it does, in order:
//! 1. Fills a fresh data directory through the store's own API (`tests/api_support/seed.rs`):
//!    25 devices with 20 completed calibrations each, 20 frequencies x 10 levels per calibration,
//!    so 100,000 stored points, each with a compressed 1,001-point comb trace, its line table and
//!    the analysis document the engine would store. Creates a viewer and an operator token.
//! 2. Starts the real daemon (`halfwave serve`, the binary Cargo builds beside this benchmark) in
//!    its own process, on a simulated bench whose instrument times are scaled so that one point
//!    takes about 0.1 s, and submits a 600-point run that outlasts the measurement.
//! 3. Quiet phase (only the run), load phase, quiet phase again. During the load phase a
//!    generator in this process (its own tokio runtime, hyper HTTP/1.1 client, one keep-alive
//!    connection per task) sends a fixed mix of read requests with a viewer token as fast as the
//!    daemon answers: the run list, one run, a page of a run's points, a device's calibration
//!    history, V_pi at a frequency, health and metrics.
//! 4. Reads the run's points back and compares the time between consecutive points of one
//!    frequency (the level steps) in the quiet phases and in the load phase.
//!
//! The daemon runs in a separate process so that the generator does not share its runtime or
//! its scheduler; both still share the machine's cores, as a client on the bench PC would.
//!
//! Run: `cargo bench -p halfwave-server --bench api_load`
//! With `HALFWAVE_BENCH_POSTGRES_URL=postgres://USER@HOST/DB` (a server where USER may create
//! databases) the store is a scratch PostgreSQL database instead of the SQLite file (seeded the
//! same way, dropped afterwards), and the daemon is configured with its `database_url`.
//! Environment (optional): `HALFWAVE_LOAD_CONNECTIONS` (default 16), `HALFWAVE_LOAD_SECONDS`
//! (default 20), `HALFWAVE_QUIET_SECONDS` (each quiet phase, default 10),
//! `HALFWAVE_LOAD_ROUTE_SECONDS` (each endpoint alone afterwards, for its CPU cost; default 3, 0
//! skips).

// libc::sysconf for the kernel clock tick, to turn /proc CPU times into seconds.
#![allow(unsafe_code)]

#[path = "../../tests/api_support/seed.rs"]
#[allow(dead_code)]
mod seed;

use halfwave::api::tokens::{self, Role};
use halfwave::store::scratch_db::ScratchDatabase;
use halfwave::store::{now_unix_ms, Store};
use http_body_util::{BodyExt, Empty};
use hyper::body::Bytes;
use hyper::client::conn::http1;
use hyper::Request;
use hyper_util::rt::TokioIo;
use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

const DEVICES: usize = 25;
const RUNS_PER_DEVICE: usize = 20;
const FREQUENCIES_GHZ: usize = 20;
const LEVELS: usize = 10;
const TRACE_POINTS: usize = 1_001;
const SERIAL_PREFIX: &str = "LD-PM-";
/// Scales the simulated instruments' settling and sweep times (0.4 s sweep -> 0.1 s).
const TIME_FACTOR: f64 = 0.25;

fn env_number(name: &str, default: u64) -> u64 {
    match std::env::var(name) {
        Ok(text) => text
            .parse()
            .unwrap_or_else(|_| panic!("{name}={text:?} is not a whole number")),
        Err(_) => default,
    }
}

/// CPU time (user + system, all threads) a process has used so far, seconds, from
/// `/proc/<pid>/stat` (fields 14 and 15, in clock ticks; proc(5)).
fn cpu_seconds(pid: u32) -> Option<f64> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    // The command name (field 2) is in parentheses and may contain spaces: count after it.
    let rest = stat.get(stat.rfind(')')? + 2..)?;
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let ticks: f64 = fields.get(11)?.parse::<f64>().ok()? + fields.get(12)?.parse::<f64>().ok()?;
    // SAFETY: sysconf only reads a configuration value.
    let per_second = unsafe { libc::sysconf(libc::_SC_CLK_TCK) } as f64;
    (per_second > 0.0).then(|| ticks / per_second)
}

/// CPU seconds a process has used since an earlier [`cpu_seconds`] reading.
fn cpu_since(pid: u32, before: Option<f64>) -> Option<f64> {
    cpu_seconds(pid)
        .zip(before)
        .map(|(after, before)| after - before)
}

/// The first field of /proc/loadavg: runnable processes averaged over the last minute.
fn load_average() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .ok()
        .and_then(|l| l.split_whitespace().next().map(str::to_string))
        .unwrap_or_else(|| "?".to_string())
}

/// An invented V_pi curve for device `d` (plumbing data; see the seed module).
fn v_pi_of(d: usize) -> impl Fn(f64) -> f64 {
    let base = 3.0 + 0.05 * d as f64;
    move |f: f64| base * (1.0 + 0.12 * (f / 1e9).sqrt())
}

/// Step 1: the stored data. Returns the number of points stored and a viewer's and an operator's
/// token.
async fn seed_store(path: &str) -> (usize, String, String) {
    let store = Store::open(path)
        .await
        .expect("open the benchmark database");
    let frequencies: Vec<f64> = (1..=FREQUENCIES_GHZ).map(|g| g as f64 * 1e9).collect();
    let levels: Vec<f64> = (0..LEVELS).map(|l| l as f64 * 2.0).collect();
    let started = Instant::now();
    let mut points = 0;
    for d in 0..DEVICES {
        let (device_id, chain_id) =
            seed::seed_device(&store, &format!("{SERIAL_PREFIX}{:04}", d + 1)).await;
        // Two calibrations at a time: the synthetic traces and their analysis use both cores
        // while the other one commits.
        for _ in 0..RUNS_PER_DEVICE / 2 {
            let calibration = || {
                seed::seed_completed_run(
                    &store,
                    device_id,
                    chain_id,
                    &frequencies,
                    &levels,
                    v_pi_of(d),
                    TRACE_POINTS,
                )
            };
            let (a, b) = tokio::join!(calibration(), calibration());
            points += a.point_ids.len() + b.point_ids.len();
        }
        eprintln!(
            "seeded device {}/{DEVICES}: {points} points in {:.1} s",
            d + 1,
            started.elapsed().as_secs_f64()
        );
    }
    let viewer = tokens::create(store.pool(), "load-viewer", Role::Viewer, "bench")
        .await
        .expect("viewer token")
        .token;
    let operator = tokens::create(store.pool(), "load-operator", Role::Operator, "bench")
        .await
        .expect("operator token")
        .token;
    store.close().await;
    (points, viewer, operator)
}

/// The daemon process; killed if the benchmark stops early.
struct Daemon {
    child: Child,
}

impl Drop for Daemon {
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// Step 2: the real daemon on a simulated bench, on the PostgreSQL database at `database_url`
/// when given (else the SQLite file in its data directory). Returns it with its address.
fn start_daemon(dir: &std::path::Path, database_url: Option<&str>) -> (Daemon, String) {
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("a free loopback port")
        .port();
    let config = dir.join("halfwave.toml");
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:{port}\"\ndata_dir = \"{}\"\n{}\n[limits]\nmax_level_at_modulator_dbm = 24.0\n\n\
             [[bench]]\nname = \"sim-bench\"\nsource = {{ kind = \"simulated\" }}\nanalyzer = {{ kind = \"simulated\" }}\n\
             [bench.simulation]\nseed = 5\ntime_factor = {TIME_FACTOR}\n",
            dir.join("data").display(),
            database_url
                .map(|url| format!("database_url = \"{url}\"\n"))
                .unwrap_or_default()
        ),
    )
    .expect("write the daemon configuration");
    let log = std::fs::File::create(dir.join("daemon.log")).expect("daemon log file");
    let mut child = Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args(["serve", "--config"])
        .arg(&config)
        .stdout(Stdio::piped())
        .stderr(log)
        .spawn()
        .expect("start `halfwave serve`");
    let stdout = child.stdout.take().expect("daemon stdout");
    let mut lines = BufReader::new(stdout).lines();
    let first = lines.next().and_then(Result::ok).unwrap_or_else(|| {
        panic!(
            "the daemon did not start; see {}",
            dir.join("daemon.log").display()
        )
    });
    assert!(first.contains("listening"), "daemon said {first:?}");
    // Keep draining stdout so the daemon never blocks on a full pipe.
    std::thread::spawn(move || for _ in lines {});
    (Daemon { child }, format!("127.0.0.1:{port}"))
}

/// One keep-alive HTTP/1.1 connection.
struct Connection {
    sender: http1::SendRequest<Empty<Bytes>>,
    address: String,
}

impl Connection {
    async fn open(address: &str) -> Connection {
        let stream = tokio::net::TcpStream::connect(address)
            .await
            .expect("connect to the daemon");
        stream.set_nodelay(true).expect("TCP_NODELAY");
        let (sender, connection) = http1::handshake(TokioIo::new(stream))
            .await
            .expect("HTTP/1.1 handshake");
        tokio::spawn(connection);
        Connection {
            sender,
            address: address.to_string(),
        }
    }

    /// Sends one request; returns the status and the body.
    async fn send(
        &mut self,
        method: &str,
        path: &str,
        token: &str,
    ) -> Result<(u16, Bytes), String> {
        self.sender.ready().await.map_err(|e| e.to_string())?;
        let request = Request::builder()
            .method(method)
            .uri(path)
            .header("host", &self.address)
            .header("authorization", format!("Bearer {token}"))
            .body(Empty::<Bytes>::new())
            .map_err(|e| e.to_string())?;
        let response = self
            .sender
            .send_request(request)
            .await
            .map_err(|e| e.to_string())?;
        let status = response.status().as_u16();
        let body = response
            .into_body()
            .collect()
            .await
            .map_err(|e| e.to_string())?
            .to_bytes();
        Ok((status, body))
    }
}

/// One kind of request in the mix.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
enum Endpoint {
    RunList,
    OneRun,
    PointsPage,
    DeviceHistory,
    VpiAt,
    Health,
    Metrics,
}

impl Endpoint {
    /// The mix: what a dashboard polling the run list, the live run and a device, plus scripts
    /// asking for V_pi, would send (weights out of 100).
    const MIX: [(Endpoint, u32); 7] = [
        (Endpoint::RunList, 15),
        (Endpoint::OneRun, 20),
        (Endpoint::PointsPage, 10),
        (Endpoint::DeviceHistory, 15),
        (Endpoint::VpiAt, 25),
        (Endpoint::Health, 10),
        (Endpoint::Metrics, 5),
    ];

    fn pick(roll: u32) -> Endpoint {
        let mut left = roll % 100;
        for (endpoint, weight) in Endpoint::MIX {
            if left < weight {
                return endpoint;
            }
            left -= weight;
        }
        Endpoint::Health
    }

    fn path(self, rng: &mut u64, seeded_runs: i64, live_run: i64) -> String {
        let mut next = |n: u64| {
            *rng ^= *rng << 13;
            *rng ^= *rng >> 7;
            *rng ^= *rng << 17;
            *rng % n
        };
        let serial = format!("{SERIAL_PREFIX}{:04}", next(DEVICES as u64) + 1);
        let run = 1 + next(seeded_runs as u64) as i64;
        match self {
            Endpoint::RunList => match next(3) {
                0 => format!("/api/v1/runs?device={serial}&per_page=20"),
                1 => "/api/v1/runs?state=running".to_string(),
                _ => "/api/v1/runs?per_page=50".to_string(),
            },
            Endpoint::OneRun => {
                let id = if next(2) == 0 { live_run } else { run };
                format!("/api/v1/runs/{id}")
            }
            Endpoint::PointsPage => {
                let page = 1 + next(4);
                format!("/api/v1/runs/{run}/points?page={page}&per_page=50")
            }
            Endpoint::DeviceHistory => format!("/api/v1/devices/{serial}/calibrations"),
            Endpoint::VpiAt => {
                let mhz = 1_000 + next(19_000);
                format!("/api/v1/devices/{serial}/v-pi?frequency_hz={mhz}e6")
            }
            Endpoint::Health => "/api/v1/health".to_string(),
            Endpoint::Metrics => "/api/v1/metrics".to_string(),
        }
    }
}

/// Where and how hard a load phase drives the daemon.
struct Load<'a> {
    address: &'a str,
    token: &'a Arc<str>,
    connections: usize,
    seconds: u64,
    seeded_runs: i64,
    live_run: i64,
}

/// Drives the daemon from `load.connections` keep-alive connections for `load.seconds`, with the
/// mix or only one endpoint.
fn load_phase(
    runtime: &tokio::runtime::Runtime,
    load: &Load<'_>,
    only: Option<Endpoint>,
) -> Vec<Tally> {
    let stop = Arc::new(AtomicBool::new(false));
    runtime.block_on(async {
        let tasks: Vec<_> = (0..load.connections)
            .map(|i| {
                tokio::spawn(generate(
                    load.address.to_string(),
                    load.token.clone(),
                    0x9E37_79B9_7F4A_7C15 ^ (i as u64 + 1).wrapping_mul(0xBF58_476D_1CE4_E5B9),
                    load.seeded_runs,
                    load.live_run,
                    stop.clone(),
                    only,
                ))
            })
            .collect();
        tokio::time::sleep(Duration::from_secs(load.seconds)).await;
        stop.store(true, Ordering::Relaxed);
        let mut tallies = Vec::new();
        for task in tasks {
            tallies.push(task.await.expect("generator task"));
        }
        tallies
    })
}

/// What one generator task saw.
#[derive(Default)]
struct Tally {
    /// Latency of every answered request, microseconds, by endpoint.
    latencies_us: BTreeMap<Endpoint, Vec<u32>>,
    errors: BTreeMap<String, u64>,
}

async fn generate(
    address: String,
    token: Arc<str>,
    seed: u64,
    seeded_runs: i64,
    live_run: i64,
    stop: Arc<AtomicBool>,
    only: Option<Endpoint>,
) -> Tally {
    let mut tally = Tally::default();
    let mut connection = Connection::open(&address).await;
    let mut rng = seed | 1;
    let mut roll: u32 = (seed as u32).wrapping_mul(2_654_435_761);
    while !stop.load(Ordering::Relaxed) {
        roll = roll.wrapping_mul(1_103_515_245).wrapping_add(12_345);
        let endpoint = only.unwrap_or_else(|| Endpoint::pick(roll >> 8));
        let path = endpoint.path(&mut rng, seeded_runs, live_run);
        let started = Instant::now();
        match connection.send("GET", &path, &token).await {
            Ok((200, _)) => {
                let us = u32::try_from(started.elapsed().as_micros()).unwrap_or(u32::MAX);
                tally.latencies_us.entry(endpoint).or_default().push(us);
            }
            Ok((status, body)) => {
                let key = format!("{endpoint:?} {status}: {}", String::from_utf8_lossy(&body));
                *tally.errors.entry(key).or_default() += 1;
            }
            Err(e) => {
                *tally
                    .errors
                    .entry(format!("{endpoint:?}: {e}"))
                    .or_default() += 1;
                connection = Connection::open(&address).await;
            }
        }
    }
    tally
}

fn percentile(sorted: &[u32], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let rank = ((p / 100.0) * sorted.len() as f64).ceil() as usize;
    f64::from(sorted[rank.clamp(1, sorted.len()) - 1]) / 1000.0
}

fn median(values: &mut [f64]) -> f64 {
    if values.is_empty() {
        return f64::NAN;
    }
    values.sort_by(f64::total_cmp);
    let n = values.len();
    if n % 2 == 1 {
        values[n / 2]
    } else {
        0.5 * (values[n / 2 - 1] + values[n / 2])
    }
}

/// The plan of the live run: 60 frequencies x 10 levels, long enough to outlast the measurement.
fn live_plan() -> serde_json::Value {
    let frequencies: Vec<f64> = (0..60).map(|k| 1e9 + k as f64 * 0.25e9).collect();
    serde_json::json!({
        "device": {"serial": "LD-PM-LIVE", "model": "simulated phase modulator", "rf_input_limit_dbm": 27.0},
        "bench": "sim-bench",
        "chain": {"kind": "flat_loss", "loss_db": 1.5},
        "frequencies": {"kind": "list", "values_hz": frequencies},
        "levels": {"kind": "ramp", "start_dbm": 2.0, "stop_dbm": 20.0, "step_db": 2.0},
        "settle_s": 0.0
    })
}

async fn json_request(
    address: &str,
    method: &str,
    path: &str,
    token: &str,
    body: Option<&serde_json::Value>,
) -> serde_json::Value {
    // One client for the benchmark's own requests, so polls reuse their connection.
    static CLIENT: std::sync::OnceLock<reqwest::Client> = std::sync::OnceLock::new();
    let client = CLIENT.get_or_init(reqwest::Client::new);
    let url = format!("http://{address}{path}");
    let request = match method {
        "POST" => client.post(url),
        _ => client.get(url),
    }
    .bearer_auth(token);
    let request = match body {
        Some(body) => request.json(body),
        None => request,
    };
    let response = request.send().await.expect("daemon answers");
    let status = response.status();
    let text = response.text().await.expect("response body");
    assert!(status.is_success(), "{method} {path}: {status} {text}");
    if text.is_empty() {
        serde_json::Value::Null
    } else {
        serde_json::from_str(&text).expect("JSON answer")
    }
}

/// Times between consecutive levels of one frequency whose later point falls in `[from, to)`.
fn level_steps_ms(points: &[serde_json::Value], from: i64, to: i64) -> Vec<f64> {
    let key = |p: &serde_json::Value| {
        (
            p["frequency_index"].as_i64().unwrap_or(-1),
            p["level_index"].as_i64().unwrap_or(-1),
            p["measured_at_unix_ms"].as_i64().unwrap_or(0),
        )
    };
    let mut rows: Vec<(i64, i64, i64)> = points.iter().map(key).collect();
    rows.sort_unstable();
    rows.windows(2)
        .filter(|w| w[0].0 == w[1].0 && w[1].1 == w[0].1 + 1)
        .filter(|w| w[1].2 >= from && w[1].2 < to)
        .map(|w| (w[1].2 - w[0].2) as f64)
        .collect()
}

fn main() {
    let connections = env_number("HALFWAVE_LOAD_CONNECTIONS", 16) as usize;
    let load_s = env_number("HALFWAVE_LOAD_SECONDS", 20);
    let quiet_s = env_number("HALFWAVE_QUIET_SECONDS", 10);
    let dir = tempfile::tempdir().expect("temporary directory");
    std::fs::create_dir_all(dir.path().join("data")).expect("data directory");
    let db_path = dir.path().join("data").join("halfwave.db");

    // The generator's runtime: two workers, separate from the daemon's process.
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("tokio runtime");

    let postgres = std::env::var("HALFWAVE_BENCH_POSTGRES_URL")
        .ok()
        .map(|url| {
            runtime
                .block_on(ScratchDatabase::create_on(&url, "bench_api_load"))
                .expect("a scratch database on HALFWAVE_BENCH_POSTGRES_URL")
        });
    let store_at = match &postgres {
        Some(database) => database.url().to_string(),
        None => db_path.to_str().expect("UTF-8 path").to_string(),
    };
    let (stored_points, viewer, operator) = runtime.block_on(seed_store(&store_at));
    let seeded_runs = (DEVICES * RUNS_PER_DEVICE) as i64;
    println!(
        "stored points: {stored_points} in {seeded_runs} completed runs, on {}",
        if postgres.is_some() {
            "PostgreSQL"
        } else {
            "SQLite"
        }
    );

    let (daemon, address) = start_daemon(dir.path(), postgres.as_ref().map(|d| d.url()));
    let live_run = runtime.block_on(async {
        let submitted = json_request(
            &address,
            "POST",
            "/api/v1/runs",
            &operator,
            Some(&live_plan()),
        )
        .await;
        let run_id = submitted["run_id"]
            .as_i64()
            .unwrap_or_else(|| panic!("no run id in {submitted}"));
        // Wait until it is measuring points.
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            let run = json_request(
                &address,
                "GET",
                &format!("/api/v1/runs/{run_id}"),
                &viewer,
                None,
            )
            .await;
            if run["measured_points"].as_u64().unwrap_or(0) >= 3 {
                break;
            }
            assert!(
                Instant::now() < deadline,
                "the live run did not start: {run}"
            );
            tokio::time::sleep(Duration::from_millis(200)).await;
        }
        run_id
    });
    let daemon_pid = daemon.child.id();
    println!(
        "live run {live_run} measuring (time factor {TIME_FACTOR}); daemon pid {daemon_pid} (for a profiler)"
    );

    let quiet_before = (now_unix_ms(), {
        std::thread::sleep(Duration::from_secs(quiet_s));
        now_unix_ms()
    });

    let load_before = load_average();
    let daemon_cpu_before = cpu_seconds(daemon_pid);
    let own_cpu_before = cpu_seconds(std::process::id());
    let token: Arc<str> = Arc::from(viewer.as_str());
    let load_started_ms = now_unix_ms();
    let started = Instant::now();
    let mut load = Load {
        address: &address,
        token: &token,
        connections,
        seconds: load_s,
        seeded_runs,
        live_run,
    };
    let tallies = load_phase(&runtime, &load, None);
    let elapsed = started.elapsed().as_secs_f64();
    let load_window = (load_started_ms, now_unix_ms());
    let daemon_cpu = cpu_since(daemon_pid, daemon_cpu_before);
    let own_cpu = cpu_since(std::process::id(), own_cpu_before);
    let load_after = load_average();

    let quiet_after = (now_unix_ms(), {
        std::thread::sleep(Duration::from_secs(quiet_s));
        now_unix_ms()
    });

    // The timing windows are only meaningful if the run was measuring through all of them.
    let state_after_timing = runtime.block_on(async {
        let run = json_request(
            &address,
            "GET",
            &format!("/api/v1/runs/{live_run}"),
            &viewer,
            None,
        )
        .await;
        run["state"].as_str().unwrap_or("?").to_string()
    });

    // Each endpoint alone, briefly: what one request of each kind costs the daemon in CPU time
    // (after the point-timing windows, so the run's figures are untouched).
    let route_s = env_number("HALFWAVE_LOAD_ROUTE_SECONDS", 3);
    let mut route_costs = Vec::new();
    if route_s > 0 {
        for (endpoint, _) in Endpoint::MIX {
            let before = cpu_seconds(daemon_pid);
            let started = Instant::now();
            load.seconds = route_s;
            let tallies = load_phase(&runtime, &load, Some(endpoint));
            let seconds = started.elapsed().as_secs_f64();
            let answered: usize = tallies
                .iter()
                .flat_map(|t| t.latencies_us.values())
                .map(Vec::len)
                .sum();
            let cpu = cpu_since(daemon_pid, before);
            route_costs.push((endpoint, answered as f64 / seconds, cpu, answered));
        }
    }

    // The run's points, and then stop everything.
    let (points, run_state) = runtime.block_on(async {
        let mut points = Vec::new();
        for page in 1.. {
            let list = json_request(
                &address,
                "GET",
                &format!("/api/v1/runs/{live_run}/points?page={page}&per_page=1000"),
                &viewer,
                None,
            )
            .await;
            let batch = list["points"].as_array().cloned().unwrap_or_default();
            if batch.is_empty() {
                break;
            }
            points.extend(batch);
        }
        let run = json_request(
            &address,
            "GET",
            &format!("/api/v1/runs/{live_run}"),
            &viewer,
            None,
        )
        .await;
        let state = run["state"].as_str().unwrap_or("?").to_string();
        // A long per-endpoint phase may outlast the run; only a run still going is cancelled.
        if matches!(state.as_str(), "queued" | "running") {
            json_request(
                &address,
                "POST",
                &format!("/api/v1/runs/{live_run}/cancel"),
                &operator,
                None,
            )
            .await;
        }
        (points, state)
    });
    drop(daemon);

    // Requests.
    let mut all: Vec<u32> = Vec::new();
    let mut by_endpoint: BTreeMap<Endpoint, Vec<u32>> = BTreeMap::new();
    let mut errors: BTreeMap<String, u64> = BTreeMap::new();
    for tally in tallies {
        for (endpoint, mut latencies) in tally.latencies_us {
            all.extend_from_slice(&latencies);
            by_endpoint
                .entry(endpoint)
                .or_default()
                .append(&mut latencies);
        }
        for (kind, n) in tally.errors {
            *errors.entry(kind).or_default() += n;
        }
    }
    all.sort_unstable();
    let error_count: u64 = errors.values().sum();
    println!();
    println!(
        "load: {connections} keep-alive connections for {elapsed:.1} s against 100,000-point store, run {live_run} in progress"
    );
    println!(
        "requests/s {:.0}  answered {}  errors {error_count}  latency p50 {:.2} ms  p99 {:.2} ms  max {:.2} ms",
        all.len() as f64 / elapsed,
        all.len(),
        percentile(&all, 50.0),
        percentile(&all, 99.0),
        percentile(&all, 100.0),
    );
    println!(
        "{:<14} {:>8} {:>9} {:>9} {:>9}",
        "endpoint", "count", "p50 ms", "p99 ms", "max ms"
    );
    for (endpoint, latencies) in &mut by_endpoint {
        latencies.sort_unstable();
        println!(
            "{:<14} {:>8} {:>9.2} {:>9.2} {:>9.2}",
            format!("{endpoint:?}"),
            latencies.len(),
            percentile(latencies, 50.0),
            percentile(latencies, 99.0),
            percentile(latencies, 100.0)
        );
    }
    let cores = std::thread::available_parallelism().map_or(0, |n| n.get());
    let per_request_us = |cpu: Option<f64>| match cpu {
        Some(seconds) if !all.is_empty() => format!("{:.0}", seconds * 1e6 / all.len() as f64),
        _ => "?".to_string(),
    };
    println!(
        "CPU during the load phase: daemon {:.1} s ({} us per request), generator {:.1} s ({} us per request), on {cores} cores x {elapsed:.1} s; load average {load_before} before, {load_after} after",
        daemon_cpu.unwrap_or(f64::NAN),
        per_request_us(daemon_cpu),
        own_cpu.unwrap_or(f64::NAN),
        per_request_us(own_cpu),
    );
    if !route_costs.is_empty() {
        println!("each endpoint alone ({route_s} s each): requests/s, daemon CPU per request");
        for (endpoint, rate, cpu, answered) in &route_costs {
            let per_request = match cpu {
                Some(seconds) if *answered > 0 => {
                    format!("{:.0} us", seconds * 1e6 / *answered as f64)
                }
                _ => "?".to_string(),
            };
            println!(
                "  {:<14} {rate:>8.0}  {per_request}",
                format!("{endpoint:?}")
            );
        }
    }
    for (kind, n) in errors.iter().take(10) {
        println!("error x{n}: {kind}");
    }

    // The run's point timing.
    let mut quiet: Vec<f64> = level_steps_ms(&points, quiet_before.0, quiet_before.1);
    quiet.extend(level_steps_ms(&points, quiet_after.0, quiet_after.1));
    let mut loaded = level_steps_ms(&points, load_window.0, load_window.1);
    let (n_quiet, n_loaded) = (quiet.len(), loaded.len());
    let (quiet_median, loaded_median) = (median(&mut quiet), median(&mut loaded));
    println!();
    println!(
        "live run: {} points stored, state {run_state} when the benchmark stopped it",
        points.len()
    );
    println!(
        "point time (between levels of one frequency), median: without load {quiet_median:.0} ms ({n_quiet} steps), under load {loaded_median:.0} ms ({n_loaded} steps), change {:+.1} %",
        100.0 * (loaded_median / quiet_median - 1.0)
    );
    assert_eq!(
        state_after_timing, "running",
        "the live run must outlast the timing windows"
    );
}
