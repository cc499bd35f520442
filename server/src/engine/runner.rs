//! The sweep executor: one run of a proven plan on one bench.
//!
//! For each frequency, in plan order: switch RF off, find the laser, take the RF-off reference,
//! then ramp the levels from low to high, one point each (set level, output on, settle, sweep,
//! fetch). Each measured trace is handed to a pipeline that analyses it and commits it to the
//! store while the instruments already measure the next point, so the analysis and the database
//! cost no instrument time; the pipeline analyses up to two points at once on blocking threads
//! while it commits the ones before, in the acquisition's order. When a frequency's levels are
//! done the RF goes off and V_pi is fitted for that frequency; when all are done the run is
//! complete.
//!
//! Every stop path switches RF off first and reports afterwards: the [`RfOffGuard`] is released
//! on the normal end, on cancel and on error, and acts from its `Drop` on a panic. An analysis
//! failure of one point is recorded with the point and does not stop the run (one unreadable
//! spectrum is noise); [`MAX_CONSECUTIVE_ANALYSIS_FAILURES`] in a row mean the light, the fibre or
//! the settings are gone, and stop it: the acquisition stops before its next point, the RF goes
//! off, and then the cause is recorded. An instrument or store error stops the run the same way.

use super::acquire;
use super::adaptive::{self, AdaptivePoint, AdaptiveSettings, AdaptiveStep};
use super::events::{ProgressEvent, ResponsePointEvent};
use super::plan::{FrequencyStep, Plan};
use super::rf_safety::BenchSafety;
use super::safety::{level_change_overran, RfOffGuard, SharedSource, SOURCE_STEP_LIMIT};
use crate::analysis::{self, chain::DriveChain, AnalysisOptions, DrivePoint};
use crate::store::{NewFrequencyResult, NewPoint, Store};
use halfwave_drivers::{AnalyzerSettings, InstrumentError, SpectrumAnalyzer};
use halfwave_units::{Db, Dbm, Hz, Trace, VoltsPeak};
use std::collections::HashSet;
use std::sync::Arc;
use std::time::Instant;
use tokio::sync::{broadcast, mpsc, oneshot, Mutex};
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;
use tracing::Instrument;

/// Points in a row that cannot be analysed before the run is stopped.
pub const MAX_CONSECUTIVE_ANALYSIS_FAILURES: usize = 3;

/// A shared analyzer handle.
pub type SharedAnalyzer = Arc<Mutex<Box<dyn SpectrumAnalyzer>>>;

/// How a run ended.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum RunOutcome {
    Completed,
    Cancelled,
    /// Stopped for good: a limit, an instrument's refusal, the analysis, the store.
    Failed(String),
    /// Stopped by a link or instrument liveness fault with the stored points intact: the run may
    /// be resumed once the link is back. RF was confirmed off.
    FailedResumable(String),
    /// The run stopped and the RF output could not be confirmed off: the run has flagged the
    /// bench and started the keeper (`engine::rf_safety`) before waiting for its pipeline.
    OutputUnconfirmed(String),
}

/// Everything one run needs.
pub struct RunContext {
    pub run_id: i64,
    pub plan: Arc<Plan>,
    pub chain: Arc<DriveChain>,
    pub source: SharedSource,
    pub analyzer: SharedAnalyzer,
    pub store: Store,
    pub events: broadcast::Sender<ProgressEvent>,
    pub cancel: CancellationToken,
    /// (frequency index, level index) pairs already committed (on resume).
    pub done: HashSet<(usize, usize)>,
    /// The bench's safety state: held by the run itself when its output cannot be confirmed off.
    pub safety: Arc<BenchSafety>,
}

/// A measured trace on its way to analysis and storage.
struct Measured {
    frequency_index: usize,
    level_index: usize,
    frequency: Hz,
    generator_level: Dbm,
    trace: Trace,
    reference: Option<Arc<Trace>>,
    acquired_in: std::time::Duration,
    /// Analyzer sweeps this point cost (see `NewPoint::analyzer_sweeps`).
    analyzer_sweeps: u32,
    /// For an adaptive frequency: where to send the point's modulation index and its
    /// uncertainty (or `None` when the trace could not be analysed) once it is committed.
    reply: Option<oneshot::Sender<Option<(f64, f64)>>>,
}

/// What the acquisition side hands to the pipeline, in order.
enum Msg {
    /// A measured point to analyse and commit.
    Point(Box<Measured>),
    /// Every level of this frequency has been measured: fit V_pi from the stored points.
    FrequencyDone {
        frequency_index: usize,
        frequency: Hz,
    },
}

/// Runs the plan to its end, cancel or first error. RF is off when this returns, or the returned
/// outcome says it could not be confirmed off.
pub async fn run(ctx: RunContext) -> RunOutcome {
    let span = tracing::info_span!("run", run_id = ctx.run_id);
    run_inner(ctx).instrument(span).await
}

async fn run_inner(ctx: RunContext) -> RunOutcome {
    let guard = RfOffGuard::arm(ctx.source.clone());
    let (tx, pipeline) = start_pipeline(&ctx);
    let result = tokio::select! {
        biased;
        _ = ctx.cancel.cancelled() => Err(Stop::Cancelled),
        r = sweep_all(&ctx, &tx) => r,
    };
    drop(tx);
    // RF off first. An output that cannot be confirmed off holds the bench and starts the keeper
    // now, before the wait for the analysis and the store below (a stalled database must not
    // delay either); the worker records the run afterwards.
    let off = guard.release().await;
    if let Err(e) = &off {
        ctx.safety
            .hold_output_unconfirmed(ctx.source.clone(), unconfirmed_cause(&result, e));
    }
    // Then the pipeline finishes what it has, so that no point lands after the run is recorded
    // as ended (a resume reads the stored points). When it ended early, its error is the run's
    // cause (the acquisition only saw it stop).
    let result = drain_pipeline(pipeline, result).await;
    match (result, off) {
        (Ok(()), Ok(())) => {
            publish_response(&ctx).await;
            RunOutcome::Completed
        }
        (Err(Stop::Cancelled), Ok(())) => RunOutcome::Cancelled,
        (Err(Stop::Failed(cause)), Ok(())) => RunOutcome::Failed(cause),
        (Err(Stop::LinkFault(cause)), Ok(())) => RunOutcome::FailedResumable(format!(
            "{cause}; the points so far are kept: resume the run once the instrument answers again"
        )),
        (Err(Stop::PipelineEnded), Ok(())) => {
            RunOutcome::Failed("the analysis task stopped early".into())
        }
        (r, Err(e)) => RunOutcome::OutputUnconfirmed(unconfirmed_cause(&r, &e)),
    }
}

/// The cause of a stop whose output could not be confirmed off: what stopped the run, then that.
fn unconfirmed_cause(result: &Result<(), Stop>, e: &InstrumentError) -> String {
    let before = match result {
        Ok(()) => String::new(),
        Err(Stop::Cancelled) => "after cancel: ".into(),
        Err(Stop::Failed(c)) | Err(Stop::LinkFault(c)) => format!("{c}; then "),
        Err(Stop::PipelineEnded) => "after the analysis stopped: ".into(),
    };
    super::worker::advice_once(format!(
        "{before}the RF output could not be confirmed off ({e}); the bench is held while the daemon keeps trying to switch it off"
    ))
}

/// The end of a completed run: the electro-optic response over every fitted frequency, logged
/// and published. A run without a single V_pi has no response; that is logged, not an error (the
/// per-frequency events already said why).
async fn publish_response(ctx: &RunContext) {
    let results = match ctx.store.frequency_results(ctx.run_id).await {
        Ok(results) => results,
        Err(e) => {
            tracing::warn!(error = %e, "could not read the V_pi results back for the response curve");
            return;
        }
    };
    let points: Vec<analysis::response::VpiAtFrequency> = results
        .iter()
        .map(|r| analysis::response::VpiAtFrequency {
            frequency: Hz(r.frequency_hz),
            v_pi: halfwave_units::VoltsPeak(r.v_pi_volts),
            uncertainty: halfwave_units::VoltsPeak(r.v_pi_uncertainty_volts),
        })
        .collect();
    let curve = match analysis::response::response_curve(&points) {
        Ok(curve) => curve,
        Err(e) => {
            tracing::warn!(error = %e, "no response curve for this run");
            return;
        }
    };
    tracing::info!(
        reference_frequency_hz = curve.reference_frequency_hz.0,
        f_3db_hz = curve.f_3db_hz.map(|f| f.0),
        f_6db_hz = curve.f_6db_hz.map(|f| f.0),
        "electro-optic response"
    );
    let _ = ctx.events.send(ProgressEvent::Response {
        run_id: ctx.run_id,
        reference_frequency_hz: curve.reference_frequency_hz.0,
        points: curve
            .points
            .iter()
            .map(|p| ResponsePointEvent {
                frequency_hz: p.frequency_hz.0,
                response_db: p.response_db,
                response_uncertainty_db: p.response_uncertainty_db,
            })
            .collect(),
        f_3db_hz: curve.f_3db_hz.map(|f| f.0),
        f_6db_hz: curve.f_6db_hz.map(|f| f.0),
    });
}

enum Stop {
    Cancelled,
    Failed(String),
    /// A link or liveness fault of an instrument (see [`InstrumentError::is_link_fault`]).
    LinkFault(String),
    /// The analysis-and-storage task ended early; its own error is the cause.
    PipelineEnded,
}

impl From<InstrumentError> for Stop {
    fn from(e: InstrumentError) -> Stop {
        if e.is_link_fault() {
            Stop::LinkFault(format!("instrument link fault: {e}"))
        } else {
            Stop::Failed(format!("instrument error: {e}"))
        }
    }
}

/// The analysis-and-storage task of a run and the channel that feeds it.
fn start_pipeline(ctx: &RunContext) -> (mpsc::Sender<Msg>, JoinHandle<Result<(), String>>) {
    let (tx, rx) = mpsc::channel::<Msg>(2);
    let task = tokio::spawn(pipeline(
        rx,
        ctx.run_id,
        ctx.store.clone(),
        ctx.chain.clone(),
        ctx.events.clone(),
        ctx.plan.point_count(),
        ctx.done.len(),
    ));
    (tx, task)
}

/// Waits for the pipeline (its channel closed) to finish what it has; when the acquisition saw it
/// stop, or ended normally, the pipeline's own error becomes the run's cause.
async fn drain_pipeline(
    pipeline: JoinHandle<Result<(), String>>,
    result: Result<(), Stop>,
) -> Result<(), Stop> {
    let pipeline_ended = matches!(result, Ok(()) | Err(Stop::PipelineEnded));
    match pipeline.await {
        Ok(Err(cause)) if pipeline_ended => Err(Stop::Failed(cause)),
        Err(join) if pipeline_ended => {
            Err(Stop::Failed(format!("the analysis task failed: {join}")))
        }
        _ => result,
    }
}

async fn sweep_all(ctx: &RunContext, tx: &mpsc::Sender<Msg>) -> Result<(), Stop> {
    let plan = &ctx.plan;
    let caps = ctx.analyzer.lock().await.capabilities();
    let mut carrier = plan.wavelength().to_frequency();

    let mut result = Ok(());
    // The V_pi the previous adaptive frequency ended with (a prior for the next).
    let mut previous_v_pi: Option<VoltsPeak> = None;
    // The device's stored calibrations, read once per run, give an adaptive plan its priors.
    let history = if plan.steps().iter().any(|s| s.adaptive.is_some()) {
        let serial = &plan.request().device.serial;
        match ctx.store.device_calibrations(serial).await {
            Ok(set) => Some(set),
            Err(e) => {
                tracing::warn!(serial = %serial, error = %e, "no stored V_pi to start adaptive levels from; starting low");
                None
            }
        }
    } else {
        None
    };
    'frequencies: for (fi, step) in plan.steps().iter().enumerate() {
        let span = tracing::info_span!("frequency", frequency_hz = step.frequency.0);
        let r = match step.adaptive {
            None => {
                let remaining: Vec<usize> = (0..step.generator_levels.len())
                    .filter(|li| !ctx.done.contains(&(fi, *li)))
                    .collect();
                if remaining.is_empty() {
                    continue;
                }
                measure_frequency(
                    ctx,
                    fi,
                    step,
                    Levels::Fixed(&remaining),
                    &caps,
                    &mut carrier,
                    tx,
                )
                .instrument(span)
                .await
            }
            Some(settings) => {
                let Some(seed) = adaptive_seed(ctx, fi).await? else {
                    continue;
                };
                // A frequency the history does not cover (no extrapolation) takes the previous
                // frequency's estimate.
                let prior = history
                    .as_ref()
                    .and_then(|set| set.vpi_at(step.frequency, None).ok())
                    .map(|stored| stored.v_pi_volts)
                    .or(previous_v_pi);
                let levels = Levels::Adaptive {
                    settings,
                    seed,
                    prior,
                    estimate: &mut previous_v_pi,
                };
                measure_frequency(ctx, fi, step, levels, &caps, &mut carrier, tx)
                    .instrument(span)
                    .await
            }
        };
        // RF off at the end of every frequency, whatever happened.
        let off = super::safety::switch_off(&ctx.source).await;
        if let Err(stop) = r {
            result = Err(stop);
            break 'frequencies;
        }
        if let Err(e) = off {
            result = Err(Stop::LinkFault(format!(
                "the RF output could not be confirmed off after {:.6} GHz: {e}",
                step.frequency.ghz()
            )));
            break 'frequencies;
        }
        if tx
            .send(Msg::FrequencyDone {
                frequency_index: fi,
                frequency: step.frequency,
            })
            .await
            .is_err()
        {
            result = Err(Stop::PipelineEnded);
            break 'frequencies;
        }
    }
    result
}

/// Which levels a frequency measures.
enum Levels<'a> {
    /// These indices of the step's levels, in order.
    Fixed(&'a [usize]),
    /// Chosen one by one (`engine::adaptive`), starting from the points already stored at this
    /// frequency (on resume); `estimate` receives the V_pi the frequency ended with.
    Adaptive {
        settings: AdaptiveSettings,
        seed: Vec<AdaptivePoint>,
        prior: Option<VoltsPeak>,
        estimate: &'a mut Option<VoltsPeak>,
    },
}

/// The points an adaptive frequency already has (on resume), or `None` when the frequency is
/// finished (it has points and a stored V_pi).
async fn adaptive_seed(ctx: &RunContext, fi: usize) -> Result<Option<Vec<AdaptivePoint>>, Stop> {
    if !ctx.done.iter().any(|(f, _)| *f == fi) {
        return Ok(Some(Vec::new()));
    }
    let read = |e: crate::store::StoreError| {
        Stop::Failed(format!(
            "could not read back the stored points to resume: {e}"
        ))
    };
    let results = ctx
        .store
        .frequency_results(ctx.run_id)
        .await
        .map_err(read)?;
    if results.iter().any(|r| r.frequency_index as usize == fi) {
        return Ok(None);
    }
    let points = ctx.store.points_of_run(ctx.run_id).await.map_err(read)?;
    Ok(Some(
        points
            .iter()
            .filter(|p| p.frequency_index as usize == fi)
            .map(|p| AdaptivePoint {
                rung: p.level_index as usize,
                v_peak: p.v_peak(),
                index: p.modulation_index.zip(p.modulation_index_uncertainty),
            })
            .collect(),
    ))
}

async fn measure_frequency(
    ctx: &RunContext,
    fi: usize,
    step: &FrequencyStep,
    levels: Levels<'_>,
    caps: &halfwave_drivers::AnalyzerCapabilities,
    carrier: &mut Hz,
    tx: &mpsc::Sender<Msg>,
) -> Result<(), Stop> {
    let plan = &ctx.plan;
    super::safety::switch_off(&ctx.source).await?;
    {
        let mut src = ctx.source.lock().await;
        src.set_frequency(step.frequency).await?;
    }
    let mut analyzer = ctx.analyzer.lock().await;
    // Find the laser with RF off, wherever it drifted.
    *carrier = acquire::locate_laser(analyzer.as_mut(), caps, *carrier, step.analyzer.span).await?;
    let settings = AnalyzerSettings {
        center: *carrier,
        span: step.analyzer.span,
        resolution_bandwidth: step.analyzer.resolution_bandwidth,
        points: step.analyzer.points,
    };
    analyzer.configure(&settings).await?;
    // The laser search's sweep, then the reference's, are charged to the next point committed.
    let mut pending_sweeps = 1;
    let reference = if plan.request().reference_trace {
        let r = acquire::measure(analyzer.as_mut(), plan.averages()).await?;
        pending_sweeps += plan.averages();
        if plan.request().carrier_tracking {
            *carrier = acquire::peak_frequency(&r);
        }
        ctx.store
            .store_reference_trace(ctx.run_id, fi as u32, step.frequency, &r)
            .await
            .map_err(|e| Stop::Failed(format!("could not store the reference trace: {e}")))?;
        Some(Arc::new(r))
    } else {
        None
    };
    drop(analyzer);

    let mut point = PointState {
        output_on: false,
        settings,
        carrier,
        pending_sweeps,
    };
    match levels {
        Levels::Fixed(remaining) => {
            for &li in remaining {
                let measured = point
                    .measure(ctx, caps, tx, fi, step, li, reference.clone())
                    .await?;
                point
                    .hand_over(ctx, tx, Msg::Point(Box::new(measured)))
                    .await?;
            }
        }
        Levels::Adaptive {
            settings,
            seed,
            prior,
            estimate,
        } => {
            let mut measured = seed;
            loop {
                let next = adaptive::next_step(
                    &step.generator_levels,
                    &ctx.chain,
                    step.frequency,
                    &measured,
                    prior,
                    &settings,
                );
                let rung = match next {
                    AdaptiveStep::Measure(rung) => rung,
                    AdaptiveStep::Stop(why) => {
                        tracing::info!(points = measured.len(), reason = %why, "adaptive levels done");
                        break;
                    }
                };
                let mut m = point
                    .measure(ctx, caps, tx, fi, step, rung, reference.clone())
                    .await?;
                let (reply, answer) = oneshot::channel();
                m.reply = Some(reply);
                let v_peak = ctx
                    .chain
                    .level_at_modulator(step.frequency, m.generator_level)
                    .to_volts_peak();
                point.hand_over(ctx, tx, Msg::Point(Box::new(m))).await?;
                let index = point
                    .wait_for_pipeline(ctx, answer)
                    .await?
                    .map_err(|_| Stop::PipelineEnded)?;
                measured.push(AdaptivePoint {
                    rung,
                    v_peak,
                    index,
                });
            }
            *estimate = adaptive::estimate_v_pi(&measured, None).or(*estimate);
        }
    }
    Ok(())
}

/// What carries over from one point of a frequency to the next.
struct PointState<'a> {
    output_on: bool,
    settings: AnalyzerSettings,
    carrier: &'a mut Hz,
    /// Sweeps not yet charged to a committed point (the laser search and the reference).
    pending_sweeps: u32,
}

/// How long the runner waits for the analysis and the store with the output on before it
/// switches the output off for the rest of the wait (they normally take milliseconds; a busy or
/// stalled database can take seconds). The next point switches it on again and settles.
pub const PIPELINE_WAIT_WITH_RF_ON: std::time::Duration = std::time::Duration::from_secs(1);

impl PointState<'_> {
    /// Hands a measured point to the analysis and the store. When they are behind, the output
    /// does not stay on while the runner waits: after [`PIPELINE_WAIT_WITH_RF_ON`] it is
    /// switched off (README, "RF on only while measuring").
    async fn hand_over(
        &mut self,
        ctx: &RunContext,
        tx: &mpsc::Sender<Msg>,
        msg: Msg,
    ) -> Result<(), Stop> {
        let permit = self
            .wait_for_pipeline(ctx, tx.reserve())
            .await?
            .map_err(|_| Stop::PipelineEnded)?;
        permit.send(msg);
        Ok(())
    }

    /// Waits for `pipeline` (room in its channel, or a point's answer) with the output on for
    /// at most [`PIPELINE_WAIT_WITH_RF_ON`], then switches the output off (and confirms it) for
    /// the rest of the wait.
    async fn wait_for_pipeline<T>(
        &mut self,
        ctx: &RunContext,
        pipeline: impl std::future::Future<Output = T>,
    ) -> Result<T, Stop> {
        let mut pipeline = std::pin::pin!(pipeline);
        if let Ok(done) = tokio::time::timeout(PIPELINE_WAIT_WITH_RF_ON, &mut pipeline).await {
            return Ok(done);
        }
        if self.output_on {
            tracing::info!(
                wait_s = PIPELINE_WAIT_WITH_RF_ON.as_secs_f64(),
                "the analysis and the store are behind; the RF output goes off while the run waits for them"
            );
            super::safety::switch_off(&ctx.source).await?;
            self.output_on = false;
        }
        Ok(pipeline.await)
    }
    /// One point: set the level, output on, settle, sweep (watched), fetch.
    #[allow(clippy::too_many_arguments)]
    async fn measure(
        &mut self,
        ctx: &RunContext,
        caps: &halfwave_drivers::AnalyzerCapabilities,
        tx: &mpsc::Sender<Msg>,
        fi: usize,
        step: &FrequencyStep,
        li: usize,
        reference: Option<Arc<Trace>>,
    ) -> Result<Measured, Stop> {
        let plan = &ctx.plan;
        if ctx.cancel.is_cancelled() {
            return Err(Stop::Cancelled);
        }
        if tx.is_closed() {
            // The analysis stopped the run: no further stimulus.
            return Err(Stop::PipelineEnded);
        }
        let level = step.generator_levels[li];
        let started = Instant::now();
        {
            let mut src = ctx.source.lock().await;
            let output_on = self.output_on;
            let drive = async {
                src.set_level(level).await?;
                if !output_on {
                    src.set_output(true).await?;
                }
                Ok::<(), InstrumentError>(())
            };
            // With the output (possibly) on, a source that stops answering must not keep the
            // run waiting for the transport's timeout: give up after the step limit and let the
            // stop path switch the output off on a fresh attempt.
            match tokio::time::timeout(SOURCE_STEP_LIMIT, drive).await {
                Ok(result) => result?,
                Err(_) => return Err(Stop::LinkFault(level_change_overran(src.resource()))),
            }
            self.output_on = true;
        }
        tokio::time::sleep(plan.settle().to_duration()).await;
        let mut analyzer = ctx.analyzer.lock().await;
        // Following a drifting laser moves the analyzer's centre with the output on: that
        // command is watched with the sweep, so a silent analyzer cannot hold RF on there either.
        let recentre = (plan.request().carrier_tracking
            && (self.settings.center.0 - self.carrier.0).abs() > 1e-3 * self.settings.span.0)
            .then_some(*self.carrier);
        let (trace, centre) =
            measure_with_rf_watchdog(ctx, analyzer.as_mut(), caps, recentre).await?;
        drop(analyzer);
        if let Some(centre) = centre {
            self.settings.center = centre;
        }
        if plan.request().carrier_tracking {
            // The strongest line may be a sideband, so track by the comb's centre of symmetry:
            // the power-weighted mean frequency of a symmetric comb is the carrier.
            if let Some(c) = comb_centroid(&trace) {
                *self.carrier = c;
            }
        }
        let analyzer_sweeps = std::mem::take(&mut self.pending_sweeps) + plan.averages();
        Ok(Measured {
            frequency_index: fi,
            level_index: li,
            frequency: step.frequency,
            generator_level: level,
            trace,
            reference,
            acquired_in: started.elapsed(),
            analyzer_sweeps,
            reply: None,
        })
    }
}

/// The least time a sweep with RF on may take before the output is switched off.
pub const MIN_SWEEP_OVERRUN_MARGIN: std::time::Duration = std::time::Duration::from_secs(5);

/// How long the analyzer may take for a point's sweeps (and their fetch) while the RF output is
/// on: twice the analyzer's typical sweep time for the averages asked for, and at least
/// [`MIN_SWEEP_OVERRUN_MARGIN`].
pub fn sweep_overrun_margin(
    caps: &halfwave_drivers::AnalyzerCapabilities,
    averages: u32,
) -> std::time::Duration {
    let expected_s = caps.typical_sweep_time.0.max(0.0) * f64::from(averages.max(1));
    let margin_s = (2.0 * expected_s).min(24.0 * 3600.0);
    MIN_SWEEP_OVERRUN_MARGIN.max(std::time::Duration::from_secs_f64(margin_s))
}

/// A point's sweep with the RF output on (after moving the centre to `recentre`, when given),
/// watched: when the analyzer overruns [`sweep_overrun_margin`] (hung, silent, or far slower than
/// it said), the output is switched off first, then the operation is abandoned and the run stops
/// with a resumable cause. A hung analyzer must not hold RF on the modulator. Returns the trace
/// and the centre's read-back when it was moved.
async fn measure_with_rf_watchdog(
    ctx: &RunContext,
    analyzer: &mut dyn SpectrumAnalyzer,
    caps: &halfwave_drivers::AnalyzerCapabilities,
    recentre: Option<Hz>,
) -> Result<(Trace, Option<Hz>), Stop> {
    let averages = ctx.plan.averages();
    let margin = sweep_overrun_margin(caps, averages);
    let measured = async {
        let centre = match recentre {
            Some(centre) => Some(analyzer.set_center(centre).await?),
            None => None,
        };
        let trace = acquire::measure(&mut *analyzer, averages).await?;
        Ok::<_, InstrumentError>((trace, centre))
    };
    if let Ok(result) = tokio::time::timeout(margin, measured).await {
        return result.map_err(Stop::from);
    }
    tracing::error!(
        margin_s = margin.as_secs_f64(),
        analyzer = analyzer.resource(),
        "the analyzer overran its sweep with RF on; switching the output off"
    );
    let task = if recentre.is_some() {
        "the move of its centre to the drifted laser and the sweep"
    } else {
        "the sweep"
    };
    let what = format!(
        "the analyzer did not finish {task} within {:.1} s (twice its typical sweep time, at least {} s)",
        margin.as_secs_f64(),
        MIN_SWEEP_OVERRUN_MARGIN.as_secs()
    );
    let cause = super::safety::switch_off_first(&ctx.source, what).await;
    analyzer.abandon_operation();
    Err(Stop::LinkFault(cause))
}

/// The +1/-1 asymmetry in dB, when both first-order lines were measured.
fn first_order_asymmetry(a: &analysis::TraceAnalysis) -> Option<Db> {
    a.asymmetry
        .iter()
        .find(|o| o.order == 1)
        .and_then(|o| o.asymmetry_db)
        .map(Db)
}

/// The power-weighted mean frequency of the points within 20 dB of the strongest one; for a
/// symmetric comb this is the carrier even when the carrier itself is nulled.
fn comb_centroid(trace: &Trace) -> Option<Hz> {
    let p = trace.power_dbm();
    let f = trace.frequency_hz();
    let max = p.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let (mut sw, mut swf) = (0.0, 0.0);
    for (pi, fi) in p.iter().zip(f) {
        if *pi > max - 20.0 {
            let w = 10f64.powf((pi - max) / 10.0);
            sw += w;
            swf += w * fi;
        }
    }
    (sw > 0.0).then(|| Hz(swf / sw))
}

/// A point's analysis, running or done, and the point it belongs to.
type AnalysisTask = tokio::task::JoinHandle<(
    Box<Measured>,
    Result<analysis::TraceAnalysis, analysis::AnalysisError>,
)>;

/// What the pipeline's analysis stage hands to its commit stage, in the order it received it.
enum Analysed {
    Point(AnalysisTask),
    FrequencyDone {
        frequency_index: usize,
        frequency: Hz,
    },
}

/// How many points the pipeline analyses at once (on blocking threads): two on a machine with two
/// cores or more, so that on the 2-core bench PC one point is analysed while the next is, and the
/// commit and the acquisition share the cores with them. Each holds its trace, which bounds the
/// memory a run adds.
fn parallel_analyses() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get().min(2))
}

/// The pipeline: the analysis stage starts each point's analysis on a blocking thread (up to
/// [`parallel_analyses`] at once) and hands it on in the acquisition's order; the commit stage
/// (this task) waits for each in that order and commits it (its trace compressed and written),
/// so a frequency's points are all committed before its V_pi is fitted. Ends when the
/// acquisition drops its sender, or with the first error (a point that could not be committed,
/// or [`MAX_CONSECUTIVE_ANALYSIS_FAILURES`] in a row).
async fn pipeline(
    rx: mpsc::Receiver<Msg>,
    run_id: i64,
    store: Store,
    chain: Arc<DriveChain>,
    events: broadcast::Sender<ProgressEvent>,
    total: usize,
    mut completed: usize,
) -> Result<(), String> {
    let (analysed_tx, mut analysed_rx) = mpsc::channel::<Analysed>(1);
    let analyser = tokio::spawn(analyse_in_order(rx, analysed_tx));
    let mut failures_in_a_row = 0;
    let mut logged = LoggedWarnings::default();
    while let Some(analysed) = analysed_rx.recv().await {
        match analysed {
            Analysed::Point(task) => {
                let (mut m, analysis) = task
                    .await
                    .map_err(|join| format!("the analysis of a point failed: {join}"))?;
                let reply = m.reply.take();
                let (failure, index) = commit_point(
                    &m,
                    analysis,
                    run_id,
                    &store,
                    &chain,
                    &events,
                    total,
                    &mut completed,
                    &mut logged,
                )
                .await?;
                if let Some(reply) = reply {
                    // The acquisition waits for this before choosing the next level; if it has
                    // stopped meanwhile there is no one to tell.
                    let _ = reply.send(index);
                }
                match failure {
                    None => failures_in_a_row = 0,
                    Some(reason) => {
                        failures_in_a_row += 1;
                        if failures_in_a_row >= MAX_CONSECUTIVE_ANALYSIS_FAILURES {
                            return Err(format!(
                                "{failures_in_a_row} points in a row could not be analysed, the last at {:.6} GHz, {:.2} ({reason}); check the laser, the fibre to the analyzer and the analyzer settings, then resubmit",
                                m.frequency.ghz(),
                                m.generator_level
                            ));
                        }
                    }
                }
            }
            Analysed::FrequencyDone {
                frequency_index,
                frequency,
            } => fit_frequency(run_id, frequency_index, frequency, &store, &events).await?,
        }
    }
    // The analysis stage ended on the acquisition's end (the commit stage has then committed
    // everything it started).
    analyser
        .await
        .map_err(|join| format!("the analysis task failed: {join}"))
}

/// The pipeline's analysis stage: starts each point's analysis on a blocking thread (a fit takes
/// milliseconds of CPU, too long to hold an async worker) once fewer than [`parallel_analyses`]
/// are running, and hands it to the commit stage in order. Ends when the acquisition drops its
/// sender or the commit stage stops.
async fn analyse_in_order(mut rx: mpsc::Receiver<Msg>, analysed: mpsc::Sender<Analysed>) {
    let running = Arc::new(tokio::sync::Semaphore::new(parallel_analyses()));
    while let Some(msg) = rx.recv().await {
        let next = match msg {
            Msg::Point(m) => {
                let Ok(permit) = running.clone().acquire_owned().await else {
                    break;
                };
                Analysed::Point(tokio::task::spawn_blocking(move || {
                    let analysis = analysis::analyze_trace(
                        &m.trace,
                        m.frequency,
                        m.reference.as_deref(),
                        &AnalysisOptions::default(),
                    );
                    drop(permit);
                    (m, analysis)
                }))
            }
            Msg::FrequencyDone {
                frequency_index,
                frequency,
            } => Analysed::FrequencyDone {
                frequency_index,
                frequency,
            },
        };
        if analysed.send(next).await.is_err() {
            // The commit stage stopped; its error is the run's cause.
            break;
        }
    }
}

/// The analysis warnings already written to the daemon's log in this run, as (frequency index,
/// code). A warning usually holds for every level of a frequency (a reference trace too coarse
/// for the measured line shape, say), and its advice is the same: the log says it once per
/// frequency, at warn level, and the later points' copies at debug level. Every point still
/// stores its own warnings and sends them with its progress event.
type LoggedWarnings = std::collections::HashSet<(usize, &'static str)>;

/// Commits one analysed point; returns why it could not be analysed, if it could not (the
/// point is stored either way), and its modulation index with its uncertainty, if it could.
#[allow(clippy::too_many_arguments)]
async fn commit_point(
    m: &Measured,
    analysis: Result<analysis::TraceAnalysis, analysis::AnalysisError>,
    run_id: i64,
    store: &Store,
    chain: &DriveChain,
    events: &broadcast::Sender<ProgressEvent>,
    total: usize,
    completed: &mut usize,
    logged: &mut LoggedWarnings,
) -> Result<(Option<String>, Option<(f64, f64)>), String> {
    let at_modulator = chain.level_at_modulator(m.frequency, m.generator_level);
    let v_peak = at_modulator.to_volts_peak();
    if let Err(e) = &analysis {
        tracing::warn!(
            frequency_hz = m.frequency.0,
            level_dbm = m.generator_level.0,
            error = %e,
            "point could not be analysed; stored without a modulation index"
        );
    }
    for warning in analysis.iter().flat_map(|a| &a.warnings) {
        if logged.insert((m.frequency_index, warning.code)) {
            tracing::warn!(
                frequency_hz = m.frequency.0,
                level_dbm = m.generator_level.0,
                code = warning.code,
                "{} (said once per frequency; each point keeps its own warnings)",
                warning.message
            );
        } else {
            tracing::debug!(
                frequency_hz = m.frequency.0,
                level_dbm = m.generator_level.0,
                code = warning.code,
                "{}",
                warning.message
            );
        }
    }
    let (line_table, details) = match &analysis {
        Ok(a) => (
            serde_json::to_value(&a.lines).unwrap_or_default(),
            serde_json::to_value(a).unwrap_or_default(),
        ),
        Err(e) => (
            serde_json::Value::Array(Vec::new()),
            serde_json::json!({ "error": e.to_string() }),
        ),
    };
    let ok = analysis.as_ref().ok();
    let point = NewPoint {
        run_id,
        frequency_index: m.frequency_index as u32,
        level_index: m.level_index as u32,
        frequency: m.frequency,
        generator_level: m.generator_level,
        level_at_modulator: at_modulator,
        v_peak,
        modulation_index: ok.map(|a| a.modulation_index.value),
        modulation_index_uncertainty: ok.map(|a| a.modulation_index.uncertainty),
        asymmetry: ok.and_then(first_order_asymmetry),
        line_table,
        analysis: details,
        trace: &m.trace,
        analyzer_sweeps: m.analyzer_sweeps,
    };
    store.commit_point(&point).await.map_err(|e| {
        format!(
            "could not commit the point at {:.6} GHz, {:.2}: {e}",
            m.frequency.ghz(),
            m.generator_level
        )
    })?;
    *completed += 1;
    tracing::debug!(
        acquired_ms = m.acquired_in.as_secs_f64() * 1e3,
        "point committed"
    );
    let _ = events.send(match &analysis {
        Ok(a) => ProgressEvent::Point {
            run_id,
            completed_points: *completed,
            total_points: total,
            frequency_hz: m.frequency.0,
            generator_level_dbm: m.generator_level.0,
            v_peak_volts: v_peak.0,
            modulation_index: a.modulation_index.value,
            modulation_index_uncertainty: a.modulation_index.uncertainty,
            warnings: a.warnings.iter().map(|w| w.code).collect(),
        },
        Err(e) => ProgressEvent::PointFailed {
            run_id,
            frequency_hz: m.frequency.0,
            generator_level_dbm: m.generator_level.0,
            reason: e.to_string(),
        },
    });
    let index = ok.map(|a| (a.modulation_index.value, a.modulation_index.uncertainty));
    Ok((analysis.err().map(|e| e.to_string()), index))
}

/// Fits V_pi for one frequency of the run from its stored points and stores the result. A fit
/// that cannot be made (no usable point) is reported, not fatal: the points stay for a look.
async fn fit_frequency(
    run_id: i64,
    frequency_index: usize,
    frequency: Hz,
    store: &Store,
    events: &broadcast::Sender<ProgressEvent>,
) -> Result<(), String> {
    let stored = store.points_of_run(run_id).await.map_err(|e| {
        format!(
            "could not read back the points at {:.6} GHz: {e}",
            frequency.ghz()
        )
    })?;
    let mut levels = Vec::new();
    let drive: Vec<DrivePoint> = stored
        .iter()
        .filter(|p| p.frequency_index as usize == frequency_index)
        .filter_map(|p| {
            let point = DrivePoint {
                v_peak: p.v_peak(),
                modulation_index: p.modulation_index?,
                uncertainty: p.modulation_index_uncertainty?,
            };
            levels.push((p.level_index, p.generator_level_dbm));
            Some(point)
        })
        .collect();
    let event = match analysis::fit_v_pi(&drive) {
        Ok(fit) => {
            store
                .save_frequency_result(&NewFrequencyResult {
                    run_id,
                    frequency_index: frequency_index as u32,
                    frequency,
                    v_pi: fit.v_pi,
                    v_pi_uncertainty: fit.v_pi_uncertainty,
                    excluded_points: serde_json::Value::Array(
                        fit.excluded
                            .iter()
                            .map(|e| {
                                let (level_index, level) =
                                    levels.get(e.index).copied().unwrap_or((0, f64::NAN));
                                serde_json::json!({
                                    "level_index": level_index,
                                    "generator_level_dbm": level,
                                    "reason": e.reason,
                                })
                            })
                            .collect(),
                    ),
                    fit: serde_json::to_value(&fit).unwrap_or_default(),
                })
                .await
                .map_err(|e| format!("could not store V_pi at {:.6} GHz: {e}", frequency.ghz()))?;
            tracing::info!(
                frequency_hz = frequency.0,
                v_pi_volts = fit.v_pi.0,
                "V_pi fitted"
            );
            ProgressEvent::Frequency {
                run_id,
                frequency_hz: frequency.0,
                v_pi_volts: Some(fit.v_pi.0),
                v_pi_uncertainty_volts: Some(fit.v_pi_uncertainty.0),
                note: None,
            }
        }
        Err(e) => {
            tracing::warn!(frequency_hz = frequency.0, error = %e, "V_pi could not be fitted");
            ProgressEvent::Frequency {
                run_id,
                frequency_hz: frequency.0,
                v_pi_volts: None,
                v_pi_uncertainty_volts: None,
                note: Some(format!("V_pi could not be fitted: {e}")),
            }
        }
    };
    let _ = events.send(event);
    Ok(())
}
