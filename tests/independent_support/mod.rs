//! A second, independent bench for end-to-end tests: an RF source and an optical analyzer that
//! speak SCPI over TCP, written from the SCPI-1999 and IEEE 488.2 rules (as recalled; clauses
//! cited beside each rule) and sharing no code with the project's drivers or simulator.
//!
//! Why: the project's simulator and drivers were written by the same hands, so a dialect
//! assumption can hide in both. This bench implements only what the standards require and
//! leaves out optional nodes a real analyzer may lack: it has no `FREQuency:STARt?`/`STOP?` and
//! no `INITiate:CONTinuous`. A calibration that completes against it by configuration alone shows
//! that the drivers adapt as documented.
//!
//! The physics is deliberately plain and its own: a phase-modulated laser gives lines at
//! f_c + n f_m with power P J_n(beta)^2 (Jacobi-Anger expansion, NIST DLMF 10.12.1; Bessel values
//! from puruspe), beta = pi V_pk / V_pi with V_pk = sqrt(2 R P_rf) into R = 50 ohm, each line
//! drawn as a Gaussian of the resolution bandwidth (FWHM) on a flat floor with a little
//! deterministic display noise. It uses nothing of the project's analysis code.
//!
//! Options a lab's analyzer may have ([`BenchOptions`]): an axis in **wavelength** (metres, in
//! vacuum or in standard air, set and read through `[SENSe:]WAVelength:CENTer`/`SPAN`, with
//! the resolution bandwidth in metres too; air by the revised Edlén equation of Birch and Downs,
//! Metrologia 31, 315 (1994), not the formula the drivers use), and a trace in **watts**.

#![allow(dead_code)]

use std::collections::VecDeque;
use std::net::SocketAddr;
use std::sync::{Arc, Mutex};
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};
use tokio::net::TcpListener;

/// The laser's optical frequency as the analyzer sees it (near 1550 nm, 1.3 GHz off the nominal
/// 193.4 THz so the engine has to find it).
pub const LASER_HZ: f64 = 193.4e12 + 1.3e9;
/// Optical power reaching the analyzer, dBm.
pub const OPTICAL_DBM: f64 = -3.0;
/// The analyzer's floor, dBm.
pub const FLOOR_DBM: f64 = -78.0;
/// The source's ranges, stated through MINimum/MAXimum queries.
pub const SOURCE_FREQUENCY_HZ: (f64, f64) = (100e3, 40e9);
pub const SOURCE_LEVEL_DBM: (f64, f64) = (-110.0, 25.0);
/// Resolution bandwidths the analyzer offers (a request is rounded to the nearest).
pub const RBW_HZ: [f64; 7] = [1e6, 2e6, 5e6, 10e6, 20e6, 50e6, 100e6];

/// The modulator's true half-wave voltage at drive frequency `f_hz` (an invented device:
/// 2.9 V at low frequency, rising with the square root of frequency as electrode loss does).
pub fn true_v_pi(f_hz: f64) -> f64 {
    2.9 * (1.0 + 0.035 * (f_hz / 1e9).sqrt())
}

/// Peak voltage into 50 ohm for a level in dBm: P = 10^((L - 30)/10) W, V_pk = sqrt(2 R P)
/// (definition of the dBm; 0 dBm is 0.3162 V peak).
pub fn peak_volts(level_dbm: f64) -> f64 {
    (2.0 * 50.0 * 10f64.powf((level_dbm - 30.0) / 10.0)).sqrt()
}

// ---------------------------------------------------------------------------------------------
// SCPI headers (SCPI-1999 Vol 1, chapter 6, from memory)

/// One node of a command pattern: its long form (upper-case letters are the short form) and
/// whether it may be left out (written in brackets).
#[derive(Debug, Clone)]
struct Node {
    long: String,
    optional: bool,
}

/// Parses notation such as `[SENSe:]FREQuency:CENTer` or `OUTPut[:STATe]`.
fn pattern(notation: &str) -> Vec<Node> {
    let mut nodes = Vec::new();
    let mut optional = false;
    let mut word = String::new();
    let flush = |word: &mut String, optional: bool, nodes: &mut Vec<Node>| {
        if !word.is_empty() {
            nodes.push(Node {
                long: std::mem::take(word),
                optional,
            });
        }
    };
    for c in notation.chars() {
        match c {
            '[' => {
                flush(&mut word, optional, &mut nodes);
                optional = true;
            }
            ']' => {
                flush(&mut word, optional, &mut nodes);
                optional = false;
            }
            ':' => flush(&mut word, optional, &mut nodes),
            other => word.push(other),
        }
    }
    flush(&mut word, optional, &mut nodes);
    nodes
}

/// A received keyword matches a node in its long or short form, in any case (SCPI-1999 Vol 1
/// 6.2.1). The short form is the leading upper-case part of the long form. A numeric suffix 1
/// may follow (6.2.5: a missing suffix means 1).
fn keyword_matches(received: &str, node: &Node) -> bool {
    let received = received.strip_suffix('1').unwrap_or(received);
    let short: String = node
        .long
        .chars()
        .take_while(|c| !c.is_ascii_lowercase())
        .collect();
    received.eq_ignore_ascii_case(&node.long) || received.eq_ignore_ascii_case(&short)
}

/// True when the received keywords spell the pattern, optional nodes left out or given.
fn header_matches(received: &[String], nodes: &[Node]) -> bool {
    // reachable[i][j]: the first i received keywords match the first j nodes.
    let (r, n) = (received.len(), nodes.len());
    let mut reachable = vec![vec![false; n + 1]; r + 1];
    reachable[0][0] = true;
    for i in 0..=r {
        for j in 0..n {
            if !reachable[i][j] {
                continue;
            }
            if nodes[j].optional {
                reachable[i][j + 1] = true;
            }
            if i < r && keyword_matches(&received[i], &nodes[j]) {
                reachable[i + 1][j + 1] = true;
            }
        }
    }
    reachable[r][n]
}

// ---------------------------------------------------------------------------------------------
// Error queue (SCPI-1999 Vol 2, chapter 21; IEEE 488.2 11.5)

const QUEUE_LENGTH: usize = 16;

#[derive(Debug, Default)]
struct ErrorQueue(VecDeque<(i32, &'static str)>);

impl ErrorQueue {
    /// Adds an entry; when full, the last entry becomes -350 "Queue overflow" (21.8.2).
    fn push(&mut self, code: i32, message: &'static str) {
        if self.0.len() + 1 >= QUEUE_LENGTH {
            if self.0.len() < QUEUE_LENGTH {
                self.0.push_back((-350, "Queue overflow"));
            }
            return;
        }
        self.0.push_back((code, message));
    }

    fn next(&mut self) -> String {
        match self.0.pop_front() {
            Some((code, message)) => format!("{code},\"{message}\""),
            None => "0,\"No error\"".into(),
        }
    }
}

/// Speed of light in vacuum, m/s (exact, SI definition).
const C_M_PER_S: f64 = 299_792_458.0;

/// Refractive index of standard air (dry, 15 °C, 101 325 Pa, 450 ppm CO2) at the vacuum
/// wavelength `vacuum_m`: the revised Edlén equation, Birch and Downs, Metrologia 31, 315
/// (1994), coefficients from memory: (n - 1) 1e8 = 8342.54 + 2406147 / (130 - s^2) +
/// 15998 / (38.9 - s^2), s in inverse micrometres.
pub fn air_index(vacuum_m: f64) -> f64 {
    let s2 = (1e-6 / vacuum_m).powi(2);
    1.0 + (8342.54 + 2_406_147.0 / (130.0 - s2) + 15_998.0 / (38.9 - s2)) * 1e-8
}

/// How the analyzer states its axis.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub enum BenchAxis {
    /// Frequency in hertz, `[SENSe:]FREQuency:CENTer`/`SPAN` (the default).
    #[default]
    Frequency,
    /// Wavelength in metres, `[SENSe:]WAVelength:CENTer`/`SPAN`; `air`: wavelengths in standard
    /// air, else in vacuum.
    Wavelength { air: bool },
}

/// Options of the bench's analyzer.
#[derive(Debug, Clone, Copy, Default)]
pub struct BenchOptions {
    pub axis: BenchAxis,
    /// `TRACe[:DATA]?` in watts instead of dBm.
    pub trace_in_watts: bool,
}

impl BenchAxis {
    /// The wavelength in this axis's medium of light at `f_hz`.
    fn wavelength(self, f_hz: f64) -> f64 {
        let vacuum = C_M_PER_S / f_hz;
        match self {
            BenchAxis::Wavelength { air: true } => vacuum / air_index(vacuum),
            _ => vacuum,
        }
    }

    /// The optical frequency of light whose wavelength in this axis's medium is `l_m`.
    fn frequency(self, l_m: f64) -> f64 {
        match self {
            BenchAxis::Wavelength { air: true } => {
                let mut vacuum = l_m;
                for _ in 0..5 {
                    vacuum = air_index(vacuum) * l_m;
                }
                C_M_PER_S / vacuum
            }
            _ => C_M_PER_S / l_m,
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Instrument state

#[derive(Debug)]
pub struct Truth {
    pub source_frequency_hz: f64,
    pub source_level_dbm: f64,
    pub output_on: bool,
    pub center_hz: f64,
    pub span_hz: f64,
    pub rbw_hz: f64,
    pub points: usize,
    /// `REAL,32`, `REAL,64` or `ASCii`.
    pub format_bits: Option<u32>,
    pub swapped: bool,
    /// The trace of the last sweep (dBm), if any.
    pub trace: Option<Vec<f64>>,
    pub sweeps: usize,
    /// State of the deterministic display noise.
    noise: u64,
    source_errors: ErrorQueue,
    analyzer_errors: ErrorQueue,
    /// Every command unit received, per instrument, for the test's assertions.
    pub source_log: Vec<String>,
    pub analyzer_log: Vec<String>,
    pub options: BenchOptions,
    /// The wavelength settings (metres) when the axis is in wavelength.
    pub center_m: f64,
    pub span_m: f64,
    pub rbw_m: f64,
}

impl Default for Truth {
    fn default() -> Self {
        Truth {
            source_frequency_hz: 1e9,
            source_level_dbm: -20.0,
            output_on: false,
            center_hz: 193.4e12,
            span_hz: 50e9,
            rbw_hz: 10e6,
            points: 1001,
            format_bits: None,
            swapped: false,
            trace: None,
            sweeps: 0,
            noise: 0x2545_f491_4f6c_dd1d,
            source_errors: ErrorQueue::default(),
            analyzer_errors: ErrorQueue::default(),
            source_log: Vec::new(),
            analyzer_log: Vec::new(),
            options: BenchOptions::default(),
            center_m: 1550e-9,
            span_m: 0.4e-9,
            rbw_m: 0.08e-12,
        }
    }
}

impl Truth {
    /// The modulation index now (0 with the output off).
    pub fn beta(&self) -> f64 {
        if !self.output_on {
            return 0.0;
        }
        std::f64::consts::PI * peak_volts(self.source_level_dbm)
            / true_v_pi(self.source_frequency_hz)
    }

    /// Uniform noise in [-0.5, 0.5) from a 64-bit xorshift (Marsaglia 2003).
    fn noise(&mut self) -> f64 {
        let mut x = self.noise;
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        self.noise = x;
        (x >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    }

    /// One sweep: the comb drawn on the current axis.
    fn sweep(&mut self) {
        let beta = self.beta();
        let fm = self.source_frequency_hz;
        let total_mw = 10f64.powf(OPTICAL_DBM / 10.0);
        let lines: Vec<(f64, f64)> = (-30i32..=30)
            .map(|n| {
                let j = puruspe::Jn(n.unsigned_abs(), beta);
                (LASER_HZ + n as f64 * fm, total_mw * j * j)
            })
            .filter(|(_, p)| *p > 1e-14)
            .collect();
        // Where each point sits in optical frequency: a grid uniform in the axis's own unit.
        let (positions, rbw_hz): (Vec<f64>, f64) = match self.options.axis {
            BenchAxis::Frequency => {
                let start = self.center_hz - self.span_hz / 2.0;
                let step = self.span_hz / (self.points - 1) as f64;
                let x = (0..self.points).map(|i| start + step * i as f64).collect();
                (x, self.rbw_hz)
            }
            axis @ BenchAxis::Wavelength { .. } => {
                let start = self.center_m - self.span_m / 2.0;
                let step = self.span_m / (self.points - 1) as f64;
                let x = (0..self.points)
                    .map(|i| axis.frequency(start + step * i as f64))
                    .collect();
                // The resolution is a wavelength width: its frequency width at the centre.
                let h = 1e-13;
                let per_metre = (axis.frequency(self.center_m - h)
                    - axis.frequency(self.center_m + h))
                    / (2.0 * h);
                (x, self.rbw_m * per_metre)
            }
        };
        let sigma = rbw_hz / (2.0 * (2.0 * std::f64::consts::LN_2).sqrt());
        let floor_mw = 10f64.powf(FLOOR_DBM / 10.0);
        let mut trace = Vec::with_capacity(self.points);
        for i in 0..self.points {
            let x = positions[i];
            let step = if i + 1 < self.points {
                (positions[i + 1] - x).abs()
            } else {
                (x - positions[i - 1]).abs()
            };
            let mut p = floor_mw;
            for &(f, power) in &lines {
                // Coarser than the resolution, a point shows the strongest response within its
                // bin (a peak detector, common practice); finer, the response at its frequency.
                let d = if step > rbw_hz {
                    ((x - f).abs() - step / 2.0).max(0.0)
                } else {
                    (x - f).abs()
                };
                if d < 8.0 * sigma {
                    p += power * (-0.5 * (d / sigma).powi(2)).exp();
                }
            }
            trace.push(10.0 * p.log10() + 0.04 * self.noise());
        }
        self.trace = Some(trace);
        self.sweeps += 1;
    }
}

// ---------------------------------------------------------------------------------------------
// Program messages (IEEE 488.2 7.3; SCPI-1999 Vol 1 6.2.4 for the header path after ';')

#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Role {
    Source,
    Analyzer,
}

/// A reply: text or bytes (a definite-length block).
enum Out {
    Text(String),
    Bytes(Vec<u8>),
}

/// A parsed parameter: number (with an optional suffix) or character data.
fn number_with_suffix(text: &str) -> Option<f64> {
    let t = text.trim();
    let split = t
        .find(|c: char| c.is_ascii_alphabetic() && c != 'e' && c != 'E')
        .unwrap_or(t.len());
    let (digits, suffix) = t.split_at(split);
    let value: f64 = digits.trim().parse().ok()?;
    // Suffix multipliers (SCPI-1999 Vol 1 7.7.3): MHZ is mega, MA mega, K kilo, G giga.
    let scale = match suffix.trim().to_ascii_uppercase().as_str() {
        "" | "HZ" | "DBM" | "M" => 1.0,
        "NM" => 1e-9,
        "UM" => 1e-6,
        "KHZ" => 1e3,
        "MHZ" | "MAHZ" => 1e6,
        "GHZ" => 1e9,
        _ => return None,
    };
    Some(value * scale)
}

fn word_is(text: &str, long: &str) -> bool {
    keyword_matches(
        text.trim(),
        &Node {
            long: long.into(),
            optional: false,
        },
    )
}

/// Executes one line (a program message) and returns the response message, if any.
pub fn execute(truth: &mut Truth, role: Role, line: &str) -> Option<Vec<u8>> {
    let mut replies: Vec<Out> = Vec::new();
    let mut path: Vec<String> = Vec::new();
    for unit in line.split(';') {
        let unit = unit.trim();
        if unit.is_empty() {
            continue;
        }
        match role {
            Role::Source => truth.source_log.push(unit.to_string()),
            Role::Analyzer => truth.analyzer_log.push(unit.to_string()),
        }
        let (header, params) = match unit.find(char::is_whitespace) {
            Some(at) => (&unit[..at], unit[at..].trim()),
            None => (unit, ""),
        };
        let query = header.ends_with('?');
        let header = header.trim_end_matches('?');
        let params: Vec<&str> = if params.is_empty() {
            Vec::new()
        } else {
            params.split(',').map(str::trim).collect()
        };
        let outcome = if let Some(common) = header.strip_prefix('*') {
            // Common commands do not change the header path (IEEE 488.2 7.6.1; SCPI 6.2.4).
            common_command(truth, role, &common.to_ascii_uppercase(), query)
        } else {
            let absolute = header.starts_with(':');
            let mut keywords: Vec<String> = if absolute { Vec::new() } else { path.clone() };
            keywords.extend(
                header
                    .trim_start_matches(':')
                    .split(':')
                    .map(str::to_string),
            );
            path = keywords[..keywords.len() - 1].to_vec();
            match role {
                Role::Source => source_command(truth, &keywords, query, &params),
                Role::Analyzer => analyzer_command(truth, &keywords, query, &params),
            }
        };
        match outcome {
            Ok(Some(out)) => replies.push(out),
            Ok(None) => {}
            Err((code, message)) => {
                let queue = match role {
                    Role::Source => &mut truth.source_errors,
                    Role::Analyzer => &mut truth.analyzer_errors,
                };
                queue.push(code, message);
                // After a command error the rest of the message is not executed (common
                // practice; IEEE 488.2 6.1.6 lets the parser discard it).
                if (-199..=-100).contains(&code) {
                    break;
                }
            }
        }
    }
    if replies.is_empty() {
        return None;
    }
    // Several responses in one message are separated by ';' (IEEE 488.2 8.4.1), ended by LF.
    let mut out = Vec::new();
    for (i, reply) in replies.into_iter().enumerate() {
        if i > 0 {
            out.push(b';');
        }
        match reply {
            Out::Text(t) => out.extend(t.into_bytes()),
            Out::Bytes(b) => out.extend(b),
        }
    }
    out.push(b'\n');
    Some(out)
}

type Outcome = Result<Option<Out>, (i32, &'static str)>;

const UNDEFINED_HEADER: (i32, &str) = (-113, "Undefined header");
const PARAMETER_NOT_ALLOWED: (i32, &str) = (-108, "Parameter not allowed");
const MISSING_PARAMETER: (i32, &str) = (-109, "Missing parameter");
const DATA_OUT_OF_RANGE: (i32, &str) = (-222, "Data out of range");
const ILLEGAL_PARAMETER: (i32, &str) = (-224, "Illegal parameter value");

fn text(t: impl Into<String>) -> Outcome {
    Ok(Some(Out::Text(t.into())))
}

/// A number in NR3 form (IEEE 488.2 8.7.4).
fn nr3(v: f64) -> Outcome {
    text(format!("{v:E}"))
}

fn common_command(truth: &mut Truth, role: Role, name: &str, query: bool) -> Outcome {
    match (name, query) {
        ("IDN", true) => text(match role {
            Role::Source => "Independent Test Works,RF-SRC-40,IT-0001,2.0",
            Role::Analyzer => "Independent Test Works,OPT-ANA-HR,IT-0002,2.0",
        }),
        ("OPC", true) => text("1"),
        ("OPC", false) | ("WAI", false) => Ok(None),
        ("ESR", true) => text("0"),
        ("CLS", false) => {
            match role {
                Role::Source => truth.source_errors.0.clear(),
                Role::Analyzer => truth.analyzer_errors.0.clear(),
            }
            Ok(None)
        }
        ("RST", false) => {
            match role {
                Role::Source => {
                    truth.output_on = false;
                    truth.source_level_dbm = -20.0;
                }
                Role::Analyzer => truth.trace = None,
            }
            Ok(None)
        }
        _ => Err(UNDEFINED_HEADER),
    }
}

/// `SYSTem:ERRor[:NEXT]?`, shared by both instruments.
fn system_error(
    truth: &mut Truth,
    role: Role,
    keywords: &[String],
    query: bool,
) -> Option<Outcome> {
    if !(query && header_matches(keywords, &pattern("SYSTem:ERRor[:NEXT]"))) {
        return None;
    }
    Some(text(match role {
        Role::Source => truth.source_errors.next(),
        Role::Analyzer => truth.analyzer_errors.next(),
    }))
}

/// A numeric setting: a query (optionally MINimum/MAXimum, SCPI-1999 Vol 1 7.2.1.1) or a set
/// within `range`.
fn numeric(
    query: bool,
    params: &[&str],
    now: f64,
    range: (f64, f64),
    set: &mut dyn FnMut(f64),
) -> Outcome {
    if query {
        return match params {
            [] => nr3(now),
            [p] if word_is(p, "MINimum") => nr3(range.0),
            [p] if word_is(p, "MAXimum") => nr3(range.1),
            [_] => Err(ILLEGAL_PARAMETER),
            _ => Err(PARAMETER_NOT_ALLOWED),
        };
    }
    match params {
        [] => Err(MISSING_PARAMETER),
        [p] => match number_with_suffix(p) {
            Some(v) if v >= range.0 && v <= range.1 => {
                set(v);
                Ok(None)
            }
            Some(_) => Err(DATA_OUT_OF_RANGE),
            None => Err((-104, "Data type error")),
        },
        _ => Err(PARAMETER_NOT_ALLOWED),
    }
}

fn source_command(truth: &mut Truth, keywords: &[String], query: bool, params: &[&str]) -> Outcome {
    if let Some(outcome) = system_error(truth, Role::Source, keywords, query) {
        return outcome;
    }
    let is = |notation: &str| header_matches(keywords, &pattern(notation));
    if is("[SOURce:]FREQuency[:CW]") {
        let now = truth.source_frequency_hz;
        return numeric(query, params, now, SOURCE_FREQUENCY_HZ, &mut |v| {
            truth.source_frequency_hz = v
        });
    }
    if is("[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]") {
        let now = truth.source_level_dbm;
        // The level is set in 0.01 dB steps.
        return numeric(query, params, now, SOURCE_LEVEL_DBM, &mut |v| {
            truth.source_level_dbm = (v * 100.0).round() / 100.0
        });
    }
    if is("OUTPut[:STATe]") {
        if query {
            return text(if truth.output_on { "1" } else { "0" });
        }
        // Boolean program data: ON, OFF, 1, 0 (SCPI-1999 Vol 1 7.3).
        return match params {
            [p] if word_is(p, "ON") || *p == "1" => {
                truth.output_on = true;
                Ok(None)
            }
            [p] if word_is(p, "OFF") || *p == "0" => {
                truth.output_on = false;
                Ok(None)
            }
            [] => Err(MISSING_PARAMETER),
            _ => Err(ILLEGAL_PARAMETER),
        };
    }
    Err(UNDEFINED_HEADER)
}

fn analyzer_command(
    truth: &mut Truth,
    keywords: &[String],
    query: bool,
    params: &[&str],
) -> Outcome {
    if let Some(outcome) = system_error(truth, Role::Analyzer, keywords, query) {
        return outcome;
    }
    let is = |notation: &str| header_matches(keywords, &pattern(notation));
    if let BenchAxis::Wavelength { .. } = truth.options.axis {
        if let Some(outcome) = wavelength_command(truth, keywords, query, params) {
            return outcome;
        }
    }
    if is("[SENSe:]FREQuency:CENTer") {
        let now = truth.center_hz;
        return numeric(query, params, now, (180e12, 240e12), &mut |v| {
            truth.center_hz = v
        });
    }
    if is("[SENSe:]FREQuency:SPAN") {
        let now = truth.span_hz;
        return numeric(query, params, now, (1e6, 20e12), &mut |v| truth.span_hz = v);
    }
    if is("[SENSe:]BANDwidth[:RESolution]") {
        let now = truth.rbw_hz;
        return numeric(
            query,
            params,
            now,
            (RBW_HZ[0] / 2.0, RBW_HZ[6] * 2.0),
            &mut |v| {
                truth.rbw_hz = RBW_HZ
                    .iter()
                    .copied()
                    .min_by(|a, b| (a - v).abs().total_cmp(&(b - v).abs()))
                    .unwrap_or(v)
            },
        );
    }
    if is("[SENSe:]SWEep:POINts") {
        let now = truth.points as f64;
        return numeric(query, params, now, (3.0, 100_001.0), &mut |v| {
            truth.points = v.round() as usize
        });
    }
    if is("INITiate[:IMMediate]") && !query {
        truth.sweep();
        return Ok(None);
    }
    if is("FORMat[:DATA]") {
        if query {
            return text(match truth.format_bits {
                None => "ASC".to_string(),
                Some(bits) => format!("REAL,{bits}"),
            });
        }
        return match params {
            [p] if word_is(p, "ASCii") => {
                truth.format_bits = None;
                Ok(None)
            }
            [p] if word_is(p, "REAL") => {
                truth.format_bits = Some(32);
                Ok(None)
            }
            [p, bits] if word_is(p, "REAL") => match *bits {
                "32" => {
                    truth.format_bits = Some(32);
                    Ok(None)
                }
                "64" => {
                    truth.format_bits = Some(64);
                    Ok(None)
                }
                _ => Err(ILLEGAL_PARAMETER),
            },
            _ => Err(ILLEGAL_PARAMETER),
        };
    }
    if is("FORMat:BORDer") {
        return match params {
            [p] if word_is(p, "NORMal") => {
                truth.swapped = false;
                Ok(None)
            }
            [p] if word_is(p, "SWAPped") => {
                truth.swapped = true;
                Ok(None)
            }
            _ => Err(ILLEGAL_PARAMETER),
        };
    }
    if is("TRACe[:DATA]") && query {
        let Some(mut trace) = truth.trace.clone() else {
            return Err((-230, "Data corrupt or stale"));
        };
        if truth.options.trace_in_watts {
            for v in trace.iter_mut() {
                *v = 10f64.powf((*v - 30.0) / 10.0);
            }
        }
        return Ok(Some(encode(&trace, truth.format_bits, truth.swapped)));
    }
    Err(UNDEFINED_HEADER)
}

/// The axis and resolution commands of a wavelength analyzer (all in metres); the frequency
/// forms are then undefined headers. `None` for any other command.
fn wavelength_command(
    truth: &mut Truth,
    keywords: &[String],
    query: bool,
    params: &[&str],
) -> Option<Outcome> {
    let is = |notation: &str| header_matches(keywords, &pattern(notation));
    if is("[SENSe:]FREQuency:CENTer") || is("[SENSe:]FREQuency:SPAN") {
        return Some(Err(UNDEFINED_HEADER));
    }
    if is("[SENSe:]WAVelength:CENTer") {
        let now = truth.center_m;
        return Some(numeric(query, params, now, (1250e-9, 1650e-9), &mut |v| {
            truth.center_m = v
        }));
    }
    if is("[SENSe:]WAVelength:SPAN") {
        let now = truth.span_m;
        return Some(numeric(query, params, now, (1e-12, 100e-9), &mut |v| {
            truth.span_m = v
        }));
    }
    if is("[SENSe:]BANDwidth[:RESolution]") {
        // The offered bandwidths are the frequency ones as wavelength widths at 1550 nm
        // (d lambda = lambda^2 d f / c).
        let offered: Vec<f64> = RBW_HZ
            .iter()
            .map(|b| 1550e-9 * 1550e-9 * b / C_M_PER_S)
            .collect();
        let now = truth.rbw_m;
        let range = (offered[0] / 2.0, offered[offered.len() - 1] * 2.0);
        return Some(numeric(query, params, now, range, &mut |v| {
            truth.rbw_m = offered
                .iter()
                .copied()
                .min_by(|a, b| (a - v).abs().total_cmp(&(b - v).abs()))
                .unwrap_or(v)
        }));
    }
    None
}

/// ASCII (NR3 values separated by commas) or a definite-length block `#<d><len><bytes>` of
/// IEEE 754 values, most significant byte first unless swapped (IEEE 488.2 8.7.9; SCPI-1999
/// Vol 1 9.3 FORMat:BORDer).
fn encode(values: &[f64], bits: Option<u32>, swapped: bool) -> Out {
    let Some(bits) = bits else {
        let list: Vec<String> = values.iter().map(|v| format!("{v:E}")).collect();
        return Out::Text(list.join(","));
    };
    let mut payload = Vec::with_capacity(values.len() * bits as usize / 8);
    for &v in values {
        match (bits, swapped) {
            (32, false) => payload.extend((v as f32).to_be_bytes()),
            (32, true) => payload.extend((v as f32).to_le_bytes()),
            (_, false) => payload.extend(v.to_be_bytes()),
            (_, true) => payload.extend(v.to_le_bytes()),
        }
    }
    let length = payload.len().to_string();
    let mut out = format!("#{}{}", length.len(), length).into_bytes();
    out.extend(payload);
    Out::Bytes(out)
}

// ---------------------------------------------------------------------------------------------
// TCP

/// The two instruments on two loopback ports, sharing one truth.
pub struct IndependentBench {
    pub truth: Arc<Mutex<Truth>>,
    pub source: SocketAddr,
    pub analyzer: SocketAddr,
}

impl IndependentBench {
    pub async fn start() -> IndependentBench {
        IndependentBench::start_with(BenchOptions::default()).await
    }

    /// A bench whose analyzer has the given options.
    pub async fn start_with(options: BenchOptions) -> IndependentBench {
        let truth = Arc::new(Mutex::new(Truth {
            options,
            ..Truth::default()
        }));
        let source = listen(truth.clone(), Role::Source).await;
        let analyzer = listen(truth.clone(), Role::Analyzer).await;
        IndependentBench {
            truth,
            source,
            analyzer,
        }
    }

    pub fn resource(&self, role: Role) -> String {
        let addr = match role {
            Role::Source => self.source,
            Role::Analyzer => self.analyzer,
        };
        format!("TCPIP::{}::{}::SOCKET", addr.ip(), addr.port())
    }
}

async fn listen(truth: Arc<Mutex<Truth>>, role: Role) -> SocketAddr {
    let listener = TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind loopback");
    let addr = listener.local_addr().expect("local address");
    tokio::spawn(async move {
        while let Ok((socket, _)) = listener.accept().await {
            let truth = truth.clone();
            tokio::spawn(async move {
                let _ = socket.set_nodelay(true);
                let (read, mut write) = socket.into_split();
                let mut lines = BufReader::new(read).lines();
                while let Ok(Some(line)) = lines.next_line().await {
                    let reply = {
                        let mut t = truth.lock().expect("truth lock");
                        execute(&mut t, role, &line)
                    };
                    if let Some(bytes) = reply {
                        if write.write_all(&bytes).await.is_err() {
                            return;
                        }
                    }
                }
            });
        }
    });
    addr
}

#[test]
fn headers_follow_the_long_short_rule() {
    // SCPI-1999 Vol 1 6.2.1 (from memory): long or short form, any case; bracketed nodes may
    // be left out; a suffix 1 is the same as none.
    let p = pattern("[SENSe:]FREQuency:CENTer");
    let k = |s: &str| -> Vec<String> { s.split(':').map(str::to_string).collect() };
    assert!(header_matches(&k("FREQ:CENT"), &p));
    assert!(header_matches(&k("sense:frequency:center"), &p));
    assert!(header_matches(&k("SENS1:FREQ:CENT"), &p));
    assert!(!header_matches(&k("FREQ:STAR"), &p));
    assert!(!header_matches(&k("FRE:CENT"), &p));
    let power = pattern("[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]");
    assert!(header_matches(&k("POW"), &power));
    assert!(header_matches(&k("SOUR:POW:LEV:IMM:AMPL"), &power));
    assert!(header_matches(&k("POWer:AMPLitude"), &power));
}

#[test]
fn the_bench_answers_as_the_standards_say() {
    let mut t = Truth::default();
    // A compound message: relative header after ';' continues the previous path (6.2.4).
    let reply = execute(&mut t, Role::Analyzer, "FREQ:CENT 193.5THZ;SPAN?").map(String::from_utf8);
    // THZ is not a suffix this instrument knows: -104, and nothing after it is run... but SPAN?
    // is in the same message after a -1xx error, so no reply.
    assert!(reply.is_none());
    assert_eq!(t.analyzer_errors.next(), "-104,\"Data type error\"");
    let reply = execute(&mut t, Role::Analyzer, "FREQ:CENT 193.5E12;SPAN?").unwrap();
    assert_eq!(String::from_utf8(reply).unwrap(), "5E10\n");
    // Undefined headers: -113 and no response (IEEE 488.2 6.1.6).
    assert!(execute(&mut t, Role::Analyzer, "FREQ:STAR?").is_none());
    assert!(execute(&mut t, Role::Analyzer, "INIT:CONT OFF").is_none());
    assert_eq!(t.analyzer_errors.next(), "-113,\"Undefined header\"");
    assert_eq!(t.analyzer_errors.next(), "-113,\"Undefined header\"");
    assert_eq!(t.analyzer_errors.next(), "0,\"No error\"");
    // MINimum/MAXimum (SCPI-1999 Vol 1 7.2.1.1).
    let reply = execute(&mut t, Role::Source, "SOUR:POW? MAX;:FREQ? min").unwrap();
    assert_eq!(String::from_utf8(reply).unwrap(), "2.5E1;1E5\n");
    // A wavelength analyzer in air: 1550 nm in standard air is 193.36 THz (n - 1 = 2.73e-4;
    // c / 1550 nm = 193.4145 THz in vacuum); frequency commands are undefined headers.
    let mut w = Truth {
        options: BenchOptions {
            axis: BenchAxis::Wavelength { air: true },
            trace_in_watts: true,
        },
        ..Truth::default()
    };
    let f = BenchAxis::Wavelength { air: true }.frequency(1550e-9);
    assert!(
        (f - 193.4145e12 / (1.0 + 2.73e-4)).abs() < 0.01e12 * 1e-2,
        "{f}"
    );
    assert!(execute(&mut w, Role::Analyzer, "FREQ:CENT?").is_none());
    assert_eq!(w.analyzer_errors.next(), "-113,\"Undefined header\"");
    let reply = execute(&mut w, Role::Analyzer, "SENS:WAV:CENT 1549.5NM;CENT?").unwrap();
    let centre: f64 = String::from_utf8(reply).unwrap().trim().parse().unwrap();
    assert!((centre - 1549.5e-9).abs() < 1e-18, "{centre}");
    // Sum rule J_0^2 + 2 sum J_k^2 = 1 (DLMF 10.23.3): the comb keeps the optical power.
    t.output_on = true;
    t.source_level_dbm = 15.0;
    let beta = t.beta();
    let sum: f64 = (-30i32..=30)
        .map(|n| puruspe::Jn(n.unsigned_abs(), beta).powi(2))
        .sum();
    assert!((sum - 1.0).abs() < 1e-9, "{sum}");
}
