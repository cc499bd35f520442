//! Slow and half-open HTTP clients against the real daemon: 3,000 connections that send only part
//! of a request line, held open, while a monitor asks `/api/v1/health` on a fresh connection
//! every 50 ms and the daemon's resident size is sampled.
//!
//! Starts the optimised `halfwave serve` binary Cargo builds beside this benchmark on the
//! simulated bench (loopback only), then:
//! 1. burst: opens the half-open connections as fast as it can, each sending `GET /api/v1/hea`
//!    and nothing more;
//! 2. hold: keeps that many open for 25 s, replacing every second those the daemon closed (so
//!    the pressure never lets up), and counts the closes;
//! 3. stops the attack and checks `/health` once more.
//!
//! Throughout, `/health` must answer 200 within 100 ms on every probe and the daemon's RSS
//! (`VmRSS`, and the kernel's high-water mark `VmHWM` at the end) must stay under 60 MB.
//! Exits non-zero when a target is missed. The count is 3,000, or fewer when the descriptor limit
//! cannot be raised that far (raised to the hard limit first; the daemon, a child, inherits it);
//! the count used is printed.
//!
//! Run: `cargo bench -p halfwave-server --bench slow_clients` (Linux; about 40 s).

#[path = "support/daemon.rs"]
mod daemon;

use daemon::{simulated_config, status_mb, Daemon};
use std::io::{ErrorKind, Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

const HALF_OPEN_TARGET: usize = 3000;
const RSS_TARGET_MB: f64 = 60.0;
const HEALTH_TARGET: Duration = Duration::from_millis(100);
const PROBE_INTERVAL: Duration = Duration::from_millis(50);
const HOLD: Duration = Duration::from_secs(25);
/// Descriptors this process keeps for itself beyond the attack (probes, pipes, the runtime).
const SPARE_DESCRIPTORS: u64 = 200;

/// Raises this process's descriptor limit to its hard limit and returns how many half-open
/// connections fit (at most [`HALF_OPEN_TARGET`]).
fn half_open_count() -> usize {
    use rustix::process::{getrlimit, setrlimit, Resource, Rlimit};
    let limit = getrlimit(Resource::Nofile);
    if let Some(hard) = limit.maximum {
        let _ = setrlimit(
            Resource::Nofile,
            Rlimit {
                current: Some(hard),
                maximum: Some(hard),
            },
        );
    }
    let soft = getrlimit(Resource::Nofile).current.unwrap_or(u64::MAX);
    let fits = usize::try_from(soft.saturating_sub(SPARE_DESCRIPTORS)).unwrap_or(usize::MAX);
    HALF_OPEN_TARGET.min(fits)
}

/// One `/health` request on a fresh connection: the time to the whole response, or why not.
fn probe(address: SocketAddr) -> Result<Duration, String> {
    let started = Instant::now();
    let mut stream = TcpStream::connect_timeout(&address, Duration::from_secs(5))
        .map_err(|e| format!("connect: {e}"))?;
    stream
        .set_read_timeout(Some(Duration::from_secs(5)))
        .map_err(|e| e.to_string())?;
    stream
        .write_all(b"GET /api/v1/health HTTP/1.1\r\nHost: bench\r\nConnection: close\r\n\r\n")
        .map_err(|e| format!("write: {e}"))?;
    let mut reply = Vec::new();
    stream
        .read_to_end(&mut reply)
        .map_err(|e| format!("read: {e}"))?;
    let elapsed = started.elapsed();
    let text = String::from_utf8_lossy(&reply);
    if !text.starts_with("HTTP/1.1 200") || !text.contains("\"ok\"") {
        return Err(format!(
            "unexpected reply: {}",
            text.lines().next().unwrap_or("(empty)")
        ));
    }
    Ok(elapsed)
}

/// Opens one connection that sends part of a request line and nothing more.
fn half_open(address: SocketAddr) -> Option<TcpStream> {
    let mut stream = TcpStream::connect_timeout(&address, Duration::from_secs(2)).ok()?;
    stream.write_all(b"GET /api/v1/hea").ok()?;
    stream.set_nonblocking(true).ok()?;
    Some(stream)
}

/// True when the daemon has closed the connection (end of file or reset).
fn closed_by_peer(stream: &mut TcpStream) -> bool {
    let mut byte = [0u8; 64];
    match stream.read(&mut byte) {
        Ok(0) => true,
        Ok(_) => false, // an error response before closing; the close comes next
        Err(e) if e.kind() == ErrorKind::WouldBlock => false,
        Err(_) => true,
    }
}

#[derive(Default)]
struct Observations {
    probes: usize,
    latencies_ms: Vec<f64>,
    failures: Vec<String>,
    peak_rss_mb: f64,
}

fn main() {
    if !std::env::args().any(|a| a == "--bench") {
        println!("slow_clients: run with `cargo bench -p halfwave-server --bench slow_clients`");
        return;
    }
    let count = half_open_count();
    let dir = tempfile::tempdir().unwrap();
    let (config, port) = simulated_config(dir.path());
    let address: SocketAddr = format!("127.0.0.1:{port}").parse().unwrap();
    let daemon = Daemon::serve(&config);
    let pid = daemon.pid();
    std::thread::sleep(Duration::from_secs(2));
    let idle_mb = status_mb(pid, "VmRSS:");
    let baseline = probe(address).expect("/health answers before the attack");

    // The monitor: a /health probe and an RSS sample every 50 ms until told to stop.
    let observations = Arc::new(Mutex::new(Observations::default()));
    let stop = Arc::new(AtomicBool::new(false));
    let monitor = {
        let observations = observations.clone();
        let stop = stop.clone();
        std::thread::spawn(move || {
            while !stop.load(Ordering::Relaxed) {
                let result = probe(address);
                let rss = status_mb(pid, "VmRSS:");
                let mut o = observations.lock().unwrap();
                o.probes += 1;
                o.peak_rss_mb = o.peak_rss_mb.max(rss);
                match result {
                    Ok(t) => o.latencies_ms.push(t.as_secs_f64() * 1e3),
                    Err(e) => o.failures.push(e),
                }
                drop(o);
                std::thread::sleep(PROBE_INTERVAL);
            }
        })
    };

    // Burst, then hold with replacements.
    let started = Instant::now();
    let mut open: Vec<TcpStream> = (0..count).filter_map(|_| half_open(address)).collect();
    let burst_s = started.elapsed().as_secs_f64();
    let opened_in_burst = open.len();
    let mut opened_total = open.len();
    let mut closed_by_daemon = 0usize;
    let hold_started = Instant::now();
    while hold_started.elapsed() < HOLD {
        std::thread::sleep(Duration::from_secs(1));
        let before = open.len();
        open.retain_mut(|s| !closed_by_peer(s));
        closed_by_daemon += before - open.len();
        while open.len() < count {
            match half_open(address) {
                Some(s) => {
                    open.push(s);
                    opened_total += 1;
                }
                None => break,
            }
        }
    }
    let held_at_end = open.len();
    drop(open);
    std::thread::sleep(Duration::from_secs(1));
    stop.store(true, Ordering::Relaxed);
    monitor.join().unwrap();
    let after = probe(address);
    let kernel_peak_mb = status_mb(pid, "VmHWM:");
    drop(daemon);

    let o = observations.lock().unwrap();
    let mut sorted = o.latencies_ms.clone();
    sorted.sort_by(f64::total_cmp);
    let pct = |p: f64| {
        sorted
            .get(((sorted.len() as f64 - 1.0) * p).round() as usize)
            .copied()
            .unwrap_or(f64::NAN)
    };
    let max_ms = sorted.last().copied().unwrap_or(f64::NAN);
    let peak_mb = o.peak_rss_mb.max(kernel_peak_mb);
    println!("half-open connections: {count} (target {HALF_OPEN_TARGET}), burst of {opened_in_burst} opened in {burst_s:.2} s, {opened_total} opened in all");
    println!(
        "closed by the daemon during the {} s hold: {closed_by_daemon}; still open at the end: {held_at_end}",
        HOLD.as_secs()
    );
    println!(
        "/health before the attack: {:.2} ms; during: {} probes, {} failed, median {:.2} ms, p99 {:.2} ms, max {max_ms:.2} ms (target < {} ms); after: {}",
        baseline.as_secs_f64() * 1e3,
        o.probes,
        o.failures.len(),
        pct(0.5),
        pct(0.99),
        HEALTH_TARGET.as_millis(),
        match &after {
            Ok(t) => format!("{:.2} ms", t.as_secs_f64() * 1e3),
            Err(e) => e.clone(),
        }
    );
    println!(
        "daemon resident size: idle {idle_mb:.1} MB, peak sampled {:.1} MB, kernel high-water mark {kernel_peak_mb:.1} MB (target < {RSS_TARGET_MB} MB)",
        o.peak_rss_mb
    );
    for failure in o.failures.iter().take(5) {
        eprintln!("probe failed: {failure}");
    }
    let met = o.failures.is_empty()
        && o.probes > 0
        && max_ms < HEALTH_TARGET.as_secs_f64() * 1e3
        && after.is_ok()
        && peak_mb < RSS_TARGET_MB
        && count == HALF_OPEN_TARGET;
    if !met {
        eprintln!("a target was missed (or the descriptor limit allowed fewer than {HALF_OPEN_TARGET} connections)");
        std::process::exit(1);
    }
}
