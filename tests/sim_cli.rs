//! `halfwave sim --source-port 0 --analyzer-port 0` prints two resource strings and accepts SCPI
//! connections on both, and `--drill FILE` injects the scheduled faults at their times (runs the
//! real binary; what a client sees over TCP is the observation).

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

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

/// Runs `halfwave sim` on free ports with `flag FILE`; asserts it exits non-zero and returns its
/// stderr.
fn sim_refuses(flag: &str, file: &std::path::Path) -> String {
    let output = Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args(["sim", "--source-port", "0", "--analyzer-port", "0", flag])
        .arg(file)
        .output()
        .unwrap();
    assert!(
        !output.status.success(),
        "halfwave sim accepted {flag} {file:?}"
    );
    String::from_utf8_lossy(&output.stderr).into_owned()
}

#[test]
fn sim_refuses_a_bad_scenario_with_a_clear_message() {
    let dir = std::env::temp_dir().join(format!("halfwave-sim-cli-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("broken.toml");
    std::fs::write(&path, "name = \"x\"\n[laser]\nwavelength_nm = -3\n").unwrap();
    let stderr = sim_refuses("--scenario", &path);
    assert!(stderr.contains("scenario"), "{stderr}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// A running `halfwave sim` with its two ports; the clock starts when it printed them.
struct Simulator {
    _running: Running,
    source_port: u16,
    analyzer_port: u16,
    ready: Instant,
    stderr: std::sync::mpsc::Receiver<String>,
    /// Every stderr line read so far.
    seen: std::cell::RefCell<Vec<String>>,
}

/// Starts `halfwave sim` on free ports with `drill` (TOML) as its drill file.
fn start_with_drill(drill: &str) -> (Simulator, tempfile::TempDir) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("drill.toml");
    std::fs::write(&path, drill).unwrap();
    let child = Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args([
            "sim",
            "--source-port",
            "0",
            "--analyzer-port",
            "0",
            "--drill",
        ])
        .arg(&path)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the halfwave binary starts");
    let mut running = Running(child);
    let stdout = running.0.stdout.take().unwrap();
    let stderr = running.0.stderr.take().unwrap();
    let mut lines = BufReader::new(stdout).lines();
    let source = lines.next().unwrap().unwrap();
    let analyzer = lines.next().unwrap().unwrap();
    let ready = Instant::now();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stderr).lines().map_while(Result::ok) {
            if tx.send(line).is_err() {
                break;
            }
        }
    });
    let simulator = Simulator {
        _running: running,
        source_port: port_of(source.strip_prefix("rf-source ").unwrap()),
        analyzer_port: port_of(analyzer.strip_prefix("analyzer ").unwrap()),
        ready,
        stderr: rx,
        seen: std::cell::RefCell::new(Vec::new()),
    };
    (simulator, dir)
}

/// The simulator's own time of a drill log line, "drill +X.XX s ...": seconds since it printed
/// its ports (the test's clock starts when it read them, a little later on a busy machine).
fn drill_time_s(line: &str) -> f64 {
    line.split("drill +")
        .nth(1)
        .and_then(|rest| rest.split(" s").next())
        .and_then(|t| t.parse().ok())
        .unwrap_or_else(|| panic!("no drill time in {line:?}"))
}

impl Simulator {
    /// Waits (at most 20 s) for a stderr line containing `text`, among the lines already read
    /// too (lines printed by two tasks within milliseconds may come in either order).
    fn log_line(&self, text: &str) -> String {
        let mut seen = self.seen.borrow_mut();
        if let Some(line) = seen.iter().find(|l| l.contains(text)) {
            return line.clone();
        }
        let deadline = Instant::now() + Duration::from_secs(20);
        while let Some(left) = deadline.checked_duration_since(Instant::now()) {
            match self.stderr.recv_timeout(left) {
                Ok(line) => {
                    seen.push(line.clone());
                    if line.contains(text) {
                        return line;
                    }
                }
                Err(_) => break,
            }
        }
        panic!("no stderr line with {text:?} within 20 s; seen: {seen:?}");
    }
}

/// One query on an open connection; `None` if no reply came within `wait`, or the link closed.
fn query(stream: &mut TcpStream, text: &str, wait: Duration) -> Option<Vec<u8>> {
    stream.set_read_timeout(Some(wait)).unwrap();
    stream.write_all(format!("{text}\n").as_bytes()).ok()?;
    let mut reply = Vec::new();
    let mut byte = [0u8; 1];
    loop {
        match stream.read(&mut byte) {
            Ok(1) if byte[0] == b'\n' => return Some(reply),
            Ok(1) => reply.push(byte[0]),
            _ => return None,
        }
    }
}

/// True if a fresh connection answers `*IDN?` within 2 s.
fn link_answers(port: u16) -> bool {
    let Ok(mut stream) = TcpStream::connect(("127.0.0.1", port)) else {
        return false;
    };
    matches!(query(&mut stream, "*IDN?", Duration::from_secs(2)), Some(r) if String::from_utf8_lossy(&r).contains("SIM-"))
}

#[test]
fn a_drilled_link_loss_closes_the_source_connection_on_time_and_the_link_comes_back() {
    // Link down from 1.5 s to 6.5 s after the simulator is ready (a window long enough for the
    // checks inside it on a busy machine).
    let (sim, _dir) = start_with_drill(
        "[[fault]]\nat_s = 1.5\ninstrument = \"rf_source\"\nkind = \"link_down\"\nfor_s = 5.0\n",
    );
    let mut before = TcpStream::connect(("127.0.0.1", sim.source_port)).unwrap();
    assert!(query(&mut before, "*IDN?", Duration::from_secs(2)).is_some());
    // The open connection is closed by the fault: reads end (EOF or reset) once it starts.
    before
        .set_read_timeout(Some(Duration::from_secs(10)))
        .unwrap();
    let mut byte = [0u8; 1];
    let outcome = before.read(&mut byte);
    let dropped_at = sim.ready.elapsed();
    assert!(
        matches!(outcome, Ok(0) | Err(_)),
        "the connection stayed open: {outcome:?}"
    );
    // Closed within the window by the test's clock, which starts after the simulator's.
    assert!(
        dropped_at < Duration::from_millis(6500),
        "closed at {dropped_at:?}, scheduled at 1.5 s"
    );
    // On time by the simulator's own clock.
    let down_at = drill_time_s(&sim.log_line("rf-source: link down"));
    assert!((1.5..2.5).contains(&down_at), "link down at +{down_at} s");
    // During the window a new connection gets no answer; the analyzer is unaffected.
    assert!(
        !link_answers(sim.source_port),
        "the source answered during the link loss"
    );
    assert!(link_answers(sim.analyzer_port));
    // After the window (6.5 s) the source answers again.
    let up_at = drill_time_s(&sim.log_line("rf-source: link up"));
    assert!(up_at >= 6.5, "link up at +{up_at} s");
    assert!(
        link_answers(sim.source_port),
        "the source did not come back"
    );
}

#[test]
fn a_drilled_silence_garbled_replies_and_an_error_are_what_a_client_sees() {
    let (sim, _dir) = start_with_drill(
        "[[fault]]\nat_s = 0.5\ninstrument = \"analyzer\"\nkind = \"silent\"\nfor_s = 4.0\n\
         [[fault]]\nat_s = 0.5\ninstrument = \"rf_source\"\nkind = \"push_error\"\ncode = -222\nmessage = \"drill\"\n\
         [[fault]]\nat_s = 5.0\ninstrument = \"rf_source\"\nkind = \"garble_replies\"\ncount = 1\n",
    );
    sim.log_line("analyzer: silent for 4 s");
    sim.log_line("error -222");
    // Silent: the analyzer reads the query but never answers within the window.
    let mut analyzer = TcpStream::connect(("127.0.0.1", sim.analyzer_port)).unwrap();
    assert_eq!(
        query(&mut analyzer, "*IDN?", Duration::from_millis(700)),
        None
    );
    // The pushed error is in the source's SCPI error queue, then the queue is empty.
    let mut source = TcpStream::connect(("127.0.0.1", sim.source_port)).unwrap();
    let entry = query(&mut source, "SYST:ERR?", Duration::from_secs(2)).unwrap();
    let entry = String::from_utf8_lossy(&entry).into_owned();
    assert!(
        entry.starts_with("-222,") && entry.contains("drill"),
        "{entry}"
    );
    assert_eq!(
        query(&mut source, "SYST:ERR?", Duration::from_secs(2)).unwrap(),
        b"0,\"No error\""
    );
    // The silence ends at 4.5 s: a fresh query is answered.
    sim.log_line("analyzer: answering again");
    let mut analyzer = TcpStream::connect(("127.0.0.1", sim.analyzer_port)).unwrap();
    let idn = query(&mut analyzer, "*IDN?", Duration::from_secs(2)).unwrap();
    assert!(String::from_utf8_lossy(&idn).contains("SIM-OSA-1"));
    // At 5 s one reply is garbled, the next is whole again.
    let garbled_at = drill_time_s(&sim.log_line("next 1 replies garbled"));
    assert!(garbled_at >= 5.0, "garbling from +{garbled_at} s");
    let garbled = query(&mut source, "*IDN?", Duration::from_secs(2)).unwrap();
    assert!(
        !String::from_utf8_lossy(&garbled).contains("SIM-RF-1"),
        "{garbled:?}"
    );
    let whole = query(&mut source, "*IDN?", Duration::from_secs(2)).unwrap();
    assert!(String::from_utf8_lossy(&whole).contains("SIM-RF-1"));
}

#[test]
fn a_drill_that_starts_on_rf_on_waits_for_the_output_and_logs_it() {
    let (sim, _dir) = start_with_drill(
        "start = \"rf_on\"\n[[fault]]\nat_s = 0.2\ninstrument = \"rf_source\"\nkind = \"silent\"\nfor_s = 3.0\n",
    );
    // Nothing happens before the output goes on.
    std::thread::sleep(Duration::from_millis(500));
    let mut source = TcpStream::connect(("127.0.0.1", sim.source_port)).unwrap();
    assert!(query(&mut source, "*IDN?", Duration::from_secs(2)).is_some());
    assert!(query(&mut source, "OUTP ON;*OPC?", Duration::from_secs(2)).is_some());
    sim.log_line("rf-source: output ON");
    sim.log_line(": started");
    sim.log_line("rf-source: silent");
    assert_eq!(
        query(&mut source, "*IDN?", Duration::from_millis(300)),
        None
    );
    sim.log_line("rf-source: answering again");
}

#[test]
fn sim_refuses_a_bad_drill_naming_the_fault_and_key() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("drill.toml");
    std::fs::write(
        &path,
        "[[fault]]\nat_s = 1\ninstrument = \"rf_source\"\nkind = \"link_down\"\n",
    )
    .unwrap();
    let stderr = sim_refuses("--drill", &path);
    assert!(
        stderr.contains("fault 1") && stderr.contains("for_s"),
        "{stderr}"
    );
}
