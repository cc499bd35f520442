//! Notifications: signed webhooks when a run ends or a bench enters or leaves a safety hold.
//!
//! The notifier follows the engine's progress events (the same broadcast channel as the SSE
//! stream and the metrics), so nothing is added to the measurement path and a slow or dead
//! receiver can never hold a run up. Two tasks:
//! - the **recorder** turns each notified event ([`payload::kind_of`]) into one `pending` row
//!   per interested receiver in `webhook_deliveries` (the outbox, `store::webhooks`), with the
//!   JSON body fixed there and then;
//! - the **sender** POSTs due rows, signed ([`signature`]), one at a time, each attempt within the
//!   receiver's `timeout_s`; a 2xx answer marks the row delivered, anything else (a transport
//!   error, a timeout, another status, a redirect: redirects are not followed) schedules a retry
//!   after `first_retry_s` doubling up to `max_retry_s`, until `max_attempts` have failed and the
//!   row becomes `failed`. It starts by sending whatever was pending when the daemon stopped, at
//!   once, whatever its backoff.
//!
//! Shutdown ([`Notifier::shutdown`], after the engine's, so that the runs it interrupts are
//! notified): the recorder stores the events still buffered, then the sender makes one last pass
//! over due deliveries within [`SHUTDOWN_GRACE`]; what is left stays pending for the next start.
//! An attempt cut short there may have reached its receiver: receivers de-duplicate by event id.
//!
//! Runs found `running` and marked interrupted by the start-up recovery after a crash have no
//! progress event (nobody can subscribe before the engine exists): the recorder notifies them
//! first, from `Engine::interrupted_at_start`. Not notified: events lost when the recorder falls
//! more than the channel's buffer (1,024 events) behind, which is logged.

pub mod payload;
pub mod settings;
pub mod signature;

use crate::engine::events::ProgressEvent;
use crate::engine::Engine;
use crate::store::{now_unix_ms, NewWebhookDelivery, RunState, Store, WebhookDelivery};
use rand::rngs::OsRng;
use rand::TryRngCore;
use settings::Receiver;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::broadcast::error::{RecvError, TryRecvError};
use tokio::sync::{broadcast, Notify};
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;

/// How long the last delivery pass may take at shutdown.
pub const SHUTDOWN_GRACE: Duration = Duration::from_secs(5);

/// Deliveries read from the outbox per query.
const BATCH: i64 = 32;

/// The longest the sender sleeps without looking at the outbox (a row written by another
/// process, or a clock change, is seen within this).
const IDLE_POLL: Duration = Duration::from_secs(60);

/// The running notifier (see the module documentation).
pub struct Notifier {
    stop_recording: CancellationToken,
    stop_sending: CancellationToken,
    recorder: JoinHandle<()>,
    sender: JoinHandle<()>,
}

impl Notifier {
    /// Starts following `engine`'s events and delivering to `receivers`; `None` when there are
    /// no receivers. Needs a tokio runtime.
    pub fn start(engine: &Engine, receivers: Vec<Receiver>) -> Option<Notifier> {
        if receivers.is_empty() {
            return None;
        }
        let receivers = Arc::new(receivers);
        let wake = Arc::new(Notify::new());
        let stop_recording = CancellationToken::new();
        let stop_sending = CancellationToken::new();
        // Runs a crashed process left running were marked interrupted before anyone could
        // subscribe: their notifications are recorded first, as the engine would have sent them.
        let at_start: Vec<ProgressEvent> = engine
            .interrupted_at_start()
            .iter()
            .map(|&run_id| ProgressEvent::Finished {
                run_id,
                state: RunState::Interrupted,
                cause: Some(crate::store::runs::INTERRUPTED_CAUSE.into()),
            })
            .collect();
        let recorder = tokio::spawn(record(
            at_start,
            engine.subscribe(),
            engine.store().clone(),
            receivers.clone(),
            wake.clone(),
            stop_recording.clone(),
        ));
        let client = reqwest::Client::builder()
            .redirect(reqwest::redirect::Policy::none())
            .user_agent(concat!("halfwave/", env!("CARGO_PKG_VERSION")))
            .build()
            .unwrap_or_else(|e| {
                tracing::warn!(error = %e, "webhook HTTP client with default settings");
                reqwest::Client::new()
            });
        let urls = receivers.iter().map(|r| r.config.url.clone()).collect();
        let sender = tokio::spawn(send(
            Sender {
                store: engine.store().clone(),
                receivers,
                urls,
                client,
            },
            wake,
            stop_sending.clone(),
        ));
        tracing::info!("webhook notifications on");
        Some(Notifier {
            stop_recording,
            stop_sending,
            recorder,
            sender,
        })
    }

    /// Stores the events still buffered, makes a last delivery pass within [`SHUTDOWN_GRACE`] and
    /// stops. Call after the engine's shutdown.
    pub async fn shutdown(self) {
        self.stop_recording.cancel();
        if let Err(e) = self.recorder.await {
            tracing::error!(error = %e, "the webhook recorder ended abnormally");
        }
        self.stop_sending.cancel();
        let mut sender = self.sender;
        if tokio::time::timeout(SHUTDOWN_GRACE, &mut sender)
            .await
            .is_err()
        {
            sender.abort();
            tracing::warn!(
                "webhook deliveries still being attempted at shutdown stay pending; they are sent at the next start"
            );
        }
    }
}

/// The recorder task: engine events in, outbox rows out.
async fn record(
    at_start: Vec<ProgressEvent>,
    mut events: broadcast::Receiver<ProgressEvent>,
    store: Store,
    receivers: Arc<Vec<Receiver>>,
    wake: Arc<Notify>,
    stop: CancellationToken,
) {
    for event in &at_start {
        record_one(event, &store, &receivers, &wake).await;
    }
    loop {
        let received = tokio::select! {
            received = events.recv() => received,
            _ = stop.cancelled() => break,
        };
        match received {
            Ok(event) => record_one(&event, &store, &receivers, &wake).await,
            Err(RecvError::Lagged(missed)) => tracing::error!(
                missed,
                "the webhook recorder fell behind the engine's events; notifications among them may be lost"
            ),
            Err(RecvError::Closed) => return,
        }
    }
    // Shutdown: what the engine published before (the runs it interrupted) is still buffered.
    loop {
        match events.try_recv() {
            Ok(event) => record_one(&event, &store, &receivers, &wake).await,
            Err(TryRecvError::Lagged(_)) => continue,
            Err(TryRecvError::Empty | TryRecvError::Closed) => break,
        }
    }
}

/// Writes one event's deliveries, if it is notified and someone wants it.
async fn record_one(event: &ProgressEvent, store: &Store, receivers: &[Receiver], wake: &Notify) {
    let Some(kind) = payload::kind_of(event) else {
        return;
    };
    let wanted: Vec<&Receiver> = receivers.iter().filter(|r| r.config.wants(kind)).collect();
    if wanted.is_empty() {
        return;
    }
    let run = match event.run_id() {
        Some(id) => match store.run(id).await {
            Ok(run) => Some(run),
            Err(e) => {
                tracing::warn!(run_id = id, error = %e, "webhook payload without the run's bench and device");
                None
            }
        },
        None => None,
    };
    let event_id = match new_event_id() {
        Ok(id) => id,
        Err(e) => {
            tracing::error!(error = %e, "no event id for a webhook; the notification is lost");
            return;
        }
    };
    let body = payload::payload(kind, &event_id, now_unix_ms(), event, run.as_ref());
    let body = match serde_json::to_string(&body) {
        Ok(body) => body,
        Err(e) => {
            tracing::error!(error = %e, "webhook payload could not be encoded; the notification is lost");
            return;
        }
    };
    let rows: Vec<NewWebhookDelivery> = wanted
        .iter()
        .map(|r| NewWebhookDelivery {
            event_id: &event_id,
            event_type: kind.as_str(),
            url: &r.config.url,
            body: &body,
        })
        .collect();
    match store.add_webhook_deliveries(&rows).await {
        Ok(()) => wake.notify_one(),
        Err(e) => tracing::error!(
            event = kind.as_str(),
            error = %e,
            "could not record webhook deliveries; the notification is lost"
        ),
    }
}

/// 128 random bits from the OS, as 32 hex digits.
fn new_event_id() -> Result<String, String> {
    let mut bytes = [0u8; 16];
    OsRng
        .try_fill_bytes(&mut bytes)
        .map_err(|e| e.to_string())?;
    Ok(crate::api::tokens::hex(&bytes))
}

/// How long a pending row for a URL no daemon on a shared (PostgreSQL) database is configured
/// with stays pending before it is failed: long enough for a daemon that has it to be restarted.
pub const ORPHAN_GRACE_SHARED: Duration = Duration::from_secs(24 * 3600);

/// What a claim adds to a receiver's timeout: the time to store the attempt's outcome.
const CLAIM_MARGIN: Duration = Duration::from_secs(30);

/// What the sender needs.
struct Sender {
    store: Store,
    receivers: Arc<Vec<Receiver>>,
    /// The receivers' URLs, the only rows this sender reads.
    urls: Vec<String>,
    client: reqwest::Client,
}

/// The sender task: due deliveries out, until stopped (then one last pass).
async fn send(sender: Sender, wake: Arc<Notify>, stop: CancellationToken) {
    match sender.store.webhook_pending_due_now(&sender.urls).await {
        Ok(0) => {}
        Ok(pending) => tracing::info!(
            pending,
            "sending webhook deliveries left pending before the start"
        ),
        Err(e) => tracing::error!(error = %e, "cannot read the webhook outbox at start"),
    }
    loop {
        let stopping = stop.is_cancelled();
        sender.pass().await;
        if stopping {
            return;
        }
        let wait = match sender.store.next_webhook_due_at(&sender.urls).await {
            Ok(Some(at)) => Duration::from_millis(u64::try_from(at - now_unix_ms()).unwrap_or(0)),
            Ok(None) => IDLE_POLL,
            Err(e) => {
                tracing::error!(error = %e, "cannot read the webhook outbox; trying again in a minute");
                IDLE_POLL
            }
        }
        .min(IDLE_POLL);
        tokio::select! {
            _ = tokio::time::sleep(wait) => {}
            _ = wake.notified() => {}
            _ = stop.cancelled() => {}
        }
    }
}

impl Sender {
    /// Fails the rows no configured receiver will take (see the module documentation), then
    /// attempts every delivery due now for this daemon's receivers, oldest first, each claimed
    /// just before its attempt.
    async fn pass(&self) {
        let grace = match self.store.backend() {
            crate::store::Backend::Sqlite => 0,
            crate::store::Backend::Postgres => {
                i64::try_from(ORPHAN_GRACE_SHARED.as_millis()).unwrap_or(i64::MAX / 2)
            }
        };
        match self
            .store
            .fail_orphan_webhook_deliveries(
                &self.urls,
                now_unix_ms() - grace,
                "no [[webhook]] with this URL is configured any more",
            )
            .await
        {
            Ok(0) => {}
            Ok(failed) => tracing::warn!(
                failed,
                "webhook deliveries for URLs no longer configured were marked failed"
            ),
            Err(e) => tracing::error!(error = %e, "cannot update the webhook outbox"),
        }
        loop {
            let due = match self
                .store
                .due_webhook_deliveries(now_unix_ms(), &self.urls, BATCH)
                .await
            {
                Ok(due) => due,
                Err(e) => {
                    tracing::error!(error = %e, "cannot read the webhook outbox");
                    return;
                }
            };
            if due.is_empty() {
                return;
            }
            for delivery in due {
                if let Err(e) = self.claim_and_attempt(&delivery).await {
                    // The row could not be updated: stop here rather than send it again at once.
                    tracing::error!(error = %e, "cannot update the webhook outbox");
                    return;
                }
            }
        }
    }

    /// Claims a due delivery and attempts it; does nothing when another sender got it first.
    async fn claim_and_attempt(
        &self,
        delivery: &WebhookDelivery,
    ) -> Result<(), crate::store::StoreError> {
        let Some(receiver) = self.receivers.iter().find(|r| r.config.url == delivery.url) else {
            return Ok(());
        };
        let span = Duration::from_secs_f64(receiver.config.timeout_s) + CLAIM_MARGIN;
        let until = now_unix_ms() + i64::try_from(span.as_millis()).unwrap_or(i64::MAX / 2);
        if self
            .store
            .claim_webhook_delivery(delivery.id, delivery.next_attempt_at_unix_ms, until)
            .await?
        {
            self.attempt(receiver, delivery).await
        } else {
            Ok(())
        }
    }

    /// One attempt at one delivery, and its outcome stored.
    async fn attempt(
        &self,
        receiver: &Receiver,
        delivery: &WebhookDelivery,
    ) -> Result<(), crate::store::StoreError> {
        let outcome = self.post(receiver, delivery).await;
        let attempts = u32::try_from(delivery.attempts.saturating_add(1)).unwrap_or(u32::MAX);
        match outcome {
            Ok(()) => {
                tracing::info!(url = %delivery.url, event = %delivery.event_type, event_id = %delivery.event_id, attempts, "webhook delivered");
                self.store.webhook_delivered(delivery.id).await
            }
            Err(error) => {
                let retry = receiver.retry_after(attempts);
                match retry {
                    Some(pause) => {
                        tracing::warn!(url = %delivery.url, event = %delivery.event_type, attempts, retry_in_s = pause.as_secs_f64(), %error, "webhook delivery failed; will retry")
                    }
                    None => {
                        tracing::error!(url = %delivery.url, event = %delivery.event_type, event_id = %delivery.event_id, attempts, %error, "webhook delivery failed for good")
                    }
                }
                let retry_at = retry.map(|pause| {
                    now_unix_ms() + i64::try_from(pause.as_millis()).unwrap_or(i64::MAX / 2)
                });
                self.store
                    .webhook_attempt_failed(delivery.id, &error, retry_at)
                    .await
            }
        }
    }

    /// POSTs the body, signed; `Err` says why the attempt failed.
    async fn post(&self, receiver: &Receiver, delivery: &WebhookDelivery) -> Result<(), String> {
        let timestamp_s = now_unix_ms().div_euclid(1000);
        let signature = signature::signature(&receiver.secret, timestamp_s, &delivery.body);
        let response = self
            .client
            .post(&delivery.url)
            .timeout(Duration::from_secs_f64(receiver.config.timeout_s))
            .header(reqwest::header::CONTENT_TYPE, "application/json")
            .header(signature::EVENT_ID_HEADER, &delivery.event_id)
            .header(signature::EVENT_TYPE_HEADER, &delivery.event_type)
            .header(signature::TIMESTAMP_HEADER, timestamp_s.to_string())
            .header(signature::SIGNATURE_HEADER, signature)
            .body(delivery.body.clone())
            .send()
            .await
            .map_err(|e| describe_transport_error(&e))?;
        let status = response.status();
        if status.is_success() {
            Ok(())
        } else if status.is_redirection() {
            Err(format!(
                "HTTP {status}: redirects are not followed; configure the final URL"
            ))
        } else {
            Err(format!("HTTP {status}"))
        }
    }
}

/// A transport error with its causes (reqwest's own text is only the outermost).
fn describe_transport_error(error: &reqwest::Error) -> String {
    let head = if error.is_timeout() {
        "timed out".to_string()
    } else {
        error.to_string()
    };
    crate::cli::client::with_causes(head, error)
}
