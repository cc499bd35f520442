//! The sweep engine: plans in, one queue per bench, runs out, RF off on every stop path.
//!
//! [`Engine`] is the one handle the API and the CLI hold. It owns the benches (each a source and
//! an analyzer behind a mutex, driven by one worker task that takes queued runs one at a time:
//! instruments are exclusive), validates plans against the configured limits before anything is
//! sent to an instrument, records every state change in the store, and publishes progress on a
//! broadcast channel.
//!
//! Start-up switches every configured source off and marks runs that were left running as
//! interrupted (their committed points stay); runs that were queued are queued again. Shutdown
//! cancels the active runs (they become interrupted, so they can be resumed), waits for their RF
//! to go off and switches every source off once more.

pub mod acquire;
pub mod adaptive;
pub mod bench;
pub mod chain_run;
pub mod events;
pub mod plan;
pub mod rf_safety;
pub mod runner;
pub mod safety;
mod worker;

use crate::analysis::chain::{ChainPoint, DriveChain};
use crate::config::{Config, Limits};
use crate::store::{
    BenchSafetyRecord, ChainCalibration, ChainCalibrationPoint, NewDevice, NewRun, RunFilter,
    RunProvenance, RunRecord, RunState, Store, StoreError,
};
use bench::BenchInstruments;
use events::ProgressEvent;
use halfwave_drivers::{AnalyzerCapabilities, Identity, InstrumentError, SourceLimits};
use halfwave_units::{Db, Dbm, Hz, Nanometers};
use plan::{ChainSpec, FieldError, Plan, PlanContext, PlanErrors, PlanRequest};
use rf_safety::{AcknowledgeError, BenchSafety};
use serde::Serialize;
use std::collections::{HashMap, HashSet};
use std::sync::Arc;
use tokio::sync::{broadcast, mpsc, Mutex};
use tokio_util::sync::CancellationToken;
use worker::{BenchQueue, BenchSlot};

/// How many progress events a slow watcher may lag behind before it loses old ones.
const EVENT_BUFFER: usize = 1024;

/// Why a plan was not accepted.
#[derive(Debug, thiserror::Error)]
pub enum SubmitError {
    #[error(transparent)]
    Invalid(#[from] PlanErrors),
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// Why a run could not be cancelled or resumed, or the engine could not start.
#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error("run {0} does not exist")]
    RunNotFound(i64),
    #[error("run {run_id} is {state}; only queued, running or interrupted runs can be cancelled")]
    NotCancellable { run_id: i64, state: String },
    #[error("run {run_id} is {state}; only interrupted runs, and failed runs stopped by a link fault, can be resumed")]
    NotResumable { run_id: i64, state: String },
    #[error("no bench named {0:?} is configured on this daemon")]
    BenchNotFound(String),
    #[error("run {run_id} is on a bench this daemon does not drive: {detail}")]
    OtherDaemon { run_id: i64, detail: String },
    #[error(transparent)]
    Acknowledge(#[from] AcknowledgeError),
    #[error("run {run_id} cannot be resumed: {reason}")]
    ResumeRefused { run_id: i64, reason: String },
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("bench {bench}: {source}")]
    Instrument {
        bench: String,
        #[source]
        source: InstrumentError,
    },
    #[error("{0}")]
    Setup(String),
}

/// A bench as the API shows it.
#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct BenchStatus {
    pub name: String,
    pub source_resource: String,
    pub analyzer_resource: String,
    pub source_identity: Option<Identity>,
    pub analyzer_identity: Option<Identity>,
    pub active_run_id: Option<i64>,
    pub queued_run_ids: Vec<i64>,
    /// `clear`, `output_unconfirmed` (the RF output could not be read back off; the daemon keeps
    /// trying and no run starts) or `awaiting_acknowledgement` (confirmed off after a fault; an
    /// operator must acknowledge before runs start again).
    pub safety_state: rf_safety::SafetyState,
    /// The fault behind a state other than `clear`: cause, since when, when confirmed off.
    pub safety_fault: Option<BenchSafetyRecord>,
}

/// Each bench's stated generator level accuracy (+/- dB) and sensor figures (accuracy +/- %,
/// |Gamma|), as the configuration gives them.
type BenchFigures = (
    HashMap<String, Db>,
    HashMap<String, (Option<f64>, Option<f64>)>,
);

/// Locks a std mutex even if a thread panicked while holding it: the engine's maps stay usable,
/// and above all the cancel path still finds the run to stop and switch off.
fn lock<T>(mutex: &std::sync::Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    mutex
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
}

struct Inner {
    store: Store,
    limits: Limits,
    events: broadcast::Sender<ProgressEvent>,
    benches: HashMap<String, Arc<BenchSlot>>,
    /// Each bench's stated generator level accuracy (+/- dB, from the configuration), where given.
    source_level_accuracy: HashMap<String, Db>,
    /// Each bench's stated sensor accuracy (+/- %) and |Gamma|, where given.
    sensor_figures: HashMap<String, (Option<f64>, Option<f64>)>,
    /// Cancel tokens of queued and running chain calibrations.
    chain_cancels: std::sync::Mutex<HashMap<i64, CancellationToken>>,
    /// Runs a previous process left running, marked interrupted by this start.
    interrupted_at_start: Vec<i64>,
    /// Cancel tokens of queued and running runs.
    cancels: std::sync::Mutex<HashMap<i64, CancellationToken>>,
    shutdown: CancellationToken,
    workers: Mutex<Vec<tokio::task::JoinHandle<()>>>,
}

/// The start of the names of the chain calibrations the engine makes for plans with a flat loss
/// (`flat-loss-2.00dB`); a chain a lab stores is any other name (see [`reserved_chain_name`]).
pub const FLAT_LOSS_PREFIX: &str = "flat-loss-";

/// True for the name of a chain calibration the engine makes for a flat loss (the store trims
/// names, so leading blanks do not count).
pub fn is_flat_loss_name(name: &str) -> bool {
    name.trim_start().starts_with(FLAT_LOSS_PREFIX)
}

/// Why a lab's chain calibration may not be stored under `name`, or `None` when it may. The
/// flat-loss names ([`is_flat_loss_name`]) are the engine's own: a plan with a flat loss reuses
/// the newest row of its name, so a lab's table stored under it would stand in for the flat loss.
pub fn reserved_chain_name(name: &str) -> Option<String> {
    is_flat_loss_name(name).then(|| {
        format!(
            "names starting with \"{FLAT_LOSS_PREFIX}\" are kept for the flat losses the engine \
             stores itself; choose another name, e.g. \"bench-2 amplifier A\""
        )
    })
}

/// The engine handle; cheap to clone.
#[derive(Clone)]
pub struct Engine {
    inner: Arc<Inner>,
}

impl Engine {
    /// Builds the configured benches and starts the engine (see the module documentation).
    pub async fn start(config: &Config, store: Store) -> Result<Engine, EngineError> {
        // Start-up interlock, before anything can fail: every source that answers is switched
        // off first, so that an unreachable analyzer (or another bench) that stops the start
        // does not leave a source on that a previous process was driving.
        let mut sources = Vec::new();
        let mut failures = Vec::new();
        let mut start_off = HashMap::new();
        for bench in &config.benches {
            let connected = match bench::simulation(config, bench) {
                Ok(simulation) => bench::connect_bench_source(config, bench, simulation.as_ref())
                    .await
                    .map(|source| (simulation, source)),
                Err(message) => Err(bench::setup_error(bench, message)),
            };
            match connected {
                Ok((simulation, mut source)) => {
                    let off = bench::switch_off_at_start(&bench.name, source.as_mut()).await;
                    start_off.insert(bench.name.clone(), off);
                    sources.push((bench, simulation, source));
                }
                Err(e) => failures.push(e),
            }
        }
        let mut benches = Vec::new();
        for (bench, simulation, source) in sources {
            let analyzer = bench::connect_bench_analyzer(config, bench, simulation.as_ref()).await;
            let sensor = bench::connect_bench_sensor(config, bench, simulation.as_ref()).await;
            match (analyzer, sensor) {
                (Ok(analyzer), Ok(sensor)) => benches.push((
                    bench.name.clone(),
                    BenchInstruments {
                        source,
                        analyzer,
                        sensor,
                        simulation,
                    },
                )),
                (Err(e), _) | (_, Err(e)) => failures.push(e),
            }
        }
        if !failures.is_empty() {
            if failures.len() == 1 {
                return Err(failures.remove(0));
            }
            let all: Vec<String> = failures.iter().map(ToString::to_string).collect();
            return Err(EngineError::Setup(all.join("; ")));
        }
        let accuracy = config
            .benches
            .iter()
            .filter_map(|b| Some((b.name.clone(), b.source_level_accuracy_db?)))
            .collect();
        let sensor_figures = config
            .benches
            .iter()
            .map(|b| {
                (
                    b.name.clone(),
                    (b.sensor_accuracy_percent, b.sensor_reflection_coefficient),
                )
            })
            .collect();
        Self::launch(
            config.limits.clone(),
            store,
            benches,
            start_off,
            (accuracy, sensor_figures),
        )
        .await
    }

    /// Starts the engine on benches built by the caller (tests use this to keep a handle on
    /// the simulated bench), switching every source off first.
    pub async fn start_with(
        limits: Limits,
        store: Store,
        benches: Vec<(String, BenchInstruments)>,
    ) -> Result<Engine, EngineError> {
        Self::start_with_figures(limits, store, benches, HashMap::new(), HashMap::new()).await
    }

    /// [`Engine::start_with`] with each bench's stated generator level accuracy (+/- dB) and
    /// sensor figures (accuracy +/- %, |Gamma|), as the configuration gives them.
    pub async fn start_with_figures(
        limits: Limits,
        store: Store,
        mut benches: Vec<(String, BenchInstruments)>,
        source_level_accuracy: HashMap<String, Db>,
        sensor_figures: HashMap<String, (Option<f64>, Option<f64>)>,
    ) -> Result<Engine, EngineError> {
        // Start-up interlock: whatever the previous process left on, switch it off now.
        let mut start_off = HashMap::new();
        for (name, instruments) in &mut benches {
            let off = bench::switch_off_at_start(name, instruments.source.as_mut()).await;
            start_off.insert(name.clone(), off);
        }
        Self::launch(
            limits,
            store,
            benches,
            start_off,
            (source_level_accuracy, sensor_figures),
        )
        .await
    }

    /// Starts the engine on benches whose sources were switched off at start-up (`start_off`
    /// holds each bench's result: a failure flags the bench, see `rf_safety`).
    async fn launch(
        limits: Limits,
        store: Store,
        benches: Vec<(String, BenchInstruments)>,
        mut start_off: HashMap<String, Result<(), String>>,
        (source_level_accuracy, sensor_figures): BenchFigures,
    ) -> Result<Engine, EngineError> {
        let (events, _) = broadcast::channel(EVENT_BUFFER);
        let shutdown = CancellationToken::new();
        let mut stored_faults: HashMap<String, BenchSafetyRecord> = store
            .bench_safety_faults()
            .await?
            .into_iter()
            .map(|r| (r.bench_name.clone(), r))
            .collect();
        let mut slots = HashMap::new();
        let mut receivers = Vec::new();
        for (name, instruments) in benches {
            let (tx, rx) = mpsc::unbounded_channel();
            let source_resource = instruments.source.resource().to_string();
            let analyzer_resource = instruments.analyzer.resource().to_string();
            let slot = Arc::new(BenchSlot {
                name: name.clone(),
                source: Arc::new(Mutex::new(instruments.source)),
                analyzer: Arc::new(Mutex::new(instruments.analyzer)),
                source_resource,
                analyzer_resource,
                identities: std::sync::Mutex::new((None, None)),
                queue: std::sync::Mutex::new(BenchQueue::default()),
                jobs: tx,
                sensor: instruments.sensor.map(|s| Arc::new(Mutex::new(s))),
                safety: BenchSafety::new(
                    name.clone(),
                    store.clone(),
                    events.clone(),
                    stored_faults.remove(&name),
                    shutdown.clone(),
                ),
            });
            slot.settle_safety_at_start(start_off.remove(&name)).await;
            slot.refresh_identities(&store).await;
            receivers.push((slot.clone(), rx));
            slots.insert(name, slot);
        }
        // On a shared database (PostgreSQL) other daemons' runs are theirs: recovery and the
        // queue cover this daemon's benches only (it holds their leases).
        let shared = store.backend() == crate::store::Backend::Postgres;
        let own_benches: Vec<String> = slots.keys().cloned().collect();
        let interrupted = store
            .mark_running_as_interrupted_on(shared.then_some(own_benches.as_slice()))
            .await?;
        let unfinished = store
            .fail_unfinished_chain_runs_on(shared.then_some(own_benches.as_slice()))
            .await?;
        if !unfinished.is_empty() {
            tracing::warn!(chain_runs = ?unfinished, "chain calibrations left unfinished by the previous process are failed; submit them again");
        }
        if !interrupted.is_empty() {
            tracing::warn!(
                runs = ?interrupted,
                "runs left running by the previous process are now interrupted; resume them to finish"
            );
        }
        let engine = Engine {
            inner: Arc::new(Inner {
                store,
                limits,
                events,
                benches: slots,
                source_level_accuracy,
                sensor_figures,
                chain_cancels: std::sync::Mutex::new(HashMap::new()),
                interrupted_at_start: interrupted.clone(),
                cancels: std::sync::Mutex::new(HashMap::new()),
                shutdown,
                workers: Mutex::new(Vec::new()),
            }),
        };
        for (slot, rx) in receivers {
            let handle = tokio::spawn(engine.clone().worker(slot, rx));
            engine.inner.workers.lock().await.push(handle);
        }
        // Runs accepted before a restart keep their place.
        let queued = engine
            .inner
            .store
            .list_runs(&RunFilter {
                state: Some(RunState::Queued),
                limit: RunFilter::MAX_LIMIT,
                ..RunFilter::default()
            })
            .await?;
        let mut queued: Vec<i64> = queued
            .runs
            .iter()
            .filter(|r| !shared || own_benches.contains(&r.bench_name))
            .map(|r| r.id)
            .collect();
        queued.sort_unstable();
        for run_id in queued {
            if let Err(e) = engine.enqueue_existing(run_id).await {
                tracing::error!(run_id, error = %e, "a queued run could not be queued again");
                engine
                    .inner
                    .store
                    .transition_run(run_id, RunState::Failed, Some(&e.to_string()))
                    .await?;
            }
        }
        Ok(engine)
    }

    /// The store behind the engine.
    pub fn store(&self) -> &Store {
        &self.inner.store
    }

    /// The configured safety limits.
    pub fn limits(&self) -> &Limits {
        &self.inner.limits
    }

    /// A receiver of progress events from now on.
    pub fn subscribe(&self) -> broadcast::Receiver<ProgressEvent> {
        self.inner.events.subscribe()
    }

    /// The runs a previous process left running, which this start marked interrupted (no
    /// progress event says so: nobody can be subscribed before the engine exists).
    pub fn interrupted_at_start(&self) -> &[i64] {
        &self.inner.interrupted_at_start
    }

    /// The generator level accuracy (+/- dB) the configuration states for `bench`, if any.
    pub fn source_level_accuracy(&self, bench: &str) -> Option<Db> {
        self.inner.source_level_accuracy.get(bench).copied()
    }

    /// Every bench with its instruments and queue.
    pub fn benches(&self) -> Vec<BenchStatus> {
        let mut list: Vec<BenchStatus> = self
            .inner
            .benches
            .values()
            .map(|slot| slot.status())
            .collect();
        list.sort_by(|a, b| a.name.cmp(&b.name));
        list
    }

    /// Why a bench is not one of this daemon's: held by another daemon on the shared database
    /// (named, with where to submit instead: runs are not forwarded), or not configured anywhere.
    async fn not_here(&self, bench: &str) -> String {
        let mut known: Vec<&str> = self.inner.benches.keys().map(String::as_str).collect();
        known.sort();
        if self.inner.store.backend() == crate::store::Backend::Postgres {
            match self.inner.store.bench_lease(bench).await {
                Ok(Some(lease)) if lease.is_live() => {
                    return format!(
                        "bench {bench:?} is driven by another daemon: {}; submit the run to that daemon's API (http://{}/), this daemon runs only its own benches ({})",
                        lease.describe(),
                        lease.holder.listen,
                        known.join(", ")
                    );
                }
                Ok(Some(lease)) => {
                    return format!(
                        "bench {bench:?} is not configured on this daemon, and its last holder ({}) stopped renewing its lease; start a daemon that configures it, this daemon runs only its own benches ({})",
                        lease.holder.describe(),
                        known.join(", ")
                    );
                }
                Ok(None) => {}
                Err(e) => tracing::warn!(error = %e, bench, "could not read the bench's lease"),
            }
        }
        format!(
            "no bench named {bench:?}; configured benches: {}",
            known.join(", ")
        )
    }

    /// Checks a plan against the limits and the bench without queuing it.
    pub async fn check_plan(
        &self,
        request: &PlanRequest,
    ) -> Result<(Plan, DriveChain, ChainChoice), SubmitError> {
        // Every mistake is named in one answer: an unknown bench or an unusable chain does not
        // stop the other fields from being checked (against stand-ins that refuse nothing).
        let mut errors = Vec::new();
        let slot = self.inner.benches.get(&request.bench);
        if slot.is_none() && !request.bench.trim().is_empty() {
            errors.push(FieldError {
                field: "bench".into(),
                message: self.not_here(&request.bench).await,
            });
        }
        let chain = match self.resolve_chain(&request.chain).await {
            Ok(chain) => Some(chain),
            Err(SubmitError::Invalid(invalid)) => {
                errors.extend(invalid.errors);
                None
            }
            Err(other) => return Err(other),
        };
        let (source_limits, caps) = match slot {
            Some(slot) => {
                // One lock at a time: holding the source's while waiting for the analyzer's
                // (which a run holds through a sweep) would keep a watchdog from switching the
                // source off.
                let source_limits = slot.source.lock().await.limits();
                let caps = slot.analyzer.lock().await.capabilities();
                (source_limits, caps)
            }
            None => (
                SourceLimits {
                    min_frequency: Hz(0.0),
                    max_frequency: Hz(f64::INFINITY),
                    min_level: Dbm(f64::NEG_INFINITY),
                    max_level: Dbm(f64::INFINITY),
                },
                AnalyzerCapabilities {
                    min_frequency: Hz(0.0),
                    max_frequency: Hz(f64::INFINITY),
                    min_span: Hz(0.0),
                    max_span: Hz(f64::INFINITY),
                    resolution_bandwidths: Vec::new(),
                    max_points: usize::MAX,
                    typical_sweep_time: halfwave_units::Seconds(0.0),
                },
            ),
        };
        let ctx = PlanContext {
            hard_limit_at_modulator: self.inner.limits.max_level_at_modulator_dbm,
            source: source_limits,
            analyzer: &caps,
            chain: chain.as_ref().map(|(c, _, _)| c),
        };
        let validated = request.validate(&ctx);
        if let (Ok(plan), Some((_, _, Some(band)))) = (&validated, &chain) {
            let outside: Vec<String> = plan
                .steps()
                .iter()
                .map(|step| step.frequency)
                .filter(|f| f.0 < band.low.0 || f.0 > band.high.0)
                .map(|f| format!("{} GHz", f.0 / 1e9))
                .collect();
            if !outside.is_empty() {
                errors.push(FieldError {
                    field: "frequencies".into(),
                    message: format!(
                        "{} lie outside {} to {} GHz, the band chain calibration {} was measured over (from its files); the chain's gain there would be extrapolated: measure the chain over these frequencies or plan inside the band",
                        outside.join(", "),
                        band.low.0 / 1e9,
                        band.high.0 / 1e9,
                        band.name
                    ),
                });
            }
        }
        let chain_named = errors.iter().any(|e| e.field == "chain");
        match (validated, chain) {
            (Ok(plan), Some((chain, choice, _))) if errors.is_empty() => Ok((plan, chain, choice)),
            (Ok(_), _) => Err(SubmitError::Invalid(PlanErrors { errors })),
            (Err(invalid), _) => {
                // The chain's own error says more than the plan's "no usable drive chain".
                // Without a bench the analyzer's checks ran against a stand-in: not reported.
                let bench_missing = slot.is_none();
                let said_better = |e: &FieldError| {
                    (chain_named && e.field == "chain")
                        || (bench_missing && e.field.starts_with("analyzer."))
                };
                errors.extend(invalid.errors.into_iter().filter(|e| !said_better(e)));
                Err(SubmitError::Invalid(PlanErrors { errors }))
            }
        }
    }

    /// Validates and queues a plan; returns the new run's id. Nothing is sent to an instrument
    /// unless the plan is proven within every limit.
    pub async fn submit(
        &self,
        request: PlanRequest,
        submitted_by: &str,
    ) -> Result<i64, SubmitError> {
        self.submit_by_token(request, submitted_by, None).await
    }

    /// [`Engine::submit`] for an API caller: `token_id` (the submitting token's `api_tokens.id`)
    /// is recorded with the run beside its name, since names of revoked tokens can be reused.
    pub async fn submit_by_token(
        &self,
        request: PlanRequest,
        submitted_by: &str,
        token_id: Option<i64>,
    ) -> Result<i64, SubmitError> {
        let (plan, chain, choice) = self.check_plan(&request).await?;
        let store = &self.inner.store;
        // Only a valid plan stores anything: the flat loss's calibration row is made now.
        let chain_id = match choice {
            ChainChoice::Stored(id) => id,
            ChainChoice::FlatLoss(loss_db) => self.flat_loss_calibration(loss_db).await?.id,
        };
        let device_id = store
            .upsert_device(&NewDevice {
                serial: request.device.serial.trim().to_string(),
                model: request.device.model.clone(),
                rf_input_limit: request.device.rf_input_limit_dbm,
                wavelength: Nanometers(request.device.wavelength_nm),
            })
            .await?
            .id;
        let plan_json = serde_json::to_value(&request).map_err(|e| {
            SubmitError::Invalid(PlanErrors {
                errors: vec![FieldError {
                    field: "plan".into(),
                    message: format!("the plan could not be serialised: {e}"),
                }],
            })
        })?;
        let run_id = store
            .create_run(&NewRun {
                plan: plan_json,
                device_id,
                bench_name: request.bench.clone(),
                chain_calibration_id: chain_id,
                submitted_by: submitted_by.to_string(),
                provenance: RunProvenance {
                    software_version: Some(crate::version::software_version()),
                    analysis_method: Some(crate::analysis::ANALYSIS_METHOD.to_string()),
                    submitted_by_token_id: token_id,
                    hard_limit_at_modulator: Some(self.inner.limits.max_level_at_modulator_dbm),
                    planned_max_at_modulator: Some(plan.max_level_at_modulator())
                        .filter(|l| l.0.is_finite()),
                    // What the budget of this run will use, whatever the configuration says later.
                    source_level_accuracy: self.source_level_accuracy(&request.bench),
                },
            })
            .await?
            .id;
        // The run's `run.submit` audit row is written with the run, in one transaction.
        tracing::info!(
            run_id,
            device = %request.device.serial,
            bench = %request.bench,
            points = plan.point_count(),
            max_at_modulator = %plan.max_level_at_modulator(),
            "run queued"
        );
        self.enqueue(run_id, Arc::new(plan), Arc::new(chain), HashSet::new());
        Ok(run_id)
    }

    /// Cancels a queued or running run. A running run stops at once with RF off.
    pub async fn cancel(&self, run_id: i64, by: &str) -> Result<(), EngineError> {
        let run = self.run_record(run_id).await?;
        let state = run.state;
        if matches!(state, RunState::Queued | RunState::Running) {
            self.refuse_other_daemons_run(run_id, &run.bench_name)
                .await?;
        }
        if !matches!(
            state,
            RunState::Queued | RunState::Running | RunState::Interrupted
        ) && !self.is_queued_or_active(run_id)
        {
            return Err(EngineError::NotCancellable {
                run_id,
                state: state.as_str().into(),
            });
        }
        self.inner
            .store
            .append_audit(by, "run.cancel", &format!("run:{run_id}"), "")
            .await?;
        if state == RunState::Queued && self.withdraw_queued(run_id) {
            // Still waiting behind another run: it ends now, not when its turn comes.
            lock(&self.inner.cancels).remove(&run_id);
            let cause = format!("cancelled by {by} before it started");
            self.inner
                .store
                .transition_run(run_id, RunState::Cancelled, Some(&cause))
                .await?;
            let _ = self.inner.events.send(ProgressEvent::Finished {
                run_id,
                state: RunState::Cancelled,
                cause: Some(cause),
            });
            return Ok(());
        }
        let token = lock(&self.inner.cancels).get(&run_id).cloned();
        match token {
            Some(t) => t.cancel(),
            None => {
                // Not in any queue of this process: an interrupted run being abandoned (its
                // points stay), or a run this process never queued. Record it directly.
                self.inner
                    .store
                    .transition_run(
                        run_id,
                        RunState::Cancelled,
                        Some(&format!("cancelled by {by}")),
                    )
                    .await?;
            }
        }
        Ok(())
    }

    /// Queues an interrupted run again; it continues from its first missing point with the same
    /// plan and chain calibration.
    pub async fn resume(&self, run_id: i64, by: &str) -> Result<(), EngineError> {
        let run = self.run_record(run_id).await?;
        let resumable_failure = run.state == RunState::Failed && run.resumable;
        if run.state != RunState::Interrupted && !resumable_failure {
            let state = match run.state {
                RunState::Failed => {
                    "failed on a cause that is not a link fault (a limit, an instrument's refusal or the analysis); resubmit it".into()
                }
                other => other.as_str().into(),
            };
            return Err(EngineError::NotResumable { run_id, state });
        }
        self.refuse_other_daemons_run(run_id, &run.bench_name)
            .await?;
        if self.is_queued_or_active(run_id) {
            return Err(EngineError::NotResumable {
                run_id,
                state: "already queued for resumption".into(),
            });
        }
        // The run stays `interrupted` (or `failed`) until its bench's worker moves it to
        // `running`; the plan is proven again against today's limits first.
        self.inner
            .store
            .append_audit(by, "run.resume", &format!("run:{run_id}"), "")
            .await?;
        self.enqueue_existing(run_id).await
    }

    /// On a shared database, refuses to act on a run of a bench this daemon does not hold: its
    /// queue and its cancel tokens live in the daemon that holds the bench.
    async fn refuse_other_daemons_run(&self, run_id: i64, bench: &str) -> Result<(), EngineError> {
        if self.inner.store.backend() != crate::store::Backend::Postgres
            || self.inner.benches.contains_key(bench)
        {
            return Ok(());
        }
        Err(EngineError::OtherDaemon {
            run_id,
            detail: self.not_here(bench).await,
        })
    }

    /// Cancels everything, waits for the RF to go off, and switches every source off again.
    pub async fn shutdown(&self) {
        self.inner.shutdown.cancel();
        let mut tokens: Vec<CancellationToken> =
            lock(&self.inner.cancels).values().cloned().collect();
        tokens.extend(lock(&self.inner.chain_cancels).values().cloned());
        for t in tokens {
            t.cancel();
        }
        let workers: Vec<_> = self.inner.workers.lock().await.drain(..).collect();
        for w in workers {
            if tokio::time::timeout(std::time::Duration::from_secs(10), w)
                .await
                .is_err()
            {
                tracing::error!("a bench worker did not stop within 10 s");
            }
        }
        for slot in self.inner.benches.values() {
            if let Err(e) = safety::switch_off(&slot.source).await {
                tracing::error!(bench = %slot.name, error = %e, "could not confirm RF off at shutdown; switch it off by hand");
                // Stored, so the next start flags the bench and switches it off first.
                slot.safety
                    .output_unconfirmed(
                        slot.source.clone(),
                        format!("the RF output could not be confirmed off at shutdown: {e}"),
                    )
                    .await;
            }
        }
    }

    async fn resolve_chain(
        &self,
        spec: &ChainSpec,
    ) -> Result<(DriveChain, ChainChoice, Option<MeasuredBand>), SubmitError> {
        let invalid = |message: String| {
            SubmitError::Invalid(PlanErrors {
                errors: vec![FieldError {
                    field: "chain".into(),
                    message,
                }],
            })
        };
        let calibration = match spec {
            &ChainSpec::FlatLoss { loss_db } => {
                if !loss_db.is_finite() || !(-60.0..=100.0).contains(&loss_db.0) {
                    return Err(invalid(format!(
                        "loss_db must be a loss in dB from -60 to 100, got {}",
                        loss_db.0
                    )));
                }
                // Nothing is stored before the whole plan is valid (see `submit`).
                return Ok((
                    DriveChain::flat_loss(loss_db),
                    ChainChoice::FlatLoss(loss_db),
                    None,
                ));
            }
            ChainSpec::Stored { name, version } => {
                let headers = self.inner.store.chain_calibrations().await?;
                let found = headers
                    .iter()
                    .filter(|h| &h.name == name && version.is_none_or(|v| h.version == v))
                    .max_by_key(|h| h.version);
                match found {
                    Some(h) => self.inner.store.chain_calibration(h.id).await?,
                    None => {
                        return Err(invalid(match version {
                            Some(v) => format!("no chain calibration {name:?} version {v}; list them with `halfwave chain list` or GET /api/v1/chain-calibrations"),
                            None => format!("no chain calibration named {name:?}; upload one first"),
                        }))
                    }
                }
            }
        };
        let chain = drive_chain(&calibration).map_err(|e| invalid(e.to_string()))?;
        let band = MeasuredBand::of(&calibration);
        Ok((chain, ChainChoice::Stored(calibration.id), band))
    }

    /// Takes a run that waits in a bench's queue of this process out of it (its bench's worker
    /// then skips its job); false when it is not waiting there (running, or not queued here).
    fn withdraw_queued(&self, run_id: i64) -> bool {
        self.inner.benches.values().any(|slot| {
            let mut q = lock(&slot.queue);
            let waiting = q.queued.len();
            if q.active != Some(run_id) {
                q.queued.retain(|id| *id != run_id);
            }
            q.queued.len() < waiting
        })
    }

    fn is_queued_or_active(&self, run_id: i64) -> bool {
        lock(&self.inner.cancels).contains_key(&run_id)
    }

    async fn run_record(&self, run_id: i64) -> Result<RunRecord, EngineError> {
        match self.inner.store.run(run_id).await {
            Ok(r) => Ok(r),
            Err(StoreError::NotFound { .. }) => Err(EngineError::RunNotFound(run_id)),
            Err(e) => Err(e.into()),
        }
    }

    /// The stored calibration that stands for a flat loss: one per distinct loss, reused, named
    /// [`FLAT_LOSS_PREFIX`] and the loss.
    async fn flat_loss_calibration(&self, loss: Db) -> Result<ChainCalibration, StoreError> {
        let name = format!("{FLAT_LOSS_PREFIX}{:.2}dB", loss.0);
        match self.inner.store.latest_chain_calibration(&name).await {
            Ok(c) => Ok(c),
            Err(StoreError::NotFound { .. }) => {
                self.inner
                    .store
                    .create_chain_calibration(
                        &name,
                        "halfwave",
                        &[ChainCalibrationPoint::new(Hz(0.0), -loss)],
                    )
                    .await
            }
            Err(e) => Err(e),
        }
    }

    /// An operator's acknowledgement of a bench's safety fault (see `rf_safety`): the bench takes
    /// runs again. Refused while the output is still unconfirmed.
    pub async fn acknowledge(&self, bench: &str, by: &str, note: &str) -> Result<(), EngineError> {
        let slot = self
            .inner
            .benches
            .get(bench)
            .ok_or_else(|| EngineError::BenchNotFound(bench.to_string()))?;
        slot.safety.acknowledge(by, note).await?;
        Ok(())
    }
}

/// The drive chain a stored calibration stands for.
/// Which chain calibration a valid plan's run records: a stored one, or the flat loss whose
/// calibration row is made (or reused) only once the plan is valid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ChainChoice {
    Stored(i64),
    FlatLoss(Db),
}

/// The band a stored chain calibration was measured over, when it was computed from measurement
/// files (Touchstone): a plan frequency outside it would be an extrapolation of a measurement,
/// which is refused. A typed table is held constant beyond its ends, as documented, and a flat
/// loss applies everywhere: neither has one.
struct MeasuredBand {
    /// `"name" vN`, for messages.
    name: String,
    low: Hz,
    high: Hz,
}

impl MeasuredBand {
    fn of(calibration: &ChainCalibration) -> Option<MeasuredBand> {
        if calibration.sources.is_empty() {
            return None;
        }
        Some(MeasuredBand {
            name: format!("{:?} v{}", calibration.name, calibration.version),
            low: calibration.points.first()?.frequency(),
            high: calibration.points.last()?.frequency(),
        })
    }
}

fn drive_chain(
    calibration: &ChainCalibration,
) -> Result<DriveChain, crate::analysis::AnalysisError> {
    DriveChain::new(
        calibration
            .points
            .iter()
            .map(|p| ChainPoint {
                frequency: p.frequency(),
                gain: p.gain(),
            })
            .collect(),
    )
}

#[cfg(test)]
mod tests {
    use super::lock;
    use std::sync::{Arc, Mutex};

    #[test]
    fn a_poisoned_engine_lock_still_gives_its_contents() {
        // The cancel path reads the run's cancel token through this lock: a panic elsewhere while
        // it was held must not hide the token (and so leave a run, and its RF, going).
        let tokens = Arc::new(Mutex::new(vec![7_i64]));
        let poisoner = tokens.clone();
        let joined = std::thread::spawn(move || {
            let _held = poisoner.lock().unwrap();
            panic!("a bug while the lock is held");
        })
        .join();
        assert!(joined.is_err());
        assert!(tokens.is_poisoned());
        assert_eq!(*lock(&tokens), vec![7]);
    }
}
