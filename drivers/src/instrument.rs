//! The instrument traits the sweep engine drives, and the error every driver returns.
//!
//! Two roles make a bench: an [`RfSource`] that drives the modulator and a [`SpectrumAnalyzer`]
//! that looks at the light. The engine knows instruments only through these traits, so a generic
//! SCPI driver over TCP and the in-process simulated bench are interchangeable. The traits are
//! object-safe (`Box<dyn RfSource>`) because the bench is chosen from configuration at run time.
//!
//! Every setter returns the value the instrument reports back after the change; implementations
//! verify the read-back against the request within the tolerance they document and return
//! [`InstrumentError::ReadBack`] otherwise.

use async_trait::async_trait;
use halfwave_units::{Dbm, Hz, Seconds, Trace};
use serde::{Deserialize, Serialize};
use std::time::Duration;

/// An instrument's identity (`*IDN?`); defined in `halfwave_units` so the store and the views
/// need not depend on the drivers for it.
pub use halfwave_units::Identity;

/// What an operator should check when a connection to an instrument fails or is lost (the end of
/// every [`InstrumentError::Connection`] message; a caller chaining several says it once).
pub const LINK_ADVICE: &str = "check the cable, the address and that the instrument is on";

/// What went wrong talking to an instrument. Messages name the instrument and say what to do.
#[derive(Debug, thiserror::Error)]
pub enum InstrumentError {
    /// The resource string could not be understood.
    #[error("bad instrument resource string {resource:?}: {reason}")]
    BadResource { resource: String, reason: String },

    /// A driver's configuration (its command profile) cannot be used; nothing was sent.
    #[error("{resource}: {reason}")]
    BadProfile { resource: String, reason: String },

    /// The connection could not be made or was lost.
    #[error("connection to {resource} failed during {operation}: {source}; {advice}", advice = LINK_ADVICE)]
    Connection {
        resource: String,
        operation: String,
        #[source]
        source: std::io::Error,
    },

    /// The instrument did not answer in time.
    #[error("{resource} did not answer {operation} within {after:?}; the instrument may be busy, hung or configured with another terminator")]
    Timeout {
        resource: String,
        operation: String,
        after: Duration,
    },

    /// A query drew no reply in time, and what the instrument's error queue said about it on a
    /// fresh connection (nothing, or that it could not be asked) is in `instrument_said`.
    #[error("{resource} did not answer {operation} within {after:?}; {instrument_said}")]
    Unanswered {
        resource: String,
        operation: String,
        after: Duration,
        instrument_said: String,
    },

    /// The instrument reported an error in its SCPI error queue. `message` is the first entry's
    /// own text; `detail` (empty or starting with "; ") holds further entries and what to do.
    #[error("{resource} reported SCPI error {code},\"{message}\" after {operation}{detail}")]
    Scpi {
        resource: String,
        operation: String,
        code: i32,
        message: String,
        detail: String,
    },

    /// A reply could not be parsed.
    #[error("could not parse the reply of {resource} to {operation}: {detail}")]
    Parse {
        resource: String,
        operation: String,
        detail: String,
    },

    /// A setting read back differently from what was requested.
    #[error("{resource}: {setting} was set to {requested} but reads back {actual}; check the instrument's range and resolution")]
    ReadBack {
        resource: String,
        setting: String,
        requested: String,
        actual: String,
    },

    /// A request outside the instrument's (or the configuration's) limits; nothing was sent.
    #[error(
        "{resource}: {what} {value} is outside the allowed range {min} to {max}; nothing was sent"
    )]
    OutOfRange {
        resource: String,
        what: String,
        value: String,
        min: String,
        max: String,
    },

    /// The instrument or its profile cannot do this.
    #[error("{resource} does not support {what}")]
    Unsupported { resource: String, what: String },

    /// The link was lost while the RF output may have been on and was re-established; the
    /// source's output was switched off because nothing is known about what it did meanwhile.
    #[error("the link to {resource} was lost during {operation} and re-established; {detail}")]
    LinkInterrupted {
        resource: String,
        operation: String,
        detail: String,
    },
}

impl InstrumentError {
    /// True for faults of the link or of the instrument's liveness (lost connection, silence, a
    /// garbled reply, a link re-established mid-step): the plan and the stored points are still
    /// good, so a run stopped by one may be resumed once the link is back. An instrument's own
    /// refusal (a SCPI error, a read-back mismatch, a range) is not one.
    pub fn is_link_fault(&self) -> bool {
        self.needs_reconnect() || matches!(self, InstrumentError::LinkInterrupted { .. })
    }

    /// True for errors after which the connection should be re-established before the next
    /// command (lost link, silence, a reply that left the stream out of step).
    pub fn needs_reconnect(&self) -> bool {
        matches!(
            self,
            InstrumentError::Connection { .. }
                | InstrumentError::Timeout { .. }
                | InstrumentError::Unanswered { .. }
                | InstrumentError::Parse { .. }
        )
    }
}

/// One thing a driver learned or chose when it connected (how it reads the frequency axis, where
/// its limits come from), for check-bench and the logs.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ConnectionNote {
    /// What the note is about, e.g. `frequency axis`.
    pub item: String,
    /// What was chosen and why.
    pub value: String,
}

impl ConnectionNote {
    pub fn new(item: impl Into<String>, value: impl Into<String>) -> ConnectionNote {
        ConnectionNote {
            item: item.into(),
            value: value.into(),
        }
    }
}

/// The ranges an RF source accepts.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SourceLimits {
    pub min_frequency: Hz,
    pub max_frequency: Hz,
    pub min_level: Dbm,
    pub max_level: Dbm,
}

/// An RF signal generator driving the modulator.
#[async_trait]
pub trait RfSource: Send {
    /// A short name for logs and errors (the resource string or the simulator's name).
    fn resource(&self) -> &str;

    /// The instrument's identity (`*IDN?`).
    async fn identify(&mut self) -> Result<Identity, InstrumentError>;

    /// The frequency and level ranges this source accepts.
    fn limits(&self) -> SourceLimits;

    /// What the driver learned or chose at connect (for check-bench); none by default.
    fn connection_notes(&self) -> Vec<ConnectionNote> {
        Vec::new()
    }

    /// Sets the CW frequency; returns the read-back.
    async fn set_frequency(&mut self, frequency: Hz) -> Result<Hz, InstrumentError>;

    /// Sets the output level; returns the read-back.
    async fn set_level(&mut self, level: Dbm) -> Result<Dbm, InstrumentError>;

    /// Switches the RF output on or off; returns the read-back state.
    async fn set_output(&mut self, on: bool) -> Result<bool, InstrumentError>;

    /// Whether the RF output is on.
    async fn output_enabled(&mut self) -> Result<bool, InstrumentError>;

    /// Switches the RF output off by every means available (reconnecting if needed) and confirms
    /// it. This is the call every stop path makes; it must not give up after one failed attempt.
    async fn safe_off(&mut self) -> Result<(), InstrumentError>;

    /// One quick, self-contained attempt to switch the output off and prove it: on a fresh
    /// connection where there is one, send the output-off command, wait for the operation to
    /// complete and read the output state back. The engine calls it repeatedly, under its own
    /// time limit, while an output stays unconfirmed; cancelling it half-way must leave the driver
    /// usable (the next attempt starts afresh). The default is [`RfSource::safe_off`].
    async fn confirm_off_fresh(&mut self) -> Result<(), InstrumentError> {
        self.safe_off().await
    }
}

/// The settings of one analyzer sweep.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct AnalyzerSettings {
    /// Centre of the sweep (optical frequency).
    pub center: Hz,
    /// Width of the sweep.
    pub span: Hz,
    /// Resolution bandwidth.
    pub resolution_bandwidth: Hz,
    /// Number of points per trace.
    pub points: usize,
}

/// What an analyzer can do.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AnalyzerCapabilities {
    pub min_frequency: Hz,
    pub max_frequency: Hz,
    pub min_span: Hz,
    pub max_span: Hz,
    /// The resolution bandwidths it offers, ascending.
    pub resolution_bandwidths: Vec<Hz>,
    pub max_points: usize,
    /// A typical time for one sweep at full points, for planning.
    pub typical_sweep_time: Seconds,
}

/// An optical spectrum analyzer (high-resolution, MHz-class).
#[async_trait]
pub trait SpectrumAnalyzer: Send {
    /// A short name for logs and errors.
    fn resource(&self) -> &str;

    /// The instrument's identity (`*IDN?`).
    async fn identify(&mut self) -> Result<Identity, InstrumentError>;

    /// What the instrument can do.
    fn capabilities(&self) -> AnalyzerCapabilities;

    /// What the driver learned or chose at connect (for check-bench); none by default.
    fn connection_notes(&self) -> Vec<ConnectionNote> {
        Vec::new()
    }

    /// Sets the centre frequency; returns the read-back.
    async fn set_center(&mut self, center: Hz) -> Result<Hz, InstrumentError>;

    /// Sets the span; returns the read-back.
    async fn set_span(&mut self, span: Hz) -> Result<Hz, InstrumentError>;

    /// Sets the resolution bandwidth; returns the read-back (instruments round to what they offer).
    async fn set_resolution_bandwidth(&mut self, rbw: Hz) -> Result<Hz, InstrumentError>;

    /// Sets the number of trace points; returns the read-back.
    async fn set_points(&mut self, points: usize) -> Result<usize, InstrumentError>;

    /// Applies all settings in order and returns what the instrument reports back.
    async fn configure(
        &mut self,
        settings: &AnalyzerSettings,
    ) -> Result<AnalyzerSettings, InstrumentError> {
        let points = self.set_points(settings.points).await?;
        let resolution_bandwidth = self
            .set_resolution_bandwidth(settings.resolution_bandwidth)
            .await?;
        let span = self.set_span(settings.span).await?;
        let center = self.set_center(settings.center).await?;
        Ok(AnalyzerSettings {
            center,
            span,
            resolution_bandwidth,
            points,
        })
    }

    /// Takes one sweep and waits until it has completed.
    async fn sweep(&mut self) -> Result<(), InstrumentError>;

    /// Fetches the last trace: frequency axis in hertz and power in dBm, with the resolution
    /// bandwidth the instrument used.
    async fn fetch_trace(&mut self) -> Result<Trace, InstrumentError>;

    /// Forgets an operation the caller stopped waiting for (a sweep that overran): the next
    /// operation must not read a late reply of the abandoned one. Drivers with a connection drop
    /// it here, so the next operation reconnects. The default does nothing.
    fn abandon_operation(&mut self) {}
}

/// The ranges of an RF power sensor: where it measures, and the level that damages it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SensorLimits {
    /// The frequency range its calibration factors cover.
    pub min_frequency: Hz,
    pub max_frequency: Hz,
    /// The range of average power it measures to its specification.
    pub min_power: Dbm,
    pub max_power: Dbm,
    /// The average power that damages it (its data sheet's damage level).
    pub damage_level: Dbm,
}

/// An RF power sensor (or a meter with its sensor) measuring the average power at the end of the
/// drive chain, for the chain's calibration. Readings are corrected by the sensor's calibration
/// factor at the frequency it was last told ([`PowerSensor::set_frequency`]), so that call comes
/// before every reading at a new frequency.
#[async_trait]
pub trait PowerSensor: Send {
    /// A short name for logs and errors.
    fn resource(&self) -> &str;

    /// The instrument's identity (`*IDN?`).
    async fn identify(&mut self) -> Result<Identity, InstrumentError>;

    /// Where it measures and what damages it.
    fn limits(&self) -> SensorLimits;

    /// What the driver learned or chose at connect (for check-bench); none by default.
    fn connection_notes(&self) -> Vec<ConnectionNote> {
        Vec::new()
    }

    /// Sets the frequency whose calibration factor corrects the readings; returns the read-back.
    async fn set_frequency(&mut self, frequency: Hz) -> Result<Hz, InstrumentError>;

    /// Takes one reading of the average power (corrected by the calibration factor) and waits
    /// for it. A reading over the sensor's range, or one it flags as such, is an error.
    async fn measure(&mut self) -> Result<Dbm, InstrumentError>;

    /// The longest one reading may take (the driver's own wait for it): a chain calibration
    /// reads with the RF output on and switches it off when a reading takes longer than this.
    /// 10 s by default.
    fn reading_time_limit(&self) -> std::time::Duration {
        std::time::Duration::from_secs(10)
    }
}
