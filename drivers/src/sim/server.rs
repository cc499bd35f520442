//! The simulated bench served over TCP: one listening socket per instrument, raw SCPI lines
//! (LXI-style socket, newline-terminated), any number of connections.
//!
//! [`SimServer::start`] binds the three ports (source, analyzer, power sensor) on 127.0.0.1 (port 0 picks a free one), spawns the
//! accept loops on the current tokio runtime and returns at once with the bound addresses, the
//! VISA-style resource strings and a [`FaultHandle`] per instrument. Each connection reads a line,
//! logs its message units in the bench's command log, consults the faults, executes the line under
//! the bench lock (microseconds), then waits outside the lock until the instrument is idle when a
//! reply needs that (`*OPC?`, `TRACe?`). Dropping the server, or [`SimServer::shutdown`], stops the
//! listeners and closes every connection.

use super::bench::{Role, SimBench};
use super::faults::{FaultHandle, LineAction, GARBLED_REPLY};
use super::scpi_instruments::execute_line;
use crate::sim::scpi_parser::{codes, split_units, ScpiError};
use std::net::{Ipv4Addr, SocketAddr};
use tokio::io::{AsyncBufReadExt, AsyncReadExt, AsyncWriteExt, BufReader};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::watch;
use tokio::task::JoinHandle;

/// Longest line accepted; longer input is discarded with a -102 syntax error.
const MAX_LINE_BYTES: usize = 1 << 20;

/// Where to listen. The simulator binds the loopback interface only.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SimServerConfig {
    /// RF source port (0 picks a free one).
    pub source_port: u16,
    /// Analyzer port (0 picks a free one).
    pub analyzer_port: u16,
    /// Power sensor port (0 picks a free one); `None` serves no sensor.
    pub sensor_port: Option<u16>,
}

impl SimServerConfig {
    /// Free ports chosen by the operating system (for tests).
    pub fn any_free_ports() -> SimServerConfig {
        SimServerConfig {
            source_port: 0,
            analyzer_port: 0,
            sensor_port: Some(0),
        }
    }
}

impl Default for SimServerConfig {
    /// 5025 (the LXI raw-socket convention) for the source, 5026 for the analyzer, 5027 for
    /// the power sensor.
    fn default() -> SimServerConfig {
        SimServerConfig {
            source_port: 5025,
            analyzer_port: 5026,
            sensor_port: Some(5027),
        }
    }
}

/// The running SCPI server of a simulated bench.
#[derive(Debug)]
pub struct SimServer {
    bench: SimBench,
    source_address: SocketAddr,
    analyzer_address: SocketAddr,
    sensor_address: Option<SocketAddr>,
    source_faults: FaultHandle,
    analyzer_faults: FaultHandle,
    sensor_faults: FaultHandle,
    shutdown: watch::Sender<bool>,
    tasks: Vec<JoinHandle<()>>,
}

/// The VISA-style resource string of a raw socket on 127.0.0.1.
pub fn resource_string(address: SocketAddr) -> String {
    format!("TCPIP::{}::{}::SOCKET", address.ip(), address.port())
}

impl SimServer {
    /// Binds both ports on 127.0.0.1 and starts serving. Must be called inside a tokio runtime.
    /// Fails when a port is taken (the error names the port).
    pub async fn start(bench: SimBench, config: SimServerConfig) -> std::io::Result<SimServer> {
        let bind = |port: u16, role: Role| async move {
            TcpListener::bind((Ipv4Addr::LOCALHOST, port))
                .await
                .map_err(|e| {
                    std::io::Error::new(
                        e.kind(),
                        format!(
                            "cannot listen on 127.0.0.1:{port} for the simulated {}: {e}; choose another port (0 picks a free one)",
                            role.name()
                        ),
                    )
                })
        };
        let source_listener = bind(config.source_port, Role::RfSource).await?;
        let analyzer_listener = bind(config.analyzer_port, Role::Analyzer).await?;
        let sensor_listener = match config.sensor_port {
            Some(port) => Some(bind(port, Role::PowerSensor).await?),
            None => None,
        };
        let source_address = source_listener.local_addr()?;
        let analyzer_address = analyzer_listener.local_addr()?;
        let sensor_address = sensor_listener
            .as_ref()
            .map(TcpListener::local_addr)
            .transpose()?;
        let source_faults = FaultHandle::new(Role::RfSource, bench.clone());
        let analyzer_faults = FaultHandle::new(Role::Analyzer, bench.clone());
        let sensor_faults = FaultHandle::new(Role::PowerSensor, bench.clone());
        let (shutdown, _) = watch::channel(false);
        let mut tasks = vec![
            tokio::spawn(accept_loop(
                source_listener,
                Role::RfSource,
                bench.clone(),
                source_faults.clone(),
                shutdown.subscribe(),
            )),
            tokio::spawn(accept_loop(
                analyzer_listener,
                Role::Analyzer,
                bench.clone(),
                analyzer_faults.clone(),
                shutdown.subscribe(),
            )),
        ];
        if let Some(listener) = sensor_listener {
            tasks.push(tokio::spawn(accept_loop(
                listener,
                Role::PowerSensor,
                bench.clone(),
                sensor_faults.clone(),
                shutdown.subscribe(),
            )));
        }
        tracing::info!(
            source = %source_address, analyzer = %analyzer_address, sensor = ?sensor_address,
            scenario = %bench.scenario().name, "simulated bench listening"
        );
        Ok(SimServer {
            bench,
            source_address,
            analyzer_address,
            sensor_address,
            source_faults,
            analyzer_faults,
            sensor_faults,
            shutdown,
            tasks,
        })
    }

    /// The bench behind the server (truth, command logs).
    pub fn bench(&self) -> &SimBench {
        &self.bench
    }

    /// The address an instrument listens on.
    ///
    /// # Panics
    /// For [`Role::PowerSensor`] when the server was started without a sensor port (a test's
    /// set-up mistake); [`SimServer::sensor_address`] asks without panicking.
    pub fn address(&self, role: Role) -> SocketAddr {
        match role {
            Role::RfSource => self.source_address,
            Role::Analyzer => self.analyzer_address,
            Role::PowerSensor => self
                .sensor_address
                .expect("the simulated bench was started without a power sensor port"),
        }
    }

    /// The power sensor's address, when one is served.
    pub fn sensor_address(&self) -> Option<SocketAddr> {
        self.sensor_address
    }

    /// The VISA-style resource string of an instrument: `TCPIP::127.0.0.1::<port>::SOCKET`.
    pub fn resource(&self, role: Role) -> String {
        resource_string(self.address(role))
    }

    /// The fault switches of an instrument.
    pub fn faults(&self, role: Role) -> FaultHandle {
        match role {
            Role::RfSource => self.source_faults.clone(),
            Role::Analyzer => self.analyzer_faults.clone(),
            Role::PowerSensor => self.sensor_faults.clone(),
        }
    }

    /// Stops listening, closes every connection and waits for the accept loops to end.
    pub async fn shutdown(mut self) {
        let _ = self.shutdown.send(true);
        for task in self.tasks.drain(..) {
            let _ = task.await;
        }
    }
}

impl Drop for SimServer {
    fn drop(&mut self) {
        let _ = self.shutdown.send(true);
    }
}

async fn accept_loop(
    listener: TcpListener,
    role: Role,
    bench: SimBench,
    faults: FaultHandle,
    mut shutdown: watch::Receiver<bool>,
) {
    loop {
        let accepted = tokio::select! {
            accepted = listener.accept() => accepted,
            _ = shutdown.changed() => return,
        };
        match accepted {
            Ok((stream, peer)) => {
                if faults.is_link_down() {
                    tracing::debug!(role = role.name(), %peer, "fault injection: link down, connection closed");
                    drop(stream);
                    continue;
                }
                tracing::debug!(role = role.name(), %peer, "simulated instrument connected");
                let _ = stream.set_nodelay(true);
                tokio::spawn(serve_connection(
                    stream,
                    role,
                    bench.clone(),
                    faults.clone(),
                    shutdown.clone(),
                ));
            }
            Err(e) => {
                tracing::warn!(role = role.name(), error = %e, "accept failed");
                tokio::time::sleep(std::time::Duration::from_millis(50)).await;
            }
        }
    }
}

async fn serve_connection(
    stream: TcpStream,
    role: Role,
    bench: SimBench,
    faults: FaultHandle,
    shutdown: watch::Receiver<bool>,
) {
    let mut link = faults.link_watch();
    tokio::select! {
        _ = serve_lines(stream, role, bench, faults, shutdown) => {}
        _ = link.wait_for(|down| *down) => {
            tracing::debug!(role = role.name(), "fault injection: link down, connection closed");
        }
    }
}

async fn serve_lines(
    stream: TcpStream,
    role: Role,
    bench: SimBench,
    faults: FaultHandle,
    mut shutdown: watch::Receiver<bool>,
) {
    let (reader, mut writer) = stream.into_split();
    let mut reader = BufReader::new(reader);
    let mut buffer = Vec::new();
    loop {
        buffer.clear();
        let mut limited = (&mut reader).take(MAX_LINE_BYTES as u64 + 1);
        let read = tokio::select! {
            read = limited.read_until(b'\n', &mut buffer) => read,
            _ = shutdown.changed() => return,
        };
        match read {
            Ok(0) | Err(_) => return,
            Ok(_) => {}
        }
        if buffer.len() > MAX_LINE_BYTES && buffer.last() != Some(&b'\n') {
            bench.push_error(
                role,
                ScpiError::new(codes::SYNTAX_ERROR, "line longer than 1 MiB discarded"),
            );
            // Skip the rest of the over-long line.
            let mut rest = Vec::new();
            if !matches!(reader.read_until(b'\n', &mut rest).await, Ok(n) if n > 0) {
                return;
            }
            continue;
        }
        let mut end = buffer.len();
        if buffer.get(..end).is_some_and(|b| b.ends_with(b"\n")) {
            end -= 1;
        }
        if buffer.get(..end).is_some_and(|b| b.ends_with(b"\r")) {
            end -= 1;
        }
        let line_bytes = buffer.get(..end).unwrap_or_default();
        let Ok(line) = std::str::from_utf8(line_bytes) else {
            bench.push_error(
                role,
                ScpiError::new(codes::COMMAND_ERROR, "the line is not ASCII/UTF-8 text"),
            );
            continue;
        };
        let units: Vec<String> = split_units(line)
            .into_iter()
            .map(str::trim)
            .filter(|u| !u.is_empty())
            .map(str::to_string)
            .collect();
        if units.is_empty() {
            continue;
        }
        let action = faults.on_line(units.len());
        let outcome = {
            let mut state = bench.lock();
            let status = match role {
                Role::RfSource => &mut state.source.status,
                Role::Analyzer => &mut state.analyzer.status,
                Role::PowerSensor => &mut state.sensor.status,
            };
            status.log.extend(units);
            match action {
                LineAction::Serve { .. } => Some(execute_line(&mut state, role, line)),
                LineAction::Drop | LineAction::Ignore => None,
            }
        };
        let (delay, garble) = match action {
            LineAction::Drop => {
                tracing::debug!(
                    role = role.name(),
                    "fault injection: dropping the connection"
                );
                return;
            }
            LineAction::Ignore => continue,
            LineAction::Serve { delay, garble } => (delay, garble),
        };
        let Some(outcome) = outcome else { continue };
        let Some(mut message) = outcome.message() else {
            continue;
        };
        // A moment already past is not waited for: tokio's timer rounds a sleep up to its next
        // millisecond tick, which would add about 1 ms to every `*OPC?` of an idle instrument.
        if let Some(ready_at) = outcome
            .ready_at
            .filter(|at| *at > tokio::time::Instant::now())
        {
            tokio::select! {
                _ = tokio::time::sleep_until(ready_at) => {}
                _ = shutdown.changed() => return,
            }
        }
        if !delay.is_zero() {
            tokio::select! {
                _ = tokio::time::sleep(delay) => {}
                _ = shutdown.changed() => return,
            }
        }
        if garble {
            faults.reply_garbled();
            message = [GARBLED_REPLY, b"\n"].concat();
        }
        if writer.write_all(&message).await.is_err() {
            return;
        }
    }
}
