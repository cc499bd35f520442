//! The real `halfwave serve` process: configuration errors refused with the line, a clean stop on
//! SIGTERM with the RF outputs switched off.

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
    let port = {
        let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        l.local_addr().unwrap().port()
    };
    let config = dir.path().join("halfwave.toml");
    std::fs::write(
        &config,
        format!(
            "bind = \"127.0.0.1:{port}\"\ndata_dir = \"{}\"\n\n[[bench]]\nname = \"sim-bench\"\nsource = {{ kind = \"simulated\" }}\nanalyzer = {{ kind = \"simulated\" }}\n[bench.simulation]\nseed = 1\ntime_factor = 0.0\n",
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
    assert!(dir.path().join("data").join("halfwave.db").exists());
}
