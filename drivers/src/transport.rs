//! SCPI over a raw TCP socket: one connection per instrument, one exchange at a time.
//!
//! A [`ScpiTransport`] owns the socket; every operation takes `&mut self`, so a driver can never
//! interleave two commands on one instrument. Each operation (write, or write-then-read for a
//! query) runs under its own timeout. A failed operation (lost link, silence, a reply that cannot
//! be framed) drops the socket, because bytes that arrive late would otherwise be read as the
//! answer to the next query; the next operation reconnects with exponential backoff. Whether to
//! repeat the failed command is the caller's decision (a driver retries idempotent steps only).
//!
//! Replies are framed by [`block::reply_end`], which reads a block header before looking for the
//! terminator, so binary traces that contain newline bytes arrive whole. Every exchange is logged
//! at debug level (command, reply excerpt, elapsed time); the log fields are only formatted when
//! debug logging is enabled, which keeps a query round trip in the tens of microseconds.

use crate::resource::Resource;
use crate::scpi::{block, excerpt};
use crate::InstrumentError;
use std::io;
use std::time::{Duration, Instant};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// How a transport talks: terminators, timeouts, reconnection and a reply size guard.
#[derive(Debug, Clone, PartialEq)]
pub struct TransportConfig {
    /// Bytes that end a reply (LF for almost every SCPI instrument).
    pub read_terminator: Vec<u8>,
    /// Bytes appended to every command sent.
    pub write_terminator: Vec<u8>,
    /// Limit for one operation (a write, or a query's write and reply).
    pub timeout: Duration,
    /// Limit for one connection attempt.
    pub connect_timeout: Duration,
    /// Connection attempts before giving up (at least 1).
    pub reconnect_attempts: u32,
    /// Pause after the first failed attempt; doubles after each further failure.
    pub reconnect_backoff: Duration,
    /// Longest pause between attempts.
    pub max_reconnect_backoff: Duration,
    /// Largest reply accepted, in bytes (guards memory against a runaway or garbled stream).
    pub max_reply_bytes: usize,
    /// Sent on every new connection before anything else (IEEE 488.2 `*CLS`, so errors queued
    /// before this connection are never blamed on a command sent on it); empty sends nothing.
    pub clear_on_connect: String,
}

impl Default for TransportConfig {
    fn default() -> Self {
        TransportConfig {
            read_terminator: b"\n".to_vec(),
            write_terminator: b"\n".to_vec(),
            timeout: Duration::from_secs(5),
            connect_timeout: Duration::from_secs(3),
            reconnect_attempts: 4,
            reconnect_backoff: Duration::from_millis(100),
            max_reconnect_backoff: Duration::from_secs(2),
            max_reply_bytes: 64 * 1024 * 1024,
            clear_on_connect: String::new(),
        }
    }
}

/// A raw-socket SCPI connection to one instrument.
#[derive(Debug)]
pub struct ScpiTransport {
    resource: Resource,
    name: String,
    config: TransportConfig,
    stream: Option<TcpStream>,
    read_buf: Vec<u8>,
    write_buf: Vec<u8>,
    /// End of the last reply handed out in `read_buf`; bytes beyond it were not asked for.
    last_reply_end: usize,
    /// The part of `read_buf` handed out as the last reply.
    last_reply: std::ops::Range<usize>,
    connections: u64,
}

/// What a failed read or write was doing, for the error message.
enum Failure {
    Io(io::Error),
    Framing(String),
}

impl ScpiTransport {
    /// Connects to `resource` (with the configured retries and backoff).
    pub async fn connect(
        resource: Resource,
        config: TransportConfig,
    ) -> Result<ScpiTransport, InstrumentError> {
        let mut transport = ScpiTransport::unconnected(resource, config)?;
        transport.reconnect().await?;
        Ok(transport)
    }

    /// A transport that connects on its first operation (useful when the instrument may still be
    /// booting when the daemon starts). Checks the configuration.
    pub fn unconnected(
        resource: Resource,
        config: TransportConfig,
    ) -> Result<ScpiTransport, InstrumentError> {
        let name = resource.to_string();
        if config.read_terminator.is_empty() {
            return Err(InstrumentError::BadResource {
                resource: name,
                reason: "the read terminator is empty; use \"\\n\" unless the instrument ends replies otherwise".into(),
            });
        }
        if config.timeout.is_zero() || config.connect_timeout.is_zero() {
            return Err(InstrumentError::BadResource {
                resource: name,
                reason: "timeouts must be longer than zero".into(),
            });
        }
        Ok(ScpiTransport {
            resource,
            name,
            config,
            stream: None,
            read_buf: Vec::with_capacity(4096),
            write_buf: Vec::with_capacity(256),
            last_reply_end: 0,
            last_reply: 0..0,
            connections: 0,
        })
    }

    /// The instrument's resource.
    pub fn resource(&self) -> &Resource {
        &self.resource
    }

    /// The canonical resource string, for logs and errors.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// The configuration in use.
    pub fn config(&self) -> &TransportConfig {
        &self.config
    }

    /// True while a socket is open (it may still turn out to be dead on the next operation).
    pub fn is_connected(&self) -> bool {
        self.stream.is_some()
    }

    /// How many connections have been made so far (1 after the first connect; more after
    /// reconnects).
    pub fn connection_count(&self) -> u64 {
        self.connections
    }

    /// Closes the socket; the next operation reconnects.
    pub fn disconnect(&mut self) {
        if self.stream.take().is_some() {
            tracing::debug!(resource = %self.name, "scpi disconnect");
        }
        self.read_buf.clear();
        self.last_reply_end = 0;
        self.last_reply = 0..0;
    }

    /// Drops any open socket and connects again, trying `reconnect_attempts` times with a backoff
    /// that doubles from `reconnect_backoff` up to `max_reconnect_backoff`, then sends
    /// `clear_on_connect` (`*CLS`) on the new connection.
    pub async fn reconnect(&mut self) -> Result<(), InstrumentError> {
        self.open_connection().await?;
        if self.config.clear_on_connect.is_empty() {
            return Ok(());
        }
        let clear = self.config.clear_on_connect.clone();
        let mut bytes = clear.clone().into_bytes();
        bytes.extend_from_slice(&self.config.write_terminator);
        let timeout = self.config.timeout;
        let Some(stream) = self.stream.as_mut() else {
            return Err(self.io_error(&clear, io::Error::from(io::ErrorKind::NotConnected)));
        };
        let outcome = tokio::time::timeout(timeout, stream.write_all(&bytes)).await;
        match outcome {
            Ok(Ok(())) => {
                tracing::debug!(resource = %self.name, command = %clear, "scpi status cleared on the new connection");
                Ok(())
            }
            Ok(Err(e)) => {
                self.disconnect();
                Err(self.io_error(&clear, e))
            }
            Err(_) => {
                self.disconnect();
                Err(InstrumentError::Timeout {
                    resource: self.name.clone(),
                    operation: clear,
                    after: timeout,
                })
            }
        }
    }

    /// Like [`reconnect`](Self::reconnect) but without `clear_on_connect`: for reading the error
    /// queue an earlier connection left (what the instrument said about a command it did not
    /// answer). The caller clears the status itself afterwards.
    pub async fn reconnect_keeping_errors(&mut self) -> Result<(), InstrumentError> {
        self.open_connection().await
    }

    async fn open_connection(&mut self) -> Result<(), InstrumentError> {
        self.disconnect();
        let attempts = self.config.reconnect_attempts.max(1);
        let mut backoff = self.config.reconnect_backoff;
        let address = self.resource.socket_address();
        let mut last_error = io::Error::other("no connection attempt was made");
        for attempt in 1..=attempts {
            let started = Instant::now();
            match tokio::time::timeout(self.config.connect_timeout, TcpStream::connect(&address))
                .await
            {
                Ok(Ok(stream)) => {
                    // Commands are small and answered at once: send them without Nagle's delay.
                    stream
                        .set_nodelay(true)
                        .map_err(|e| self.io_error("connect", e))?;
                    self.stream = Some(stream);
                    self.connections += 1;
                    tracing::debug!(resource = %self.name, attempt, elapsed_us = started.elapsed().as_micros() as u64, "scpi connected");
                    return Ok(());
                }
                Ok(Err(e)) => last_error = e,
                Err(_) => {
                    last_error = io::Error::new(
                        io::ErrorKind::TimedOut,
                        format!(
                            "no answer to the connection request within {:?}",
                            self.config.connect_timeout
                        ),
                    )
                }
            }
            tracing::debug!(resource = %self.name, attempt, attempts, error = %last_error, "scpi connect failed");
            if attempt < attempts {
                tokio::time::sleep(backoff).await;
                backoff = (backoff * 2).min(self.config.max_reconnect_backoff);
            }
        }
        Err(InstrumentError::Connection {
            resource: self.name.clone(),
            operation: format!("connect (after {attempts} attempts)"),
            source: last_error,
        })
    }

    fn io_error(&self, operation: &str, source: io::Error) -> InstrumentError {
        InstrumentError::Connection {
            resource: self.name.clone(),
            operation: operation.to_string(),
            source,
        }
    }

    async fn ensure_connected(&mut self) -> Result<(), InstrumentError> {
        if self.stream.is_none() {
            self.reconnect().await?;
        }
        Ok(())
    }

    /// Sends one command (the write terminator is appended). No reply is read.
    pub async fn write(&mut self, command: &str) -> Result<(), InstrumentError> {
        let timeout = self.config.timeout;
        self.run(command, timeout, false).await.map(|_| ())
    }

    /// Sends a query and returns the reply as text, without its terminator.
    pub async fn query(&mut self, command: &str) -> Result<String, InstrumentError> {
        let timeout = self.config.timeout;
        self.query_text(command, timeout).await
    }

    /// Like [`query`](Self::query) with a different time limit (for example `*OPC?` after a
    /// sweep that takes longer than a normal reply).
    pub async fn query_with_timeout(
        &mut self,
        command: &str,
        timeout: Duration,
    ) -> Result<String, InstrumentError> {
        self.query_text(command, timeout).await
    }

    async fn query_text(
        &mut self,
        command: &str,
        timeout: Duration,
    ) -> Result<String, InstrumentError> {
        let range = self.run(command, timeout, true).await?;
        let bytes = self.read_buf.get(range).unwrap_or_default();
        String::from_utf8(bytes.to_vec()).map_err(|_| InstrumentError::Parse {
            resource: self.name.clone(),
            operation: command.to_string(),
            detail: format!("the reply {} is not text", excerpt(bytes)),
        })
    }

    /// Sends a query and returns the raw reply. A text reply comes without its terminator; a
    /// block reply (starting with `#`) comes whole, terminator included, ready for
    /// [`block::decode_binary_reply_into`]. The slice lives until the next operation.
    pub async fn query_raw(&mut self, command: &str) -> Result<&[u8], InstrumentError> {
        let timeout = self.config.timeout;
        let range = self.run(command, timeout, true).await?;
        Ok(self.read_buf.get(range).unwrap_or_default())
    }

    /// The last reply returned by a query, in the form [`query_raw`](Self::query_raw) gives it
    /// (empty after a failure or a write).
    pub fn last_reply(&self) -> &[u8] {
        self.read_buf
            .get(self.last_reply.clone())
            .unwrap_or_default()
    }

    /// Before a command: reads without waiting whatever the socket already holds. Bytes are
    /// replies nobody asked for (discarded with a warning, so they cannot be taken for the next
    /// answer); end of stream means the instrument closed an idle connection, which is dropped so
    /// that the command goes out on a fresh one instead of failing.
    fn drain_pending(&mut self) {
        let Some(stream) = self.stream.as_ref() else {
            return;
        };
        let mut scratch = [0u8; 1024];
        loop {
            match stream.try_read(&mut scratch) {
                Ok(0) => {
                    tracing::debug!(resource = %self.name, "the instrument closed the idle connection; reconnecting");
                    self.disconnect();
                    return;
                }
                Ok(n) => {
                    tracing::warn!(resource = %self.name, unexpected = %excerpt(scratch.get(..n).unwrap_or_default()), "discarding bytes the instrument sent without being asked");
                }
                Err(e) if e.kind() == io::ErrorKind::WouldBlock => return,
                Err(e) => {
                    tracing::debug!(resource = %self.name, error = %e, "the idle connection failed; reconnecting");
                    self.disconnect();
                    return;
                }
            }
        }
    }

    /// Writes `command` and, for a query, reads one reply. Returns the reply's range in the read
    /// buffer. On failure the socket is dropped so the next operation starts clean.
    async fn run(
        &mut self,
        command: &str,
        timeout: Duration,
        read_reply: bool,
    ) -> Result<std::ops::Range<usize>, InstrumentError> {
        self.drain_pending();
        self.ensure_connected().await?;
        let started = Instant::now();
        self.write_buf.clear();
        self.write_buf.extend_from_slice(command.as_bytes());
        self.write_buf
            .extend_from_slice(&self.config.write_terminator);
        if let Some(unexpected) = self
            .read_buf
            .get(self.last_reply_end..)
            .filter(|s| !s.is_empty())
        {
            tracing::warn!(resource = %self.name, unexpected = %excerpt(unexpected), "discarding bytes the instrument sent without being asked");
        }
        self.read_buf.clear();
        self.last_reply_end = 0;
        self.last_reply = 0..0;
        let Some(stream) = self.stream.as_mut() else {
            return Err(self.io_error(command, io::Error::from(io::ErrorKind::NotConnected)));
        };
        let exchange = exchange(
            stream,
            &self.write_buf,
            &mut self.read_buf,
            &self.config,
            read_reply,
        );
        let outcome = tokio::time::timeout(timeout, exchange).await;
        let elapsed_us = started.elapsed().as_micros() as u64;
        match outcome {
            Ok(Ok(end)) => {
                let range = self.reply_range(end);
                tracing::debug!(
                    resource = %self.name,
                    command,
                    reply = %excerpt(self.read_buf.get(range.clone()).unwrap_or_default()),
                    elapsed_us,
                    "scpi exchange"
                );
                // The reply is handed out by range; the buffer is cleared at the next operation.
                self.last_reply_end = end;
                self.last_reply = range.clone();
                Ok(range)
            }
            Ok(Err(failure)) => {
                self.disconnect();
                let error = match failure {
                    Failure::Io(source) => self.io_error(command, source),
                    Failure::Framing(detail) => InstrumentError::Parse {
                        resource: self.name.clone(),
                        operation: command.to_string(),
                        detail,
                    },
                };
                tracing::debug!(resource = %self.name, command, elapsed_us, error = %error, "scpi exchange failed");
                Err(error)
            }
            Err(_) => {
                self.disconnect();
                tracing::debug!(resource = %self.name, command, elapsed_us, "scpi exchange timed out");
                Err(InstrumentError::Timeout {
                    resource: self.name.clone(),
                    operation: command.to_string(),
                    after: timeout,
                })
            }
        }
    }

    /// The part of the read buffer to hand out for a reply ending at `end`.
    fn reply_range(&self, end: usize) -> std::ops::Range<usize> {
        let reply = self.read_buf.get(..end).unwrap_or_default();
        if reply.first() == Some(&b'#') {
            return 0..end;
        }
        let term = &self.config.read_terminator;
        let mut stop = end;
        if reply.ends_with(term) {
            stop -= term.len();
        }
        // A lone CR before an LF terminator is common; it is not part of the value.
        if term.as_slice() == b"\n" && stop > 0 && reply.get(stop - 1) == Some(&b'\r') {
            stop -= 1;
        }
        0..stop
    }
}

/// Writes one command and, when asked, reads until one whole reply is in `read_buf`.
/// Returns the end of the reply (terminator included) in `read_buf`.
async fn exchange(
    stream: &mut TcpStream,
    command: &[u8],
    read_buf: &mut Vec<u8>,
    config: &TransportConfig,
    read_reply: bool,
) -> Result<usize, Failure> {
    stream.write_all(command).await.map_err(Failure::Io)?;
    if !read_reply {
        return Ok(0);
    }
    let terminator = config.read_terminator.as_slice();
    let mut searched = 0;
    loop {
        match block::reply_end(read_buf, terminator, searched) {
            Ok(Some(end)) => return Ok(end),
            Ok(None) => searched = read_buf.len(),
            Err(e) => {
                return Err(Failure::Framing(format!(
                    "{e}; the connection is reset so the next reply starts in step"
                )))
            }
        }
        if read_buf.len() >= config.max_reply_bytes {
            return Err(Failure::Framing(format!(
                "the reply exceeds {} bytes without ending; check the read terminator ({})",
                config.max_reply_bytes,
                excerpt(terminator)
            )));
        }
        if read_buf.capacity() - read_buf.len() < 4096 {
            read_buf.reserve(64 * 1024);
        }
        let read = stream.read_buf(read_buf).await.map_err(Failure::Io)?;
        if read == 0 {
            return Err(Failure::Io(io::Error::new(
                io::ErrorKind::UnexpectedEof,
                if read_buf.is_empty() {
                    "the instrument closed the connection".to_string()
                } else {
                    format!(
                        "the instrument closed the connection in the middle of the reply {}",
                        excerpt(read_buf)
                    )
                },
            )));
        }
    }
}
