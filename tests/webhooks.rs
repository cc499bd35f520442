//! Webhook notifications from the real `halfwave serve` process (simulated bench over SCPI/TCP),
//! to a receiver run by this test on 127.0.0.1:
//! - a completed run and a cancelled one: the event set per receiver (one filtered to
//!   `run.cancelled`), the payload, and the signature checked against an HMAC-SHA256 computed here
//!   from SHA-256 by the construction of RFC 2104 (not with the daemon's `hmac` crate), and by
//!   README's Python and `openssl dgst` examples;
//! - a receiver answering 503 twice, then 204: delivered on the third attempt with the same event
//!   id and body, the pauses growing as configured;
//! - a receiver that is down while SIGTERM interrupts a run: the delivery stays pending in the
//!   database, and the restarted daemon delivers it once the receiver is up; a receiver that
//!   never answers holds the shutdown for the 5 s grace only.
//! - a bench whose source link drops with the RF on: `bench.hold` when the output cannot be
//!   confirmed off, `bench.hold` again when it is held for an operator, and `bench.hold_cleared`
//!   after the acknowledgement, each signed, to a receiver that asked for bench events only.

mod engine_support;

mod daemon_support;

mod webhook_support;

use daemon_support::Bench;
use halfwave::store::Store;
use serde_json::{json, Value};
use sha2::{Digest, Sha256};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};
use webhook_support::{Received, Receiver};

/// The shared secret of the tests (an invented value).
const SECRET: &str = "lab-b-webhook-secret-0123456789abcdef";

/// HMAC-SHA256 by RFC 2104: H((K ^ opad) || H((K ^ ipad) || m)), a 64-byte block, with `sha2`.
fn reference_hmac_sha256(key: &[u8], message: &[u8]) -> String {
    let mut block = [0u8; 64];
    if key.len() > 64 {
        block[..32].copy_from_slice(&Sha256::digest(key));
    } else {
        block[..key.len()].copy_from_slice(key);
    }
    let inner_key: Vec<u8> = block.iter().map(|b| b ^ 0x36).collect();
    let outer_key: Vec<u8> = block.iter().map(|b| b ^ 0x5c).collect();
    let inner = Sha256::digest([&inner_key[..], message].concat());
    let outer = Sha256::digest([&outer_key[..], &inner[..]].concat());
    outer.iter().map(|b| format!("{b:02x}")).collect()
}

#[test]
fn the_reference_hmac_matches_rfc_4231_test_case_2() {
    // RFC 4231, section 4.3: key "Jefe", data "what do ya want for nothing?".
    assert_eq!(
        reference_hmac_sha256(b"Jefe", b"what do ya want for nothing?"),
        "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    );
}

fn header<'a>(r: &'a Received, name: &str) -> &'a str {
    r.headers
        .get(name)
        .unwrap_or_else(|| panic!("header {name} missing: {:?}", r.headers))
        .to_str()
        .unwrap()
}

/// Checks the signature as a receiver would (README, "Notifications") and returns the body.
fn verified(r: &Received) -> Value {
    let timestamp = header(r, "Halfwave-Timestamp");
    let expected = format!(
        "sha256={}",
        reference_hmac_sha256(
            SECRET.as_bytes(),
            format!("{timestamp}.{}", r.body).as_bytes()
        )
    );
    assert_eq!(header(r, "Halfwave-Signature"), expected, "{r:?}");
    let now = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_secs() as i64;
    let sent: i64 = timestamp.parse().unwrap();
    assert!(
        (now - sent).abs() <= 60,
        "timestamp {sent} against now {now}"
    );
    assert_eq!(
        header(r, "Content-Type"),
        "application/json",
        "{:?}",
        r.headers
    );
    let body: Value = serde_json::from_str(&r.body).unwrap();
    assert_eq!(header(r, "Halfwave-Event-Id"), body["event_id"], "{body}");
    assert_eq!(header(r, "Halfwave-Event"), body["event_type"], "{body}");
    body
}

/// A short plan on bench "sim": one frequency, nine levels, no settling.
fn short_plan() -> Value {
    let mut plan = daemon_support::plan();
    plan["frequencies"] = json!({"kind": "list", "values_hz": [1.5e9]});
    plan
}

/// Submits [`short_plan`] and waits (up to 120 s) until it has completed; returns its id.
async fn complete_short_run(bench: &Bench, token: &str) -> i64 {
    let run_id = bench.submit_plan(token, &short_plan()).await;
    bench
        .wait_for(run_id, token, Duration::from_secs(120), |r| {
            r["state"] == "completed"
        })
        .await;
    run_id
}

/// Writes the secret file and appends a `[[webhook]]` table.
fn add_webhook(bench: &Bench, url: &str, extra: &str) {
    let secret = bench.dir.path().join("webhook.secret");
    std::fs::write(&secret, format!("{SECRET}\n")).unwrap();
    bench.append_config(&format!(
        "\n[[webhook]]\nurl = \"{url}\"\nsecret_file = \"{}\"\n{extra}\n",
        secret.display()
    ));
}

/// Runs the Python `verify` of README.md's "Notifications" section on a delivery, as of `now`.
fn readme_python_verify(r: &Received, body: &str, now: i64) -> bool {
    let readme =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../README.md")).unwrap();
    let section = &readme[readme
        .find("## Notifications")
        .expect("README has Notifications")..];
    let start = section.find("```python\n").expect("a Python example") + "```python\n".len();
    let snippet = &section[start..start + section[start..].find("```").unwrap()];
    let script = format!(
        "{snippet}\nimport sys\nheaders = {{'Halfwave-Timestamp': sys.argv[1], 'Halfwave-Signature': sys.argv[2]}}\nprint(verify(sys.argv[3].encode(), headers, sys.stdin.buffer.read(), float(sys.argv[4])))\n"
    );
    let mut child = std::process::Command::new("python3")
        .arg("-c")
        .arg(script)
        .arg(header(r, "Halfwave-Timestamp"))
        .arg(header(r, "Halfwave-Signature"))
        .arg(SECRET)
        .arg(now.to_string())
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("python3 runs (README's verification example)");
    use std::io::Write;
    child
        .stdin
        .take()
        .unwrap()
        .write_all(body.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "{out:?}");
    match String::from_utf8(out.stdout).unwrap().trim() {
        "True" => true,
        "False" => false,
        other => panic!("the README example printed {other:?}"),
    }
}

/// Runs the shell one-liner of README.md's "Notifications" section (`openssl dgst`) on a
/// delivery's body saved to `body.json`, with its timestamp and the secret in the environment
/// variables the line names, and returns what it prints (the signature's hex digits).
fn readme_shell_signature(r: &Received, body: &str) -> String {
    let readme =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../README.md")).unwrap();
    let section = &readme[readme
        .find("## Notifications")
        .expect("README has Notifications")..];
    let shell = &section[section.find("or in a shell").expect("a shell example")..];
    let start = shell.find("```sh\n").expect("a shell block") + "```sh\n".len();
    let line = shell[start..start + shell[start..].find("```").unwrap()].trim();
    assert!(line.contains("openssl dgst"), "{line}");
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("body.json"), body).unwrap();
    let out = std::process::Command::new("bash")
        .args(["-euo", "pipefail", "-c", line])
        .current_dir(dir.path())
        .env("TIMESTAMP", header(r, "Halfwave-Timestamp"))
        .env("SECRET", SECRET)
        .output()
        .expect("bash runs (README's openssl example)");
    assert!(out.status.success(), "{line}: {out:?}");
    String::from_utf8(out.stdout).unwrap().trim().to_string()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_completed_and_a_cancelled_run_are_notified_signed_to_each_receiver_that_wants_them() {
    let receiver = Receiver::start(0);
    let bench = Bench::new(41).await;
    add_webhook(&bench, &receiver.url("/all"), "");
    add_webhook(
        &bench,
        &receiver.url("/cancels"),
        "events = [\"run.cancelled\"]",
    );
    let token = bench.operator_token().await;
    let _daemon = bench.serve("daemon.log").await;

    // The instruments run at twice their real times until the cancel below is answered: nine
    // sweeps of 0.8 s keep the first run going for over 7 s, so the second is still queued when
    // its cancel arrives, with seconds to spare on a loaded machine.
    let sim = bench.server.bench();
    sim.set_time_factor(2.0);
    let completed = bench.submit_plan(&token, &short_plan()).await;
    // A second run waits behind the first and is cancelled while queued.
    let cancelled = bench.submit_plan(&token, &short_plan()).await;
    let response = bench
        .post(
            &format!("/api/v1/runs/{cancelled}/cancel"),
            &token,
            &json!({}),
        )
        .await;
    assert!(response.status().is_success(), "{:?}", response.status());
    sim.set_time_factor(daemon_support::TIME_FACTOR);
    bench
        .wait_for(completed, &token, Duration::from_secs(120), |r| {
            r["state"] == "completed"
        })
        .await;

    let got = receiver.wait_for(3, Duration::from_secs(30)).await;
    // Nothing more arrives (no progress events, no second copy).
    tokio::time::sleep(Duration::from_millis(500)).await;
    let got_now = receiver.received();
    assert_eq!(got_now.len(), 3, "{got_now:?}");

    let to = |path: &str| -> Vec<Value> {
        got.iter()
            .filter(|r| r.path == path)
            .map(verified)
            .collect()
    };
    let all = to("/all");
    let mut types: Vec<(&str, i64)> = all
        .iter()
        .map(|b| {
            (
                b["event_type"].as_str().unwrap(),
                b["run_id"].as_i64().unwrap(),
            )
        })
        .collect();
    types.sort();
    assert_eq!(
        types,
        [("run.cancelled", cancelled), ("run.completed", completed)]
    );
    let done = all
        .iter()
        .find(|b| b["event_type"] == "run.completed")
        .unwrap();
    assert_eq!(done["bench"], "sim");
    assert_eq!(done["device_serial"], "EG-PM-0042");
    assert_eq!(done["state"], "completed");
    assert_eq!(
        done["summary"],
        format!("run {completed} (device EG-PM-0042) on bench sim completed")
    );
    assert!(
        done["occurred_at"].as_str().unwrap().ends_with('Z'),
        "{done}"
    );

    let cancels = to("/cancels");
    assert_eq!(cancels.len(), 1, "{cancels:?}");
    assert_eq!(cancels[0]["event_type"], "run.cancelled");
    assert_eq!(cancels[0]["run_id"], cancelled);
    // The same event carries the same id to every receiver.
    let same = all
        .iter()
        .find(|b| b["event_type"] == "run.cancelled")
        .unwrap();
    assert_eq!(same["event_id"], cancels[0]["event_id"]);
    assert_ne!(same["event_id"], done["event_id"]);

    // README's Python example accepts a real delivery, and refuses a changed body and a
    // timestamp outside its 5-minute window.
    let sent: i64 = header(&got[0], "Halfwave-Timestamp").parse().unwrap();
    assert!(readme_python_verify(&got[0], &got[0].body, sent + 10));
    assert!(!readme_python_verify(
        &got[0],
        &got[0].body.replace("sim", "sin"),
        sent + 10
    ));
    assert!(!readme_python_verify(&got[0], &got[0].body, sent + 301));
    // README's openssl one-liner prints the signature's digits for the body as received, and
    // other digits for a changed body.
    let signature = header(&got[0], "Halfwave-Signature");
    assert_eq!(
        format!("sha256={}", readme_shell_signature(&got[0], &got[0].body)),
        signature
    );
    assert_ne!(
        format!(
            "sha256={}",
            readme_shell_signature(&got[0], &got[0].body.replace("sim", "sin"))
        ),
        signature
    );

    // The daemon stores each outcome after the receiver's reply: wait for the rows first.
    let rows = settled_deliveries(&bench, "daemon.log").await;
    assert_eq!(rows.len(), 3, "{rows:?}");
    assert_eq!(
        bench
            .metric(&token, "halfwave_webhook_deliveries{state=\"delivered\"}")
            .await,
        Some(3.0)
    );
    assert_eq!(
        bench
            .metric(&token, "halfwave_webhook_deliveries{state=\"pending\"}")
            .await,
        Some(0.0)
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_receiver_down_then_up_gets_the_delivery_on_a_later_attempt_with_growing_pauses() {
    // 503 to the first two attempts, 204 afterwards.
    let receiver = Receiver::start(2);
    let bench = Bench::new(42).await;
    add_webhook(
        &bench,
        &receiver.url("/hook"),
        "first_retry_s = 0.4\nmax_retry_s = 5\nmax_attempts = 5",
    );
    let token = bench.operator_token().await;
    let _daemon = bench.serve("daemon.log").await;
    let run_id = complete_short_run(&bench, &token).await;

    let got = receiver.wait_for(3, Duration::from_secs(30)).await;
    let bodies: Vec<Value> = got.iter().map(verified).collect();
    assert!(bodies.iter().all(|b| b == &bodies[0]), "{bodies:?}");
    assert_eq!(bodies[0]["event_type"], "run.completed");
    assert_eq!(bodies[0]["run_id"], run_id);
    // 0.4 s before the second attempt, 0.8 s before the third (a little slack for the clock).
    let first_pause = got[1].at - got[0].at;
    let second_pause = got[2].at - got[1].at;
    assert!(first_pause >= Duration::from_millis(350), "{first_pause:?}");
    assert!(
        second_pause >= Duration::from_millis(750),
        "{second_pause:?}"
    );
    // No `second_pause > first_pause`: the two lower bounds already show the doubling (a constant
    // 0.4 s pause would fail the second), and a stall of the loaded machine in the first pause
    // could make it the longer one without the daemon doing anything wrong.

    tokio::time::sleep(Duration::from_millis(300)).await;
    assert_eq!(
        receiver.received().len(),
        3,
        "no attempt after the delivery"
    );
    let rows = settled_deliveries(&bench, "daemon.log").await;
    assert_eq!(rows.len(), 1, "{rows:?}");
    assert_eq!(rows[0].state, "delivered");
    assert_eq!(rows[0].attempts, 3);
    assert_eq!(rows[0].event_id, bodies[0]["event_id"].as_str().unwrap());
}

/// A receiver that answers with a redirect is not followed (README, "Notifications": a redirect
/// counts as a failed attempt, and the log says to configure the final URL): the redirect's
/// target never gets the delivery, and after `max_attempts` the delivery is `failed`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_redirect_is_not_followed_and_counts_as_a_failed_attempt() {
    let target = Receiver::start(0);
    let redirected = std::sync::Arc::new(std::sync::atomic::AtomicUsize::new(0));
    let counter = redirected.clone();
    let location = target.url("/hook");
    let redirector = axum::Router::new().fallback(move || {
        let counter = counter.clone();
        let location = location.clone();
        async move {
            counter.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
            (
                axum::http::StatusCode::TEMPORARY_REDIRECT,
                [(axum::http::header::LOCATION, location)],
            )
        }
    });
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let redirector_url = format!("http://{}/hook", listener.local_addr().unwrap());
    tokio::spawn(async move { axum::serve(listener, redirector).await.unwrap() });

    let bench = Bench::new(45).await;
    add_webhook(
        &bench,
        &redirector_url,
        "first_retry_s = 0.2\nmax_retry_s = 0.2\nmax_attempts = 2",
    );
    let token = bench.operator_token().await;
    let _daemon = bench.serve("daemon.log").await;
    complete_short_run(&bench, &token).await;
    let store = Store::open(bench.database().to_str().unwrap())
        .await
        .unwrap();
    let deadline = std::time::Instant::now() + Duration::from_secs(30);
    let row = loop {
        let rows = store.webhook_deliveries(10).await.unwrap();
        if let Some(row) = rows.into_iter().find(|r| r.state == "failed") {
            break row;
        }
        assert!(
            std::time::Instant::now() < deadline,
            "no failed delivery: {}",
            bench.log("daemon.log")
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    };
    assert_eq!(row.attempts, 2, "{row:?}");
    let error = row.last_error.unwrap_or_default();
    assert!(
        error.contains("307") && error.contains("redirects are not followed"),
        "{error}"
    );
    assert_eq!(redirected.load(std::sync::atomic::Ordering::SeqCst), 2);
    assert!(target.received().is_empty(), "the redirect was followed");
}

/// The bench database's webhook deliveries (up to 10), read on a connection of their own.
async fn stored_deliveries(bench: &Bench) -> Vec<halfwave::store::WebhookDelivery> {
    let store = Store::open(bench.database().to_str().unwrap())
        .await
        .unwrap();
    let rows = store.webhook_deliveries(10).await.unwrap();
    store.close().await;
    rows
}

/// The bench database's webhook deliveries once none is `pending` (polled up to 30 s; the daemon's
/// log `log_name` in the failure message): the daemon stores an attempt's outcome only after the
/// receiver's reply, so a receiver can hold a request before its row says so.
async fn settled_deliveries(
    bench: &Bench,
    log_name: &str,
) -> Vec<halfwave::store::WebhookDelivery> {
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let rows = stored_deliveries(bench).await;
        if rows.iter().all(|r| r.state != "pending") {
            return rows;
        }
        assert!(
            Instant::now() < deadline,
            "deliveries still pending after 30 s: {rows:?}\n{}",
            bench.log(log_name)
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// Sends the daemon SIGTERM and waits (up to 60 s) for it to exit successfully (its log
/// `log_name` in the failure message); returns how long it took.
async fn stop_with_sigterm(
    daemon: &mut tokio::process::Child,
    bench: &Bench,
    log_name: &str,
) -> Duration {
    let pid = daemon.id().expect("the daemon is running");
    let pid = rustix::process::Pid::from_raw(pid as i32).unwrap();
    let signalled = Instant::now();
    rustix::process::kill_process(pid, rustix::process::Signal::TERM).unwrap();
    let status = tokio::time::timeout(Duration::from_secs(60), daemon.wait())
        .await
        .expect("the daemon exits within 60 s of SIGTERM")
        .unwrap();
    assert!(status.success(), "{status:?}: {}", bench.log(log_name));
    signalled.elapsed()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_delivery_pending_when_the_daemon_stops_is_sent_after_the_restart() {
    // Nothing listens on this port until the daemon has stopped.
    let reserved = webhook_support::reserved_port();
    let port = reserved.port;
    let bench = Bench::new(43).await;
    add_webhook(
        &bench,
        &format!("http://127.0.0.1:{port}/hook"),
        "first_retry_s = 3600",
    );
    let token = bench.operator_token().await;
    let (mut daemon, run_id) = daemon_support::serve_mid_run(&bench, "first.log", &token, 3).await;
    stop_with_sigterm(&mut daemon, &bench, "first.log").await;

    // The interruption was recorded and attempted once at shutdown (refused: nobody listens).
    let rows = stored_deliveries(&bench).await;
    assert_eq!(rows.len(), 1, "{rows:?}");
    assert_eq!(rows[0].event_type, "run.interrupted");
    assert_eq!(rows[0].state, "pending");
    assert_eq!(rows[0].attempts, 1, "{rows:?}");
    assert!(rows[0].last_error.is_some());

    // The receiver comes up; the restarted daemon sends what was pending at once, despite the
    // hour-long backoff.
    let receiver = Receiver::start_reserved(reserved, 0);
    let _daemon = bench.serve("second.log").await;
    let got = receiver.wait_for(1, Duration::from_secs(30)).await;
    let body = verified(&got[0]);
    assert_eq!(body["event_type"], "run.interrupted");
    assert_eq!(body["run_id"], run_id);
    assert_eq!(body["state"], "interrupted");
    assert_eq!(body["event_id"], rows[0].event_id.as_str());
    // The row is marked delivered after the receiver's reply: wait for it before the count.
    let settled = settled_deliveries(&bench, "second.log").await;
    assert_eq!(settled.len(), 1, "{settled:?}");
    assert_eq!(settled[0].state, "delivered", "{settled:?}");
    assert_eq!(
        bench
            .metric(&token, "halfwave_webhook_deliveries{state=\"delivered\"}")
            .await,
        Some(1.0)
    );
}

/// README, "Notifications": at shutdown the daemon tries to deliver the runs it interrupts for up
/// to 5 s before it exits. A receiver that accepts the connection and never answers (its
/// attempt limit, `timeout_s`, is 60 s) holds the last pass for those 5 s, not longer: the daemon
/// exits between 5 s and 15 s after SIGTERM, and the delivery stays pending for the next start.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_receiver_that_never_answers_holds_the_shutdown_for_five_seconds_only() {
    let listener = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = listener.local_addr().unwrap().port();
    let accepted = std::sync::Arc::new(std::sync::atomic::AtomicUsize::new(0));
    let counter = accepted.clone();
    std::thread::spawn(move || {
        // Accepts and holds every connection without reading or answering.
        let mut held = Vec::new();
        for stream in listener.incoming().flatten() {
            counter.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
            held.push(stream);
        }
    });
    let bench = Bench::new(47).await;
    add_webhook(
        &bench,
        &format!("http://127.0.0.1:{port}/hook"),
        "timeout_s = 60\nfirst_retry_s = 3600",
    );
    let token = bench.operator_token().await;
    let (mut daemon, _run_id) =
        daemon_support::serve_mid_run(&bench, "daemon.log", &token, 3).await;
    let took = stop_with_sigterm(&mut daemon, &bench, "daemon.log").await;
    assert!(
        accepted.load(std::sync::atomic::Ordering::SeqCst) >= 1,
        "no delivery was attempted at shutdown: {}",
        bench.log("daemon.log")
    );
    assert!(
        took >= Duration::from_millis(4_900) && took < Duration::from_secs(15),
        "exited {took:?} after SIGTERM: {}",
        bench.log("daemon.log")
    );
    let rows = stored_deliveries(&bench).await;
    assert_eq!(rows.len(), 1, "{rows:?}");
    assert_eq!(rows[0].event_type, "run.interrupted");
    assert_eq!(rows[0].state, "pending", "{rows:?}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_run_a_killed_daemon_left_running_is_notified_as_interrupted_at_the_next_start() {
    // SIGKILL leaves no chance to notify; the next start marks the run interrupted and must
    // notify it then, once.
    let receiver = Receiver::start(0);
    let bench = Bench::new(44).await;
    add_webhook(&bench, &receiver.url("/hook"), "");
    let token = bench.operator_token().await;
    let (mut daemon, run_id) = daemon_support::serve_mid_run(&bench, "first.log", &token, 2).await;
    daemon.start_kill().expect("SIGKILL sent");
    daemon.wait().await.unwrap();
    assert!(
        receiver.received().is_empty(),
        "nothing was sent before the kill"
    );

    let _daemon = bench.serve("second.log").await;
    let got = receiver.wait_for(1, Duration::from_secs(30)).await;
    let body = verified(&got[0]);
    assert_eq!(body["event_type"], "run.interrupted");
    assert_eq!(body["run_id"], run_id);
    assert_eq!(body["state"], "interrupted");
    // Only once: a later start finds nothing running.
    tokio::time::sleep(Duration::from_secs(1)).await;
    assert_eq!(receiver.received().len(), 1);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_bench_entering_and_leaving_a_safety_hold_is_notified_signed() {
    // Only bench events to this receiver, so run ends do not mix in.
    let receiver = Receiver::start(0);
    let bench = Bench::new(43).await;
    add_webhook(
        &bench,
        &receiver.url("/safety"),
        "events = [\"bench.hold\", \"bench.hold_cleared\"]",
    );
    let token = bench.operator_token().await;
    let _daemon = bench.serve("daemon.log").await;
    let run_id = bench
        .submit_plan(&token, &daemon_support::small_plan())
        .await;

    // Wait for the output to be on with a point or two measured, then cut the source's link
    // until the daemon flags the bench: it cannot confirm the output off (hold 1:
    // `output_unconfirmed`); once the link is back it switches it off and holds the bench for an
    // operator (hold 2).
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        let run = bench.run(run_id, &token).await;
        let measured = run["measured_points"].as_u64().unwrap_or(0);
        if measured >= 2 && bench.server.bench().rf_output_on() {
            break;
        }
        assert!(Instant::now() < deadline, "no point with RF on: {run}");
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    let faults = bench.server.faults(halfwave_drivers::sim::Role::RfSource);
    faults.link_down();
    // The link stays down until the bench is flagged (a fixed outage could end first on a loaded
    // machine, and then no hold would follow).
    bench
        .wait_for_safety_state(&token, "output_unconfirmed", Duration::from_secs(30))
        .await;
    faults.link_up();

    let holds = receiver.wait_for(2, Duration::from_secs(30)).await;
    let bodies: Vec<Value> = holds.iter().map(verified).collect();
    assert!(
        bodies.iter().all(|b| b["event_type"] == "bench.hold"),
        "{bodies:?}"
    );
    assert_eq!(bodies[0]["state"], "output_unconfirmed", "{bodies:?}");
    assert_eq!(bodies[1]["state"], "awaiting_acknowledgement", "{bodies:?}");
    for b in &bodies {
        assert_eq!(b["bench"], "sim");
        assert!(b["run_id"].is_null(), "a bench event names no run: {b}");
    }
    assert!(
        bodies[1]["summary"]
            .as_str()
            .unwrap()
            .contains("an operator must acknowledge"),
        "{bodies:?}"
    );

    // The operator acknowledges: one `bench.hold_cleared`.
    let ack = bench
        .post(
            "/api/v1/benches/sim/acknowledge",
            &token,
            &json!({"note": "checked the source"}),
        )
        .await;
    assert_eq!(ack.status(), 204);
    let all = receiver.wait_for(3, Duration::from_secs(30)).await;
    let cleared = verified(&all[2]);
    assert_eq!(cleared["event_type"], "bench.hold_cleared", "{cleared}");
    assert_eq!(cleared["bench"], "sim");
    assert_eq!(cleared["state"], "clear");
    // Each event its own id.
    let mut ids: Vec<&str> = bodies
        .iter()
        .chain(std::iter::once(&cleared))
        .map(|b| b["event_id"].as_str().unwrap())
        .collect();
    ids.sort();
    ids.dedup();
    assert_eq!(ids.len(), 3);
}
