//! The generic SCPI spectrum analyzer: [`SpectrumAnalyzer`] for any analyzer, adapted by an
//! [`AnalyzerProfile`].
//!
//! On connect it selects single-sweep mode and the profile's trace format and byte order, so that
//! a sweep runs only when asked and traces arrive in a known encoding. Setters are range-checked
//! against the profile's capabilities, sent as session steps (send, drain errors, read back) and
//! verified within tolerance. A trace is fetched as ASCII or as a binary block, whichever the
//! reply turns out to be, and its frequency axis is rebuilt from `STARt?`, `STOP?` and `POINts?`
//! (linear), as the agreed command set defines it.

use super::session::ScpiSession;
use crate::profile::{fill_template, AnalyzerProfile, PowerUnit};
use crate::scpi::block::decode_binary_reply_into;
use crate::scpi::response::{parse_integer, parse_number_list_into};
use crate::scpi::{ByteOrder, DataFormat, ParseError};
use crate::{AnalyzerCapabilities, Identity, InstrumentError, SpectrumAnalyzer};
use async_trait::async_trait;
use halfwave_units::{Hz, Trace};
use std::time::Duration;

/// A spectrum analyzer reached over SCPI.
#[derive(Debug)]
pub struct ScpiSpectrumAnalyzer {
    session: ScpiSession,
    profile: AnalyzerProfile,
}

impl ScpiSpectrumAnalyzer {
    /// Connects to `resource`, clears the status, selects single-sweep mode and the profile's
    /// data format, then runs the profile's `on_connect` commands.
    pub async fn connect(
        resource: &str,
        profile: AnalyzerProfile,
    ) -> Result<ScpiSpectrumAnalyzer, InstrumentError> {
        let c = &profile.commands;
        let mut setup = Vec::new();
        if !c.single_sweep_mode.is_empty() {
            setup.push(c.single_sweep_mode.clone());
        }
        let format = match profile.data.format {
            DataFormat::Ascii => &c.format_ascii,
            DataFormat::Real32 => &c.format_real32,
            DataFormat::Real64 => &c.format_real64,
        };
        setup.push(format.clone());
        if profile.data.format != DataFormat::Ascii {
            let order = match profile.data.byte_order {
                ByteOrder::Normal => &c.byte_order_normal,
                ByteOrder::Swapped => &c.byte_order_swapped,
            };
            if !order.is_empty() {
                setup.push(order.clone());
            }
        }
        setup.extend(profile.on_connect.iter().cloned());
        let session = ScpiSession::open(
            resource,
            profile.validate("(given to the analyzer driver)"),
            &profile.connection,
            &profile.common,
            &setup,
        )
        .await?;
        let analyzer = ScpiSpectrumAnalyzer { session, profile };
        Ok(analyzer)
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
    ) -> Result<Hz, InstrumentError> {
        if !(value.0.is_finite() && value.0 >= min && value.0 <= max) {
            return Err(self.session.out_of_range(
                what,
                value.to_string(),
                Hz(min).to_string(),
                Hz(max).to_string(),
            ));
        }
        let actual = self.session.set_number(&set, &query, value.0).await?;
        if !actual.is_finite() || (actual - value.0).abs() > tolerance_hz {
            return Err(self.session.read_back_error(
                what,
                value.to_string(),
                Hz(actual).to_string(),
            ));
        }
        Ok(Hz(actual))
    }

    /// Decodes a trace reply (ASCII list or binary block) into dBm values.
    fn decode_trace(&self, reply: &[u8], out: &mut Vec<f64>) -> Result<(), ParseError> {
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
        convert_to_dbm(out, data.power_unit)
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
        self.set_frequency_setting("centre frequency", center, range, commands, tolerance)
            .await
    }

    async fn set_span(&mut self, span: Hz) -> Result<Hz, InstrumentError> {
        let k = &self.profile.capabilities;
        let range = (k.min_span_hz, k.max_span_hz);
        let c = &self.profile.commands;
        let commands = (c.set_span.clone(), c.query_span.clone());
        let tolerance = self.profile.read_back.span_relative * span.0.abs();
        self.set_frequency_setting("span", span, range, commands, tolerance)
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
        self.set_frequency_setting("resolution bandwidth", rbw, range, commands, tolerance)
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
        let start = self.session.query_number(&c.query_start).await?;
        let stop = self.session.query_number(&c.query_stop).await?;
        let points_reply = self.session.query(&c.query_points).await?;
        let points = parse_integer(&points_reply)
            .map_err(|e| self.session.parse_error(&c.query_points, e))?;
        let rbw = self
            .session
            .query_number(&c.query_resolution_bandwidth)
            .await?;
        let name = self.session.name().to_string();
        let axis_error = |detail: String| InstrumentError::Parse {
            resource: name.clone(),
            operation: format!("{} / {} / {}", c.query_start, c.query_stop, c.query_points),
            detail,
        };
        if !(start.is_finite() && stop.is_finite() && stop > start) {
            return Err(axis_error(format!(
                "the sweep runs from {start} Hz to {stop} Hz; the stop must be above the start"
            )));
        }
        let points = usize::try_from(points)
            .ok()
            .filter(|p| *p >= Trace::MIN_POINTS)
            .ok_or_else(|| axis_error(format!("the instrument reports {points} points")))?;

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
        let step = (stop - start) / (points - 1) as f64;
        let frequency_hz: Vec<f64> = (0..points).map(|i| start + step * i as f64).collect();
        Trace::new(frequency_hz, power_dbm, Some(Hz(rbw))).map_err(|e| InstrumentError::Parse {
            resource: self.session.name().to_string(),
            operation: c.query_trace.clone(),
            detail: format!("the trace is not usable: {e}"),
        })
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
