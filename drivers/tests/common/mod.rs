//! A scripted fake SCPI instrument on 127.0.0.1 for the driver tests.
//!
//! It answers the agreed default command set (long and short forms, case-insensitive) for both an
//! RF source and an analyzer, keeps the state a real instrument would (settings, error queue, data
//! format), and takes faults from the test: close the connection after N more commands, delay
//! replies, send one garbled reply, or stop answering. It is deliberately small and independent of
//! the drivers under test: commands are matched with the SCPI long/short-form rule, values are
//! parsed with `str::parse`, and binary blocks are written by hand.
#![allow(dead_code)]

use std::collections::VecDeque;
use std::net::SocketAddr;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};
use tokio::net::TcpListener;

/// Resolution bandwidths the fake analyzer offers; a request is rounded to the nearest.
pub const OFFERED_RBW_HZ: [f64; 5] = [1e6, 2e6, 5e6, 10e6, 20e6];
/// The fake source's frequency range; outside it the setter pushes -222.
pub const SOURCE_MIN_HZ: f64 = 1e3;
pub const SOURCE_MAX_HZ: f64 = 40e9;
/// The fake source's level range (dBm); outside it the setter pushes -222.
pub const SOURCE_MIN_DBM: f64 = -130.0;
pub const SOURCE_MAX_DBM: f64 = 25.0;

#[derive(Debug, Clone, Default)]
pub struct Faults {
    /// Close the connection when this many more commands have been received.
    pub drop_after_commands: Option<usize>,
    /// Wait this long before every reply.
    pub reply_delay: Duration,
    /// Replace the next reply with bytes that are not a valid reply.
    pub garble_next_reply: bool,
    /// Read commands but never answer.
    pub silent: bool,
    /// A query read, neither answered nor queued as an error (an instrument busy with it, or
    /// one that ends its replies with another terminator): the others are answered as usual.
    pub unanswered_query: Option<String>,
}

#[derive(Debug, Clone)]
pub struct State {
    pub identity: String,
    pub frequency_hz: f64,
    pub level_dbm: f64,
    pub output_on: bool,
    pub center_hz: f64,
    pub span_hz: f64,
    pub rbw_hz: f64,
    pub points: usize,
    pub continuous: bool,
    pub sweeps: usize,
    pub format: String,
    pub swapped: bool,
    pub errors: VecDeque<(i32, String)>,
    pub faults: Faults,
    pub commands: Vec<String>,
    pub connections: usize,
    pub reply_terminator: String,
    /// Leave out the optional FREQuency:STARt?/STOP? queries (the axis is then only available
    /// as CENTer?/SPAN?), as an analyzer that implements only part of the tree would.
    pub without_start_stop: bool,
    /// Leave out INITiate:CONTinuous (an analyzer that sweeps only when told to).
    pub without_continuous: bool,
}

impl Default for State {
    fn default() -> Self {
        State {
            identity: "Halfwave Test Fixtures,FAKE-1,TF000123,0.1".into(),
            frequency_hz: 1e9,
            level_dbm: -10.0,
            output_on: false,
            center_hz: 193.4e12,
            span_hz: 20e9,
            rbw_hz: 5e6,
            points: 1001,
            continuous: true,
            sweeps: 0,
            format: "ASC".into(),
            swapped: false,
            errors: VecDeque::new(),
            faults: Faults::default(),
            commands: Vec::new(),
            connections: 0,
            reply_terminator: "\n".into(),
            without_start_stop: false,
            without_continuous: false,
        }
    }
}

/// The trace the fake analyzer returns: a floor with three lines, exactly representable in f32.
pub fn fake_trace_dbm(points: usize) -> Vec<f64> {
    (0..points)
        .map(|i| {
            let x = i as f64 / points.max(1) as f64;
            let line = |at: f64, height: f64| if (x - at).abs() < 0.004 { height } else { 0.0 };
            -70.0 + line(0.4, 40.0) + line(0.5, 50.0) + line(0.6, 40.0) + (i % 7) as f64 * 0.25
        })
        .collect()
}

pub struct FakeInstrument {
    pub addr: SocketAddr,
    state: Arc<Mutex<State>>,
}

impl FakeInstrument {
    pub async fn start() -> FakeInstrument {
        FakeInstrument::start_with(State::default()).await
    }

    pub async fn start_with(state: State) -> FakeInstrument {
        let listener = TcpListener::bind("127.0.0.1:0")
            .await
            .expect("bind loopback");
        let addr = listener.local_addr().expect("local addr");
        let state = Arc::new(Mutex::new(state));
        let shared = state.clone();
        tokio::spawn(async move {
            while let Ok((socket, _)) = listener.accept().await {
                shared.lock().unwrap().connections += 1;
                tokio::spawn(serve(socket, shared.clone()));
            }
        });
        FakeInstrument { addr, state }
    }

    pub fn resource(&self) -> String {
        format!("TCPIP::{}::{}::SOCKET", self.addr.ip(), self.addr.port())
    }

    pub fn state(&self) -> MutexGuard<'_, State> {
        self.state.lock().unwrap()
    }
}

/// True when `header` matches `pattern` (e.g. "[SENSe:]FREQuency:CENTer"): each node in its long
/// form or its short form (the upper-case letters), case-insensitive, and nodes in brackets may be
/// left out (SCPI-1999 Vol 1 §6.2, from memory).
pub fn header_matches(header: &str, pattern: &str) -> bool {
    let nodes: Vec<&str> = header.trim_start_matches(':').split(':').collect();
    let normalized = pattern.replace("[:", ":[").replace(":]", "]:");
    let wanted: Vec<(String, bool)> = normalized
        .split(':')
        .map(
            |p| match p.strip_prefix('[').and_then(|p| p.strip_suffix(']')) {
                Some(inner) => (inner.to_string(), true),
                None => (p.to_string(), false),
            },
        )
        .collect();
    fn node_matches(node: &str, want: &str) -> bool {
        let short: String = want.chars().filter(|c| !c.is_ascii_lowercase()).collect();
        node.eq_ignore_ascii_case(want) || node.eq_ignore_ascii_case(&short)
    }
    fn walk(nodes: &[&str], wanted: &[(String, bool)]) -> bool {
        match (nodes.split_first(), wanted.split_first()) {
            (_, None) => nodes.is_empty(),
            (first, Some(((want, optional), rest))) => {
                (*optional && walk(nodes, rest))
                    || first
                        .is_some_and(|(node, more)| node_matches(node, want) && walk(more, rest))
            }
        }
    }
    walk(&nodes, &wanted)
}

enum Reply {
    Text(String),
    Bytes(Vec<u8>),
    Nothing,
}

fn handle(state: &mut State, line: &str) -> Reply {
    let line = line.trim();
    let (header, argument) = match line.split_once(' ') {
        Some((h, a)) => (h, a.trim()),
        None => (line, ""),
    };
    let is_query = header.ends_with('?');
    let header = header.trim_end_matches('?');
    let number = || argument.parse::<f64>().ok();
    let m = |pattern: &str| header_matches(header, pattern);
    let push = |state: &mut State, code: i32, message: &str| {
        state.errors.push_back((code, message.to_string()))
    };
    let num = |v: f64| Reply::Text(format!("{v:E}"));

    if header == "*IDN" && is_query {
        return Reply::Text(state.identity.clone());
    }
    if header == "*OPC" && is_query {
        return Reply::Text("1".into());
    }
    if header == "*ESR" && is_query {
        return Reply::Text("0".into());
    }
    if header == "*CLS" {
        state.errors.clear();
        return Reply::Nothing;
    }
    if header == "*RST" {
        let keep = (
            state.faults.clone(),
            state.identity.clone(),
            state.connections,
        );
        let commands = std::mem::take(&mut state.commands);
        let dialect = (state.without_start_stop, state.without_continuous);
        *state = State::default();
        (state.without_start_stop, state.without_continuous) = dialect;
        (state.faults, state.identity, state.connections) = keep;
        state.commands = commands;
        return Reply::Nothing;
    }
    if m("SYSTem:ERRor") && is_query {
        return Reply::Text(match state.errors.pop_front() {
            Some((code, message)) => format!("{code},\"{message}\""),
            None => "0,\"No error\"".into(),
        });
    }
    // A numeric query may take MINimum or MAXimum (SCPI-1999 Vol 1 §7.2.1.1, from memory).
    let bound = |min: f64, max: f64, now: f64| match argument.to_ascii_uppercase().as_str() {
        "" => Some(num(now)),
        "MIN" | "MINIMUM" => Some(num(min)),
        "MAX" | "MAXIMUM" => Some(num(max)),
        _ => None,
    };
    if m("[SOURce:]FREQuency[:CW]") {
        if is_query {
            return bound(SOURCE_MIN_HZ, SOURCE_MAX_HZ, state.frequency_hz).unwrap_or_else(|| {
                push(state, -224, "Illegal parameter value");
                Reply::Nothing
            });
        }
        match number() {
            Some(v) if (SOURCE_MIN_HZ..=SOURCE_MAX_HZ).contains(&v) => state.frequency_hz = v,
            Some(_) => push(state, -222, "Data out of range"),
            None => push(state, -109, "Missing parameter"),
        }
        return Reply::Nothing;
    }
    if m("[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]") {
        if is_query {
            // Levels are set in 0.01 dB steps.
            return bound(SOURCE_MIN_DBM, SOURCE_MAX_DBM, state.level_dbm).unwrap_or_else(|| {
                push(state, -224, "Illegal parameter value");
                Reply::Nothing
            });
        }
        match number() {
            Some(v) if (SOURCE_MIN_DBM..=SOURCE_MAX_DBM).contains(&v) => {
                state.level_dbm = (v * 100.0).round() / 100.0
            }
            Some(_) => push(state, -222, "Data out of range"),
            None => push(state, -109, "Missing parameter"),
        }
        return Reply::Nothing;
    }
    if m("OUTPut[:STATe]") {
        if is_query {
            return Reply::Text(if state.output_on { "1" } else { "0" }.into());
        }
        match argument.to_ascii_uppercase().as_str() {
            "ON" | "1" => state.output_on = true,
            "OFF" | "0" => state.output_on = false,
            _ => push(state, -224, "Illegal parameter value"),
        }
        return Reply::Nothing;
    }
    if m("[SENSe:]FREQuency:CENTer") {
        if is_query {
            return num(state.center_hz);
        }
        match number() {
            Some(v) if v > 0.0 => state.center_hz = v,
            _ => push(state, -222, "Data out of range"),
        }
        return Reply::Nothing;
    }
    if m("[SENSe:]FREQuency:SPAN") {
        if is_query {
            return num(state.span_hz);
        }
        match number() {
            Some(v) if v > 0.0 && v <= 200e9 => state.span_hz = v,
            _ => push(state, -222, "Data out of range"),
        }
        return Reply::Nothing;
    }
    if state.without_start_stop && (m("[SENSe:]FREQuency:STARt") || m("[SENSe:]FREQuency:STOP")) {
        push(state, -113, "Undefined header");
        return Reply::Nothing;
    }
    if state.without_continuous && m("INITiate:CONTinuous") {
        push(state, -113, "Undefined header");
        return Reply::Nothing;
    }
    if m("[SENSe:]FREQuency:STARt") && is_query {
        return num(state.center_hz - state.span_hz / 2.0);
    }
    if m("[SENSe:]FREQuency:STOP") && is_query {
        return num(state.center_hz + state.span_hz / 2.0);
    }
    if m("[SENSe:]BANDwidth[:RESolution]") {
        if is_query {
            return num(state.rbw_hz);
        }
        match number() {
            Some(v) if v > 0.0 => {
                state.rbw_hz = OFFERED_RBW_HZ
                    .iter()
                    .copied()
                    .min_by(|a, b| (a - v).abs().total_cmp(&(b - v).abs()))
                    .unwrap()
            }
            _ => push(state, -222, "Data out of range"),
        }
        return Reply::Nothing;
    }
    if m("[SENSe:]SWEep:POINts") {
        if is_query {
            return Reply::Text(state.points.to_string());
        }
        match argument.parse::<usize>() {
            Ok(v) if (3..=100_001).contains(&v) => state.points = v,
            _ => push(state, -222, "Data out of range"),
        }
        return Reply::Nothing;
    }
    if m("INITiate:CONTinuous") {
        state.continuous = matches!(argument.to_ascii_uppercase().as_str(), "ON" | "1");
        return Reply::Nothing;
    }
    if m("INITiate[:IMMediate]") {
        state.sweeps += 1;
        return Reply::Nothing;
    }
    if m("FORMat:DATA") {
        let arg = argument.to_ascii_uppercase().replace(' ', "");
        match arg.as_str() {
            "ASC" | "ASCII" => state.format = "ASC".into(),
            "REAL,32" => state.format = "REAL32".into(),
            "REAL,64" => state.format = "REAL64".into(),
            _ => push(state, -224, "Illegal parameter value"),
        }
        return Reply::Nothing;
    }
    if m("FORMat:BORDer") {
        match argument.to_ascii_uppercase().as_str() {
            "NORM" | "NORMAL" => state.swapped = false,
            "SWAP" | "SWAPPED" => state.swapped = true,
            _ => push(state, -224, "Illegal parameter value"),
        }
        return Reply::Nothing;
    }
    if m("TRACe[:DATA]") && is_query {
        let values = fake_trace_dbm(state.points);
        return encode(state, &values);
    }
    // An invented dialect's axis query: the frequency of every point, on a grid that is not
    // linear (steps growing along the sweep).
    if m("TRACe:XVALues") && is_query {
        let values = fake_axis_hz(state);
        return encode(state, &values);
    }
    push(state, -113, "Undefined header");
    if is_query {
        // A real instrument answers nothing to an unknown query; the driver then times out.
        return Reply::Nothing;
    }
    Reply::Nothing
}

/// The fake's non-linear axis: centre - span/2 to centre + span/2 with the offset going as the
/// square of the point's position (so steps grow along the sweep).
pub fn fake_axis_hz(state: &State) -> Vec<f64> {
    let n = state.points.max(2);
    (0..n)
        .map(|i| {
            let x = i as f64 / (n - 1) as f64;
            state.center_hz - state.span_hz / 2.0 + state.span_hz * x * x
        })
        .collect()
}

/// Values in the fake's current data format and byte order.
fn encode(state: &State, values: &[f64]) -> Reply {
    match state.format.as_str() {
        "ASC" => Reply::Text(
            values
                .iter()
                .map(|v| format!("{v:E}"))
                .collect::<Vec<_>>()
                .join(","),
        ),
        kind => {
            let mut payload = Vec::new();
            for v in values {
                match (kind, state.swapped) {
                    ("REAL32", false) => payload.extend((*v as f32).to_be_bytes()),
                    ("REAL32", true) => payload.extend((*v as f32).to_le_bytes()),
                    (_, false) => payload.extend(v.to_be_bytes()),
                    (_, true) => payload.extend(v.to_le_bytes()),
                }
            }
            let len = payload.len().to_string();
            let mut out = format!("#{}{}", len.len(), len).into_bytes();
            out.extend(payload);
            out.extend(state.reply_terminator.as_bytes());
            Reply::Bytes(out)
        }
    }
}

async fn serve(socket: tokio::net::TcpStream, state: Arc<Mutex<State>>) {
    let (read, mut write) = socket.into_split();
    let mut lines = BufReader::new(read).lines();
    while let Ok(Some(line)) = lines.next_line().await {
        let (reply, faults) = {
            let mut s = state.lock().unwrap();
            s.commands.push(line.clone());
            if let Some(n) = s.faults.drop_after_commands.as_mut() {
                if *n <= 1 {
                    s.faults.drop_after_commands = None;
                    return; // drops both halves: the connection closes
                }
                *n -= 1;
            }
            if s.faults.unanswered_query.as_deref() == Some(line.trim()) {
                continue;
            }
            let reply = handle(&mut s, &line);
            let faults = s.faults.clone();
            if !matches!(reply, Reply::Nothing) {
                s.faults.garble_next_reply = false;
            }
            (reply, faults)
        };
        let bytes = match reply {
            Reply::Nothing => continue,
            Reply::Text(text) => format!("{text}{}", faults_terminator(&state)).into_bytes(),
            Reply::Bytes(bytes) => bytes,
        };
        if faults.silent {
            continue;
        }
        if !faults.reply_delay.is_zero() {
            tokio::time::sleep(faults.reply_delay).await;
        }
        let bytes = if faults.garble_next_reply {
            b"#x@garbled\n".to_vec()
        } else {
            bytes
        };
        if write.write_all(&bytes).await.is_err() {
            return;
        }
    }
}

/// A server that answers each received line with the next scripted reply (bytes sent as given),
/// for transport tests that need exact bytes on the wire.
pub async fn scripted_server(replies: Vec<Vec<u8>>) -> SocketAddr {
    let listener = TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind loopback");
    let addr = listener.local_addr().expect("local addr");
    tokio::spawn(async move {
        let Ok((socket, _)) = listener.accept().await else {
            return;
        };
        let (read, mut write) = socket.into_split();
        let mut lines = BufReader::new(read).lines();
        let mut replies = replies.into_iter();
        while let Ok(Some(_line)) = lines.next_line().await {
            match replies.next() {
                Some(reply) => {
                    if write.write_all(&reply).await.is_err() {
                        return;
                    }
                }
                None => return,
            }
        }
    });
    addr
}

fn faults_terminator(state: &Arc<Mutex<State>>) -> String {
    state.lock().unwrap().reply_terminator.clone()
}

#[test]
fn header_matching_follows_the_long_short_rule() {
    // SCPI-1999 Vol 1 §6.2.1 (from memory): long form or short form, any case, optional nodes.
    assert!(header_matches("FREQ", "[SOURce:]FREQuency[:CW]"));
    assert!(header_matches("sour:freq:cw", "[SOURce:]FREQuency[:CW]"));
    assert!(header_matches(
        "SOURCE:FREQUENCY",
        "[SOURce:]FREQuency[:CW]"
    ));
    assert!(!header_matches("FREQ:CENT", "[SOURce:]FREQuency[:CW]"));
    assert!(!header_matches("FRE", "[SOURce:]FREQuency[:CW]"));
    assert!(header_matches(
        "SENS:BAND:RES",
        "[SENSe:]BANDwidth[:RESolution]"
    ));
}
