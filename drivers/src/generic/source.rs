//! The generic SCPI RF source: [`RfSource`] for any signal generator, adapted by a
//! [`SourceProfile`].
//!
//! Requests outside the profile's limits are refused before anything is sent. Every setter is a
//! session step (send, drain the error queue, read back) and the read-back must agree within the
//! profile's tolerance, otherwise [`InstrumentError::ReadBack`]. [`ScpiRfSource::safe_off`] tries
//! harder than any other call: it reconnects and repeats until the instrument confirms the output
//! is off, because it is what every stop path relies on.
//!
//! A source takes time to settle after a change of frequency, level or output state. Every such
//! setter ends with `*OPC?` (the profile's `common.operation_complete`), so the call returns when
//! the instrument says the change is complete and a sweep that follows sees the settled drive.
//!
//! The ranges come from the instrument: at connect the driver asks `FREQuency? MINimum`,
//! `FREQuency? MAXimum`, `POWer? MINimum` and `POWer? MAXimum` (the profile can rename or skip
//! them) and keeps the narrower of each answer and the profile's `[limits]` key; a bound that
//! neither states is the conservative default ([`SourceLimitsProfile::CONSERVATIVE`]). Plans are
//! validated against what [`RfSource::limits`] reports, so a level the instrument cannot make is
//! refused before a run starts rather than failing mid-run with -222.
//!
//! A lost link is an interlock event. The session repeats a step on a new connection, which is
//! harmless for the step itself, but while the link was down nobody knew what the output did. So
//! after any step that needed a new connection the driver switches the output off and confirms it;
//! if the output may have been on, the step then fails with [`InstrumentError::LinkInterrupted`],
//! because the measurement in progress assumed RF on and can no longer be trusted.

use super::session::ScpiSession;
use crate::profile::{fill_template, SourceLimitsProfile, SourceProfile};
use crate::scpi::response::{parse_bool, parse_number};
use crate::{ConnectionNote, Identity, InstrumentError, RfSource, SourceLimits};
use async_trait::async_trait;
use halfwave_units::{Dbm, Hz};
use std::time::Duration;

/// How many times `safe_off` tries (each try reconnects if needed) before it reports failure.
const SAFE_OFF_ATTEMPTS: u32 = 4;

/// Longest wait for the answer to a range query at connect (an instrument that knows it answers
/// within milliseconds; one that does not queues -108 or -113 and sends nothing).
const RANGE_QUERY_TIMEOUT: Duration = Duration::from_millis(1500);

/// Where one bound of the limits came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum BoundOrigin {
    Instrument,
    Profile,
    Default,
}

/// An RF source reached over SCPI.
#[derive(Debug)]
pub struct ScpiRfSource {
    session: ScpiSession,
    profile: SourceProfile,
    /// False only while the output is known to be off (confirmed by a read-back).
    output_may_be_on: bool,
    /// The ranges in force (instrument, profile, defaults; see the module documentation).
    limits: SourceLimits,
    /// How the limits were found, for [`RfSource::connection_notes`].
    limit_notes: Vec<ConnectionNote>,
}

impl ScpiRfSource {
    /// Connects to `resource` (a VISA-style socket resource string), clears the status and runs
    /// the profile's `on_connect` commands.
    pub async fn connect(
        resource: &str,
        profile: SourceProfile,
    ) -> Result<ScpiRfSource, InstrumentError> {
        let session = ScpiSession::open(
            resource,
            profile.validate("(given to the RF source driver)"),
            &profile.connection,
            &profile.common,
            &profile.on_connect,
        )
        .await?;
        // Nothing is known about the output of an instrument just connected to.
        let limits = profile.source_limits();
        let mut source = ScpiRfSource {
            session,
            profile,
            output_may_be_on: true,
            limits,
            limit_notes: Vec::new(),
        };
        source.learn_limits().await?;
        Ok(source)
    }

    /// Asks the instrument for its ranges and merges them with the profile (see the module
    /// documentation). A query the instrument refuses is noted and skipped; when the first of a
    /// pair is refused the second is not asked (same header, same answer). A lost link fails.
    async fn learn_limits(&mut self) -> Result<(), InstrumentError> {
        let c = self.profile.commands.clone();
        let l = self.profile.limits.clone();
        let d = SourceLimitsProfile::CONSERVATIVE;
        let frequency = self
            .ask_pair(&c.query_min_frequency, &c.query_max_frequency)
            .await?;
        let level = self
            .ask_pair(&c.query_min_level, &c.query_max_level)
            .await?;
        // Whatever the answered range queries queued is read here, not blamed on a later step.
        if let Err(e) = self.session.check_errors("the range queries").await {
            if e.is_link_fault() {
                return Err(e);
            }
            tracing::warn!(resource = %self.session.name(), error = %e, "the range queries left an error; using the profile or default where they did not answer");
        }
        let (min_f, max_f, f_note) = merge(
            frequency,
            (l.min_frequency_hz, l.max_frequency_hz),
            (d.min_frequency.0, d.max_frequency.0),
        );
        let (min_l, max_l, l_note) = merge(
            level,
            (l.min_level_dbm, l.max_level_dbm),
            (d.min_level.0, d.max_level.0),
        );
        let limits = SourceLimits {
            min_frequency: Hz(min_f),
            max_frequency: Hz(max_f),
            min_level: Dbm(min_l),
            max_level: Dbm(max_l),
        };
        let empty =
            |what: &str, range: String, note: &str, keys: &str| InstrumentError::BadProfile {
                resource: self.session.name().to_string(),
                reason: format!(
                "the {what} range {range} ({note}) is empty; correct {keys} in the source's profile"
            ),
            };
        if min_f >= max_f {
            let range = format!("{} to {}", Hz(min_f), Hz(max_f));
            let keys = "limits.min_frequency_hz / limits.max_frequency_hz";
            return Err(empty("frequency", range, &f_note, keys));
        }
        if min_l >= max_l {
            let range = format!("{} to {}", Dbm(min_l), Dbm(max_l));
            let keys = "limits.min_level_dbm / limits.max_level_dbm";
            return Err(empty("level", range, &l_note, keys));
        }
        self.limit_notes = vec![
            ConnectionNote::new(
                "frequency range",
                format!(
                    "{} to {} ({f_note})",
                    limits.min_frequency, limits.max_frequency
                ),
            ),
            ConnectionNote::new(
                "level range",
                format!("{} to {} ({l_note})", limits.min_level, limits.max_level),
            ),
        ];
        tracing::info!(resource = %self.session.name(), ?limits, "RF source limits");
        self.limits = limits;
        Ok(())
    }

    /// Asks a MINimum/MAXimum pair; `None` for a bound the instrument did not state.
    async fn ask_pair(
        &mut self,
        min_query: &str,
        max_query: &str,
    ) -> Result<[Option<f64>; 2], InstrumentError> {
        let mut answers = [None, None];
        for (slot, query) in answers.iter_mut().zip([min_query, max_query]) {
            if query.trim().is_empty() {
                continue;
            }
            let timeout = RANGE_QUERY_TIMEOUT.min(self.session.transport().config().timeout);
            match self.session.probe(query, timeout).await {
                Ok(reply) => match parse_number(&reply) {
                    // 9.9E37 (infinity) and 9.91E37 (not a number) are not ranges (SCPI-1999
                    // Vol 1, 7.2.1.5; from memory).
                    Ok(v) if v.is_finite() && v.abs() < 9e37 => *slot = Some(v),
                    _ => {
                        tracing::warn!(resource = %self.session.name(), query, reply, "the range reply is not a usable number; using the profile or default")
                    }
                },
                Err(e @ (InstrumentError::Scpi { .. } | InstrumentError::Unanswered { .. })) => {
                    tracing::info!(resource = %self.session.name(), query, error = %e, "the instrument does not state this range; using the profile or default");
                    break;
                }
                Err(e) => return Err(e),
            }
        }
        Ok(answers)
    }

    /// The profile in use.
    pub fn profile(&self) -> &SourceProfile {
        &self.profile
    }

    /// The SCPI session, for commands outside the trait.
    pub fn session_mut(&mut self) -> &mut ScpiSession {
        &mut self.session
    }

    /// `*RST` (many sources switch the output off on reset; the caller should not rely on it).
    pub async fn reset(&mut self) -> Result<(), InstrumentError> {
        self.session.reset().await
    }

    fn check_range(
        &self,
        what: &str,
        value: f64,
        (min, max): (f64, f64),
        unit: &str,
    ) -> Result<(), InstrumentError> {
        if value.is_finite() && value >= min && value <= max {
            return Ok(());
        }
        Err(self.session.out_of_range(
            what,
            format!("{value} {unit}"),
            format!("{min} {unit}"),
            format!("{max} {unit}"),
        ))
    }

    /// Waits for the instrument to finish settling (`*OPC?`, within the transport's timeout).
    async fn wait_settled(&mut self, operation: &str) -> Result<(), InstrumentError> {
        let before = self.connections();
        let timeout = self.session.transport().config().timeout;
        let result = self.session.wait_complete(timeout).await;
        self.after_step(operation, before, result).await
    }

    fn connections(&self) -> u64 {
        self.session.transport().connection_count()
    }

    /// The interlock after a step (see the module documentation): when the step needed a new
    /// connection (`connections_before` is the count before it), switch the output off and fail
    /// the step if the output may have been on.
    async fn after_step<T>(
        &mut self,
        operation: &str,
        connections_before: u64,
        result: Result<T, InstrumentError>,
    ) -> Result<T, InstrumentError> {
        if self.connections() == connections_before {
            return result;
        }
        let was_on = self.output_may_be_on;
        tracing::warn!(resource = %self.session.name(), operation, output_may_have_been_on = was_on, "the link was re-established; switching the RF output off");
        let resource = self.session.name().to_string();
        let interrupted = |detail: String| InstrumentError::LinkInterrupted {
            resource,
            operation: operation.to_string(),
            detail,
        };
        let step_failure = match &result {
            Err(e) => format!("the step failed ({e}), and "),
            Ok(_) => String::new(),
        };
        match self.safe_off().await {
            Err(e) => Err(interrupted(format!(
                "{step_failure}the output could not be confirmed off afterwards ({e})"
            ))),
            Ok(()) if was_on => Err(interrupted(
                "the output was switched off because its state while the link was down is unknown; the measurement in progress is void".into(),
            )),
            Ok(()) => result,
        }
    }

    /// Sends the output-off command, optionally waits for `*OPC?`, and reads the output back.
    async fn try_off(&mut self, wait_complete: bool) -> Result<(), InstrumentError> {
        let c = &self.profile.commands;
        let command = fill_template(&c.set_output, &c.output_off_word);
        let query = c.query_output.clone();
        let complete = self.profile.common.operation_complete.clone();
        // The error queue is not consulted here: only the read-back proves the output is off.
        let transport = self.session.transport_mut();
        transport.write(&command).await?;
        if wait_complete {
            transport.query(&complete).await?;
        }
        let reply = transport.query(&query).await?;
        match parse_bool(&reply) {
            Ok(false) => Ok(()),
            Ok(true) => Err(self
                .session
                .read_back_error("output", "off".into(), "on".into())),
            Err(e) => Err(self.session.parse_error(&query, e)),
        }
    }
}

#[async_trait]
impl RfSource for ScpiRfSource {
    fn resource(&self) -> &str {
        self.session.name()
    }

    async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        let before = self.connections();
        let result = self.session.identify().await;
        self.after_step("identify", before, result).await
    }

    fn limits(&self) -> SourceLimits {
        self.limits
    }

    fn connection_notes(&self) -> Vec<ConnectionNote> {
        self.limit_notes.clone()
    }

    async fn set_frequency(&mut self, frequency: Hz) -> Result<Hz, InstrumentError> {
        let l = self.limits;
        self.check_range(
            "frequency",
            frequency.0,
            (l.min_frequency.0, l.max_frequency.0),
            "Hz",
        )?;
        let (set, query) = (
            self.profile.commands.set_frequency.clone(),
            self.profile.commands.query_frequency.clone(),
        );
        let before = self.connections();
        let result = self.session.set_number(&set, &query, frequency.0).await;
        let actual = self.after_step("set frequency", before, result).await?;
        if (actual - frequency.0).abs() > self.profile.read_back.frequency_hz || !actual.is_finite()
        {
            return Err(self.session.read_back_error(
                "frequency",
                Hz(frequency.0).to_string(),
                Hz(actual).to_string(),
            ));
        }
        self.wait_settled("settle after the frequency change")
            .await?;
        Ok(Hz(actual))
    }

    async fn set_level(&mut self, level: Dbm) -> Result<Dbm, InstrumentError> {
        let l = self.limits;
        self.check_range("level", level.0, (l.min_level.0, l.max_level.0), "dBm")?;
        let (set, query) = (
            self.profile.commands.set_level.clone(),
            self.profile.commands.query_level.clone(),
        );
        let before = self.connections();
        let result = self.session.set_number(&set, &query, level.0).await;
        let actual = self.after_step("set level", before, result).await?;
        if (actual - level.0).abs() > self.profile.read_back.level_db || !actual.is_finite() {
            return Err(self.session.read_back_error(
                "level",
                level.to_string(),
                Dbm(actual).to_string(),
            ));
        }
        self.wait_settled("settle after the level change").await?;
        Ok(Dbm(actual))
    }

    async fn set_output(&mut self, on: bool) -> Result<bool, InstrumentError> {
        let c = &self.profile.commands;
        let word = if on {
            &c.output_on_word
        } else {
            &c.output_off_word
        };
        let command = fill_template(&c.set_output, word);
        let query = c.query_output.clone();
        if on {
            self.output_may_be_on = true;
        }
        let before = self.connections();
        let result = self.session.set_and_read_back(&command, &query).await;
        let reply = self.after_step("set output", before, result).await?;
        let actual = parse_bool(&reply).map_err(|e| self.session.parse_error(&query, e))?;
        if actual != on {
            let state = |b: bool| if b { "on" } else { "off" }.to_string();
            return Err(self
                .session
                .read_back_error("output", state(on), state(actual)));
        }
        self.output_may_be_on = actual;
        if on {
            self.wait_settled("settle after switching the output on")
                .await?;
        }
        Ok(actual)
    }

    async fn output_enabled(&mut self) -> Result<bool, InstrumentError> {
        let query = self.profile.commands.query_output.clone();
        let before = self.connections();
        let result = self.session.query_bool(&query).await;
        self.after_step("read the output state", before, result)
            .await
    }

    async fn confirm_off_fresh(&mut self) -> Result<(), InstrumentError> {
        // A fresh connection: whatever the old one was waiting for is forgotten.
        self.session.transport_mut().disconnect();
        let result = self.try_off(true).await;
        match &result {
            Ok(()) => self.output_may_be_on = false,
            Err(_) => self.session.transport_mut().disconnect(),
        }
        result
    }

    async fn safe_off(&mut self) -> Result<(), InstrumentError> {
        let mut last_error = None;
        for attempt in 1..=SAFE_OFF_ATTEMPTS {
            match self.try_off(false).await {
                Ok(()) => {
                    self.output_may_be_on = false;
                    tracing::debug!(resource = %self.session.name(), attempt, "RF output confirmed off");
                    return Ok(());
                }
                Err(e) => {
                    tracing::warn!(resource = %self.session.name(), attempt, error = %e, "could not confirm the RF output is off; trying again");
                    // Start the next attempt on a fresh connection whatever went wrong.
                    self.session.transport_mut().disconnect();
                    last_error = Some(e);
                }
            }
        }
        Err(last_error.unwrap_or_else(|| InstrumentError::Unsupported {
            resource: self.session.name().to_string(),
            what: "switching the output off".into(),
        }))
    }
}

/// One range from the instrument's answers, the profile's keys and the defaults: each bound is
/// the narrower of the instrument's and the profile's, or whichever exists, or the default.
/// Returns the bounds and a note saying where they came from.
fn merge(
    instrument: [Option<f64>; 2],
    profile: (Option<f64>, Option<f64>),
    default: (f64, f64),
) -> (f64, f64, String) {
    let pick = |from_instrument: Option<f64>,
                from_profile: Option<f64>,
                fallback: f64,
                lower: bool| {
        match (from_instrument, from_profile) {
            (Some(i), Some(p)) => {
                let narrower = if lower { i.max(p) } else { i.min(p) };
                let origin = if narrower == i {
                    BoundOrigin::Instrument
                } else {
                    BoundOrigin::Profile
                };
                (narrower, origin)
            }
            (Some(i), None) => (i, BoundOrigin::Instrument),
            (None, Some(p)) => (p, BoundOrigin::Profile),
            (None, None) => (fallback, BoundOrigin::Default),
        }
    };
    let (min, min_origin) = pick(instrument[0], profile.0, default.0, true);
    let (max, max_origin) = pick(instrument[1], profile.1, default.1, false);
    let name = |o: BoundOrigin| match o {
        BoundOrigin::Instrument => "stated by the instrument",
        BoundOrigin::Profile => "from the profile's [limits]",
        BoundOrigin::Default => {
            "the conservative default, as neither the instrument nor the profile states it"
        }
    };
    let note = if min_origin == max_origin {
        name(min_origin).to_string()
    } else {
        format!("minimum {}, maximum {}", name(min_origin), name(max_origin))
    };
    (min, max, note)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_narrower_bound_wins_and_says_where_it_came_from() {
        // A 25 dBm instrument with a profile that allows 30 dBm: the instrument's 25 dBm wins.
        let (min, max, note) = merge(
            [Some(-130.0), Some(25.0)],
            (None, Some(30.0)),
            (-100.0, 10.0),
        );
        assert_eq!((min, max), (-130.0, 25.0));
        assert_eq!(note, "stated by the instrument");
        // A profile narrower than the instrument wins for its bound only.
        let (min, max, note) = merge(
            [Some(-130.0), Some(25.0)],
            (None, Some(18.0)),
            (-100.0, 10.0),
        );
        assert_eq!((min, max), (-130.0, 18.0));
        assert!(note.contains("maximum from the profile"), "{note}");
        // Nothing stated anywhere: the defaults.
        let (min, max, note) = merge([None, None], (None, None), (-100.0, 10.0));
        assert_eq!((min, max), (-100.0, 10.0));
        assert!(note.contains("conservative default"), "{note}");
    }
}
