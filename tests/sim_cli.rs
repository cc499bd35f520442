//! `halfwave sim --source-port 0 --analyzer-port 0` prints two resource strings and accepts SCPI
//! connections on both (runs the real binary).

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::process::{Child, Command, Stdio};
use std::time::Duration;

/// Kills the simulator when the test ends, whatever happens.
struct Running(Child);

impl Drop for Running {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn port_of(resource: &str) -> u16 {
    // TCPIP::127.0.0.1::<port>::SOCKET
    let parts: Vec<&str> = resource.split("::").collect();
    assert_eq!(parts.len(), 4, "{resource}");
    assert_eq!(parts[0], "TCPIP");
    assert_eq!(parts[1], "127.0.0.1");
    assert_eq!(parts[3], "SOCKET");
    parts[2].parse().unwrap()
}

fn ask(port: u16, query: &str) -> String {
    let mut stream = TcpStream::connect(("127.0.0.1", port)).unwrap();
    stream
        .set_read_timeout(Some(Duration::from_secs(10)))
        .unwrap();
    stream.write_all(format!("{query}\n").as_bytes()).unwrap();
    let mut reply = Vec::new();
    let mut byte = [0u8; 1];
    while stream.read(&mut byte).unwrap() == 1 && byte[0] != b'\n' {
        reply.push(byte[0]);
    }
    String::from_utf8(reply).unwrap()
}

#[test]
fn sim_prints_two_resource_strings_and_serves_scpi() {
    let child = Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args([
            "sim",
            "--source-port",
            "0",
            "--analyzer-port",
            "0",
            "--seed",
            "3",
        ])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("the halfwave binary starts");
    let mut running = Running(child);
    let stdout = running.0.stdout.take().unwrap();
    let mut lines = BufReader::new(stdout).lines();
    let source_line = lines.next().unwrap().unwrap();
    let analyzer_line = lines.next().unwrap().unwrap();
    let source = source_line.strip_prefix("rf-source ").unwrap();
    let analyzer = analyzer_line.strip_prefix("analyzer ").unwrap();
    let (source_port, analyzer_port) = (port_of(source), port_of(analyzer));
    assert_ne!(source_port, 0);
    assert_ne!(source_port, analyzer_port);

    assert!(ask(source_port, "*IDN?").contains("SIM-RF-1"));
    assert!(ask(analyzer_port, "*IDN?").contains("SIM-OSA-1"));
    assert_eq!(ask(source_port, "SYST:ERR?"), "0,\"No error\"");
    assert!(running.0.try_wait().unwrap().is_none(), "still running");
}

#[test]
fn sim_refuses_a_bad_scenario_with_a_clear_message() {
    let dir = std::env::temp_dir().join(format!("halfwave-sim-cli-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("broken.toml");
    std::fs::write(&path, "name = \"x\"\n[laser]\nwavelength_nm = -3\n").unwrap();
    let output = Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args([
            "sim",
            "--source-port",
            "0",
            "--analyzer-port",
            "0",
            "--scenario",
        ])
        .arg(&path)
        .output()
        .unwrap();
    assert!(!output.status.success());
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(stderr.contains("scenario"), "{stderr}");
    let _ = std::fs::remove_dir_all(&dir);
}
