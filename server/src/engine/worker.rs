//! The bench queues and their workers, behind the public [`Engine`] handle of `engine/mod.rs`.
//!
//! Each configured bench is a [`BenchSlot`]: its source and analyzer (exclusive, behind mutexes),
//! its queue of runs as the API shows it, its RF safety state and the channel its worker reads.
//! One worker task per bench takes [`Work`] in turn (a calibration run or a chain calibration),
//! waits while a safety fault holds the bench, runs it in a task of its own so that a panic
//! cannot take the worker down, and records how it ended. Putting a run on a queue (a new one,
//! or a stored one on resume and at start-up) is here too; what may be queued is decided by the
//! handle (plan validation, the chain, the limits).

use super::chain_run::{ChainJob, SharedSensor};
use super::events::ProgressEvent;
use super::plan::{Plan, PlanContext, PlanRequest};
use super::rf_safety::{BenchSafety, SafetyState};
use super::runner::{self, RunContext, RunOutcome, SharedAnalyzer};
use super::safety::{self, SharedSource};
use super::{drive_chain, lock, BenchStatus, Engine, EngineError};
use crate::analysis::chain::DriveChain;
use crate::store::{BenchFault, RunState, Store};
use halfwave_drivers::Identity;
use std::collections::{HashSet, VecDeque};
use std::sync::Arc;
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

/// What a bench's worker takes from its queue.
pub(super) enum Work {
    Measure(Job),
    Chain(ChainJob),
}

pub(super) struct Job {
    pub(super) run_id: i64,
    pub(super) plan: Arc<Plan>,
    pub(super) chain: Arc<DriveChain>,
    pub(super) done: HashSet<(usize, usize)>,
}

#[derive(Default)]
pub(super) struct BenchQueue {
    pub(super) active: Option<i64>,
    pub(super) queued: VecDeque<i64>,
}

pub(super) struct BenchSlot {
    pub(super) name: String,
    pub(super) source: SharedSource,
    pub(super) analyzer: SharedAnalyzer,
    pub(super) source_resource: String,
    pub(super) analyzer_resource: String,
    pub(super) identities: std::sync::Mutex<(Option<Identity>, Option<Identity>)>,
    pub(super) queue: std::sync::Mutex<BenchQueue>,
    pub(super) jobs: mpsc::UnboundedSender<Work>,
    pub(super) safety: Arc<BenchSafety>,
    /// The power sensor for chain calibrations, when the bench has one.
    pub(super) sensor: Option<SharedSensor>,
}

impl BenchSlot {
    pub(super) fn status(&self) -> BenchStatus {
        let (source_identity, analyzer_identity) = lock(&self.identities).clone();
        let (active, queued) = {
            let q = lock(&self.queue);
            (q.active, q.queued.iter().copied().collect())
        };
        let safety_fault = self.safety.current();
        BenchStatus {
            name: self.name.clone(),
            source_resource: self.source_resource.clone(),
            analyzer_resource: self.analyzer_resource.clone(),
            source_identity,
            analyzer_identity,
            active_run_id: active,
            queued_run_ids: queued,
            safety_state: SafetyState::of(safety_fault.as_ref().map(|f| f.fault)),
            safety_fault,
        }
    }

    /// Asks both instruments who they are and records them; failures are logged, not fatal
    /// (the daemon must start to switch RF off even with an analyzer missing). Returns the
    /// stored instrument rows that were recorded, by role.
    pub(super) async fn refresh_identities(&self, store: &Store) -> Vec<(&'static str, i64)> {
        let source = self.source.lock().await.identify().await;
        let analyzer = self.analyzer.lock().await.identify().await;
        let mut recorded = Vec::with_capacity(2);
        for (role, result, resource) in [
            ("source", &source, &self.source_resource),
            ("analyzer", &analyzer, &self.analyzer_resource),
        ] {
            match result {
                Ok(id) => match store.record_instrument_seen(id, resource).await {
                    Ok(instrument) => recorded.push((role, instrument.id)),
                    Err(e) => {
                        tracing::warn!(bench = %self.name, role, error = %e, "could not record the instrument identity")
                    }
                },
                Err(e) => {
                    tracing::warn!(bench = %self.name, role, error = %e, "instrument did not identify")
                }
            }
        }
        *lock(&self.identities) = (source.ok(), analyzer.ok());
        recorded
    }

    /// Asks both instruments who they are as a run starts (or resumes) and links the recorded
    /// identities to the run, with this daemon's software and analysis method versions, so the
    /// record says what measured it. Failures are logged: a
    /// missing identity must not stop a run whose instruments answer their commands.
    pub(super) async fn record_run_instruments(&self, store: &Store, run_id: i64) {
        if let Err(e) = store
            .record_run_software(
                run_id,
                &crate::version::software_version(),
                crate::analysis::ANALYSIS_METHOD,
            )
            .await
        {
            tracing::warn!(run_id, error = %e, "could not record the run's software version");
        }
        let recorded = self.refresh_identities(store).await;
        let source_notes = self.source.lock().await.connection_notes();
        let analyzer_notes = self.analyzer.lock().await.connection_notes();
        for (role, instrument_id) in recorded {
            let notes = if role == "source" {
                &source_notes
            } else {
                &analyzer_notes
            };
            // Serialising a list of string pairs cannot fail; an empty list is stored if it did.
            let notes = serde_json::to_string(notes).unwrap_or_else(|_| "[]".into());
            if let Err(e) = store
                .link_run_instrument(run_id, role, instrument_id, &notes)
                .await
            {
                tracing::warn!(run_id, role, error = %e, "could not record the run's instrument");
            }
        }
    }

    /// After the start-up switch-off (`off`: its result, `None` when it was not tried): a bench
    /// whose output could not be confirmed off is flagged and its keeper started; a bench that
    /// was stored as unconfirmed and is now off waits for an acknowledgement.
    pub(super) async fn settle_safety_at_start(&self, off: Option<Result<(), String>>) {
        match (off, self.safety.current()) {
            (Some(Err(e)), _) => {
                self.safety
                    .output_unconfirmed(
                        self.source.clone(),
                        format!("the start-up switch-off could not confirm the output off: {e}"),
                    )
                    .await
            }
            (Some(Ok(())), Some(f)) if f.fault == BenchFault::OutputUnconfirmed => {
                self.safety.confirmed_off(f.cause, f.since_unix_ms).await
            }
            (Some(Ok(())), Some(f)) => tracing::warn!(
                bench = %self.name,
                cause = %f.cause,
                "the bench still waits for an operator's acknowledgement of a safety fault; no run starts on it until then"
            ),
            _ => {}
        }
    }
}

impl Engine {
    pub(super) async fn enqueue_existing(&self, run_id: i64) -> Result<(), EngineError> {
        let store = &self.inner.store;
        let run = self.run_record(run_id).await?;
        let refuse = |reason: String| EngineError::ResumeRefused { run_id, reason };
        let request: PlanRequest = serde_json::from_value(run.plan()?)
            .map_err(|e| refuse(format!("its stored plan no longer parses: {e}")))?;
        let slot = self
            .inner
            .benches
            .get(&request.bench)
            .ok_or_else(|| refuse(format!("bench {:?} is not configured", request.bench)))?;
        let calibration = store
            .chain_calibration(run.chain_calibration_id)
            .await
            .map_err(|e| refuse(format!("its chain calibration cannot be read: {e}")))?;
        let chain = drive_chain(&calibration).map_err(|e| refuse(e.to_string()))?;
        let source_limits = slot.source.lock().await.limits();
        let caps = slot.analyzer.lock().await.capabilities();
        let plan = request
            .validate(&PlanContext {
                hard_limit_at_modulator: self.inner.limits.max_level_at_modulator_dbm,
                source: source_limits,
                analyzer: &caps,
                chain: Some(&chain),
            })
            .map_err(|e| refuse(format!("its plan is no longer within limits: {e}")))?;
        let done: HashSet<(usize, usize)> = store
            .stored_point_indices(run_id)
            .await?
            .into_iter()
            .map(|(f, l)| (f as usize, l as usize))
            .collect();
        self.enqueue(run_id, Arc::new(plan), Arc::new(chain), done);
        Ok(())
    }

    pub(super) fn enqueue(
        &self,
        run_id: i64,
        plan: Arc<Plan>,
        chain: Arc<DriveChain>,
        done: HashSet<(usize, usize)>,
    ) {
        let bench = plan.request().bench.clone();
        let Some(slot) = self.inner.benches.get(&bench) else {
            return;
        };
        lock(&self.inner.cancels).insert(run_id, CancellationToken::new());
        lock(&slot.queue).queued.push_back(run_id);
        let _ = self.inner.events.send(ProgressEvent::Queued {
            run_id,
            bench: bench.clone(),
        });
        let _ = slot.jobs.send(Work::Measure(Job {
            run_id,
            plan,
            chain,
            done,
        }));
    }

    pub(super) async fn worker(
        self,
        slot: Arc<BenchSlot>,
        mut jobs: mpsc::UnboundedReceiver<Work>,
    ) {
        loop {
            let work = tokio::select! {
                _ = self.inner.shutdown.cancelled() => break,
                job = jobs.recv() => match job { Some(j) => j, None => break },
            };
            let job = match work {
                Work::Measure(job) => job,
                Work::Chain(job) => {
                    if !slot.safety.is_clear() {
                        tracing::warn!(bench = %slot.name, chain_run = job.id, "chain calibration waits: the bench is held by a safety fault");
                        tokio::select! {
                            _ = self.inner.shutdown.cancelled() => break,
                            _ = slot.safety.wait_clear() => {}
                        }
                    }
                    self.run_chain_job(&slot, job).await;
                    continue;
                }
            };
            // A bench with a safety fault starts nothing until the output is confirmed off and
            // an operator has acknowledged; the run keeps its place in the queue meanwhile.
            if !slot.safety.is_clear() {
                tracing::warn!(bench = %slot.name, run_id = job.run_id, "run waits: the bench is held by a safety fault");
                tokio::select! {
                    _ = self.inner.shutdown.cancelled() => break,
                    _ = slot.safety.wait_clear() => {}
                }
            }
            let token = lock(&self.inner.cancels)
                .get(&job.run_id)
                .cloned()
                .unwrap_or_default();
            {
                let mut q = lock(&slot.queue);
                let waiting = q.queued.len();
                q.queued.retain(|id| *id != job.run_id);
                if q.queued.len() == waiting {
                    // Withdrawn while it waited: cancelled, recorded so and its cancel token
                    // removed by `Engine::cancel`.
                    continue;
                }
                q.active = Some(job.run_id);
            }
            self.run_job(&slot, job, token).await;
            lock(&slot.queue).active = None;
        }
    }

    async fn run_job(&self, slot: &Arc<BenchSlot>, job: Job, token: CancellationToken) {
        let store = &self.inner.store;
        let run_id = job.run_id;
        let finish = |state: RunState, cause: Option<String>, resumable: bool| async move {
            let recorded = match (&cause, resumable) {
                (Some(c), true) => store.fail_run_resumably(run_id, c).await,
                _ => store.transition_run(run_id, state, cause.as_deref()).await,
            };
            if let Err(e) = recorded {
                tracing::error!(run_id, error = %e, "could not record the end of the run");
            }
            lock(&self.inner.cancels).remove(&run_id);
            let _ = self.inner.events.send(ProgressEvent::Finished {
                run_id,
                state,
                cause,
            });
        };
        if token.is_cancelled() {
            finish(
                RunState::Cancelled,
                Some("cancelled before it started".into()),
                false,
            )
            .await;
            return;
        }
        if let Err(e) = store.transition_run(run_id, RunState::Running, None).await {
            tracing::error!(run_id, error = %e, "could not mark the run as running");
            finish(
                RunState::Failed,
                Some(format!("the store refused to start the run: {e}")),
                false,
            )
            .await;
            return;
        }
        slot.record_run_instruments(store, run_id).await;
        let _ = self.inner.events.send(ProgressEvent::Started {
            run_id,
            bench: slot.name.clone(),
            total_points: job.plan.point_count(),
            already_measured: job.done.len(),
        });
        let ctx = RunContext {
            run_id,
            plan: job.plan,
            chain: job.chain,
            source: slot.source.clone(),
            analyzer: slot.analyzer.clone(),
            store: store.clone(),
            events: self.inner.events.clone(),
            cancel: token,
            done: job.done,
            safety: slot.safety.clone(),
        };
        // The run goes in its own task so that a panic in it is caught here (and its RF guard
        // acts on the unwind) instead of taking the worker down.
        let outcome = match tokio::spawn(runner::run(ctx)).await {
            Ok(outcome) => outcome,
            Err(join) => {
                // Give the guard's spawned safe-off the lock, then make sure ourselves.
                match safety::switch_off(&slot.source).await {
                    Ok(()) => RunOutcome::Failed(format!("the run task failed: {join}")),
                    Err(e) => {
                        let cause = advice_once(format!(
                            "the run task failed ({join}) and the RF output could not be confirmed off ({e})"
                        ));
                        // Flag the bench first: the keeper starts at once, then the run is
                        // recorded.
                        slot.safety
                            .output_unconfirmed(slot.source.clone(), cause.clone())
                            .await;
                        RunOutcome::OutputUnconfirmed(cause)
                    }
                }
            }
        };
        let outcome = match outcome {
            RunOutcome::Completed => self.check_results(run_id).await,
            other => other,
        };
        let (state, cause, resumable) = match outcome {
            RunOutcome::Completed => (RunState::Completed, None, false),
            RunOutcome::Cancelled if self.inner.shutdown.is_cancelled() => (
                RunState::Interrupted,
                Some("the daemon shut down; resume the run to finish it".into()),
                false,
            ),
            RunOutcome::Cancelled => (RunState::Cancelled, Some("cancelled".into()), false),
            RunOutcome::Failed(cause) => (RunState::Failed, Some(advice_once(cause)), false),
            RunOutcome::FailedResumable(cause) => {
                (RunState::Failed, Some(advice_once(cause)), true)
            }
            // The bench was held by whoever found the output unconfirmed (the run before it
            // waited for its pipeline, or the panic path above), with this cause, the link
            // advice already said once.
            RunOutcome::OutputUnconfirmed(cause) => (RunState::Failed, Some(cause), true),
        };
        tracing::info!(
            run_id,
            state = state.as_str(),
            cause = cause.as_deref().unwrap_or(""),
            resumable,
            "run ended"
        );
        finish(state, cause, resumable).await;
    }

    /// A run that measured everything is `completed` only with at least one V_pi; otherwise it
    /// failed (its points stay for a look).
    async fn check_results(&self, run_id: i64) -> RunOutcome {
        match self.inner.store.frequency_results(run_id).await {
            Ok(results) if !results.is_empty() => RunOutcome::Completed,
            Ok(_) => RunOutcome::Failed(
                "every point was measured but no frequency gave a V_pi (too few points with a modulation index); look at the points and resubmit with more levels".into(),
            ),
            Err(e) => RunOutcome::Failed(format!(
                "could not read the V_pi results back to close the run: {e}"
            )),
        }
    }
}

/// A cause that chains several connection errors (the step's, the read-back's, the switch-off's)
/// repeats the link advice after each; it is said once, after the last.
pub(super) fn advice_once(cause: String) -> String {
    let advice = format!("; {}", halfwave_drivers::instrument::LINK_ADVICE);
    match cause.rfind(&advice) {
        Some(last) if cause.matches(&advice).count() > 1 => {
            let (head, tail) = cause.split_at(last);
            format!("{}{tail}", head.replace(&advice, ""))
        }
        _ => cause,
    }
}

#[cfg(test)]
mod advice_tests {
    use super::advice_once;

    #[test]
    fn the_link_advice_is_said_once_after_the_last_error() {
        // The cause of a run that lost its source's link with the output on (a rehearsal drill).
        let chained = "instrument link fault: the link to TCPIP::127.0.0.1::5025::SOCKET was lost during set level and re-established; \
            the step failed (connection to TCPIP::127.0.0.1::5025::SOCKET failed during POWer?: Connection reset by peer (os error 104); \
            check the cable, the address and that the instrument is on), and the output could not be confirmed off afterwards \
            (connection to TCPIP::127.0.0.1::5025::SOCKET failed during OUTPut?: Connection reset by peer (os error 104); \
            check the cable, the address and that the instrument is on); then the RF output could not be confirmed off \
            (connection to TCPIP::127.0.0.1::5025::SOCKET failed during OUTPut OFF: Broken pipe (os error 32); \
            check the cable, the address and that the instrument is on); the bench is held while the daemon keeps trying to switch it off";
        let once = advice_once(chained.to_string());
        assert_eq!(once.matches("check the cable").count(), 1, "{once}");
        assert!(
            once.contains("OUTPut OFF: Broken pipe (os error 32); check the cable, the address and that the instrument is on); the bench is held"),
            "{once}"
        );
        // Every error is still there, with its operation and cause.
        for part in [
            "during POWer?: Connection reset by peer",
            "during OUTPut?: Connection reset by peer",
            "afterwards",
            "keeps trying",
        ] {
            assert!(once.contains(part), "{part}: {once}");
        }
        // One error, or none, is left as it is.
        let single = "connection to X failed during OUTPut?: refused; check the cable, the address and that the instrument is on";
        assert_eq!(advice_once(single.to_string()), single);
        assert_eq!(advice_once("cancelled".into()), "cancelled");
    }
}
