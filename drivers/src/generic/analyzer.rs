//! The generic SCPI spectrum analyzer: [`SpectrumAnalyzer`] for any analyzer, adapted by an
//! [`AnalyzerProfile`].
//!
//! On connect it selects single-sweep mode and the profile's trace format and byte order, so that
//! a sweep runs only when asked and traces arrive in a known encoding; a set-up command the
//! instrument refuses is reported with the profile key that sends it. It then chooses how to
//! learn the trace's frequency axis (the profile's `[axis] method`, by default by probing):
//! `STARt?`/`STOP?`, else `CENTer?`/`SPAN?`, else the profile's explicit axis query. A probe the
//! instrument does not know draws -113 and no reply; the session reads that entry on a fresh
//! connection and clears it, and the probe is not repeated. The choice is kept for the life of
//! the driver and reported by [`SpectrumAnalyzer::connection_notes`].
//!
//! Setters are range-checked against the profile's capabilities, sent as session steps (send,
//! read back, drain errors) and verified within tolerance. Before every trace fetch the format
//! and byte order are sent again (unless the profile's `data.assert_each_fetch` is false), since
//! another client of the instrument may have changed them; the fetch ends with an error-queue
//! check. A trace arrives as ASCII or as a binary block, whichever the reply turns out to be.
//!
//! An analyzer whose axis is in wavelength (`[axis] unit = "m"`, in vacuum or standard air) is
//! driven in hertz all the same: every setting is converted to metres before it is sent and its
//! read-back converted back, and every trace point's wavelength becomes an optical frequency
//! (f = c / (n lambda), `halfwave_units::wavelength`). Such a trace runs from long to short
//! wavelength, so it is reversed to ascending frequency; its grid is not uniform in frequency,
//! which the analysis takes as it comes.

use super::session::ScpiSession;
use crate::profile::{fill_template, AnalyzerProfile, AxisMethod, AxisUnit, PowerUnit};
use crate::scpi::block::decode_binary_reply_into;
use crate::scpi::response::{parse_integer, parse_number_list_into};
use crate::scpi::{ByteOrder, DataFormat, ParseError};
use crate::{AnalyzerCapabilities, ConnectionNote, Identity, InstrumentError, SpectrumAnalyzer};
use async_trait::async_trait;
use halfwave_units::{Hz, Medium, Trace};
use std::time::Duration;

/// Longest wait for the answer to an axis probe at connect (a settings query is answered within
/// milliseconds by an instrument that knows it; common practice). A probe that draws no reply
/// costs this much once, at connect.
const PROBE_TIMEOUT: Duration = Duration::from_millis(1500);

/// A spectrum analyzer reached over SCPI.
#[derive(Debug)]
pub struct ScpiSpectrumAnalyzer {
    session: ScpiSession,
    profile: AnalyzerProfile,
    /// How the frequency axis is read (never [`AxisMethod::Probe`] after connect).
    axis: AxisMethod,
    /// Why that axis method was chosen, for [`SpectrumAnalyzer::connection_notes`].
    axis_reason: String,
    /// The centre frequency last set or read back; a wavelength axis converts span and
    /// resolution bandwidth around it.
    center_hz: Option<f64>,
}

/// How a frequency-like setting travels between hertz and the instrument's unit.
#[derive(Debug, Clone, Copy)]
enum Conversion {
    /// The instrument works in hertz.
    Identity,
    /// A position: wavelength in the medium.
    Position(Medium),
    /// A span around the centre `center_hz`: the wavelength interval between its ends.
    Span { medium: Medium, center_hz: f64 },
    /// A narrow width (resolution bandwidth): by the local derivative, in Hz per metre.
    Width { hz_per_metre: f64 },
}

impl Conversion {
    fn to_instrument(self, hz: f64) -> f64 {
        match self {
            Conversion::Identity => hz,
            Conversion::Position(medium) => medium.wavelength_m(hz),
            Conversion::Span { medium, center_hz } => {
                medium.wavelength_m(center_hz - hz / 2.0)
                    - medium.wavelength_m(center_hz + hz / 2.0)
            }
            Conversion::Width { hz_per_metre } => hz / hz_per_metre,
        }
    }

    fn to_hz(self, value: f64) -> f64 {
        match self {
            Conversion::Identity => value,
            Conversion::Position(medium) => medium.frequency_hz(value),
            Conversion::Span { medium, center_hz } => {
                let lc = medium.wavelength_m(center_hz);
                medium.frequency_hz(lc - value / 2.0) - medium.frequency_hz(lc + value / 2.0)
            }
            Conversion::Width { hz_per_metre } => value * hz_per_metre,
        }
    }
}

impl ScpiSpectrumAnalyzer {
    /// Connects to `resource`, clears the status, selects single-sweep mode and the profile's
    /// data format, runs the profile's `on_connect` commands and chooses the axis method.
    pub async fn connect(
        resource: &str,
        profile: AnalyzerProfile,
    ) -> Result<ScpiSpectrumAnalyzer, InstrumentError> {
        let session = ScpiSession::open(
            resource,
            profile.validate("(given to the analyzer driver)"),
            &profile.connection,
            &profile.common,
            &[],
        )
        .await?;
        let mut analyzer = ScpiSpectrumAnalyzer {
            session,
            profile,
            axis: AxisMethod::StartStop,
            axis_reason: String::new(),
            center_hz: None,
        };
        for (key, command) in analyzer.setup_commands() {
            analyzer
                .session
                .write(&command)
                .await
                .map_err(|e| with_profile_key(e, &key, &command))?;
        }
        analyzer.choose_axis().await?;
        tracing::info!(resource = %analyzer.session.name(), axis = %analyzer.axis, reason = %analyzer.axis_reason, "analyzer connected");
        Ok(analyzer)
    }

    /// The set-up commands sent at connect, each with the profile key that sends it.
    fn setup_commands(&self) -> Vec<(String, String)> {
        let c = &self.profile.commands;
        let mut setup = Vec::new();
        if !c.single_sweep_mode.is_empty() {
            setup.push((
                "commands.single_sweep_mode".into(),
                c.single_sweep_mode.clone(),
            ));
        }
        setup.extend(self.format_commands());
        for (index, command) in self.profile.on_connect.iter().enumerate() {
            setup.push((format!("on_connect[{index}]"), command.clone()));
        }
        setup
    }

    /// The format command and, for binary formats, the byte-order command, with their keys.
    fn format_commands(&self) -> Vec<(String, String)> {
        let c = &self.profile.commands;
        let mut out = Vec::new();
        let format = match self.profile.data.format {
            DataFormat::Ascii => ("commands.format_ascii", &c.format_ascii),
            DataFormat::Real32 => ("commands.format_real32", &c.format_real32),
            DataFormat::Real64 => ("commands.format_real64", &c.format_real64),
        };
        out.push((format.0.to_string(), format.1.clone()));
        if self.profile.data.format != DataFormat::Ascii {
            let order = match self.profile.data.byte_order {
                ByteOrder::Normal => ("commands.byte_order_normal", &c.byte_order_normal),
                ByteOrder::Swapped => ("commands.byte_order_swapped", &c.byte_order_swapped),
            };
            if !order.1.is_empty() {
                out.push((order.0.to_string(), order.1.clone()));
            }
        }
        out
    }

    /// Decides how the axis is read: the profile's method, or the first pair of queries the
    /// instrument answers (probing). An error that is not the instrument's refusal (a lost link)
    /// ends the connect.
    async fn choose_axis(&mut self) -> Result<(), InstrumentError> {
        let c = self.profile.commands.clone();
        match self.profile.axis.method {
            AxisMethod::Probe => {}
            fixed => {
                self.axis = fixed;
                self.axis_reason = "set by the profile's axis.method".into();
                return Ok(());
            }
        }
        let mut refused = Vec::new();
        for (method, first, second) in [
            (AxisMethod::StartStop, &c.query_start, &c.query_stop),
            (AxisMethod::CenterSpan, &c.query_center, &c.query_span),
        ] {
            match self.probe_pair(first, second).await {
                Ok(()) => {
                    self.axis = method;
                    self.axis_reason = if refused.is_empty() {
                        format!("{first} and {second} answered")
                    } else {
                        format!(
                            "{first} and {second} answered; not used: {}",
                            refused.join("; ")
                        )
                    };
                    return Ok(());
                }
                Err(e) if refusal(&e) => refused.push(short_refusal(first, second, &e)),
                Err(e) => return Err(e),
            }
        }
        if !c.query_axis.trim().is_empty() {
            self.axis = AxisMethod::Query;
            self.axis_reason = format!(
                "{} from the profile (not used: {})",
                c.query_axis,
                refused.join("; ")
            );
            return Ok(());
        }
        Err(InstrumentError::Unsupported {
            resource: self.session.name().to_string(),
            what: format!(
                "any of the axis queries tried ({}); name the queries it answers in its profile \
                 (commands.query_start/query_stop, commands.query_center/query_span, or \
                 commands.query_axis with axis.method = \"query\")",
                refused.join("; ")
            ),
        })
    }

    /// Asks both queries of an axis method once; both must answer with a finite number.
    async fn probe_pair(&mut self, first: &str, second: &str) -> Result<(), InstrumentError> {
        let timeout = PROBE_TIMEOUT.min(self.session.transport().config().timeout);
        for query in [first, second] {
            let reply = self.session.probe(query, timeout).await?;
            let value = crate::scpi::response::parse_number(&reply)
                .map_err(|e| self.session.parse_error(query, e))?;
            if !value.is_finite() {
                return Err(self.session.parse_error(
                    query,
                    ParseError(format!("the reply {reply:?} is not a finite number")),
                ));
            }
        }
        self.session.check_errors(second).await
    }

    /// How the frequency axis is read (chosen at connect).
    pub fn axis_method(&self) -> AxisMethod {
        self.axis
    }

    /// The profile in use.
    pub fn profile(&self) -> &AnalyzerProfile {
        &self.profile
    }

    /// The SCPI session, for commands outside the trait.
    pub fn session_mut(&mut self) -> &mut ScpiSession {
        &mut self.session
    }

    /// `*RST` followed by the single-sweep and data-format set-up again.
    pub async fn reset(&mut self) -> Result<(), InstrumentError> {
        self.session.reset().await
    }

    /// Sets a frequency-like setting after a range check, verifying the read-back within
    /// `tolerance_hz`.
    async fn set_frequency_setting(
        &mut self,
        what: &str,
        value: Hz,
        (min, max): (f64, f64),
        (set, query): (String, String),
        tolerance_hz: f64,
        conversion: Conversion,
    ) -> Result<Hz, InstrumentError> {
        if !(value.0.is_finite() && value.0 >= min && value.0 <= max) {
            return Err(self.session.out_of_range(
                what,
                value.to_string(),
                Hz(min).to_string(),
                Hz(max).to_string(),
            ));
        }
        let sent = conversion.to_instrument(value.0);
        let actual = conversion.to_hz(self.session.set_number(&set, &query, sent).await?);
        if !actual.is_finite() || (actual - value.0).abs() > tolerance_hz {
            return Err(self.session.read_back_error(
                what,
                value.to_string(),
                Hz(actual).to_string(),
            ));
        }
        Ok(Hz(actual))
    }

    /// The medium of a wavelength axis, `None` for an axis in hertz.
    fn wavelength_medium(&self) -> Option<Medium> {
        (self.profile.axis.unit == AxisUnit::M).then_some(self.profile.axis.medium)
    }

    /// The centre frequency in hertz: the one last set, else asked of the instrument.
    async fn current_center_hz(&mut self) -> Result<f64, InstrumentError> {
        if let Some(center) = self.center_hz {
            return Ok(center);
        }
        let query = self.profile.commands.query_center.clone();
        let raw = self.session.query_number(&query).await?;
        let center = match self.wavelength_medium() {
            Some(medium) => medium.frequency_hz(raw),
            None => raw,
        };
        if !(center.is_finite() && center > 0.0) {
            return Err(self.session.parse_error(
                &query,
                ParseError(format!("the centre {raw} is not a usable optical position")),
            ));
        }
        self.center_hz = Some(center);
        Ok(center)
    }

    /// The conversion of a width (span, resolution bandwidth) around the centre: identity for a
    /// frequency axis; for a wavelength axis, `span_like` converts the whole interval exactly
    /// (the interval's ends, for a span), otherwise by the local derivative.
    async fn width_conversion(&mut self, span_like: bool) -> Result<Conversion, InstrumentError> {
        let Some(medium) = self.wavelength_medium() else {
            return Ok(Conversion::Identity);
        };
        let center_hz = self.current_center_hz().await?;
        Ok(if span_like {
            Conversion::Span { medium, center_hz }
        } else {
            Conversion::Width {
                hz_per_metre: medium.hz_per_metre(center_hz),
            }
        })
    }

    /// Decodes a trace reply (ASCII list or binary block) into dBm values.
    fn decode_trace(&self, reply: &[u8], out: &mut Vec<f64>) -> Result<(), ParseError> {
        self.decode_values(reply, out)?;
        convert_to_dbm(out, self.profile.data.power_unit)
    }

    /// Decodes a reply that is an ASCII list or a binary block in the profile's format.
    fn decode_values(&self, reply: &[u8], out: &mut Vec<f64>) -> Result<(), ParseError> {
        let data = &self.profile.data;
        if reply.first() == Some(&b'#') {
            let format = match data.format {
                // An instrument asked for ASCII that sends a block anyway: read it as REAL,32.
                DataFormat::Ascii => DataFormat::Real32,
                other => other,
            };
            decode_binary_reply_into(reply, format, data.byte_order, out)?;
        } else {
            let text = std::str::from_utf8(reply)
                .map_err(|_| ParseError("the ASCII trace holds bytes that are not text".into()))?;
            parse_number_list_into(text, out)?;
        }
        Ok(())
    }
}

#[async_trait]
impl SpectrumAnalyzer for ScpiSpectrumAnalyzer {
    fn resource(&self) -> &str {
        self.session.name()
    }

    async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        self.session.identify().await
    }

    fn capabilities(&self) -> AnalyzerCapabilities {
        self.profile.analyzer_capabilities()
    }

    async fn set_center(&mut self, center: Hz) -> Result<Hz, InstrumentError> {
        let k = &self.profile.capabilities;
        let range = (k.min_frequency_hz, k.max_frequency_hz);
        let c = &self.profile.commands;
        let commands = (c.set_center.clone(), c.query_center.clone());
        let tolerance = self.profile.read_back.center_hz;
        let conversion = self
            .wavelength_medium()
            .map_or(Conversion::Identity, Conversion::Position);
        self.center_hz = None;
        let actual = self
            .set_frequency_setting(
                "centre frequency",
                center,
                range,
                commands,
                tolerance,
                conversion,
            )
            .await?;
        self.center_hz = Some(actual.0);
        Ok(actual)
    }

    async fn set_span(&mut self, span: Hz) -> Result<Hz, InstrumentError> {
        let k = &self.profile.capabilities;
        let range = (k.min_span_hz, k.max_span_hz);
        let c = &self.profile.commands;
        let commands = (c.set_span.clone(), c.query_span.clone());
        let tolerance = self.profile.read_back.span_relative * span.0.abs();
        let conversion = self.width_conversion(true).await?;
        self.set_frequency_setting("span", span, range, commands, tolerance, conversion)
            .await
    }

    async fn set_resolution_bandwidth(&mut self, rbw: Hz) -> Result<Hz, InstrumentError> {
        let k = &self.profile.capabilities;
        let first = k.resolution_bandwidths_hz.first().copied().unwrap_or(0.0);
        let last = k
            .resolution_bandwidths_hz
            .last()
            .copied()
            .unwrap_or(f64::MAX);
        // Accept requests the instrument can round to its nearest offered bandwidth.
        let range = (first / 2.0, last * 2.0);
        let c = &self.profile.commands;
        let commands = (
            c.set_resolution_bandwidth.clone(),
            c.query_resolution_bandwidth.clone(),
        );
        let tolerance = self.profile.read_back.resolution_bandwidth_relative * rbw.0.abs();
        let conversion = self.width_conversion(false).await?;
        self.set_frequency_setting(
            "resolution bandwidth",
            rbw,
            range,
            commands,
            tolerance,
            conversion,
        )
        .await
    }

    async fn set_points(&mut self, points: usize) -> Result<usize, InstrumentError> {
        let max = self.profile.capabilities.max_points;
        if points < Trace::MIN_POINTS || points > max {
            return Err(self.session.out_of_range(
                "point count",
                points.to_string(),
                Trace::MIN_POINTS.to_string(),
                max.to_string(),
            ));
        }
        let c = &self.profile.commands;
        let command = fill_template(&c.set_points, &points.to_string());
        let query = c.query_points.clone();
        let reply = self.session.set_and_read_back(&command, &query).await?;
        let actual = parse_integer(&reply).map_err(|e| self.session.parse_error(&query, e))?;
        let tolerance = self.profile.read_back.points as i64;
        if actual < Trace::MIN_POINTS as i64 || (actual - points as i64).abs() > tolerance {
            return Err(self.session.read_back_error(
                "point count",
                points.to_string(),
                actual.to_string(),
            ));
        }
        Ok(actual as usize)
    }

    async fn sweep(&mut self) -> Result<(), InstrumentError> {
        let start = self.profile.commands.start_sweep.clone();
        let timeout = Duration::from_millis(self.profile.sweep_timeout_ms);
        let retries = self.profile.connection.retries;
        let mut attempt = 0;
        loop {
            let outcome = async {
                self.session.transport_mut().write(&start).await?;
                self.session.wait_complete(timeout).await
            }
            .await;
            match outcome {
                Err(e) if e.needs_reconnect() && attempt < retries => {
                    attempt += 1;
                    tracing::warn!(resource = %self.session.name(), attempt, error = %e, "repeating the sweep after a link failure");
                }
                other => return other,
            }
        }
    }

    fn abandon_operation(&mut self) {
        // A late reply to the abandoned query must not be read as the answer to the next one.
        self.session.transport_mut().disconnect();
    }

    async fn fetch_trace(&mut self) -> Result<Trace, InstrumentError> {
        let c = self.profile.commands.clone();
        let points_reply = self.session.query(&c.query_points).await?;
        let points = parse_integer(&points_reply)
            .map_err(|e| self.session.parse_error(&c.query_points, e))?;
        // The count sizes the axis and the trace before any of their data is read: a count
        // beyond what the profile allows (a wrong device on the port, a garbled reply) is refused
        // here, not allocated.
        let max_points = self.profile.capabilities.max_points;
        let points = usize::try_from(points)
            .ok()
            .filter(|p| (Trace::MIN_POINTS..=max_points).contains(p))
            .ok_or_else(|| {
                self.session.parse_error(
                    &c.query_points,
                    ParseError(format!(
                        "the instrument reports {points} points; a trace holds {} to {max_points} (the profile's capabilities.max_points)",
                        Trace::MIN_POINTS
                    )),
                )
            })?;
        let rbw = self
            .session
            .query_number(&c.query_resolution_bandwidth)
            .await?;
        if self.profile.data.assert_each_fetch {
            for (_, command) in self.format_commands() {
                self.session.transport_mut().write(&command).await?;
            }
        }
        let mut frequency_hz = self.read_axis(points).await?;

        let reply = self.session.query_raw(&c.query_trace).await?.to_vec();
        let mut power_dbm = Vec::with_capacity(points);
        self.decode_trace(&reply, &mut power_dbm)
            .map_err(|e| self.session.parse_error(&c.query_trace, e))?;
        if power_dbm.len() != points {
            return Err(self.session.parse_error(
                &c.query_trace,
                ParseError(format!(
                    "the trace holds {} values but the instrument reports {points} points",
                    power_dbm.len()
                )),
            ));
        }
        // Everything this fetch sent (format, axis and trace queries) is accounted for here.
        self.session.check_errors(&c.query_trace).await?;
        let rbw = match self.wavelength_medium() {
            Some(medium) => {
                // The resolution is a wavelength width: converted at the trace's middle.
                let middle = 0.5 * (frequency_hz[0] + frequency_hz[points - 1]);
                rbw * medium.hz_per_metre(middle)
            }
            None => rbw,
        };
        if frequency_hz.first() > frequency_hz.last() {
            // A wavelength axis runs from low to high frequency backwards.
            frequency_hz.reverse();
            power_dbm.reverse();
        }
        Trace::new(frequency_hz, power_dbm, Some(Hz(rbw))).map_err(|e| InstrumentError::Parse {
            resource: self.session.name().to_string(),
            operation: c.query_trace.clone(),
            detail: format!("the trace is not usable: {e}"),
        })
    }

    fn connection_notes(&self) -> Vec<ConnectionNote> {
        let c = &self.profile.commands;
        let queries = match self.axis {
            AxisMethod::StartStop | AxisMethod::Probe => {
                format!("{} / {}", c.query_start, c.query_stop)
            }
            AxisMethod::CenterSpan => format!("{} / {}", c.query_center, c.query_span),
            AxisMethod::Query => c.query_axis.clone(),
        };
        let d = &self.profile.data;
        let format = self
            .format_commands()
            .into_iter()
            .map(|(_, command)| command)
            .collect::<Vec<_>>()
            .join(", ");
        vec![
            ConnectionNote::new(
                "frequency axis",
                match self.wavelength_medium() {
                    None => format!("{} via {queries} ({})", self.axis, self.axis_reason),
                    Some(medium) => format!(
                        "{} via {queries} ({}); wavelengths in metres in {medium}, converted to optical frequency",
                        self.axis, self.axis_reason
                    ),
                },
            ),
            ConnectionNote::new(
                "trace format",
                format!(
                    "{format}; values in {:?}; {}",
                    d.power_unit,
                    if d.assert_each_fetch {
                        "sent again before every fetch"
                    } else {
                        "set at connect only (data.assert_each_fetch = false)"
                    }
                ),
            ),
        ]
    }
}

impl ScpiSpectrumAnalyzer {
    /// The frequency of every point, by the axis method chosen at connect.
    async fn read_axis(&mut self, points: usize) -> Result<Vec<f64>, InstrumentError> {
        let c = self.profile.commands.clone();
        let (start, stop, queries) = match self.axis {
            AxisMethod::Query => {
                let reply = self.session.query_raw(&c.query_axis).await?.to_vec();
                let mut axis = Vec::with_capacity(points);
                self.decode_values(&reply, &mut axis)
                    .map_err(|e| self.session.parse_error(&c.query_axis, e))?;
                if axis.len() != points || !axis.iter().all(|f| f.is_finite() && *f > 0.0) {
                    return Err(self.session.parse_error(
                        &c.query_axis,
                        ParseError(format!(
                            "the axis holds {} values (all must be finite and above 0) but the instrument reports {points} points",
                            axis.len()
                        )),
                    ));
                }
                if let Some(medium) = self.wavelength_medium() {
                    for value in axis.iter_mut() {
                        *value = medium.frequency_hz(*value);
                    }
                }
                return Ok(axis);
            }
            AxisMethod::CenterSpan => {
                let center = self.session.query_number(&c.query_center).await?;
                let span = self.session.query_number(&c.query_span).await?;
                (
                    center - span / 2.0,
                    center + span / 2.0,
                    format!("{} / {}", c.query_center, c.query_span),
                )
            }
            AxisMethod::StartStop | AxisMethod::Probe => {
                let start = self.session.query_number(&c.query_start).await?;
                let stop = self.session.query_number(&c.query_stop).await?;
                (start, stop, format!("{} / {}", c.query_start, c.query_stop))
            }
        };
        let unit = match self.profile.axis.unit {
            AxisUnit::Hz => "Hz",
            AxisUnit::M => "m",
        };
        if !(start.is_finite() && stop.is_finite() && stop > start && start > 0.0) {
            return Err(InstrumentError::Parse {
                resource: self.session.name().to_string(),
                operation: queries,
                detail: format!(
                    "the sweep runs from {start} {unit} to {stop} {unit}; the start must be above 0 and the stop above the start"
                ),
            });
        }
        let step = (stop - start) / (points - 1) as f64;
        let grid = (0..points).map(|i| start + step * i as f64);
        Ok(match self.wavelength_medium() {
            // Wavelength points: each becomes its optical frequency (descending; the caller
            // reverses the trace).
            Some(medium) => grid.map(|l| medium.frequency_hz(l)).collect(),
            None => grid.collect(),
        })
    }
}

/// True when an error is the instrument's answer that it does not know a query (rather than a
/// lost link): a SCPI error, or silence with an empty error queue.
fn refusal(error: &InstrumentError) -> bool {
    matches!(
        error,
        InstrumentError::Scpi { .. }
            | InstrumentError::Unanswered { .. }
            | InstrumentError::Parse { .. }
    )
}

/// A refused probe in a few words, for the axis note: the instrument's own error when it gave one.
fn short_refusal(first: &str, second: &str, error: &InstrumentError) -> String {
    match error {
        InstrumentError::Scpi { code, message, .. } => {
            format!("{first} / {second} drew {code},\"{message}\"")
        }
        other => format!("{first} / {second}: {other}"),
    }
}

/// Adds the profile key that sent a refused set-up command to the error, so the operator knows
/// what to change.
fn with_profile_key(error: InstrumentError, key: &str, command: &str) -> InstrumentError {
    match error {
        InstrumentError::Scpi {
            resource,
            operation,
            code,
            message,
            mut detail,
        } => {
            let skip = if key == "commands.single_sweep_mode" {
                format!(" (or {key} = \"\" if the instrument sweeps only when told to, having no continuous mode)")
            } else {
                String::new()
            };
            detail.push_str(&format!(
                "; {command:?} is sent at connect by the profile key {key}: set it to the instrument's own form{skip}"
            ));
            InstrumentError::Scpi {
                resource,
                operation,
                code,
                message,
                detail,
            }
        }
        other => other,
    }
}

/// Converts trace values in `unit` to dBm in place: L = 10 log10(P / 1 mW). A power of zero or
/// less has no level in dBm and is an error naming the point.
pub fn convert_to_dbm(values: &mut [f64], unit: PowerUnit) -> Result<(), ParseError> {
    let offset_db = match unit {
        PowerUnit::Dbm => return Ok(()),
        PowerUnit::Milliwatt => 0.0,
        PowerUnit::Watt => 30.0,
    };
    for (index, value) in values.iter_mut().enumerate() {
        if !(value.is_finite() && *value > 0.0) {
            return Err(ParseError(format!(
                "trace point {index} is {value} {unit:?}, which has no level in dBm (powers must be above zero)"
            )));
        }
        *value = 10.0 * value.log10() + offset_db;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn linear_powers_become_dbm() {
        // Definition of the dBm: 1 mW = 0 dBm, 1 W = 30 dBm, 10 uW = -20 dBm (common practice).
        let mut mw = vec![1.0, 0.01, 100.0];
        convert_to_dbm(&mut mw, PowerUnit::Milliwatt).unwrap();
        assert_eq!(mw, vec![0.0, -20.0, 20.0]);
        let mut w = vec![1.0, 1e-3];
        convert_to_dbm(&mut w, PowerUnit::Watt).unwrap();
        assert_eq!(w, vec![30.0, 0.0]);
        let mut dbm = vec![-3.0];
        convert_to_dbm(&mut dbm, PowerUnit::Dbm).unwrap();
        assert_eq!(dbm, vec![-3.0]);
        for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
            let err = convert_to_dbm(&mut [1.0, bad], PowerUnit::Milliwatt).unwrap_err();
            assert!(err.0.contains("point 1"), "{err}");
        }
    }
}
