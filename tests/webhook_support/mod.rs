//! A webhook receiver on 127.0.0.1 for the tests: records every POST (path, headers, body, time)
//! and answers 503 to the first `fail_first`, 204 after. Shared by `webhooks.rs` and
//! `shared_database.rs`.

#![allow(dead_code)] // each test file uses part of it

use axum::body::Bytes;
use axum::http::{HeaderMap, StatusCode};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// One request the receiver got.
#[derive(Debug, Clone)]
pub struct Received {
    pub path: String,
    pub headers: HeaderMap,
    pub body: String,
    pub at: Instant,
}

/// A receiver on 127.0.0.1 that records every POST and answers 503 to the first `fail_first`.
#[derive(Clone)]
pub struct Receiver {
    got: Arc<Mutex<Vec<Received>>>,
    pub port: u16,
}

/// A port held for a receiver that is not up yet: bound but not listening, so a delivery to it is
/// refused at once (as to a receiver that is down), and no other socket can take the port before
/// [`Receiver::start_reserved`] listens on it.
pub struct ReservedPort {
    socket: tokio::net::TcpSocket,
    pub port: u16,
}

pub fn reserved_port() -> ReservedPort {
    let socket = tokio::net::TcpSocket::new_v4().unwrap();
    socket.bind("127.0.0.1:0".parse().unwrap()).unwrap();
    let port = socket.local_addr().unwrap().port();
    ReservedPort { socket, port }
}

impl Receiver {
    /// Starts the receiver on a free port.
    pub fn start(fail_first: usize) -> Receiver {
        Self::start_reserved(reserved_port(), fail_first)
    }

    /// Starts the receiver on a port held by [`reserved_port`].
    pub fn start_reserved(reserved: ReservedPort, fail_first: usize) -> Receiver {
        let listener = reserved.socket.listen(1024).unwrap();
        let got: Arc<Mutex<Vec<Received>>> = Arc::default();
        let count = Arc::new(AtomicUsize::new(0));
        let recorder = got.clone();
        let app = axum::Router::new().fallback(
            move |uri: axum::http::Uri, headers: HeaderMap, body: Bytes| {
                let recorder = recorder.clone();
                let count = count.clone();
                async move {
                    recorder.lock().unwrap().push(Received {
                        path: uri.path().to_string(),
                        headers,
                        body: String::from_utf8(body.to_vec()).unwrap(),
                        at: Instant::now(),
                    });
                    if count.fetch_add(1, Ordering::SeqCst) < fail_first {
                        StatusCode::SERVICE_UNAVAILABLE
                    } else {
                        StatusCode::NO_CONTENT
                    }
                }
            },
        );
        let port = listener.local_addr().unwrap().port();
        tokio::spawn(async move { axum::serve(listener, app).await.unwrap() });
        Receiver { got, port }
    }

    pub fn url(&self, path: &str) -> String {
        format!("http://127.0.0.1:{}{path}", self.port)
    }

    pub fn received(&self) -> Vec<Received> {
        self.got.lock().unwrap().clone()
    }

    /// Waits until at least `n` requests have arrived (up to `limit`).
    pub async fn wait_for(&self, n: usize, limit: Duration) -> Vec<Received> {
        let deadline = Instant::now() + limit;
        loop {
            let got = self.received();
            if got.len() >= n {
                return got;
            }
            assert!(
                Instant::now() < deadline,
                "{} of {n} deliveries arrived: {got:?}",
                got.len()
            );
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }
}
