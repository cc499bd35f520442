//! Per-model command profiles: how a generic SCPI driver talks to one kind of instrument.
//!
//! The generic drivers speak the standard SCPI command tree by default. Real instruments differ
//! in dialect (an extra node, another keyword, CR LF terminators, little-endian data), so every
//! command string, terminator, data format, limit and read-back tolerance can be overridden from a
//! TOML file. A profile lists only what differs: every table and key has a default, unknown keys are
//! refused (a misspelt key must not be silently ignored), and [`SourceProfile::validate`] /
//! [`AnalyzerProfile::validate`] check what serde cannot (a setter without `{value}`, an empty
//! terminator, limits the wrong way round) with messages that name the key to fix.
//!
//! Command templates take the value to send in place of `{value}`; numbers are written in plain
//! decimal (NR1/NR2) in the unit the key names (hertz, dBm, a count).

use crate::scpi::{ByteOrder, DataFormat};
use crate::transport::TransportConfig;
use crate::{AnalyzerCapabilities, SourceLimits};
use halfwave_units::{Dbm, Hz, Seconds};
use serde::{Deserialize, Serialize};
use std::ops::Not;
use std::path::{Path, PathBuf};
use std::time::Duration;

pub mod sensor;
pub use sensor::SensorProfile;

/// The placeholder a setter template must contain.
pub const VALUE_PLACEHOLDER: &str = "{value}";

/// Why a profile could not be used.
#[derive(Debug, thiserror::Error)]
pub enum ProfileError {
    #[error("cannot read the instrument profile {path}: {source}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(
        "the instrument profile {origin} is not valid TOML for this instrument kind: {message}"
    )]
    Syntax { origin: String, message: String },
    #[error("the instrument profile {origin} is not usable: {key} {problem}")]
    Invalid {
        origin: String,
        key: String,
        problem: String,
    },
}

/// Connection settings: terminators, timeouts and reconnection.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ConnectionProfile {
    /// What ends a reply (TOML escapes work: "\n", "\r\n").
    pub read_terminator: String,
    /// What is appended to each command.
    pub write_terminator: String,
    /// Time limit for one command or query, in milliseconds.
    pub timeout_ms: u64,
    /// Time limit for one connection attempt, in milliseconds.
    pub connect_timeout_ms: u64,
    /// Connection attempts before giving up.
    pub reconnect_attempts: u32,
    /// Pause after the first failed attempt, doubling after each further one, in milliseconds.
    pub reconnect_backoff_ms: u64,
    /// How many times a failed step (lost link, timeout, garbled reply) is repeated after
    /// reconnecting. Steps are idempotent: set a value and read it back, or query.
    pub retries: u32,
}

impl Default for ConnectionProfile {
    fn default() -> Self {
        let transport = TransportConfig::default();
        ConnectionProfile {
            read_terminator: "\n".into(),
            write_terminator: "\n".into(),
            timeout_ms: transport.timeout.as_millis() as u64,
            connect_timeout_ms: transport.connect_timeout.as_millis() as u64,
            reconnect_attempts: transport.reconnect_attempts,
            reconnect_backoff_ms: transport.reconnect_backoff.as_millis() as u64,
            retries: 1,
        }
    }
}

impl ConnectionProfile {
    /// The transport settings these connection settings stand for.
    pub fn transport_config(&self) -> TransportConfig {
        self.transport_config_clearing("")
    }

    /// The transport settings, sending `clear_status` (`*CLS`; empty for none) on every new
    /// connection.
    pub fn transport_config_clearing(&self, clear_status: &str) -> TransportConfig {
        TransportConfig {
            clear_on_connect: clear_status.to_string(),
            read_terminator: self.read_terminator.as_bytes().to_vec(),
            write_terminator: self.write_terminator.as_bytes().to_vec(),
            timeout: Duration::from_millis(self.timeout_ms),
            connect_timeout: Duration::from_millis(self.connect_timeout_ms),
            reconnect_attempts: self.reconnect_attempts,
            reconnect_backoff: Duration::from_millis(self.reconnect_backoff_ms),
            ..TransportConfig::default()
        }
    }

    fn validate(&self, check: &mut Checker) {
        check.require(
            "connection.read_terminator",
            !self.read_terminator.is_empty(),
            "must not be empty (use \"\\n\" unless the instrument ends replies otherwise)",
        );
        check.require(
            "connection.timeout_ms",
            self.timeout_ms > 0,
            "must be more than 0",
        );
        check.require(
            "connection.connect_timeout_ms",
            self.connect_timeout_ms > 0,
            "must be more than 0",
        );
        check.require(
            "connection.reconnect_attempts",
            self.reconnect_attempts > 0,
            "must be at least 1",
        );
    }
}

/// IEEE 488.2 common commands and the SCPI error queue.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct CommonCommands {
    pub identify: String,
    pub reset: String,
    pub clear_status: String,
    pub operation_complete: String,
    /// Reads the standard event status register.
    pub event_status: String,
    /// The error-queue query; an empty string means the instrument has none (errors then go
    /// unnoticed until a read-back disagrees).
    pub error_query: String,
    /// Most entries read from the error queue after one step (guards against a queue that never
    /// answers "no error").
    pub max_error_entries: u32,
}

impl Default for CommonCommands {
    fn default() -> Self {
        CommonCommands {
            identify: crate::ieee488::IDENTIFY.into(),
            reset: crate::ieee488::RESET.into(),
            clear_status: crate::ieee488::CLEAR_STATUS.into(),
            operation_complete: crate::ieee488::OPERATION_COMPLETE.into(),
            event_status: crate::ieee488::EVENT_STATUS.into(),
            error_query: crate::ieee488::SYSTEM_ERROR.into(),
            max_error_entries: 32,
        }
    }
}

impl CommonCommands {
    fn validate(&self, check: &mut Checker) {
        check.non_empty("common.identify", &self.identify);
        check.non_empty("common.operation_complete", &self.operation_complete);
        check.require(
            "common.max_error_entries",
            self.max_error_entries > 0,
            "must be at least 1",
        );
    }
}

/// Collects the first problem found while validating, with the key that has it.
struct Checker {
    problem: Option<(String, String)>,
}

impl Checker {
    fn require(&mut self, key: &str, ok: bool, problem: &str) {
        if !ok && self.problem.is_none() {
            self.problem = Some((key.to_string(), problem.to_string()));
        }
    }

    fn non_empty(&mut self, key: &str, value: &str) {
        self.require(key, !value.trim().is_empty(), "must not be empty");
    }

    fn setter(&mut self, key: &str, template: &str) {
        self.require(
            key,
            template.contains(VALUE_PLACEHOLDER),
            "must contain {value} where the number goes, e.g. \"FREQuency {value}\"",
        );
    }

    fn finish(self, origin: &str) -> Result<(), ProfileError> {
        match self.problem {
            None => Ok(()),
            Some((key, problem)) => Err(ProfileError::Invalid {
                origin: origin.to_string(),
                key,
                problem,
            }),
        }
    }
}

/// Fills a setter template.
pub fn fill_template(template: &str, value: &str) -> String {
    template.replace(VALUE_PLACEHOLDER, value)
}

fn parse_toml<T: serde::de::DeserializeOwned>(text: &str, origin: &str) -> Result<T, ProfileError> {
    toml::from_str(text).map_err(|e| ProfileError::Syntax {
        origin: origin.to_string(),
        message: e.to_string(),
    })
}

fn read_file(path: &Path) -> Result<String, ProfileError> {
    std::fs::read_to_string(path).map_err(|source| ProfileError::Read {
        path: path.to_path_buf(),
        source,
    })
}

/// The kind of instrument a profile describes (the `kind` key).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ProfileKind {
    RfSource,
    SpectrumAnalyzer,
    PowerSensor,
}

// ---------------------------------------------------------------------------------------------
// RF source

/// Command strings of an RF source.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SourceCommands {
    /// Sets the CW frequency; `{value}` in hertz.
    pub set_frequency: String,
    pub query_frequency: String,
    /// Sets the output level; `{value}` in dBm.
    pub set_level: String,
    pub query_level: String,
    /// Switches the output; `{value}` is `output_on_word` or `output_off_word`.
    pub set_output: String,
    pub query_output: String,
    pub output_on_word: String,
    pub output_off_word: String,
    /// Range queries asked once at connect, with the standard MINimum/MAXimum query parameters
    /// (SCPI-1999 Vol 1, 7.2.1.1). An empty string skips one; an instrument that refuses one
    /// falls back to `[limits]`, then to the conservative defaults.
    pub query_min_frequency: String,
    pub query_max_frequency: String,
    pub query_min_level: String,
    pub query_max_level: String,
}

impl Default for SourceCommands {
    fn default() -> Self {
        SourceCommands {
            set_frequency: "FREQuency {value}".into(),
            query_frequency: "FREQuency?".into(),
            set_level: "POWer {value}".into(),
            query_level: "POWer?".into(),
            set_output: "OUTPut {value}".into(),
            query_output: "OUTPut?".into(),
            output_on_word: "ON".into(),
            output_off_word: "OFF".into(),
            query_min_frequency: "FREQuency? MINimum".into(),
            query_max_frequency: "FREQuency? MAXimum".into(),
            query_min_level: "POWer? MINimum".into(),
            query_max_level: "POWer? MAXimum".into(),
        }
    }
}

/// The ranges a source accepts (the driver refuses requests outside them before sending). Each
/// key is optional: the driver asks the instrument at connect and uses the narrower of its answer
/// and the key; a bound that neither gives is [`SourceLimitsProfile::CONSERVATIVE`]'s.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default, deny_unknown_fields)]
pub struct SourceLimitsProfile {
    pub min_frequency_hz: Option<f64>,
    pub max_frequency_hz: Option<f64>,
    pub min_level_dbm: Option<f64>,
    pub max_level_dbm: Option<f64>,
}

impl SourceLimitsProfile {
    /// The limits used when neither the instrument nor the profile states a bound: 10 MHz to
    /// 20 GHz and -100 dBm to +10 dBm. Conservative on purpose: nearly every microwave signal
    /// generator covers this range (common practice), and +10 dBm cannot harm a modulator rated
    /// for +24 dBm or more (from memory; the device's own limit is checked by the engine).
    pub const CONSERVATIVE: SourceLimits = SourceLimits {
        min_frequency: Hz(10e6),
        max_frequency: Hz(20e9),
        min_level: Dbm(-100.0),
        max_level: Dbm(10.0),
    };
}

/// How far a read-back may differ from the request.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SourceReadBack {
    pub frequency_hz: f64,
    pub level_db: f64,
}

impl Default for SourceReadBack {
    fn default() -> Self {
        SourceReadBack {
            frequency_hz: 1.0,
            level_db: 0.05,
        }
    }
}

/// Everything the generic RF source driver needs to know about one model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SourceProfile {
    /// Must be `rf_source`.
    pub kind: ProfileKind,
    /// A human description (shown in logs).
    pub description: String,
    pub connection: ConnectionProfile,
    pub common: CommonCommands,
    pub commands: SourceCommands,
    pub limits: SourceLimitsProfile,
    pub read_back: SourceReadBack,
    /// Commands sent once after connecting (each followed by an error-queue check).
    pub on_connect: Vec<String>,
}

impl Default for SourceProfile {
    fn default() -> Self {
        SourceProfile {
            kind: ProfileKind::RfSource,
            description: "standard SCPI RF source".into(),
            connection: ConnectionProfile::default(),
            common: CommonCommands::default(),
            commands: SourceCommands::default(),
            limits: SourceLimitsProfile::default(),
            read_back: SourceReadBack::default(),
            on_connect: Vec::new(),
        }
    }
}

impl SourceProfile {
    /// The standard SCPI command set with default settings.
    pub fn standard() -> SourceProfile {
        SourceProfile::default()
    }

    /// Parses and validates a profile; `origin` names it in errors (a path or "inline").
    pub fn from_toml_str(text: &str, origin: &str) -> Result<SourceProfile, ProfileError> {
        let profile: SourceProfile = parse_toml(text, origin)?;
        profile.validate(origin)?;
        Ok(profile)
    }

    /// Reads, parses and validates a profile file.
    pub fn from_file(path: &Path) -> Result<SourceProfile, ProfileError> {
        let text = read_file(path)?;
        SourceProfile::from_toml_str(&text, &path.display().to_string())
    }

    /// The profile in the file at `path`, or the standard SCPI tree when there is none.
    pub fn from_optional_file(path: Option<&Path>) -> Result<SourceProfile, ProfileError> {
        path.map_or_else(|| Ok(SourceProfile::standard()), SourceProfile::from_file)
    }

    /// Checks what serde cannot: templates, terminators, limits, tolerances.
    pub fn validate(&self, origin: &str) -> Result<(), ProfileError> {
        let mut check = Checker { problem: None };
        check.require(
            "kind",
            self.kind == ProfileKind::RfSource,
            "must be \"rf_source\" for an RF source profile",
        );
        self.connection.validate(&mut check);
        self.common.validate(&mut check);
        let c = &self.commands;
        check.setter("commands.set_frequency", &c.set_frequency);
        check.setter("commands.set_level", &c.set_level);
        check.setter("commands.set_output", &c.set_output);
        check.non_empty("commands.query_frequency", &c.query_frequency);
        check.non_empty("commands.query_level", &c.query_level);
        check.non_empty("commands.query_output", &c.query_output);
        check.non_empty("commands.output_on_word", &c.output_on_word);
        check.non_empty("commands.output_off_word", &c.output_off_word);
        let l = &self.limits;
        let finite = |v: Option<f64>| v.is_none_or(f64::is_finite);
        check.require(
            "limits.min_frequency_hz",
            finite(l.min_frequency_hz)
                && finite(l.max_frequency_hz)
                && l.min_frequency_hz.is_none_or(|v| v > 0.0)
                && l.max_frequency_hz.is_none_or(|v| v > 0.0),
            "must be a number above 0",
        );
        check.require(
            "limits.min_frequency_hz",
            matches!((l.min_frequency_hz, l.max_frequency_hz), (Some(a), Some(b)) if a >= b).not(),
            "must be below limits.max_frequency_hz",
        );
        check.require(
            "limits.min_level_dbm",
            finite(l.min_level_dbm) && finite(l.max_level_dbm),
            "must be a finite number",
        );
        check.require(
            "limits.min_level_dbm",
            matches!((l.min_level_dbm, l.max_level_dbm), (Some(a), Some(b)) if a >= b).not(),
            "must be below limits.max_level_dbm",
        );
        check.require(
            "read_back.frequency_hz",
            self.read_back.frequency_hz >= 0.0,
            "must be 0 or more",
        );
        check.require(
            "read_back.level_db",
            self.read_back.level_db >= 0.0,
            "must be 0 or more",
        );
        check.finish(origin)
    }

    /// The limits from the profile alone, each missing bound taken from
    /// [`SourceLimitsProfile::CONSERVATIVE`] (what the driver uses when the instrument does not
    /// state its ranges).
    pub fn source_limits(&self) -> SourceLimits {
        let l = &self.limits;
        let d = SourceLimitsProfile::CONSERVATIVE;
        SourceLimits {
            min_frequency: Hz(l.min_frequency_hz.unwrap_or(d.min_frequency.0)),
            max_frequency: Hz(l.max_frequency_hz.unwrap_or(d.max_frequency.0)),
            min_level: Dbm(l.min_level_dbm.unwrap_or(d.min_level.0)),
            max_level: Dbm(l.max_level_dbm.unwrap_or(d.max_level.0)),
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Spectrum analyzer

/// Command strings of a spectrum analyzer.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AnalyzerCommands {
    /// `{value}` in hertz.
    pub set_center: String,
    pub query_center: String,
    /// `{value}` in hertz.
    pub set_span: String,
    pub query_span: String,
    pub query_start: String,
    pub query_stop: String,
    /// `{value}` in hertz.
    pub set_resolution_bandwidth: String,
    pub query_resolution_bandwidth: String,
    /// `{value}` is a count.
    pub set_points: String,
    pub query_points: String,
    /// Sent after connecting so that a sweep runs only when asked.
    pub single_sweep_mode: String,
    /// Starts one sweep; completion is awaited with `common.operation_complete`.
    pub start_sweep: String,
    pub format_ascii: String,
    pub format_real32: String,
    pub format_real64: String,
    pub byte_order_normal: String,
    pub byte_order_swapped: String,
    /// Returns the trace values.
    pub query_trace: String,
    /// Returns the frequency of every trace point (ASCII list or a block in the data format),
    /// for an analyzer that answers neither `query_start`/`query_stop` nor
    /// `query_center`/`query_span`, or whose grid is not linear. Empty: not used.
    pub query_axis: String,
}

impl Default for AnalyzerCommands {
    fn default() -> Self {
        AnalyzerCommands {
            set_center: "FREQuency:CENTer {value}".into(),
            query_center: "FREQuency:CENTer?".into(),
            set_span: "FREQuency:SPAN {value}".into(),
            query_span: "FREQuency:SPAN?".into(),
            query_start: "FREQuency:STARt?".into(),
            query_stop: "FREQuency:STOP?".into(),
            set_resolution_bandwidth: "BANDwidth {value}".into(),
            query_resolution_bandwidth: "BANDwidth?".into(),
            set_points: "SWEep:POINts {value}".into(),
            query_points: "SWEep:POINts?".into(),
            single_sweep_mode: "INITiate:CONTinuous OFF".into(),
            start_sweep: "INITiate".into(),
            format_ascii: "FORMat:DATA ASCii".into(),
            format_real32: "FORMat:DATA REAL,32".into(),
            format_real64: "FORMat:DATA REAL,64".into(),
            byte_order_normal: "FORMat:BORDer NORMal".into(),
            byte_order_swapped: "FORMat:BORDer SWAPped".into(),
            query_trace: "TRACe:DATA? TRACE1".into(),
            query_axis: String::new(),
        }
    }
}

/// The unit the instrument's trace values are in; the driver converts to dBm.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum PowerUnit {
    #[default]
    Dbm,
    Milliwatt,
    Watt,
}

/// How trace data is transferred.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TraceDataProfile {
    /// `ascii`, `real32` or `real64`.
    pub format: DataFormat,
    /// `normal` (big-endian) or `swapped` (little-endian); binary formats only.
    pub byte_order: ByteOrder,
    /// `dbm`, `milliwatt` or `watt`.
    pub power_unit: PowerUnit,
    /// Send the format (and byte order) commands again before every trace fetch, so a change
    /// made by another client of the instrument cannot make a trace be misread.
    pub assert_each_fetch: bool,
}

impl Default for TraceDataProfile {
    fn default() -> Self {
        TraceDataProfile {
            format: DataFormat::default(),
            byte_order: ByteOrder::default(),
            power_unit: PowerUnit::default(),
            assert_each_fetch: true,
        }
    }
}

/// How the driver learns the frequency of each trace point (the `[axis]` table's `method`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum AxisMethod {
    /// Try `query_start`/`query_stop`, then `query_center`/`query_span`, then `query_axis`, at
    /// connect, and keep the first the instrument answers.
    #[default]
    Probe,
    /// `query_start` and `query_stop`: a linear grid between them.
    StartStop,
    /// `query_center` and `query_span`: a linear grid from centre - span/2 to centre + span/2.
    CenterSpan,
    /// `query_axis`: the frequency of every point, as the instrument reports it.
    Query,
}

impl std::fmt::Display for AxisMethod {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            AxisMethod::Probe => "probe",
            AxisMethod::StartStop => "start_stop",
            AxisMethod::CenterSpan => "center_span",
            AxisMethod::Query => "query",
        })
    }
}

/// The unit the analyzer's axis settings and replies are in (the `[axis]` table's `unit`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum AxisUnit {
    /// Optical frequency in hertz (centre, span, start/stop, resolution bandwidth, axis).
    #[default]
    Hz,
    /// Wavelength in metres: centre, span, start/stop, resolution bandwidth and the axis query
    /// are all wavelengths, in the profile's `axis.medium`. The driver converts every setting
    /// and every point to optical frequency, so the trace reaches the analysis in hertz.
    #[serde(alias = "metre", alias = "meter")]
    M,
}

impl std::fmt::Display for AxisUnit {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            AxisUnit::Hz => "hz",
            AxisUnit::M => "m",
        })
    }
}

/// The `[axis]` table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default, deny_unknown_fields)]
pub struct AxisProfile {
    /// `probe` (default), `start_stop`, `center_span` or `query`.
    pub method: AxisMethod,
    /// `hz` (default) or `m` (wavelength in metres).
    pub unit: AxisUnit,
    /// For `unit = "m"`: `vacuum` (default) or `standard_air` (alias `air`; Edlén 1966, see
    /// `halfwave_units::wavelength`). The instrument's manual says which it reports.
    pub medium: halfwave_units::Medium,
}

/// What the analyzer can do (reported through the trait; requests outside are refused).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AnalyzerCapabilitiesProfile {
    pub min_frequency_hz: f64,
    pub max_frequency_hz: f64,
    pub min_span_hz: f64,
    pub max_span_hz: f64,
    /// Offered resolution bandwidths, ascending.
    pub resolution_bandwidths_hz: Vec<f64>,
    pub max_points: usize,
    pub typical_sweep_time_s: f64,
}

impl Default for AnalyzerCapabilitiesProfile {
    fn default() -> Self {
        // An optical analyzer around the telecom bands (about 1250-1650 nm); a model profile
        // should state its own figures.
        AnalyzerCapabilitiesProfile {
            min_frequency_hz: 180e12,
            max_frequency_hz: 240e12,
            min_span_hz: 1e6,
            max_span_hz: 20e12,
            resolution_bandwidths_hz: vec![1e6, 2e6, 5e6, 10e6, 20e6, 50e6, 100e6],
            max_points: 100_001,
            typical_sweep_time_s: 1.0,
        }
    }
}

/// How far a read-back may differ from the request.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AnalyzerReadBack {
    /// Absolute tolerance of the centre frequency.
    pub center_hz: f64,
    /// Relative tolerance of the span (0.001 = 0.1 %).
    pub span_relative: f64,
    /// Relative tolerance of the resolution bandwidth; instruments round to the bandwidths they
    /// offer, so this is wide by default (0.5 = within a factor 1.5 of the request).
    pub resolution_bandwidth_relative: f64,
    /// Absolute tolerance of the point count.
    pub points: usize,
}

impl Default for AnalyzerReadBack {
    fn default() -> Self {
        AnalyzerReadBack {
            center_hz: 1e6,
            span_relative: 1e-3,
            resolution_bandwidth_relative: 0.5,
            points: 0,
        }
    }
}

/// Everything the generic analyzer driver needs to know about one model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AnalyzerProfile {
    /// Must be `spectrum_analyzer`.
    pub kind: ProfileKind,
    pub description: String,
    pub connection: ConnectionProfile,
    pub common: CommonCommands,
    pub commands: AnalyzerCommands,
    pub data: TraceDataProfile,
    pub axis: AxisProfile,
    pub capabilities: AnalyzerCapabilitiesProfile,
    pub read_back: AnalyzerReadBack,
    /// Time limit for one sweep (`start_sweep` until `*OPC?` answers), in milliseconds.
    pub sweep_timeout_ms: u64,
    /// Commands sent once after connecting (each followed by an error-queue check).
    pub on_connect: Vec<String>,
}

impl Default for AnalyzerProfile {
    fn default() -> Self {
        AnalyzerProfile {
            kind: ProfileKind::SpectrumAnalyzer,
            description: "standard SCPI spectrum analyzer".into(),
            connection: ConnectionProfile::default(),
            common: CommonCommands::default(),
            commands: AnalyzerCommands::default(),
            data: TraceDataProfile::default(),
            axis: AxisProfile::default(),
            capabilities: AnalyzerCapabilitiesProfile::default(),
            read_back: AnalyzerReadBack::default(),
            sweep_timeout_ms: 60_000,
            on_connect: Vec::new(),
        }
    }
}

impl AnalyzerProfile {
    /// The standard SCPI command set with default settings.
    pub fn standard() -> AnalyzerProfile {
        AnalyzerProfile::default()
    }

    /// Parses and validates a profile; `origin` names it in errors.
    pub fn from_toml_str(text: &str, origin: &str) -> Result<AnalyzerProfile, ProfileError> {
        let profile: AnalyzerProfile = parse_toml(text, origin)?;
        profile.validate(origin)?;
        Ok(profile)
    }

    /// Reads, parses and validates a profile file.
    pub fn from_file(path: &Path) -> Result<AnalyzerProfile, ProfileError> {
        let text = read_file(path)?;
        AnalyzerProfile::from_toml_str(&text, &path.display().to_string())
    }

    /// The profile in the file at `path`, or the standard SCPI tree when there is none.
    pub fn from_optional_file(path: Option<&Path>) -> Result<AnalyzerProfile, ProfileError> {
        path.map_or_else(
            || Ok(AnalyzerProfile::standard()),
            AnalyzerProfile::from_file,
        )
    }

    /// Checks what serde cannot.
    pub fn validate(&self, origin: &str) -> Result<(), ProfileError> {
        let mut check = Checker { problem: None };
        check.require(
            "kind",
            self.kind == ProfileKind::SpectrumAnalyzer,
            "must be \"spectrum_analyzer\" for an analyzer profile",
        );
        self.connection.validate(&mut check);
        self.common.validate(&mut check);
        let c = &self.commands;
        check.setter("commands.set_center", &c.set_center);
        check.setter("commands.set_span", &c.set_span);
        check.setter(
            "commands.set_resolution_bandwidth",
            &c.set_resolution_bandwidth,
        );
        check.setter("commands.set_points", &c.set_points);
        for (key, value) in [
            ("commands.query_center", &c.query_center),
            ("commands.query_span", &c.query_span),
            ("commands.query_start", &c.query_start),
            ("commands.query_stop", &c.query_stop),
            (
                "commands.query_resolution_bandwidth",
                &c.query_resolution_bandwidth,
            ),
            ("commands.query_points", &c.query_points),
            ("commands.start_sweep", &c.start_sweep),
            ("commands.query_trace", &c.query_trace),
        ] {
            check.non_empty(key, value);
        }
        let format_key = match self.data.format {
            DataFormat::Ascii => ("commands.format_ascii", &c.format_ascii),
            DataFormat::Real32 => ("commands.format_real32", &c.format_real32),
            DataFormat::Real64 => ("commands.format_real64", &c.format_real64),
        };
        check.non_empty(format_key.0, format_key.1);
        check.require(
            "commands.query_axis",
            self.axis.method != AxisMethod::Query || !c.query_axis.trim().is_empty(),
            "must name the instrument's axis query when axis.method = \"query\"",
        );
        check.require(
            "axis.medium",
            self.axis.unit == AxisUnit::M || self.axis.medium == halfwave_units::Medium::Vacuum,
            "applies only to a wavelength axis: set axis.unit = \"m\" as well, or remove it",
        );
        let k = &self.capabilities;
        check.require(
            "capabilities.min_frequency_hz",
            k.min_frequency_hz.is_finite()
                && k.max_frequency_hz.is_finite()
                && 0.0 < k.min_frequency_hz
                && k.min_frequency_hz < k.max_frequency_hz,
            "must be above 0 and below capabilities.max_frequency_hz",
        );
        check.require(
            "capabilities.min_span_hz",
            k.min_span_hz.is_finite()
                && k.max_span_hz.is_finite()
                && 0.0 < k.min_span_hz
                && k.min_span_hz <= k.max_span_hz,
            "must be above 0 and not above capabilities.max_span_hz",
        );
        check.require(
            "capabilities.resolution_bandwidths_hz",
            !k.resolution_bandwidths_hz.is_empty()
                && k.resolution_bandwidths_hz
                    .iter()
                    .all(|b| b.is_finite() && *b > 0.0)
                && k.resolution_bandwidths_hz.windows(2).all(|w| w[0] < w[1]),
            "must list positive bandwidths in ascending order",
        );
        check.require(
            "capabilities.max_points",
            (halfwave_units::Trace::MIN_POINTS..=halfwave_units::Trace::MAX_STORED_POINTS)
                .contains(&k.max_points),
            "must be 3 to 16777216 (2^24, the most points the store keeps per trace)",
        );
        check.require(
            "capabilities.typical_sweep_time_s",
            k.typical_sweep_time_s.is_finite() && k.typical_sweep_time_s >= 0.0,
            "must be 0 or more",
        );
        let r = &self.read_back;
        check.require(
            "read_back",
            r.center_hz >= 0.0 && r.span_relative >= 0.0 && r.resolution_bandwidth_relative >= 0.0,
            "tolerances must be 0 or more",
        );
        check.require(
            "read_back.points",
            r.points <= k.max_points,
            "must be at most capabilities.max_points (a tolerance in points)",
        );
        check.require(
            "sweep_timeout_ms",
            self.sweep_timeout_ms > 0,
            "must be more than 0",
        );
        check.finish(origin)
    }

    /// The capabilities as the trait reports them.
    pub fn analyzer_capabilities(&self) -> AnalyzerCapabilities {
        let k = &self.capabilities;
        AnalyzerCapabilities {
            min_frequency: Hz(k.min_frequency_hz),
            max_frequency: Hz(k.max_frequency_hz),
            min_span: Hz(k.min_span_hz),
            max_span: Hz(k.max_span_hz),
            resolution_bandwidths: k.resolution_bandwidths_hz.iter().copied().map(Hz).collect(),
            max_points: k.max_points,
            typical_sweep_time: Seconds(k.typical_sweep_time_s),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_wavelength_axis_is_declared_with_its_unit_and_medium() {
        let text = "kind = \"spectrum_analyzer\"\n[axis]\nunit = \"m\"\nmedium = \"air\"\n";
        let profile = AnalyzerProfile::from_toml_str(text, "inline").unwrap();
        assert_eq!(profile.axis.unit, AxisUnit::M);
        assert_eq!(profile.axis.medium, halfwave_units::Medium::StandardAir);
        // A medium on a frequency axis means nothing: refused, naming the key and the fix.
        let text = "kind = \"spectrum_analyzer\"\n[axis]\nmedium = \"standard_air\"\n";
        let err = AnalyzerProfile::from_toml_str(text, "inline")
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("axis.medium") && err.contains("axis.unit = \"m\""),
            "{err}"
        );
        // An unknown unit is named by serde.
        let text = "kind = \"spectrum_analyzer\"\n[axis]\nunit = \"nm\"\n";
        let err = AnalyzerProfile::from_toml_str(text, "inline")
            .unwrap_err()
            .to_string();
        assert!(err.contains("nm"), "{err}");
    }

    #[test]
    fn an_empty_profile_is_the_standard_tree() {
        let source = SourceProfile::from_toml_str("kind = \"rf_source\"", "inline").unwrap();
        assert_eq!(source, SourceProfile::standard());
        let analyzer =
            AnalyzerProfile::from_toml_str("kind = \"spectrum_analyzer\"", "inline").unwrap();
        assert_eq!(analyzer, AnalyzerProfile::standard());
        assert_eq!(analyzer.commands.query_trace, "TRACe:DATA? TRACE1");
    }

    #[test]
    fn overrides_replace_only_what_they_name() {
        let text = r#"
            kind = "spectrum_analyzer"
            [connection]
            read_terminator = "\r\n"
            [commands]
            set_center = "SENS:FREQ:CENT {value}"
            [data]
            format = "real64"
            byte_order = "swapped"
        "#;
        let p = AnalyzerProfile::from_toml_str(text, "inline").unwrap();
        assert_eq!(p.connection.read_terminator, "\r\n");
        assert_eq!(p.connection.transport_config().read_terminator, b"\r\n");
        assert_eq!(p.commands.set_center, "SENS:FREQ:CENT {value}");
        assert_eq!(p.commands.query_center, "FREQuency:CENTer?");
        assert_eq!(p.data.format, DataFormat::Real64);
        assert_eq!(p.data.byte_order, ByteOrder::Swapped);
    }

    #[test]
    fn mistakes_name_the_key_to_fix() {
        let cases = [
            (
                "kind = \"rf_source\"\n[commands]\nset_level = \"POW\"",
                "commands.set_level",
            ),
            ("kind = \"spectrum_analyzer\"", "kind"),
            (
                "kind = \"rf_source\"\n[connection]\nread_terminator = \"\"",
                "connection.read_terminator",
            ),
            (
                "kind = \"rf_source\"\n[limits]\nmin_level_dbm = 10.0\nmax_level_dbm = 0.0",
                "limits.min_level_dbm",
            ),
        ];
        for (text, key) in cases {
            match SourceProfile::from_toml_str(text, "inline") {
                Err(ProfileError::Invalid { key: k, .. }) => assert_eq!(k, key, "{text}"),
                other => panic!("{text}: expected an invalid-key error, got {other:?}"),
            }
        }
        // Unknown keys and wrong types are syntax errors that quote the offending key.
        let err = SourceProfile::from_toml_str("kind = \"rf_source\"\nfrequncy = 1", "inline")
            .unwrap_err();
        assert!(err.to_string().contains("frequncy"), "{err}");
        let err = AnalyzerProfile::from_toml_str(
            "kind = \"spectrum_analyzer\"\n[data]\nformat = \"real16\"",
            "inline",
        )
        .unwrap_err();
        assert!(err.to_string().contains("real16"), "{err}");
        let err = AnalyzerProfile::from_toml_str(
            "kind = \"spectrum_analyzer\"\n[capabilities]\nresolution_bandwidths_hz = [5e6, 1e6]",
            "inline",
        )
        .unwrap_err();
        assert!(err.to_string().contains("ascending"), "{err}");
    }

    #[test]
    fn templates_take_the_value() {
        assert_eq!(fill_template("FREQuency {value}", "1000"), "FREQuency 1000");
    }

    #[test]
    fn the_shipped_example_profiles_load() {
        let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("profiles");
        let mut loaded = 0;
        for entry in std::fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            if path.extension().and_then(|e| e.to_str()) != Some("toml") {
                continue;
            }
            let text = std::fs::read_to_string(&path).unwrap();
            let kind: toml::Value = toml::from_str(&text).unwrap();
            match kind.get("kind").and_then(|k| k.as_str()) {
                Some("rf_source") => {
                    SourceProfile::from_file(&path).unwrap();
                }
                Some("spectrum_analyzer") => {
                    AnalyzerProfile::from_file(&path).unwrap();
                }
                Some("power_sensor") => {
                    SensorProfile::from_file(&path).unwrap();
                }
                other => panic!("{}: unknown kind {other:?}", path.display()),
            }
            loaded += 1;
        }
        assert!(
            loaded >= 3,
            "expected the three example profiles, found {loaded}"
        );
    }
}
