//! A SCPI conversation with one instrument: steps that check the error queue and survive a
//! dropped link.
//!
//! The transport sends bytes; the session knows what a *step* is. A configuration step sends a
//! setting, drains `SYSTem:ERRor?` until `0,"No error"`, and reads the setting back. If the link
//! fails during a step (connection lost, timeout, reply out of step), the transport has already
//! dropped the socket; the session repeats the whole step, which reconnects first, up to the
//! profile's `retries`. Steps are idempotent (set-then-read, or a query), so repeating one is safe.
//! SCPI errors are never retried: they are the instrument's answer.

use super::format_decimal;
use crate::ieee488;
use crate::profile::{fill_template, CommonCommands, ConnectionProfile, ProfileError};
use crate::resource::Resource;
use crate::scpi::response::{parse_bool, parse_error_entry, parse_number};
use crate::scpi::ParseError;
use crate::transport::ScpiTransport;
use crate::{Identity, InstrumentError};
use std::time::Duration;

/// The transport with the common commands of a profile and a retry count.
#[derive(Debug)]
pub struct ScpiSession {
    transport: ScpiTransport,
    common: CommonCommands,
    retries: u32,
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
}

impl ScpiSession {
    pub fn new(transport: ScpiTransport, common: CommonCommands, retries: u32) -> ScpiSession {
        ScpiSession {
            transport,
            common,
            retries,
        }
    }

    /// Opens a session for a driver: parses `resource`, refuses a profile that failed its
    /// validation (`profile_check`), connects, clears the status and sends `setup` (each command
    /// checked against the error queue).
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
        let transport = ScpiTransport::connect(resource, connection.transport_config()).await?;
        let mut session = ScpiSession::new(transport, common.clone(), connection.retries);
        session.clear_status().await?;
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
    /// [`InstrumentError::Scpi`] carrying the first code and message (later ones are appended to
    /// the message). Does nothing when the profile has no error query.
    pub async fn check_errors(&mut self, after: &str) -> Result<(), InstrumentError> {
        if self.common.error_query.is_empty() {
            return Ok(());
        }
        let mut found = Vec::new();
        for _ in 0..self.common.max_error_entries {
            let reply = self.transport.query(&self.common.error_query).await?;
            let entry = parse_error_entry(&reply)
                .map_err(|e| self.parse_error(&self.common.error_query, e))?;
            if entry.is_no_error() {
                break;
            }
            tracing::debug!(resource = %self.name(), after, code = entry.code, message = %entry.message, "scpi error queue entry");
            found.push(entry);
        }
        let Some(first) = found.first() else {
            return Ok(());
        };
        let mut message = first.message.clone();
        if found.len() > 1 {
            let others: Vec<String> = found[1..]
                .iter()
                .map(|e| format!("{},\"{}\"", e.code, e.message))
                .collect();
            message.push_str(&format!(" (then also: {})", others.join("; ")));
        }
        if found.len() as u32 >= self.common.max_error_entries {
            message.push_str(" (the error queue did not empty; clear it with *CLS)");
        }
        Err(InstrumentError::Scpi {
            resource: self.name().to_string(),
            operation: after.to_string(),
            code: first.code,
            message,
        })
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
                self.check_errors(command).await?;
                Ok(Some(self.transport.query(query).await?))
            }
            Step::Query(query) => Ok(Some(self.transport.query(query).await?)),
        }
    }

    async fn run(&mut self, step: Step<'_>) -> Result<Option<String>, InstrumentError> {
        let mut attempt = 0;
        loop {
            match self.attempt(step).await {
                Err(e) if e.needs_reconnect() && attempt < self.retries => {
                    attempt += 1;
                    tracing::warn!(resource = %self.name(), attempt, error = %e, "repeating a step after a link failure");
                }
                other => return other,
            }
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

    /// A configuration step: sends `command`, checks the error queue, then returns the reply to
    /// `read_back` (the whole step is repeated after a link failure).
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

    /// Sends a query and returns its raw reply (see [`ScpiTransport::query_raw`]), repeated after
    /// a link failure.
    pub async fn query_raw(&mut self, query: &str) -> Result<&[u8], InstrumentError> {
        let mut attempt = 0;
        loop {
            match self.transport.query_raw(query).await {
                Ok(_) => break,
                Err(e) if e.needs_reconnect() && attempt < self.retries => {
                    attempt += 1;
                    tracing::warn!(resource = %self.name(), attempt, error = %e, "repeating a query after a link failure");
                }
                Err(e) => return Err(e),
            }
        }
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
