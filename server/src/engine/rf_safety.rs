//! A bench's RF safety state: clear, output unconfirmed, or awaiting an operator's
//! acknowledgement; and the keeper task that switches an unconfirmed output off.
//!
//! When a stop path cannot read the source's output back as off (the link is down, the source
//! does not answer), the bench becomes **output unconfirmed**: the state is stored, logged at
//! ERROR (again every [`UNCONFIRMED_LOG_INTERVAL`]), shown by `/benches`, `/health`, `/metrics`
//! and the dashboard, and a keeper task tries again and again, for as long as the daemon runs,
//! to switch the output off on a fresh connection ([`RfSource::confirm_off_fresh`], each attempt
//! within [`ATTEMPT_TIMEOUT`], [`BACKOFF_START`] doubling to [`BACKOFF_MAX`] between them, so the
//! output goes off within about two seconds of the link's return). Only a read-back of "off" ends
//! that state, and then the bench **awaits acknowledgement**: an operator looks at the bench and
//! acknowledges (API, CLI or dashboard; audited) before any run starts on it again. The bench's
//! worker waits for [`BenchSafety::wait_clear`] before it takes a run, so queued runs keep their
//! place meanwhile.
//!
//! The state lives here, in the engine's bench slot, and every view reads it from here; the store
//! keeps a copy so a restart keeps the bench flagged (see `store::bench_safety`).

use super::events::ProgressEvent;
use super::safety::SharedSource;
use crate::store::{now_unix_ms, BenchFault, BenchSafetyRecord, Store, StoreError};
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{broadcast, watch};
use tokio_util::sync::CancellationToken;

/// Time limit of one keeper attempt (connect, output off, `*OPC?`, read-back).
pub const ATTEMPT_TIMEOUT: Duration = Duration::from_millis(1000);
/// First pause between keeper attempts.
pub const BACKOFF_START: Duration = Duration::from_millis(100);
/// Longest pause between keeper attempts.
pub const BACKOFF_MAX: Duration = Duration::from_millis(400);
/// How often the keeper repeats its ERROR log while the output stays unconfirmed.
pub const UNCONFIRMED_LOG_INTERVAL: Duration = Duration::from_secs(60);

/// A bench's RF safety state as events and views report it: one of the two stored faults, or
/// clear. Serialises to the lowercase words `output_unconfirmed`, `awaiting_acknowledgement`
/// and `clear`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SafetyState {
    /// The source's output could not be read back off; the daemon keeps trying.
    OutputUnconfirmed,
    /// Confirmed off after a fault; an operator must acknowledge before runs start again.
    AwaitingAcknowledgement,
    /// No fault holds the bench.
    Clear,
}

impl SafetyState {
    /// The state of a bench with `fault` (`None`: clear).
    pub fn of(fault: Option<BenchFault>) -> SafetyState {
        match fault {
            Some(BenchFault::OutputUnconfirmed) => SafetyState::OutputUnconfirmed,
            Some(BenchFault::AwaitingAcknowledgement) => SafetyState::AwaitingAcknowledgement,
            None => SafetyState::Clear,
        }
    }

    /// The word in JSON, the same as the serialised form.
    pub fn as_str(self) -> &'static str {
        match self {
            SafetyState::OutputUnconfirmed => "output_unconfirmed",
            SafetyState::AwaitingAcknowledgement => "awaiting_acknowledgement",
            SafetyState::Clear => "clear",
        }
    }
}

impl std::fmt::Display for SafetyState {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Why an acknowledgement was refused.
#[derive(Debug, thiserror::Error)]
pub enum AcknowledgeError {
    #[error("bench {bench}: the RF output is not confirmed off yet ({cause}); the daemon keeps trying to switch it off. Check the source and its link; acknowledge once the bench shows awaiting_acknowledgement")]
    StillUnconfirmed { bench: String, cause: String },
    #[error("bench {0} has no safety fault to acknowledge")]
    NothingToAcknowledge(String),
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// The safety state of one bench (see the module documentation).
pub struct BenchSafety {
    bench: String,
    store: Store,
    events: broadcast::Sender<ProgressEvent>,
    state: watch::Sender<Option<BenchSafetyRecord>>,
    /// Cancelled when the daemon shuts down: the keeper stops (the stored state stays).
    shutdown: CancellationToken,
    keeper_running: std::sync::atomic::AtomicBool,
    /// One store write of the state at a time (see [`BenchSafety::persist`]).
    persisting: tokio::sync::Mutex<()>,
}

impl BenchSafety {
    /// The safety state of `bench`, starting from what the store kept.
    pub fn new(
        bench: String,
        store: Store,
        events: broadcast::Sender<ProgressEvent>,
        stored: Option<BenchSafetyRecord>,
        shutdown: CancellationToken,
    ) -> Arc<BenchSafety> {
        Arc::new(BenchSafety {
            bench,
            store,
            events,
            state: watch::channel(stored).0,
            shutdown,
            keeper_running: std::sync::atomic::AtomicBool::new(false),
            persisting: tokio::sync::Mutex::new(()),
        })
    }

    /// The current fault, `None` when the bench is clear.
    pub fn current(&self) -> Option<BenchSafetyRecord> {
        self.state.borrow().clone()
    }

    /// True when no fault holds the bench.
    pub fn is_clear(&self) -> bool {
        self.state.borrow().is_none()
    }

    /// Waits until the bench is clear (returns at once when it is).
    pub async fn wait_clear(&self) {
        let mut rx = self.state.subscribe();
        let _ = rx.wait_for(Option::is_none).await;
    }

    /// The stop path could not confirm the output off: flag the bench, store and log it, and
    /// start the keeper (once).
    pub async fn output_unconfirmed(self: &Arc<Self>, source: SharedSource, cause: String) {
        self.hold_unconfirmed(source, cause);
        self.persist().await;
    }

    /// [`BenchSafety::output_unconfirmed`] without waiting for the store: the bench is held and
    /// the keeper started before this returns; the state is stored by a task of its own (a run
    /// whose output could not be confirmed off still waits for its pipeline, which may be held by
    /// the same stalled database).
    pub fn hold_output_unconfirmed(self: &Arc<Self>, source: SharedSource, cause: String) {
        self.hold_unconfirmed(source, cause);
        let me = self.clone();
        tokio::spawn(async move { me.persist().await });
    }

    fn hold_unconfirmed(self: &Arc<Self>, source: SharedSource, cause: String) {
        let since = match self.current() {
            Some(r) if r.fault == BenchFault::OutputUnconfirmed => r.since_unix_ms,
            _ => now_unix_ms(),
        };
        tracing::error!(
            bench = %self.bench,
            cause = %cause,
            "RF OUTPUT NOT CONFIRMED OFF: the bench is held and the daemon keeps trying to switch it off; check the source and its link"
        );
        // The bench is held and the keeper tries from now: neither waits for the store, which
        // may be slow or stalled (the stored state follows).
        self.publish(BenchSafetyRecord {
            bench_name: self.bench.clone(),
            fault: BenchFault::OutputUnconfirmed,
            cause,
            since_unix_ms: since,
            confirmed_off_at_unix_ms: None,
        });
        self.start_keeper(source);
    }

    /// The output was read back off after a fault: hold the bench for an acknowledgement.
    pub async fn confirmed_off(&self, cause: String, since_unix_ms: i64) {
        tracing::warn!(
            bench = %self.bench,
            "RF output confirmed off after a safety fault; the bench holds its runs until an operator acknowledges (halfwave acknowledge {})",
            self.bench
        );
        self.set(BenchSafetyRecord {
            bench_name: self.bench.clone(),
            fault: BenchFault::AwaitingAcknowledgement,
            cause,
            since_unix_ms,
            confirmed_off_at_unix_ms: Some(now_unix_ms()),
        })
        .await;
    }

    /// An operator's acknowledgement: clears a bench whose output was confirmed off, with an
    /// audit entry. Refused while the output is still unconfirmed.
    pub async fn acknowledge(&self, by: &str, note: &str) -> Result<(), AcknowledgeError> {
        match self.current() {
            None => return Err(AcknowledgeError::NothingToAcknowledge(self.bench.clone())),
            Some(r) if r.fault == BenchFault::OutputUnconfirmed => {
                return Err(AcknowledgeError::StillUnconfirmed {
                    bench: self.bench.clone(),
                    cause: r.cause,
                })
            }
            Some(_) => {}
        }
        if !self
            .store
            .acknowledge_bench_fault(&self.bench, by, note)
            .await?
        {
            return Err(AcknowledgeError::NothingToAcknowledge(self.bench.clone()));
        }
        tracing::info!(bench = %self.bench, by, "safety fault acknowledged; the bench takes runs again");
        self.state.send_replace(None);
        let _ = self.events.send(ProgressEvent::BenchSafety {
            bench: self.bench.clone(),
            state: SafetyState::Clear,
            cause: None,
        });
        Ok(())
    }

    /// Publishes a new fault state, then stores it.
    async fn set(&self, record: BenchSafetyRecord) {
        self.publish(record);
        self.persist().await;
    }

    /// The new fault state in memory (which is what holds the bench) and on the event stream.
    fn publish(&self, record: BenchSafetyRecord) {
        let _ = self.events.send(ProgressEvent::BenchSafety {
            bench: self.bench.clone(),
            state: SafetyState::of(Some(record.fault)),
            cause: Some(record.cause.clone()),
        });
        self.state.send_replace(Some(record));
    }

    /// Stores the state in memory as it is when the write starts, one write at a time, so that
    /// a slow write of an older state cannot land after a newer one. A store failure is logged:
    /// the state in memory still holds the bench, which is what safety needs.
    async fn persist(&self) {
        let _one_at_a_time = self.persisting.lock().await;
        let Some(record) = self.current() else {
            return;
        };
        if let Err(e) = self.store.record_bench_fault(&record).await {
            tracing::error!(bench = %self.bench, error = %e, "could not store the bench's safety state; it holds in memory until the daemon stops");
        }
    }

    fn start_keeper(self: &Arc<Self>, source: SharedSource) {
        use std::sync::atomic::Ordering;
        if self.keeper_running.swap(true, Ordering::SeqCst) {
            return;
        }
        let me = self.clone();
        tokio::spawn(async move {
            me.keep_switching_off(source).await;
            me.keeper_running.store(false, Ordering::SeqCst);
        });
    }

    async fn keep_switching_off(&self, source: SharedSource) {
        let started = tokio::time::Instant::now();
        let mut next_log = started + UNCONFIRMED_LOG_INTERVAL;
        let mut backoff = BACKOFF_START;
        let mut attempts: u64 = 0;
        loop {
            if self.shutdown.is_cancelled() {
                tracing::error!(bench = %self.bench, "the daemon stops with the RF output still unconfirmed; the next start switches it off, or switch it off by hand");
                return;
            }
            attempts += 1;
            let attempt = async {
                let mut src = source.lock().await;
                src.confirm_off_fresh().await
            };
            let outcome = tokio::select! {
                r = tokio::time::timeout(ATTEMPT_TIMEOUT, attempt) => r,
                _ = self.shutdown.cancelled() => continue,
            };
            match outcome {
                Ok(Ok(())) => {
                    let (cause, since) = self
                        .current()
                        .map(|r| (r.cause, r.since_unix_ms))
                        .unwrap_or_else(|| ("RF output unconfirmed".into(), now_unix_ms()));
                    tracing::warn!(bench = %self.bench, attempts, after_s = started.elapsed().as_secs_f64(), "the keeper switched the RF output off and read it back off");
                    self.confirmed_off(cause, since).await;
                    return;
                }
                Ok(Err(e)) => {
                    tracing::debug!(bench = %self.bench, attempts, error = %e, "RF output still unconfirmed")
                }
                Err(_) => {
                    tracing::debug!(bench = %self.bench, attempts, "RF off attempt timed out")
                }
            }
            let now = tokio::time::Instant::now();
            if now >= next_log {
                tracing::error!(
                    bench = %self.bench,
                    unconfirmed_for_s = (now - started).as_secs(),
                    attempts,
                    "RF OUTPUT STILL NOT CONFIRMED OFF; the daemon keeps trying. Check the source and its link, or switch it off by hand"
                );
                next_log = now + UNCONFIRMED_LOG_INTERVAL;
            }
            tokio::select! {
                _ = tokio::time::sleep(backoff) => {}
                _ = self.shutdown.cancelled() => {}
            }
            backoff = (backoff * 2).min(BACKOFF_MAX);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The words are the ones the event stream, the webhook payloads, `/benches` and the
    /// dashboard (`server/assets/app.js`) have always used; a rename would break their readers.
    #[test]
    fn safety_states_serialise_to_the_documented_words() {
        for (state, word) in [
            (SafetyState::OutputUnconfirmed, "output_unconfirmed"),
            (
                SafetyState::AwaitingAcknowledgement,
                "awaiting_acknowledgement",
            ),
            (SafetyState::Clear, "clear"),
        ] {
            assert_eq!(
                serde_json::to_value(state).unwrap(),
                serde_json::json!(word)
            );
            assert_eq!(state.as_str(), word);
            assert_eq!(state.to_string(), word);
            let back: SafetyState = serde_json::from_value(serde_json::json!(word)).unwrap();
            assert_eq!(back, state);
        }
        // The fault states carry the stored words of `BenchFault`.
        for fault in [
            BenchFault::OutputUnconfirmed,
            BenchFault::AwaitingAcknowledgement,
        ] {
            assert_eq!(SafetyState::of(Some(fault)).as_str(), fault.as_str());
        }
        assert_eq!(SafetyState::of(None), SafetyState::Clear);
    }

    /// The keeper does not wait for the store: with the database locked by another writer (a
    /// stalled or busy store), the bench is held and its output switched off and read back at
    /// once, and the stored state follows once the lock is gone, newest last.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_locked_store_delays_neither_the_hold_nor_the_switch_off() {
        use halfwave_drivers::RfSource;
        use sqlx::Connection;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("h.db");
        let store = Store::open(path.to_str().unwrap()).await.unwrap();
        let sim = halfwave_drivers::sim::SimBench::new(
            halfwave_drivers::sim::Scenario::builtin().unwrap(),
            5,
        )
        .with_time_factor(0.0);
        let mut source = sim.rf_source();
        source.set_output(true).await.unwrap();
        assert!(sim.rf_output_on());
        let source: SharedSource = Arc::new(tokio::sync::Mutex::new(Box::new(source)));
        let (events, _) = broadcast::channel(16);
        let safety = BenchSafety::new(
            "sim".into(),
            store.clone(),
            events,
            None,
            CancellationToken::new(),
        );
        // Another writer holds the database's write lock for 2 s.
        let mut writer = sqlx::SqliteConnection::connect(&format!("sqlite://{}", path.display()))
            .await
            .unwrap();
        sqlx::query("BEGIN IMMEDIATE")
            .execute(&mut writer)
            .await
            .unwrap();
        let flagged = {
            let safety = safety.clone();
            let source = source.clone();
            tokio::spawn(async move {
                safety
                    .output_unconfirmed(source, "link lost (test)".into())
                    .await
            })
        };
        let asked = std::time::Instant::now();
        while safety.current().map(|r| r.fault) != Some(BenchFault::AwaitingAcknowledgement) {
            assert!(
                asked.elapsed() < Duration::from_millis(1500),
                "the keeper waited for the store: {:?} after {:?}",
                safety.current(),
                asked.elapsed()
            );
            tokio::time::sleep(Duration::from_millis(5)).await;
        }
        assert!(
            !sim.rf_output_on(),
            "the output is off while the store is locked"
        );
        assert!(
            !flagged.is_finished(),
            "the store write still waits for the lock"
        );
        tokio::time::sleep(Duration::from_millis(2000).saturating_sub(asked.elapsed())).await;
        sqlx::query("COMMIT").execute(&mut writer).await.unwrap();
        flagged.await.unwrap();
        // Both states are stored, the newest last (the keeper's write waits for the first).
        let stored_at = std::time::Instant::now();
        loop {
            let stored = store.bench_safety_faults().await.unwrap();
            assert_eq!(stored.len(), 1, "{stored:?}");
            if stored[0].fault == BenchFault::AwaitingAcknowledgement {
                break;
            }
            assert!(
                stored_at.elapsed() < Duration::from_secs(10),
                "the newest state was not stored: {stored:?}"
            );
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
    }

    #[test]
    fn a_bench_safety_event_keeps_its_json() {
        let event = ProgressEvent::BenchSafety {
            bench: "sim".into(),
            state: SafetyState::AwaitingAcknowledgement,
            cause: Some("link lost".into()),
        };
        assert_eq!(
            serde_json::to_value(&event).unwrap(),
            serde_json::json!({
                "event": "bench_safety",
                "bench": "sim",
                "state": "awaiting_acknowledgement",
                "cause": "link lost",
            })
        );
    }
}
