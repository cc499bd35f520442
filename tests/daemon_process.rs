//! The real `halfwave serve` process: configuration errors refused with the line, a clean stop on
//! SIGTERM with the RF outputs switched off, a log that says a frequency's warning once.

mod daemon_support;
mod engine_support;

use std::io::{BufRead, BufReader, Read, Write};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn halfwave() -> Command {
    Command::new(env!("CARGO_BIN_EXE_halfwave"))
}

#[test]
fn invalid_configuration_is_refused_with_the_line() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("halfwave.toml");
    std::fs::write(
        &config,
        "bind = \"127.0.0.1:0\"\n[limits]\nmax_level_at_modulator_dbm = \"very high\"\n",
    )
    .unwrap();
    let out = halfwave()
        .args(["serve", "--config"])
        .arg(&config)
        .output()
        .unwrap();
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("line 3"), "{stderr}");
    assert!(stderr.contains("halfwave.toml"), "{stderr}");
}

#[test]
fn missing_configuration_file_is_named() {
    let out = halfwave()
        .args(["serve", "--config", "/nonexistent/halfwave.toml"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("/nonexistent/halfwave.toml"), "{stderr}");
}

#[test]
fn serves_health_and_stops_cleanly_on_sigterm() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("halfwave.toml");
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:0\"\ndata_dir = \"{}\"\n\n[[bench]]\nname = \"sim-bench\"\nsource = {{ kind = \"simulated\" }}\nanalyzer = {{ kind = \"simulated\" }}\n[bench.simulation]\nseed = 1\ntime_factor = 0.0\n",
            dir.path().join("data").display()
        ),
    )
    .unwrap();
    let mut child = halfwave()
        .args(["serve", "--config"])
        .arg(&config)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut stdout = BufReader::new(child.stdout.take().unwrap());
    let mut line = String::new();
    stdout.read_line(&mut line).unwrap();
    assert!(line.contains("listening"), "{line}");
    let port = daemon_support::listening_port(&line);

    let mut stream = std::net::TcpStream::connect(("127.0.0.1", port)).unwrap();
    stream
        .write_all(b"GET /api/v1/health HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n")
        .unwrap();
    let mut reply = String::new();
    stream.read_to_string(&mut reply).unwrap();
    assert!(reply.starts_with("HTTP/1.1 200"), "{reply}");

    let status = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let started = Instant::now();
    let exit = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        assert!(
            started.elapsed() < Duration::from_secs(20),
            "no exit after SIGTERM"
        );
        std::thread::sleep(Duration::from_millis(50));
    };
    let mut rest = String::new();
    stdout.read_to_string(&mut rest).unwrap();
    assert!(exit.success(), "exit {exit:?}");
    assert!(rest.contains("RF outputs off"), "{rest}");
    // A fresh database holds no token: serve says how to make the first one.
    assert!(
        rest.contains("no API token exists yet") && rest.contains("halfwave token create --config"),
        "{rest}"
    );
    // ... and that no drive chain is stored yet, with the command that stores one.
    assert!(
        rest.contains("no drive chain is stored yet") && rest.contains("halfwave chain upload"),
        "{rest}"
    );
    assert!(dir.path().join("data").join("halfwave.db").exists());
}

/// A warning that holds for every level of a frequency is logged once for that frequency, not
/// once per point (a night's log stays readable), while every point still stores its own. On the
/// simulated bench at 20 GHz the analyzer's reference trace is too coarse for the measured line
/// shape, so a parametric shape is fitted; with a laser line 3 MHz wide (the built-in scenario's
/// is 50 kHz) that shape is a real Gaussian-Lorentzian mix, whose stated line-shape term (1 % of
/// beta up to beta 0.3, falling as 0.3 / beta above) makes every point there carry
/// `index_not_within_one_percent`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_warning_is_logged_once_per_frequency_and_stored_with_every_point() {
    let mut scenario = halfwave_drivers::sim::Scenario::builtin().unwrap();
    scenario.laser.linewidth_hz = 3e6;
    let bench = daemon_support::Bench::with_scenario(scenario, 34).await;
    let token = bench.operator_token().await;
    let mut daemon = bench.serve("daemon.log").await;
    let plan = serde_json::json!({
        "device": {"serial": "EG-PM-0042", "model": "simulated phase modulator",
                   "rf_input_limit_dbm": 27.0, "wavelength_nm": 1550.0},
        "bench": "sim",
        "chain": {"kind": "flat_loss", "loss_db": 2.0},
        "frequencies": {"kind": "list", "values_hz": [1.26e10, 2e10]},
        "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 8.0, "step_db": 2.0},
        "settle_s": 0.0
    });
    // Submitted with the client's own request id: it comes back in the reply's header and is on
    // the daemon's log line of the request (README, "HTTP API and dashboard").
    let submitted = bench
        .client
        .post(bench.url("/api/v1/runs"))
        .bearer_auth(&token)
        .header("X-Request-Id", "lab-b-submit-42")
        .json(&plan)
        .send()
        .await
        .unwrap();
    assert_eq!(submitted.status(), 201);
    assert_eq!(
        submitted.headers()["x-request-id"].to_str().unwrap(),
        "lab-b-submit-42"
    );
    let run_id = submitted.json::<serde_json::Value>().await.unwrap()["run_id"]
        .as_i64()
        .unwrap();
    let run = bench
        .wait_for(run_id, &token, Duration::from_secs(120), |r| {
            r["state"] != "queued" && r["state"] != "running"
        })
        .await;
    assert_eq!(run["state"], "completed", "{run}");
    let (status, points) = bench
        .get(
            &format!("/api/v1/runs/{run_id}/points?per_page=100"),
            &token,
        )
        .await;
    assert_eq!(status, 200, "{points}");
    let warned_points: Vec<f64> = points["points"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|p| {
            p["analysis"]
                .to_string()
                .contains("index_not_within_one_percent")
        })
        .map(|p| p["frequency_hz"].as_f64().unwrap())
        .collect();
    let warned_at_20 = warned_points.iter().filter(|&&f| f == 2e10).count();
    assert!(
        warned_at_20 >= 2,
        "the check needs points that repeat a warning at 20 GHz: {warned_points:?}"
    );
    let _ = daemon.kill().await;
    let log = bench.log("daemon.log");
    assert!(
        log.lines()
            .any(|l| l.contains("run queued") && l.contains("lab-b-submit-42")),
        "{log}"
    );
    for f in [1.26e10, 2e10] {
        let stored = warned_points.iter().filter(|&&w| w == f).count();
        let logged = log
            .lines()
            .filter(|l| {
                l.contains(" WARN ")
                    && l.contains("index_not_within_one_percent")
                    && l.contains(&format!("frequency_hz={f}"))
            })
            .count();
        assert_eq!(
            logged,
            usize::from(stored > 0),
            "{stored} points warned at {f} Hz, {logged} warnings logged: {log}"
        );
    }
}
