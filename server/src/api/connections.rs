//! The HTTP accept loop: how many connections the daemon holds, how long a client may take to
//! send a request head, and how the server stops.
//!
//! Why not `axum::serve`: it sets no timer on hyper, so hyper's header read timeout never fires,
//! and it neither caps connections nor sheds them. A few thousand clients that send half a
//! request line then held memory and descriptors until they gave up, and with the descriptors
//! gone the accept loop paused and `/health` stalled behind them. Here:
//! - every connection is an HTTP/1.1 connection of hyper's own builder with a Tokio timer, so a
//!   request head (request line and headers) must arrive within
//!   [`ConnectionLimits::header_read_timeout`]. Hyper starts that clock whenever it waits for a
//!   head, including between requests on a kept-alive connection, so the same limit closes idle
//!   keep-alive connections;
//! - at most [`ConnectionLimits::max_connections`] are open (fewer if the process's descriptor
//!   limit is lower; see [`connection_cap`]). When a new client arrives at the cap, the oldest
//!   connection that has not yet delivered its first request head is closed to make room: a
//!   client that sends its request at once (a health probe, the dashboard) is always served,
//!   however many half-open connections a slow or hostile client keeps open. When every open
//!   connection has delivered a request (real work in progress), the newcomer is closed instead;
//! - a read buffer of at most [`ConnectionLimits::max_buffer_bytes`] per connection (hyper's
//!   `max_buf_size`), so a client cannot grow one connection's memory with endless headers;
//! - on shutdown the listener closes at once, every connection finishes the response it is
//!   writing and closes (hyper's graceful shutdown), and `serve_connections` returns when the
//!   last one has gone, or after [`ConnectionLimits::shutdown_grace`], when the connections
//!   still open are closed mid-request: a client that stops reading a large response, or sends
//!   half a request body, cannot hold the daemon's exit. Long-lived responses (the event
//!   stream) end through the application's own shutdown signal. (The RF outputs do not wait
//!   for any of this: `halfwave serve` switches them off as soon as the stop signal arrives.)

use axum::Router;
use hyper::body::Incoming;
use hyper::Request;
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::service::TowerToHyperService;
use std::collections::BTreeMap;
use std::future::Future;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{watch, Notify};
use tokio_util::sync::CancellationToken;

/// Default for [`ConnectionLimits::max_connections`]: far more than a lab's browsers, scripts
/// and monitoring use at once, and small enough that the daemon's memory stays bounded (about
/// 20 kB per half-open connection, see README.md "Performance").
pub const DEFAULT_MAX_CONNECTIONS: usize = 1024;

/// Default for [`ConnectionLimits::header_read_timeout`]: a client on a lab network sends a
/// request head in milliseconds; ten seconds leaves room for a slow VPN and still frees a
/// stalled connection quickly.
pub const DEFAULT_HEADER_READ_TIMEOUT: Duration = Duration::from_secs(10);

/// Default for [`ConnectionLimits::max_buffer_bytes`]: a request head larger than this is
/// refused by hyper (431); browsers send a few kilobytes.
pub const DEFAULT_MAX_BUFFER_BYTES: usize = 64 * 1024;

/// Default for [`ConnectionLimits::shutdown_grace`]: a lab's responses take milliseconds to
/// write; five seconds lets a slow link finish one and keeps a stopping daemon's exit well inside
/// a service manager's stop timeout (systemd's default is 90 s).
pub const DEFAULT_SHUTDOWN_GRACE: Duration = Duration::from_secs(5);

/// Descriptors kept free for everything but HTTP clients: the database and its WAL files,
/// instrument connections, logs.
pub const RESERVED_DESCRIPTORS: u64 = 128;

/// The fewest connections the cap goes down to, whatever the descriptor limit says.
pub const MIN_CONNECTIONS: usize = 16;

/// Pause after an accept error that is not about one connection (for example no descriptor
/// left), so the loop neither spins nor sleeps for long.
const ACCEPT_ERROR_PAUSE: Duration = Duration::from_millis(10);

/// What the HTTP server allows each client.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConnectionLimits {
    /// Most connections open at once (lowered to fit the descriptor limit).
    pub max_connections: usize,
    /// Time allowed for a request head to arrive, from the moment the server waits for one; an
    /// idle keep-alive connection is closed after it too.
    pub header_read_timeout: Duration,
    /// Largest read buffer of one connection, in bytes (at least 8,192, hyper's minimum).
    pub max_buffer_bytes: usize,
    /// On shutdown, how long connections may take to finish the request in progress before
    /// they are closed regardless.
    pub shutdown_grace: Duration,
}

impl Default for ConnectionLimits {
    fn default() -> ConnectionLimits {
        ConnectionLimits {
            max_connections: DEFAULT_MAX_CONNECTIONS,
            header_read_timeout: DEFAULT_HEADER_READ_TIMEOUT,
            max_buffer_bytes: DEFAULT_MAX_BUFFER_BYTES,
            shutdown_grace: DEFAULT_SHUTDOWN_GRACE,
        }
    }
}

/// The connection cap that fits this process: `wanted`, or fewer if the descriptor limit
/// (less [`RESERVED_DESCRIPTORS`]) is lower. The soft limit is raised towards the hard limit
/// first when that makes room (what a server that needs many descriptors is expected to do;
/// common practice on Linux). Never below [`MIN_CONNECTIONS`].
pub fn connection_cap(wanted: usize) -> usize {
    use rustix::process::{getrlimit, setrlimit, Resource, Rlimit};
    let needed = wanted as u64 + RESERVED_DESCRIPTORS;
    let limit = getrlimit(Resource::Nofile);
    let mut soft = limit.current.unwrap_or(u64::MAX);
    if soft < needed {
        let raised = limit.maximum.map_or(needed, |hard| hard.min(needed));
        if raised > soft
            && setrlimit(
                Resource::Nofile,
                Rlimit {
                    current: Some(raised),
                    maximum: limit.maximum,
                },
            )
            .is_ok()
        {
            soft = raised;
        }
    }
    let fits = usize::try_from(soft.saturating_sub(RESERVED_DESCRIPTORS)).unwrap_or(usize::MAX);
    wanted.min(fits).max(MIN_CONNECTIONS)
}

/// Open connections, and which of them have not delivered a request head yet.
#[derive(Default)]
struct Registry {
    state: Mutex<RegistryState>,
    /// Woken when a connection ends (shutdown waits for the last one).
    closed: Notify,
}

#[derive(Default)]
struct RegistryState {
    next_id: u64,
    open: usize,
    /// Connections still waiting for their first request head, oldest first; cancelling the
    /// token tells the connection to close.
    awaiting_first_request: BTreeMap<u64, CancellationToken>,
}

impl Registry {
    fn lock(&self) -> MutexGuard<'_, RegistryState> {
        self.state.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Takes a slot for a new connection, closing the oldest one without a request to make
    /// room when at `cap`. `None`: at the cap and nothing to close, so refuse the newcomer.
    fn admit(&self, cap: usize) -> Option<(u64, CancellationToken)> {
        let mut state = self.lock();
        if state.open >= cap {
            let (_, evict) = state.awaiting_first_request.pop_first()?;
            // The evicted connection releases its slot when its task ends; until then `open`
            // counts it, which keeps the count honest about descriptors in use.
            evict.cancel();
        }
        let id = state.next_id;
        state.next_id += 1;
        state.open += 1;
        let evict = CancellationToken::new();
        state.awaiting_first_request.insert(id, evict.clone());
        Some((id, evict))
    }

    /// The connection delivered a request head: it is no longer a candidate for eviction.
    fn first_request(&self, id: u64) {
        self.lock().awaiting_first_request.remove(&id);
    }

    fn release(&self, id: u64) {
        let mut state = self.lock();
        state.awaiting_first_request.remove(&id);
        state.open = state.open.saturating_sub(1);
        drop(state);
        self.closed.notify_waiters();
    }

    fn open(&self) -> usize {
        self.lock().open
    }
}

/// Gives the slot back however the connection task ends.
struct Slot {
    registry: Arc<Registry>,
    id: u64,
}

impl Drop for Slot {
    fn drop(&mut self) {
        self.registry.release(self.id);
    }
}

/// Serves `app` on `listener` within `limits` until `shutdown` completes, then lets open
/// connections finish their responses and returns when all have closed, closing those still
/// open after [`ConnectionLimits::shutdown_grace`].
pub async fn serve_connections(
    listener: TcpListener,
    app: Router,
    limits: ConnectionLimits,
    shutdown: impl Future<Output = ()>,
) {
    let cap = connection_cap(limits.max_connections);
    if cap < limits.max_connections {
        tracing::warn!(
            cap,
            wanted = limits.max_connections,
            "the descriptor limit allows fewer HTTP connections than configured; raise it (LimitNOFILE= in the systemd unit, or ulimit -n)"
        );
    }
    let registry = Arc::new(Registry::default());
    let (stop_tx, stop_rx) = watch::channel(false);
    let close_now = CancellationToken::new();
    let mut builder = hyper::server::conn::http1::Builder::new();
    builder
        .timer(TokioTimer::new())
        .header_read_timeout(limits.header_read_timeout)
        .max_buf_size(limits.max_buffer_bytes.max(8192))
        .keep_alive(true);
    let mut shutdown = std::pin::pin!(shutdown);
    loop {
        let stream = tokio::select! {
            () = &mut shutdown => break,
            accepted = listener.accept() => match accepted {
                Ok((stream, _peer)) => stream,
                Err(e) if is_about_one_connection(&e) => continue,
                Err(e) => {
                    tracing::warn!(error = %e, "cannot accept an HTTP connection; retrying");
                    tokio::time::sleep(ACCEPT_ERROR_PAUSE).await;
                    continue;
                }
            },
        };
        let Some((id, evicted)) = registry.admit(cap) else {
            tracing::debug!(
                cap,
                "HTTP connection refused: every slot is serving a request"
            );
            drop(stream);
            continue;
        };
        let slot = Slot {
            registry: registry.clone(),
            id,
        };
        tokio::spawn(serve_one(
            stream,
            builder.clone(),
            app.clone(),
            slot,
            evicted,
            stop_rx.clone(),
            close_now.clone(),
        ));
    }
    drop(listener);
    let _ = stop_tx.send(true);
    let grace_over = tokio::time::sleep(limits.shutdown_grace);
    let mut grace_over = std::pin::pin!(grace_over);
    let mut closing = false;
    loop {
        let closed = registry.closed.notified();
        let open = registry.open();
        if open == 0 {
            break;
        }
        tokio::select! {
            () = closed => {}
            () = &mut grace_over, if !closing => {
                tracing::warn!(
                    connections = open,
                    grace_s = limits.shutdown_grace.as_secs_f64(),
                    "closing HTTP connections that did not finish their request within the shutdown grace"
                );
                closing = true;
                close_now.cancel();
            }
        }
    }
}

/// One connection, until it ends, is evicted, or the server stops (gracefully).
async fn serve_one(
    stream: TcpStream,
    builder: hyper::server::conn::http1::Builder,
    app: Router,
    slot: Slot,
    evicted: CancellationToken,
    mut stop: watch::Receiver<bool>,
    close_now: CancellationToken,
) {
    let _ = stream.set_nodelay(true);
    let tower = TowerToHyperService::new(app);
    let registry = slot.registry.clone();
    let id = slot.id;
    let seen_a_request = AtomicBool::new(false);
    let service = hyper::service::service_fn(move |request: Request<Incoming>| {
        if !seen_a_request.swap(true, Ordering::Relaxed) {
            registry.first_request(id);
        }
        hyper::service::Service::call(&tower, request)
    });
    let connection = builder.serve_connection(TokioIo::new(stream), service);
    let mut connection = std::pin::pin!(connection);
    let mut stopping = *stop.borrow();
    if stopping {
        connection.as_mut().graceful_shutdown();
    }
    loop {
        tokio::select! {
            result = connection.as_mut() => {
                if let Err(e) = result {
                    tracing::debug!(error = %e, "HTTP connection ended with an error");
                }
                break;
            }
            () = evicted.cancelled() => {
                tracing::debug!("closing an HTTP connection that sent no request head, to make room");
                break;
            }
            () = close_now.cancelled() => break,
            changed = stop.changed(), if !stopping => {
                stopping = true;
                if changed.is_err() || *stop.borrow() {
                    connection.as_mut().graceful_shutdown();
                }
            }
        }
    }
    drop(slot);
}

/// Accept errors that concern only the connection being accepted (the client gave up first).
fn is_about_one_connection(e: &std::io::Error) -> bool {
    use std::io::ErrorKind::*;
    matches!(
        e.kind(),
        ConnectionAborted | ConnectionRefused | ConnectionReset | Interrupted
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::routing::get;
    use std::time::Instant;
    use tokio::io::{AsyncReadExt, AsyncWriteExt};

    /// Generous bound on anything that should happen "soon" (a correctness bound, not a target).
    const SOON: Duration = Duration::from_secs(5);

    /// The limits README states ("HTTP API and dashboard": a request head within 10 s, at most
    /// 1,024 connections, requests timed out after 30 s; the top section: 5 s for requests in
    /// progress at shutdown), written out so that changing a default here fails until README
    /// says the new value. The behaviour at each limit is tested below with small limits.
    #[test]
    fn the_defaults_are_those_readme_states() {
        let limits = ConnectionLimits::default();
        assert_eq!(limits.max_connections, 1024);
        assert_eq!(limits.header_read_timeout, Duration::from_secs(10));
        assert_eq!(limits.shutdown_grace, Duration::from_secs(5));
        assert_eq!(crate::api::REQUEST_TIMEOUT, Duration::from_secs(30));
    }

    struct Server {
        address: std::net::SocketAddr,
        stop: Option<tokio::sync::oneshot::Sender<()>>,
        task: tokio::task::JoinHandle<()>,
    }

    async fn start(limits: ConnectionLimits) -> Server {
        let app = Router::new()
            .route("/ok", get(|| async { "ok" }))
            .route(
                "/slow",
                get(|| async {
                    tokio::time::sleep(Duration::from_millis(300)).await;
                    "slow"
                }),
            )
            // Larger than any socket buffer between the two ends, so it cannot be written
            // until the client reads.
            .route("/large", get(|| async { vec![b'x'; 64 << 20] }))
            .route("/echo", axum::routing::post(|body: String| async { body }));
        let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
        let address = listener.local_addr().unwrap();
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let task = tokio::spawn(serve_connections(listener, app, limits, async {
            let _ = stopped.await;
        }));
        Server {
            address,
            stop: Some(stop),
            task,
        }
    }

    fn limits(header_read_timeout_ms: u64, max_connections: usize) -> ConnectionLimits {
        ConnectionLimits {
            max_connections,
            header_read_timeout: Duration::from_millis(header_read_timeout_ms),
            max_buffer_bytes: DEFAULT_MAX_BUFFER_BYTES,
            shutdown_grace: SOON,
        }
    }

    /// Reads until the server closes the connection; what it sent, and when it closed.
    async fn read_until_closed(stream: &mut TcpStream) -> (String, Instant) {
        let mut received = Vec::new();
        let mut buffer = [0u8; 4096];
        loop {
            match tokio::time::timeout(SOON, stream.read(&mut buffer)).await {
                Ok(Ok(0)) | Ok(Err(_)) => break,
                Ok(Ok(n)) => received.extend_from_slice(&buffer[..n]),
                Err(_) => panic!("the server kept the connection open for over {SOON:?}"),
            }
        }
        (
            String::from_utf8_lossy(&received).into_owned(),
            Instant::now(),
        )
    }

    /// Sends one whole request (kept alive) and reads its response head and body.
    async fn request(stream: &mut TcpStream, path: &str) -> String {
        stream
            .write_all(format!("GET {path} HTTP/1.1\r\nHost: test\r\n\r\n").as_bytes())
            .await
            .unwrap();
        let mut received = Vec::new();
        let mut buffer = [0u8; 4096];
        while !String::from_utf8_lossy(&received).ends_with("ok")
            && !String::from_utf8_lossy(&received).ends_with("slow")
        {
            let n = tokio::time::timeout(SOON, stream.read(&mut buffer))
                .await
                .expect("a response in time")
                .unwrap();
            assert!(n > 0, "closed before the response was complete");
            received.extend_from_slice(&buffer[..n]);
        }
        String::from_utf8_lossy(&received).into_owned()
    }

    #[tokio::test]
    async fn a_connection_that_sends_part_of_its_headers_is_closed_after_the_header_timeout() {
        let server = start(limits(300, 64)).await;
        let mut stream = TcpStream::connect(server.address).await.unwrap();
        let sent = Instant::now();
        stream
            .write_all(b"GET /ok HTTP/1.1\r\nHost: test\r\nX-Half: ")
            .await
            .unwrap();
        let (received, closed) = read_until_closed(&mut stream).await;
        let held = closed - sent;
        assert!(
            held >= Duration::from_millis(250),
            "closed after {held:?}, before the 300 ms header timeout"
        );
        assert!(!received.contains("200 OK"), "{received}");
    }

    #[tokio::test]
    async fn an_idle_keep_alive_connection_is_closed_after_the_header_timeout() {
        let server = start(limits(300, 64)).await;
        let mut stream = TcpStream::connect(server.address).await.unwrap();
        let response = request(&mut stream, "/ok").await;
        assert!(response.starts_with("HTTP/1.1 200"), "{response}");
        let idle_since = Instant::now();
        let (_, closed) = read_until_closed(&mut stream).await;
        assert!(closed - idle_since >= Duration::from_millis(250));
    }

    #[tokio::test]
    async fn at_the_cap_the_oldest_half_open_connection_makes_room_for_a_whole_request() {
        let cap = MIN_CONNECTIONS;
        let server = start(limits(60_000, cap)).await;
        let mut half_open = Vec::new();
        for _ in 0..cap {
            let mut s = TcpStream::connect(server.address).await.unwrap();
            s.write_all(b"GET /o").await.unwrap();
            half_open.push(s);
        }
        // Let the server register them all before the newcomer arrives.
        tokio::time::sleep(Duration::from_millis(100)).await;
        let mut newcomer = TcpStream::connect(server.address).await.unwrap();
        let response = request(&mut newcomer, "/ok").await;
        assert!(response.starts_with("HTTP/1.1 200"), "{response}");
        // The oldest half-open connection was closed for it; the newest is still open.
        let (received, _) = read_until_closed(&mut half_open[0]).await;
        assert!(received.is_empty(), "{received}");
        let mut byte = [0u8; 1];
        let still_open = tokio::time::timeout(
            Duration::from_millis(200),
            half_open[cap - 1].read(&mut byte),
        )
        .await;
        assert!(
            still_open.is_err(),
            "the newest half-open connection was closed too"
        );
    }

    #[tokio::test]
    async fn when_every_slot_has_served_a_request_a_newcomer_is_refused() {
        let cap = MIN_CONNECTIONS;
        let server = start(limits(60_000, cap)).await;
        let mut kept = Vec::new();
        for _ in 0..cap {
            let mut s = TcpStream::connect(server.address).await.unwrap();
            assert!(request(&mut s, "/ok").await.starts_with("HTTP/1.1 200"));
            kept.push(s);
        }
        let mut newcomer = TcpStream::connect(server.address).await.unwrap();
        let _ = newcomer
            .write_all(b"GET /ok HTTP/1.1\r\nHost: test\r\n\r\n")
            .await;
        let (received, _) = read_until_closed(&mut newcomer).await;
        assert!(received.is_empty(), "{received}");
        // The kept-alive connections still work.
        assert!(request(&mut kept[0], "/ok")
            .await
            .starts_with("HTTP/1.1 200"));
    }

    #[tokio::test]
    async fn shutdown_finishes_the_response_in_progress_then_returns() {
        let mut server = start(limits(60_000, 64)).await;
        let mut busy = TcpStream::connect(server.address).await.unwrap();
        busy.write_all(b"GET /slow HTTP/1.1\r\nHost: test\r\n\r\n")
            .await
            .unwrap();
        let mut idle = TcpStream::connect(server.address).await.unwrap();
        assert!(request(&mut idle, "/ok").await.starts_with("HTTP/1.1 200"));
        tokio::time::sleep(Duration::from_millis(50)).await;
        let _ = server.stop.take().unwrap().send(());
        let (received, _) = read_until_closed(&mut busy).await;
        assert!(
            received.starts_with("HTTP/1.1 200") && received.ends_with("slow"),
            "{received}"
        );
        let (_, _) = read_until_closed(&mut idle).await;
        tokio::time::timeout(SOON, server.task)
            .await
            .expect("serve_connections returns once every connection closed")
            .unwrap();
        assert!(TcpStream::connect(server.address).await.is_err());
    }

    #[tokio::test]
    async fn shutdown_closes_connections_still_busy_after_the_grace() {
        let grace = Duration::from_millis(300);
        let mut server = start(ConnectionLimits {
            shutdown_grace: grace,
            ..limits(60_000, 64)
        })
        .await;
        // One client asks for a large response and never reads it; another sends half a body.
        let mut not_reading = TcpStream::connect(server.address).await.unwrap();
        not_reading
            .write_all(b"GET /large HTTP/1.1\r\nHost: test\r\n\r\n")
            .await
            .unwrap();
        let mut half_body = TcpStream::connect(server.address).await.unwrap();
        half_body
            .write_all(b"POST /echo HTTP/1.1\r\nHost: test\r\nContent-Length: 100\r\n\r\nhalf")
            .await
            .unwrap();
        tokio::time::sleep(Duration::from_millis(200)).await;
        let stopped = Instant::now();
        let _ = server.stop.take().unwrap().send(());
        tokio::time::timeout(SOON, server.task)
            .await
            .expect("serve_connections returns once the grace is over, whatever the clients do")
            .unwrap();
        let took = stopped.elapsed();
        assert!(
            took >= grace - Duration::from_millis(50),
            "returned after {took:?}, before the grace"
        );
        // Both connections were closed: the half body never got its echo.
        let (received, _) = read_until_closed(&mut half_body).await;
        assert!(!received.contains("200 OK"), "{received}");
        drop(not_reading);
    }

    #[test]
    fn the_cap_fits_the_descriptor_limit() {
        let cap = connection_cap(DEFAULT_MAX_CONNECTIONS);
        let soft = rustix::process::getrlimit(rustix::process::Resource::Nofile)
            .current
            .unwrap_or(u64::MAX);
        assert!(cap >= MIN_CONNECTIONS);
        assert!(cap <= DEFAULT_MAX_CONNECTIONS);
        assert!(
            cap as u64 + RESERVED_DESCRIPTORS <= soft || cap == MIN_CONNECTIONS,
            "cap {cap} with soft limit {soft}"
        );
    }
}
