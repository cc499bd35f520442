//! The simulated bench served as SCPI over loopback TCP: a session of the agreed commands on
//! each instrument, both binary byte orders, the error queue, every fault injection, and the
//! generic SCPI drivers talking to it.

use halfwave_drivers::profile::{AnalyzerProfile, SourceProfile};
use halfwave_drivers::scpi::block::{split_block, ByteOrder, DataFormat};
use halfwave_drivers::sim::faults::GARBLED_REPLY;
use halfwave_drivers::sim::{Role, Scenario, SimBench, SimServer, SimServerConfig};
use halfwave_drivers::{RfSource, ScpiRfSource, ScpiSpectrumAnalyzer, SpectrumAnalyzer};
use halfwave_units::{Dbm, Hz};
use std::time::{Duration, Instant};
use tokio::io::{AsyncBufReadExt, AsyncReadExt, AsyncWriteExt, BufReader};
use tokio::net::tcp::{OwnedReadHalf, OwnedWriteHalf};
use tokio::net::TcpStream;

/// A minimal line client, independent of the project's transport.
struct Client {
    reader: BufReader<OwnedReadHalf>,
    writer: OwnedWriteHalf,
}

const ANSWER_TIMEOUT: Duration = Duration::from_secs(10);

impl Client {
    async fn connect(server: &SimServer, role: Role) -> Client {
        let stream = TcpStream::connect(server.address(role)).await.unwrap();
        let (r, w) = stream.into_split();
        Client {
            reader: BufReader::new(r),
            writer: w,
        }
    }

    async fn send(&mut self, line: &str) {
        self.writer
            .write_all(format!("{line}\n").as_bytes())
            .await
            .unwrap();
    }

    /// Reads one newline-terminated reply; `None` on timeout, `Some(empty)` on EOF.
    async fn read_line_within(&mut self, wait: Duration) -> Option<Vec<u8>> {
        let mut buf = Vec::new();
        match tokio::time::timeout(wait, self.reader.read_until(b'\n', &mut buf)).await {
            Ok(Ok(_)) => Some(buf),
            Ok(Err(_)) => Some(Vec::new()),
            Err(_) => None,
        }
    }

    async fn query(&mut self, line: &str) -> String {
        self.send(line).await;
        let reply = self
            .read_line_within(ANSWER_TIMEOUT)
            .await
            .unwrap_or_else(|| panic!("no reply to {line}"));
        String::from_utf8(reply)
            .unwrap()
            .trim_end_matches('\n')
            .to_string()
    }

    /// Sends a query and reads a definite-length block reply plus its terminator.
    async fn query_block(&mut self, line: &str) -> Vec<u8> {
        self.send(line).await;
        let mut head = [0u8; 2];
        self.reader.read_exact(&mut head).await.unwrap();
        assert_eq!(head[0], b'#', "a block starts with #");
        let digits = usize::from(head[1] - b'0');
        let mut len_text = vec![0u8; digits];
        self.reader.read_exact(&mut len_text).await.unwrap();
        let len: usize = std::str::from_utf8(&len_text).unwrap().parse().unwrap();
        let mut payload = vec![0u8; len + 1];
        self.reader.read_exact(&mut payload).await.unwrap();
        assert_eq!(
            payload.pop(),
            Some(b'\n'),
            "the block is followed by the terminator"
        );
        // Re-assemble and parse with the client-side block parser.
        let mut whole = head.to_vec();
        whole.extend_from_slice(&len_text);
        whole.extend_from_slice(&payload);
        let (body, rest) = split_block(&whole).unwrap();
        assert!(rest.is_empty());
        body.to_vec()
    }
}

fn quiet_scenario() -> Scenario {
    let mut s = Scenario::builtin().unwrap();
    s.analyzer.sweep_time_s = 0.2;
    s.rf_source.settling_time_s = 0.0;
    s
}

async fn start(scenario: Scenario, time_factor: f64) -> SimServer {
    let bench = SimBench::new(scenario, 9).with_time_factor(time_factor);
    SimServer::start(bench, SimServerConfig::any_free_ports())
        .await
        .unwrap()
}

#[tokio::test]
async fn rf_source_session() {
    let server = start(quiet_scenario(), 0.0).await;
    assert!(server
        .resource(Role::RfSource)
        .starts_with("TCPIP::127.0.0.1::"));
    let mut c = Client::connect(&server, Role::RfSource).await;

    // IEEE 488.2, 10.14: *IDN? answers four comma-separated fields.
    let idn = c.query("*IDN?").await;
    assert_eq!(idn.split(',').count(), 4, "{idn}");
    assert!(idn.starts_with("Halfwave Simulations,SIM-RF-1,"));
    assert_eq!(c.query("SYST:ERR?").await, "0,\"No error\"");

    c.send("SOURce:FREQuency:CW 2.5 GHZ").await;
    assert_eq!(c.query("FREQ?").await, "2500000000");
    c.send("pow -5.5 dBm").await;
    assert_eq!(c.query("SOUR:POW:LEV:IMM:AMPL?").await, "-5.5");
    assert_eq!(c.query("OUTP?").await, "0");
    c.send("OUTP ON").await;
    assert_eq!(c.query("OUTPut:STATe?").await, "1");
    assert!(server.bench().rf_output_on());

    // Out of range: -222 and the setting unchanged.
    c.send("FREQ 1 THZ").await;
    assert!(c
        .query("SYST:ERR?")
        .await
        .starts_with("-222,\"Data out of range"));
    assert_eq!(c.query("FREQ?").await, "2500000000");
    c.send("POW 99").await;
    assert!(c.query("SYST:ERR:NEXT?").await.starts_with("-222,"));
    assert_eq!(c.query("POW?").await, "-5.5");

    // Several commands in one line; replies joined by `;`.
    assert_eq!(
        c.query("FREQ 1GHZ;POW 3;OUTP OFF;FREQ?;POW?;OUTP?").await,
        "1000000000;3;0"
    );

    // Errors: undefined header, bad boolean, missing parameter; *ESR? shows command (32) and
    // execution (16) error bits and clears (IEEE 488.2, 11.5.1.1; from memory).
    c.send("FREQ:BOGUS 1").await;
    c.send("OUTP MAYBE").await;
    c.send("POW").await;
    assert!(c.query("SYST:ERR?").await.starts_with("-113,"));
    assert!(c.query("SYST:ERR?").await.starts_with("-224,"));
    assert!(c.query("SYST:ERR?").await.starts_with("-109,"));
    assert_eq!(c.query("SYST:ERR?").await, "0,\"No error\"");
    c.send("FREQ 1 THZ").await;
    assert_eq!(c.query("*ESR?").await, "48");
    assert_eq!(c.query("*ESR?").await, "0");
    c.send("*CLS").await;
    assert_eq!(c.query("SYST:ERR?").await, "0,\"No error\"");
    assert_eq!(c.query("*OPC?").await, "1");
    c.send("*RST").await;
    assert_eq!(c.query("OUTP?").await, "0");

    let log = server.bench().command_log(Role::RfSource);
    assert_eq!(log.first().map(String::as_str), Some("*IDN?"));
    assert!(log.contains(&"OUTP ON".to_string()));
    assert!(
        log.contains(&"POW 3".to_string()),
        "units of a line are logged one by one"
    );
}

#[tokio::test]
async fn analyzer_session_with_ascii_and_both_byte_orders() {
    let server = start(quiet_scenario(), 1.0).await;
    let mut c = Client::connect(&server, Role::Analyzer).await;
    assert!(c
        .query("*IDN?")
        .await
        .starts_with("Halfwave Simulations,SIM-OSA-1,"));
    c.send("INIT:CONT OFF").await;
    // No sweep taken yet in single mode: -230 and no reply.
    c.send("TRAC? TRACE1").await;
    assert!(c.query("SYST:ERR?").await.starts_with("-230,"));

    c.send("SENS:FREQ:CENT 193.4 THZ;SPAN 20 GHZ").await;
    c.send("BWID:RES 4MHZ").await;
    c.send("SWE:POIN 1001").await;
    assert_eq!(c.query("FREQ:CENT?").await, "193400000000000");
    assert_eq!(c.query("FREQ:SPAN?").await, "20000000000");
    assert_eq!(c.query("FREQ:STAR?").await, "193390000000000");
    assert_eq!(c.query("FREQ:STOP?").await, "193410000000000");
    assert_eq!(
        c.query("BAND?").await,
        "5000000",
        "RBW rounds to an offered value"
    );
    assert_eq!(c.query("SWE:POIN?").await, "1001");
    c.send("SWE:POIN 7").await;
    assert!(c.query("SYST:ERR?").await.starts_with("-222,"));
    assert_eq!(c.query("SYST:ERR?").await, "0,\"No error\"");

    // INIT starts a sweep; *OPC? answers once it is complete (scenario sweep time 0.2 s).
    let started = Instant::now();
    c.send("INIT").await;
    assert_eq!(c.query("*OPC?").await, "1");
    assert!(started.elapsed() >= Duration::from_millis(200));

    c.send("FORM ASC").await;
    assert_eq!(c.query("FORM?").await, "ASC");
    let ascii: Vec<f64> = c
        .query("TRAC? TRACE1")
        .await
        .split(',')
        .map(|v| v.parse().unwrap())
        .collect();
    assert_eq!(ascii.len(), 1001);
    // The carrier stands out from the noise floor somewhere in the span.
    let peak = ascii.iter().cloned().fold(f64::MIN, f64::max);
    assert!(peak > -10.0, "carrier peak {peak} dBm");

    // REAL,32 big-endian (NORMal) and little-endian (SWAPped) give the same values.
    c.send("FORMat:DATA REAL,32;BORDer NORMal").await;
    assert_eq!(c.query("FORM?;FORM:BORD?").await, "REAL,32;NORM");
    let be = c.query_block("TRACe:DATA? TRACE1").await;
    c.send("FORM:BORD SWAP").await;
    let le = c.query_block("TRAC? TRACE1").await;
    let decode = |bytes: &[u8], order: ByteOrder| -> Vec<f64> {
        bytes
            .chunks_exact(4)
            .map(|b| {
                let b = [b[0], b[1], b[2], b[3]];
                f64::from(match order {
                    ByteOrder::Normal => f32::from_be_bytes(b),
                    ByteOrder::Swapped => f32::from_le_bytes(b),
                })
            })
            .collect()
    };
    let from_be = decode(&be, ByteOrder::Normal);
    let from_le = decode(&le, ByteOrder::Swapped);
    assert_eq!(from_be.len(), 1001);
    assert_eq!(from_be, from_le);
    for (a, b) in ascii.iter().zip(&from_be) {
        assert!((a - b).abs() < 1e-4, "ASCII {a} vs REAL,32 {b}");
    }
    // REAL,64 through the client-side decoder.
    c.send("FORM REAL,64;FORM:BORD NORM").await;
    let mut whole = Vec::new();
    let body = c.query_block("TRAC?").await;
    halfwave_drivers::scpi::block::decode_real64_into(&body, ByteOrder::Normal, &mut whole)
        .unwrap();
    for (a, b) in from_be.iter().zip(&whole) {
        assert!((a - b).abs() < 1e-4);
    }
    c.send("FORM REAL,16").await;
    assert!(c.query("SYST:ERR?").await.starts_with("-224,"));
    let _ = DataFormat::Real64;

    // In continuous mode every trace query returns a fresh sweep (new noise, the laser drifts).
    c.send("INIT:CONT ON;:FORM ASC").await;
    assert_eq!(c.query("INIT:CONT?").await, "1");
    let first = c.query("TRAC? TRACE1").await;
    let second = c.query("TRAC? TRACE1").await;
    assert_ne!(first, second);
    // In single mode the same sweep is returned until the next INIT.
    c.send("INIT:CONT OFF;:INIT").await;
    let third = c.query("TRAC?").await;
    assert_eq!(third, c.query("TRAC?").await);
}

#[tokio::test]
async fn error_queue_overflows_with_350() {
    let server = start(quiet_scenario(), 0.0).await;
    let mut c = Client::connect(&server, Role::RfSource).await;
    for _ in 0..40 {
        c.send("NO:SUCH:COMMAND").await;
    }
    let mut entries = Vec::new();
    loop {
        let e = c.query("SYST:ERR?").await;
        if e.starts_with("0,") {
            break;
        }
        entries.push(e);
    }
    // SCPI 1999 vol. 2, 21.8 (from memory): the last entry of a full queue is -350.
    assert_eq!(entries.len(), 16);
    assert!(entries[..15].iter().all(|e| e.starts_with("-113,")));
    assert_eq!(entries[15], "-350,\"Queue overflow\"");
}

#[tokio::test]
async fn fault_drop_after_commands() {
    let server = start(quiet_scenario(), 0.0).await;
    let faults = server.faults(Role::RfSource);
    let mut c = Client::connect(&server, Role::RfSource).await;
    faults.drop_after_commands(2);
    assert!(!c.query("*IDN?").await.is_empty());
    assert_eq!(c.query("*OPC?").await, "1");
    c.send("FREQ?").await;
    assert_eq!(
        c.read_line_within(ANSWER_TIMEOUT).await,
        Some(Vec::new()),
        "the connection is closed on the third command"
    );
    // One-shot: a new connection is served normally.
    let mut again = Client::connect(&server, Role::RfSource).await;
    assert_eq!(again.query("OUTP?").await, "0");
    let log = server.bench().command_log(Role::RfSource);
    assert_eq!(log, vec!["*IDN?", "*OPC?", "FREQ?", "OUTP?"]);
}

#[tokio::test]
async fn fault_delay_garble_push_error_and_silence() {
    let server = start(quiet_scenario(), 0.0).await;
    let faults = server.faults(Role::Analyzer);
    let mut c = Client::connect(&server, Role::Analyzer).await;

    faults.delay_replies(Duration::from_millis(300));
    let t = Instant::now();
    assert_eq!(c.query("*OPC?").await, "1");
    assert!(t.elapsed() >= Duration::from_millis(300));
    faults.delay_replies(Duration::ZERO);

    faults.garble_replies(1);
    c.send("SWE:POIN?").await;
    let garbled = c.read_line_within(ANSWER_TIMEOUT).await.unwrap();
    assert_eq!(garbled, [GARBLED_REPLY, b"\n"].concat());
    assert_eq!(
        c.query("SWE:POIN?").await,
        "10001",
        "only the next reply is garbled"
    );

    faults.push_error(-224, "injected by the test");
    assert_eq!(
        c.query("SYST:ERR?").await,
        "-224,\"Illegal parameter value;injected by the test\""
    );

    faults.stop_answering();
    c.send("*IDN?").await;
    assert_eq!(c.read_line_within(Duration::from_millis(300)).await, None);
    faults.resume();
    assert!(c.query("*IDN?").await.contains("SIM-OSA-1"));
    let log = server.bench().command_log(Role::Analyzer);
    assert_eq!(
        log.iter().filter(|l| *l == "*IDN?").count(),
        2,
        "ignored commands are logged"
    );
    faults.clear();
}

#[tokio::test]
async fn fault_link_down_closes_connections_until_it_comes_back() {
    let server = start(quiet_scenario(), 0.0).await;
    let faults = server.faults(Role::RfSource);
    let mut open = Client::connect(&server, Role::RfSource).await;
    assert_eq!(open.query("OUTP?").await, "0");

    faults.link_down();
    assert!(faults.is_link_down());
    assert_eq!(
        open.read_line_within(ANSWER_TIMEOUT).await,
        Some(Vec::new()),
        "an open connection is closed when the link goes down"
    );
    // New connections are accepted and closed at once, without executing anything.
    let mut refused = Client::connect(&server, Role::RfSource).await;
    let _ = refused.writer.write_all(b"OUTP ON\n").await;
    assert_eq!(
        refused.read_line_within(ANSWER_TIMEOUT).await,
        Some(Vec::new())
    );
    assert!(!server.bench().rf_output_on());
    // The other instrument's link is untouched.
    let mut analyzer = Client::connect(&server, Role::Analyzer).await;
    assert_eq!(analyzer.query("*OPC?").await, "1");

    faults.link_up();
    let mut again = Client::connect(&server, Role::RfSource).await;
    assert_eq!(again.query("OUTP?").await, "0");
}

#[tokio::test]
async fn generic_scpi_drivers_run_against_the_simulator() {
    let server = start(quiet_scenario(), 0.0).await;
    let mut source =
        ScpiRfSource::connect(&server.resource(Role::RfSource), SourceProfile::standard())
            .await
            .unwrap();
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &server.resource(Role::Analyzer),
        AnalyzerProfile::standard(),
    )
    .await
    .unwrap();
    assert_eq!(source.identify().await.unwrap().model, "SIM-RF-1");
    source.set_frequency(Hz::from_ghz(3.0)).await.unwrap();
    source.set_level(Dbm(10.0)).await.unwrap();
    assert!(source.set_output(true).await.unwrap());
    assert!(
        (server.bench().modulation_index() - {
            let s = server.bench().scenario();
            let v = halfwave_drivers::sim::physics::peak_voltage(
                s.level_at_modulator(Dbm(10.0), Hz::from_ghz(3.0)),
            );
            std::f64::consts::PI * v.value() / s.v_pi_at(Hz::from_ghz(3.0)).value()
        })
        .abs()
            < 1e-12
    );
    let centre = server.bench().scenario().laser_frequency();
    analyzer.set_points(2001).await.unwrap();
    analyzer.set_span(Hz::from_ghz(20.0)).await.unwrap();
    analyzer.set_center(centre).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    assert_eq!(trace.len(), 2001);
    source.safe_off().await.unwrap();
    assert!(!server.bench().rf_output_on());
    assert!(!server.bench().overdriven());
}

#[tokio::test]
async fn garbage_input_never_stops_the_server() {
    let server = start(quiet_scenario(), 0.0).await;
    let mut c = Client::connect(&server, Role::Analyzer).await;
    let nasty: Vec<Vec<u8>> = vec![
        b"\xff\xfe\x00garbage".to_vec(),
        b";;;;".to_vec(),
        b"*".to_vec(),
        b":".to_vec(),
        b"FREQ:CENT 1e99999".to_vec(),
        b"SWE:POIN 1e300".to_vec(),
        b"TRAC? \"unterminated".to_vec(),
        b"FORM REAL,32,64,128".to_vec(),
        b"[SENSe:]FREQ:SPAN 1".to_vec(),
        vec![b'A'; 200_000],
        b"\r".to_vec(),
    ];
    for line in &nasty {
        c.writer.write_all(line).await.unwrap();
        c.writer.write_all(b"\n").await.unwrap();
    }
    assert!(c.query("*IDN?").await.contains("SIM-OSA-1"));
    let mut codes = Vec::new();
    loop {
        let e = c.query("SYST:ERR?").await;
        if e.starts_with("0,") {
            break;
        }
        codes.push(e.split(',').next().unwrap().parse::<i32>().unwrap());
    }
    assert!(!codes.is_empty());
    assert!(codes.iter().all(|c| (-399..=-100).contains(c)), "{codes:?}");
    // The settings survived.
    assert_eq!(c.query("SWE:POIN?").await, "10001");
}
