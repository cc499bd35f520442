//! The real `halfwave serve` process on a bench reached over SCPI/TCP (the simulator's server,
//! run by this test so that it outlives the daemon and shows what the RF output really does):
//! - killed with SIGKILL mid-run and started again: the run is interrupted, every committed point is
//!   still there, the start-up interlock has switched the RF off, and resuming it through the API
//!   completes it with the same number of points as an uninterrupted run, each measured once;
//! - stopped with SIGTERM mid-run: the process exits cleanly, the run is marked interrupted with its
//!   cause, and the RF output is off.

// libc::kill sends SIGTERM to the daemon under test.
#![allow(unsafe_code)]

mod engine_support;

mod daemon_support;

use daemon_support::{stored_points, Bench};
use engine_support::{FREQUENCIES_HZ, LEVELS, POINTS};
use halfwave::store::{RunState, Store};
use serde_json::Value;
use std::collections::HashSet;
use std::time::Duration;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigkill_mid_run_then_restart_and_resume_completes_every_point_once() {
    let bench = Bench::new(31).await;
    let token = bench.operator_token().await;
    // Let a dozen points be committed, then kill the process with no chance to clean up.
    let (mut daemon, run_id) = daemon_support::serve_mid_run(&bench, "first.log", &token, 12).await;
    daemon.kill().await.unwrap();
    daemon.wait().await.unwrap();
    // Usually on already (killed mid-point); make sure it is, so that the restart is what
    // switches it off.
    engine_support::leave_rf_on(bench.server.bench()).await;

    let committed = stored_points(&bench.database(), run_id).await;
    assert!(
        committed.len() >= 12 && committed.len() < POINTS,
        "{} points committed before the kill",
        committed.len()
    );

    // Start again: the start-up interlock switches the RF off; the run is interrupted with every
    // committed point intact.
    let _daemon = bench.serve("second.log").await;
    assert!(
        !bench.server.bench().rf_output_on(),
        "RF still on after the restart: {}",
        bench.log("second.log")
    );
    let run = bench.run(run_id, &token).await;
    assert_eq!(run["state"], "interrupted", "{run}");
    assert_eq!(
        run["measured_points"].as_u64(),
        Some(committed.len() as u64)
    );
    let after_restart = stored_points(&bench.database(), run_id).await;
    assert_eq!(after_restart, committed, "committed points changed");

    // Resumed with the CLI, which follows the run to its end (it reads "interrupted" until the
    // bench's worker takes it up, and must not take that for the end).
    let url = bench.url("");
    let followed = daemon_support::cli_succeeds(&[
        "resume",
        &run_id.to_string(),
        "--url",
        &url,
        "--token",
        &token,
        "--json",
    ])
    .await;
    let followed: Value = serde_json::from_str(&followed).expect("the run as JSON");
    assert_eq!(
        followed["state"],
        "completed",
        "{followed}: {}",
        bench.log("second.log")
    );
    let run = bench.run(run_id, &token).await;
    assert_eq!(run["state"], "completed", "{run}");
    assert_eq!(run["measured_points"].as_u64(), Some(POINTS as u64));
    assert_eq!(
        run["results"].as_array().map(Vec::len),
        Some(FREQUENCIES_HZ.len())
    );
    let all = stored_points(&bench.database(), run_id).await;
    let distinct: HashSet<_> = all.iter().copied().collect();
    assert_eq!(all.len(), POINTS, "same count as an uninterrupted run");
    assert_eq!(distinct.len(), POINTS, "every point measured once");
    assert!(distinct
        .iter()
        .all(|&(f, l)| (f as usize) < FREQUENCIES_HZ.len() && (l as usize) < LEVELS));
    assert!(!bench.server.bench().rf_output_on());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_mid_run_marks_the_run_interrupted_with_rf_off() {
    stop_mid_run_marks_the_run_interrupted_with_rf_off(libc::SIGTERM, "SIGTERM", 32).await;
}

/// Ctrl-C in the daemon's terminal: the same stop path as SIGTERM (README, "Safety").
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigint_mid_run_marks_the_run_interrupted_with_rf_off() {
    stop_mid_run_marks_the_run_interrupted_with_rf_off(libc::SIGINT, "SIGINT", 35).await;
}

async fn stop_mid_run_marks_the_run_interrupted_with_rf_off(signal: i32, name: &str, seed: u64) {
    let bench = Bench::new(seed).await;
    let token = bench.operator_token().await;
    let (mut daemon, run_id) = daemon_support::serve_mid_run(&bench, "daemon.log", &token, 5).await;
    let pid = daemon.id().expect("the daemon is running") as i32;
    // SAFETY: kill(2) with a valid pid and signal number has no memory-safety preconditions.
    assert_eq!(unsafe { libc::kill(pid, signal) }, 0);
    let status = tokio::time::timeout(Duration::from_secs(20), daemon.wait())
        .await
        .unwrap_or_else(|_| panic!("the daemon exits within 20 s of {name}"))
        .unwrap();
    assert!(status.success(), "{status:?}: {}", bench.log("daemon.log"));
    assert!(
        !bench.server.bench().rf_output_on(),
        "RF left on after {name}"
    );
    let store = Store::open(bench.database().to_str().unwrap())
        .await
        .unwrap();
    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.state, RunState::Interrupted);
    let cause = run.cause.unwrap_or_default();
    assert!(cause.contains("shut down"), "{cause}");
    assert!(store.points_of_run(run_id).await.unwrap().len() >= 5);
}

/// A client in the middle of a request cannot hold the RF on after SIGTERM. Here it has sent the
/// head of a run submission and half its body, then nothing: the server waits for the rest (up
/// to the 30 s request timeout) and the daemon's HTTP drain waits for that request. The outputs
/// must go off at once all the same, the run must be interrupted (not left to finish while the
/// daemon waits), and the process must exit within the shutdown grace.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_half_sent_request_holds_neither_the_rf_nor_the_exit_after_sigterm() {
    use tokio::io::AsyncWriteExt;
    let bench = Bench::new(33).await;
    let token = bench.operator_token().await;
    let (mut daemon, run_id) = daemon_support::serve_mid_run(&bench, "daemon.log", &token, 3).await;
    // The output is off while each frequency's reference trace is taken; wait for it to be on.
    let waiting = std::time::Instant::now();
    while !bench.server.bench().rf_output_on() {
        assert!(
            waiting.elapsed() < Duration::from_secs(30),
            "the output never came on mid-run"
        );
        tokio::time::sleep(Duration::from_millis(2)).await;
    }
    let mut half_sent = tokio::net::TcpStream::connect(("127.0.0.1", bench.port()))
        .await
        .unwrap();
    half_sent
        .write_all(
            format!(
                "POST /api/v1/runs HTTP/1.1\r\nHost: localhost\r\nAuthorization: Bearer {token}\r\nContent-Type: application/json\r\nContent-Length: 4000\r\n\r\n{{\"device\": "
            )
            .as_bytes(),
        )
        .await
        .unwrap();
    // Let the request reach its handler, which now waits for the body (a second, for a busy
    // machine: a head not yet read when the signal comes would count as an idle connection).
    tokio::time::sleep(Duration::from_millis(1000)).await;
    let pid = daemon.id().expect("the daemon is running") as i32;
    let signalled = std::time::Instant::now();
    // SAFETY: kill(2) with a valid pid and signal number has no memory-safety preconditions.
    assert_eq!(unsafe { libc::kill(pid, libc::SIGTERM) }, 0);
    while bench.server.bench().rf_output_on() {
        assert!(
            signalled.elapsed() < Duration::from_secs(5),
            "RF still on 5 s after SIGTERM with a request half sent: {}",
            bench.log("daemon.log")
        );
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    let status = tokio::time::timeout(Duration::from_secs(20), daemon.wait())
        .await
        .expect("the daemon exits within 20 s of SIGTERM, before the 30 s request timeout")
        .unwrap();
    assert!(status.success(), "{status:?}: {}", bench.log("daemon.log"));
    let log = bench.log("daemon.log");
    assert!(
        log.contains("did not finish their request within the shutdown grace"),
        "{log}"
    );
    drop(half_sent);
    let store = Store::open(bench.database().to_str().unwrap())
        .await
        .unwrap();
    let run = store.run(run_id).await.unwrap();
    assert_eq!(run.state, RunState::Interrupted, "{:?}", run.cause);
}
