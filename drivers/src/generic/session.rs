//! A SCPI conversation with one instrument: steps that check the error queue and survive a
//! dropped link.
//!
//! The transport sends bytes; the session knows what a *step* is. A configuration step sends a
//! setting, reads it back and then drains `SYSTem:ERRor?` until `0,"No error"`, so an error in
//! the queue belongs to that step. If the link fails during a step (connection lost, timeout,
//! reply out of step), the transport has already dropped the socket; the session repeats the
//! whole step, which reconnects first, up to the profile's `retries`. Steps are idempotent
//! (set-then-read, or a query), so repeating one is safe. SCPI errors are never retried: they are
//! the instrument's answer.
//!
//! Error-queue hygiene (why errors are never blamed on the wrong command):
//! - every new connection starts with `*CLS` (the transport sends `common.clear_status`), so
//!   nothing queued before it is read as the answer to a command sent on it;
//! - a query that draws no reply is followed, on a fresh connection, by a read of the error
//!   queue: an instrument that does not know a query queues -113 and sends nothing, and that
//!   entry is reported with the query that caused it instead of a bare timeout (and the step is
//!   not repeated, because the instrument has answered);
//! - queries sent without an error check since the last one are remembered; an entry found later
//!   names them as possible causes rather than blaming only the command just sent.

use super::format_decimal;
use crate::ieee488;
use crate::profile::{fill_template, CommonCommands, ConnectionProfile, ProfileError};
use crate::resource::Resource;
use crate::scpi::response::{parse_bool, parse_error_entry, parse_number, ErrorEntry};
use crate::scpi::ParseError;
use crate::transport::ScpiTransport;
use crate::{Identity, InstrumentError};
use std::time::Duration;

/// Most queries remembered as "sent without an error check" (the oldest are forgotten).
const MAX_UNCHECKED: usize = 8;

/// Longest wait for the error queue after a query went unanswered (on a fresh connection an
/// instrument answers `SYSTem:ERRor?` at once unless it is hung or busy).
const DIAGNOSIS_TIMEOUT: Duration = Duration::from_secs(2);

/// The transport with the common commands of a profile and a retry count.
#[derive(Debug)]
pub struct ScpiSession {
    transport: ScpiTransport,
    common: CommonCommands,
    retries: u32,
    /// Queries sent since the error queue was last read (possible causes of a later entry).
    unchecked: Vec<String>,
}

/// What the error queue held, read on a fresh connection after a query went unanswered.
enum QueueAfterSilence {
    /// The instrument queued these entries (typically -113 for a query it does not know).
    Errors(Vec<ErrorEntry>),
    /// The queue was empty, or could not be read; the text says which, for the operator.
    Nothing(String),
}

/// What one attempt of a step does.
#[derive(Clone, Copy)]
enum Step<'a> {
    /// Send a command and check the error queue.
    Write(&'a str),
    /// Send a command, check the error queue, then send a query and return its reply.
    WriteThenQuery(&'a str, &'a str),
    /// Send a query and return its reply.
    Query(&'a str),
    /// Send a query; its raw reply stays in the transport's buffer.
    QueryRaw(&'a str),
    /// Send a query and return its reply, waiting at most this long.
    QueryWithin(&'a str, Duration),
}

impl Step<'_> {
    /// The commands of the step, for an error message.
    fn describe(&self) -> String {
        match self {
            Step::Write(c) | Step::Query(c) | Step::QueryRaw(c) | Step::QueryWithin(c, _) => {
                c.to_string()
            }
            Step::WriteThenQuery(c, q) => format!("{c} (read back with {q})"),
        }
    }
}

impl ScpiSession {
    pub fn new(transport: ScpiTransport, common: CommonCommands, retries: u32) -> ScpiSession {
        ScpiSession {
            transport,
            common,
            retries,
            unchecked: Vec::new(),
        }
    }

    /// Opens a session for a driver: parses `resource`, refuses a profile that failed its
    /// validation (`profile_check`), connects (the transport sends `*CLS` on this and every later
    /// connection) and sends `setup` (each command checked against the error queue).
    pub async fn open(
        resource: &str,
        profile_check: Result<(), ProfileError>,
        connection: &ConnectionProfile,
        common: &CommonCommands,
        setup: &[String],
    ) -> Result<ScpiSession, InstrumentError> {
        let resource = Resource::parse(resource)?;
        profile_check.map_err(|e| InstrumentError::BadProfile {
            resource: resource.to_string(),
            reason: e.to_string(),
        })?;
        let config = connection.transport_config_clearing(&common.clear_status);
        let transport = ScpiTransport::connect(resource, config).await?;
        let mut session = ScpiSession::new(transport, common.clone(), connection.retries);
        for command in setup {
            session.write(command).await?;
        }
        Ok(session)
    }

    /// The instrument's resource string, for errors and logs.
    pub fn name(&self) -> &str {
        self.transport.name()
    }

    /// The transport, for raw access (custom commands, reconnect, counters).
    pub fn transport_mut(&mut self) -> &mut ScpiTransport {
        &mut self.transport
    }

    /// The transport, read-only.
    pub fn transport(&self) -> &ScpiTransport {
        &self.transport
    }

    /// A parse error for a reply to `operation`.
    pub fn parse_error(&self, operation: &str, error: ParseError) -> InstrumentError {
        InstrumentError::Parse {
            resource: self.name().to_string(),
            operation: operation.to_string(),
            detail: error.0,
        }
    }

    /// A request outside the allowed range (nothing was sent).
    pub fn out_of_range(
        &self,
        what: &str,
        value: String,
        min: String,
        max: String,
    ) -> InstrumentError {
        InstrumentError::OutOfRange {
            resource: self.name().to_string(),
            what: what.to_string(),
            value,
            min,
            max,
        }
    }

    /// A setting that read back outside its tolerance.
    pub fn read_back_error(
        &self,
        setting: &str,
        requested: String,
        actual: String,
    ) -> InstrumentError {
        InstrumentError::ReadBack {
            resource: self.name().to_string(),
            setting: setting.to_string(),
            requested,
            actual,
        }
    }

    /// Fills `set_template` with `value`, runs it as a configuration step and parses the
    /// read-back of `query` as a number.
    pub async fn set_number(
        &mut self,
        set_template: &str,
        query: &str,
        value: f64,
    ) -> Result<f64, InstrumentError> {
        let command = fill_template(set_template, &format_decimal(value));
        let reply = self.set_and_read_back(&command, query).await?;
        parse_number(&reply).map_err(|e| self.parse_error(query, e))
    }

    /// Sends a query and parses the reply as a number.
    pub async fn query_number(&mut self, query: &str) -> Result<f64, InstrumentError> {
        let reply = self.query(query).await?;
        parse_number(&reply).map_err(|e| self.parse_error(query, e))
    }

    /// Sends a query and parses the reply as a boolean (`0`/`1`/`ON`/`OFF`).
    pub async fn query_bool(&mut self, query: &str) -> Result<bool, InstrumentError> {
        let reply = self.query(query).await?;
        parse_bool(&reply).map_err(|e| self.parse_error(query, e))
    }

    /// Reads the error queue until it reports no error. Any entries found become one
    /// [`InstrumentError::Scpi`] carrying the first code and message, with later entries and
    /// what to do in its `detail`. `after` is the command just sent; queries sent since the last
    /// check are named beside it as possible causes. Does nothing when the profile has no error
    /// query.
    pub async fn check_errors(&mut self, after: &str) -> Result<(), InstrumentError> {
        if self.common.error_query.is_empty() {
            self.unchecked.clear();
            return Ok(());
        }
        let timeout = self.transport.config().timeout;
        let (found, full) = self.drain_error_queue(after, timeout).await?;
        let suspects = std::mem::take(&mut self.unchecked);
        if found.is_empty() {
            return Ok(());
        }
        Err(self.scpi_error(after, &suspects, &found, full))
    }

    /// Reads up to `max_error_entries` entries; true when the queue did not report "no error".
    async fn drain_error_queue(
        &mut self,
        after: &str,
        timeout: Duration,
    ) -> Result<(Vec<ErrorEntry>, bool), InstrumentError> {
        let mut found = Vec::new();
        let query = self.common.error_query.clone();
        for _ in 0..self.common.max_error_entries {
            let reply = self.transport.query_with_timeout(&query, timeout).await?;
            let entry = parse_error_entry(&reply).map_err(|e| self.parse_error(&query, e))?;
            if entry.is_no_error() {
                return Ok((found, false));
            }
            tracing::debug!(resource = %self.name(), after, code = entry.code, message = %entry.message, "scpi error queue entry");
            found.push(entry);
        }
        Ok((found, true))
    }

    /// The error for queue entries found after `after` (with earlier unchecked `suspects`).
    fn scpi_error(
        &self,
        after: &str,
        suspects: &[String],
        found: &[ErrorEntry],
        queue_full: bool,
    ) -> InstrumentError {
        let operation = if suspects.is_empty() {
            after.to_string()
        } else {
            format!(
                "{after} (or one of the queries sent before it without an error check: {})",
                suspects.join(", ")
            )
        };
        let mut detail = String::new();
        if let Some(first) = found.first() {
            detail.push_str(&hint_for(first.code));
        }
        if found.len() > 1 {
            let others: Vec<String> = found[1..]
                .iter()
                .map(|e| format!("{},\"{}\"", e.code, e.message))
                .collect();
            detail.push_str(&format!(
                "; the error queue also held {}",
                others.join(" and ")
            ));
        }
        if queue_full {
            detail.push_str(&format!(
                "; the error queue did not empty after {} reads (clear it with *CLS)",
                self.common.max_error_entries
            ));
        }
        let first = found.first();
        InstrumentError::Scpi {
            resource: self.name().to_string(),
            operation,
            code: first.map_or(0, |e| e.code),
            message: first.map(|e| e.message.clone()).unwrap_or_default(),
            detail,
        }
    }

    /// After a query drew no reply: on a fresh connection (without `*CLS`), reads the error
    /// queue, then clears the status. The instrument's own entries explain the silence.
    async fn queue_after_silence(&mut self, pending: &str) -> QueueAfterSilence {
        if self.common.error_query.is_empty() {
            return QueueAfterSilence::Nothing(
                "its error queue was not read (the profile's common.error_query is empty)".into(),
            );
        }
        if let Err(e) = self.transport.reconnect_keeping_errors().await {
            return QueueAfterSilence::Nothing(format!(
                "a fresh connection to read its error queue failed ({e})"
            ));
        }
        let timeout = self.transport.config().timeout.min(DIAGNOSIS_TIMEOUT);
        let outcome = self.drain_error_queue(pending, timeout).await;
        // The queue has been read; clear the status too so the next step starts clean.
        let clear = self.common.clear_status.clone();
        let cleared = if clear.is_empty() || outcome.is_err() {
            Ok(())
        } else {
            self.transport.write(&clear).await
        };
        match (outcome, cleared) {
            (Ok((found, _)), Ok(())) if !found.is_empty() => QueueAfterSilence::Errors(found),
            (Ok(_), Ok(())) => QueueAfterSilence::Nothing(format!(
                "on a fresh connection its error queue ({}) was empty, so it accepted the \
                 command without answering: it may be busy or hung, or end replies with another \
                 terminator than the profile's connection.read_terminator",
                self.common.error_query
            )),
            (Err(InstrumentError::Timeout { after, .. }), _) => {
                QueueAfterSilence::Nothing(format!(
                    "it did not answer {} on a fresh connection either (within {after:?}): check \
                     that it is on and not hung",
                    self.common.error_query
                ))
            }
            (Err(e), _) | (_, Err(e)) => QueueAfterSilence::Nothing(format!(
                "reading its error queue ({}) on a fresh connection failed too ({e})",
                self.common.error_query
            )),
        }
    }

    async fn attempt(&mut self, step: Step<'_>) -> Result<Option<String>, InstrumentError> {
        match step {
            Step::Write(command) => {
                self.transport.write(command).await?;
                self.check_errors(command).await?;
                Ok(None)
            }
            Step::WriteThenQuery(command, query) => {
                self.transport.write(command).await?;
                let reply = self.transport.query(query).await?;
                // Read after the read-back, so an entry belongs to this step and no other.
                self.check_errors(command).await?;
                Ok(Some(reply))
            }
            Step::Query(query) => {
                let reply = self.transport.query(query).await?;
                self.note_unchecked(query);
                Ok(Some(reply))
            }
            Step::QueryRaw(query) => {
                self.transport.query_raw(query).await?;
                self.note_unchecked(query);
                Ok(None)
            }
            Step::QueryWithin(query, timeout) => {
                let reply = self.transport.query_with_timeout(query, timeout).await?;
                self.note_unchecked(query);
                Ok(Some(reply))
            }
        }
    }

    fn note_unchecked(&mut self, query: &str) {
        if self.common.error_query.is_empty() {
            return;
        }
        if self.unchecked.len() >= MAX_UNCHECKED {
            self.unchecked.remove(0);
        }
        self.unchecked.push(query.to_string());
    }

    async fn run(&mut self, step: Step<'_>) -> Result<Option<String>, InstrumentError> {
        self.run_with_retries(step, self.retries).await
    }

    async fn run_with_retries(
        &mut self,
        step: Step<'_>,
        retries: u32,
    ) -> Result<Option<String>, InstrumentError> {
        let mut attempt = 0;
        loop {
            let error = match self.attempt(step).await {
                Err(InstrumentError::Timeout {
                    resource,
                    operation,
                    after,
                }) => {
                    // The instrument may have refused the command and queued why; ask it.
                    match self.queue_after_silence(&operation).await {
                        QueueAfterSilence::Errors(found) => {
                            let suspects = std::mem::take(&mut self.unchecked);
                            let mut error =
                                self.scpi_error(&step.describe(), &suspects, &found, false);
                            if let InstrumentError::Scpi { detail, .. } = &mut error {
                                detail.push_str(&format!(
                                    "; it sent no reply to {operation} within {after:?}"
                                ));
                            }
                            return Err(error);
                        }
                        QueueAfterSilence::Nothing(instrument_said) => {
                            InstrumentError::Unanswered {
                                resource,
                                operation,
                                after,
                                instrument_said,
                            }
                        }
                    }
                }
                Err(e) => e,
                ok => return ok,
            };
            if error.needs_reconnect() && attempt < retries {
                attempt += 1;
                tracing::warn!(resource = %self.name(), attempt, error = %error, "repeating a step after a link failure");
                continue;
            }
            return Err(error);
        }
    }

    /// Sends a command and checks the error queue (repeated after a link failure).
    pub async fn write(&mut self, command: &str) -> Result<(), InstrumentError> {
        self.run(Step::Write(command)).await.map(|_| ())
    }

    /// Sends a query and returns its reply (repeated after a link failure).
    pub async fn query(&mut self, query: &str) -> Result<String, InstrumentError> {
        Ok(self.run(Step::Query(query)).await?.unwrap_or_default())
    }

    /// A configuration step: sends `command`, reads `read_back`, checks the error queue and
    /// returns the read-back reply (the whole step is repeated after a link failure).
    pub async fn set_and_read_back(
        &mut self,
        command: &str,
        read_back: &str,
    ) -> Result<String, InstrumentError> {
        Ok(self
            .run(Step::WriteThenQuery(command, read_back))
            .await?
            .unwrap_or_default())
    }

    /// Sends a query and returns its reply, waiting at most `timeout` for it (a reading that
    /// takes longer than the profile's usual timeout); repeated after a link failure.
    pub async fn query_within(
        &mut self,
        query: &str,
        timeout: Duration,
    ) -> Result<String, InstrumentError> {
        Ok(self
            .run(Step::QueryWithin(query, timeout))
            .await?
            .unwrap_or_default())
    }

    /// Asks whether the instrument knows `query`: one attempt, waiting at most `timeout`. A
    /// query it does not know comes back as [`InstrumentError::Scpi`] (its -113, read on a fresh
    /// connection and cleared), silence without an error as [`InstrumentError::Unanswered`].
    pub async fn probe(
        &mut self,
        query: &str,
        timeout: Duration,
    ) -> Result<String, InstrumentError> {
        Ok(self
            .run_with_retries(Step::QueryWithin(query, timeout), 0)
            .await?
            .unwrap_or_default())
    }

    /// Sends a query and returns its raw reply (see [`ScpiTransport::query_raw`]), repeated after
    /// a link failure.
    pub async fn query_raw(&mut self, query: &str) -> Result<&[u8], InstrumentError> {
        self.run(Step::QueryRaw(query)).await?;
        Ok(self.transport.last_reply())
    }

    /// `*IDN?`, parsed.
    pub async fn identify(&mut self) -> Result<Identity, InstrumentError> {
        let command = self.common.identify.clone();
        let reply = self.query(&command).await?;
        ieee488::parse_identity(&reply).map_err(|e| self.parse_error(&command, e))
    }

    /// Waits for pending operations with `*OPC?` (up to `timeout`), then checks the error queue.
    pub async fn wait_complete(&mut self, timeout: Duration) -> Result<(), InstrumentError> {
        let command = self.common.operation_complete.clone();
        let reply = self.transport.query_with_timeout(&command, timeout).await?;
        ieee488::parse_operation_complete(&reply).map_err(|e| self.parse_error(&command, e))?;
        self.check_errors(&command).await
    }

    /// `*ESR?`: reads (and thereby clears) the standard event status register.
    pub async fn event_status(&mut self) -> Result<ieee488::EventStatus, InstrumentError> {
        let command = self.common.event_status.clone();
        let reply = self.query(&command).await?;
        ieee488::EventStatus::parse(&reply).map_err(|e| self.parse_error(&command, e))
    }

    /// `*RST`, waits for completion and checks the error queue.
    pub async fn reset(&mut self) -> Result<(), InstrumentError> {
        let reset = self.common.reset.clone();
        if reset.is_empty() {
            return Err(InstrumentError::Unsupported {
                resource: self.name().to_string(),
                what: "reset (the profile's common.reset is empty)".into(),
            });
        }
        self.transport.write(&reset).await?;
        let timeout = self.transport.config().timeout;
        self.wait_complete(timeout).await
    }

    /// `*CLS` when the profile has one (clears a stale error queue before the first step).
    pub async fn clear_status(&mut self) -> Result<(), InstrumentError> {
        let clear = self.common.clear_status.clone();
        if clear.is_empty() {
            return Ok(());
        }
        self.transport.write(&clear).await
    }
}

/// What to do about an error-queue entry, by its SCPI class (SCPI-1999 Vol 2, chapter 21: -1xx
/// command errors, -2xx execution errors; from memory).
fn hint_for(code: i32) -> String {
    match code {
        -199..=-100 => {
            "; the instrument does not accept this command as written: give the profile \
            key that sends it the instrument's own form, or an empty string where the key allows \
            skipping it (see `halfwave check-bench --suggest-profile`)"
                .into()
        }
        -299..=-200 => "; the instrument refused to carry it out: check the value against the \
            instrument's range and its current state"
            .into(),
        _ => String::new(),
    }
}
