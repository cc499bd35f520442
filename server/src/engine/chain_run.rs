//! Chain calibration runs: the RF source drives through the drive chain into the bench's power
//! sensor at the request's frequencies and one or two levels; the gain (sensor reading less the
//! generator's read-back level) and its uncertainty (`analysis::sensor_chain`) are stored as a
//! new version of a named chain calibration.
//!
//! Such a run takes the bench's queue like a measurement run (the instruments are exclusive, a
//! bench held by a safety fault starts nothing) and has the same interlocks:
//! - before anything is sent, the request is proven within the limits: every frequency within
//!   the source's and the sensor's ranges, every level within the source's, and the highest level
//!   plus the largest gain the operator expects of the chain (`max_expected_gain_db`) within the
//!   sensor's measuring range and the daemon's ceiling at the modulator input (the sensor sits
//!   where the modulator's input is);
//! - while it runs, levels go from low to high and a level whose reading, moved up by the next
//!   step, would pass the sensor's range is not taken: the run stops with RF off;
//! - RF goes off at the end of every frequency and on every stop path: the end, cancel, an
//!   instrument's error, a panic (the [`RfOffGuard`] acts from `Drop`) and daemon shutdown. An
//!   output that cannot be confirmed off flags the bench (`rf_safety`) as a measurement run does.

use super::events::{ChainRunEnd, ProgressEvent};
use super::plan::{FieldError, PlanErrors};
use super::safety::{self, RfOffGuard, SharedSource};
use super::worker::{BenchSlot, Work};
use super::{lock, Engine, EngineError, SubmitError};
use crate::analysis::sensor_chain::{
    gain_from_readings, GainEstimate, SensorFigures, SensorReading,
};
use crate::store::ChainCalibrationPoint;
use halfwave_drivers::{InstrumentError, PowerSensor, SensorLimits, SourceLimits};
use halfwave_units::{Dbm, Hz};
use serde::{Deserialize, Serialize};
use std::sync::Arc;
use tokio::sync::Mutex;
use tokio_util::sync::CancellationToken;
use utoipa::ToSchema;

/// A power sensor shared by the bench's chain calibration runs.
pub type SharedSensor = Arc<Mutex<Box<dyn PowerSensor>>>;

/// Most frequencies in one chain calibration.
pub const MAX_FREQUENCIES: usize = 401;

/// A chain calibration as submitted.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChainCalibrationRequest {
    /// The bench whose source and sensor measure the chain.
    pub bench: String,
    /// The chain calibration's name; the result is stored as its next version. Not starting
    /// with `flat-loss-` (the names of the flat losses the engine stores itself).
    #[schema(min_length = 1, max_length = 200)]
    pub name: String,
    /// Frequencies in hertz, ascending, 1 to 401 of them.
    pub frequencies_hz: Vec<f64>,
    /// One or two generator levels in dBm (two show the sensor's and the chain's linearity).
    pub levels_dbm: Vec<f64>,
    /// Readings per frequency and level (2 to 100; default 5), for the repeatability.
    #[serde(default = "default_readings")]
    #[schema(minimum = 2, maximum = 100)]
    pub readings_per_level: u32,
    /// The largest gain the chain can have at any of the frequencies, dB (an amplifier's gain, or
    /// the least loss); the interlock adds it to the highest level.
    pub max_expected_gain_db: f64,
    /// |Gamma| of the chain's output (its worst case over the band, 0 to 0.99), for mismatch.
    pub source_reflection_coefficient: f64,
    /// The sensor's accuracy, +/- percent (0 to 50); default: the bench's
    /// `sensor_accuracy_percent`.
    #[serde(default)]
    pub sensor_accuracy_percent: Option<f64>,
    /// |Gamma| of the sensor (0 to 0.99); default: the bench's `sensor_reflection_coefficient`.
    #[serde(default)]
    pub sensor_reflection_coefficient: Option<f64>,
}

fn default_readings() -> u32 {
    5
}

/// What the request is proven against.
pub struct ChainContext {
    pub source: SourceLimits,
    pub sensor: SensorLimits,
    /// The daemon's ceiling at the modulator input.
    pub hard_limit: Dbm,
    /// The bench's stated sensor figures (accuracy %, |Gamma|), where given.
    pub bench_accuracy_percent: Option<f64>,
    pub bench_sensor_reflection: Option<f64>,
}

/// A proven chain calibration plan.
#[derive(Debug, Clone, PartialEq)]
pub struct ChainPlan {
    pub request: ChainCalibrationRequest,
    pub frequencies: Vec<Hz>,
    /// Ascending.
    pub levels: Vec<Dbm>,
    pub figures: SensorFigures,
}

impl ChainCalibrationRequest {
    /// Proves the request within every limit, or names every field to change.
    pub fn validate(&self, ctx: &ChainContext) -> Result<ChainPlan, PlanErrors> {
        let mut errors = Vec::new();
        let mut bad = |field: &str, message: String| {
            errors.push(FieldError {
                field: field.into(),
                message,
            })
        };
        if self.name.trim().is_empty() || self.name.len() > 200 {
            bad(
                "name",
                "give the chain a name of 1 to 200 characters, e.g. \"bench-2 amplifier A\"".into(),
            );
        } else if let Some(reason) = super::reserved_chain_name(&self.name) {
            bad("name", reason);
        }
        let f = &self.frequencies_hz;
        let (low_f, high_f) = (
            ctx.source.min_frequency.max_of(ctx.sensor.min_frequency),
            ctx.source.max_frequency.min_of(ctx.sensor.max_frequency),
        );
        if f.is_empty() || f.len() > MAX_FREQUENCIES {
            bad(
                "frequencies_hz",
                format!("give 1 to {MAX_FREQUENCIES} frequencies, got {}", f.len()),
            );
        } else if f.iter().any(|v| !v.is_finite()) || f.windows(2).any(|w| w[1] <= w[0]) {
            bad(
                "frequencies_hz",
                "frequencies must be finite and strictly ascending".into(),
            );
        } else if let Some(v) = f.iter().find(|v| **v < low_f.0 || **v > high_f.0) {
            bad(
                "frequencies_hz",
                format!(
                    "{} GHz is outside {} to {} GHz, where both the source and the sensor (its calibration factors) work",
                    v / 1e9,
                    low_f.0 / 1e9,
                    high_f.0 / 1e9
                ),
            );
        }
        let mut levels = self.levels_dbm.clone();
        levels.sort_by(f64::total_cmp);
        if levels.is_empty() || levels.len() > 2 {
            bad(
                "levels_dbm",
                format!("give one or two levels, got {}", levels.len()),
            );
        } else if levels.iter().any(|l| !l.is_finite())
            || levels.windows(2).any(|w| w[1] - w[0] < 0.01)
        {
            bad(
                "levels_dbm",
                "levels must be finite and at least 0.01 dB apart".into(),
            );
        } else if let Some(l) = levels
            .iter()
            .find(|l| **l < ctx.source.min_level.0 || **l > ctx.source.max_level.0)
        {
            bad(
                "levels_dbm",
                format!(
                    "{l} dBm is outside the source's {} to {}",
                    ctx.source.min_level, ctx.source.max_level
                ),
            );
        }
        if !(2..=100).contains(&self.readings_per_level) {
            bad(
                "readings_per_level",
                format!("must be 2 to 100, got {}", self.readings_per_level),
            );
        }
        let gain = self.max_expected_gain_db;
        if !(gain.is_finite() && (-100.0..=60.0).contains(&gain)) {
            bad(
                "max_expected_gain_db",
                format!("must be a gain in dB from -100 to 60, got {gain}"),
            );
        } else if let Some(highest) = levels.last().filter(|l| l.is_finite()) {
            let at_sensor = highest + gain;
            let ceiling = ctx.sensor.max_power.0.min(ctx.hard_limit.0);
            if at_sensor > ceiling {
                bad(
                    "levels_dbm",
                    format!(
                        "the highest level {highest} dBm plus the chain's largest expected gain {gain} dB puts {at_sensor} dBm on the sensor, above {ceiling} dBm (the lower of the sensor's range {} and the daemon's ceiling {}; the sensor is damaged at {}): lower the levels",
                        ctx.sensor.max_power, ctx.hard_limit, ctx.sensor.damage_level
                    ),
                );
            }
            if let Some(lowest) = levels.first() {
                if lowest + gain < ctx.sensor.min_power.0 - 40.0 {
                    bad(
                        "levels_dbm",
                        format!(
                            "{lowest} dBm through the chain is far under the sensor's range from {}: raise the levels",
                            ctx.sensor.min_power
                        ),
                    );
                }
            }
        }
        let source_reflection = self.source_reflection_coefficient;
        if !(source_reflection.is_finite() && (0.0..=0.99).contains(&source_reflection)) {
            bad(
                "source_reflection_coefficient",
                format!("must be |Gamma| from 0 to 0.99, got {source_reflection}"),
            );
        }
        let accuracy = self.sensor_accuracy_percent.or(ctx.bench_accuracy_percent);
        match accuracy {
            None => bad("sensor_accuracy_percent", format!("bench {:?} states no sensor_accuracy_percent; give the sensor's +/- accuracy in percent from its data sheet", self.bench)),
            Some(a) if !(a.is_finite() && (0.0..=50.0).contains(&a)) => bad("sensor_accuracy_percent", format!("must be 0 to 50 percent, got {a}")),
            Some(_) => {}
        }
        let reflection = self
            .sensor_reflection_coefficient
            .or(ctx.bench_sensor_reflection);
        match reflection {
            None => bad("sensor_reflection_coefficient", format!("bench {:?} states no sensor_reflection_coefficient; give the sensor's |Gamma| from its data sheet (VSWR s gives (s - 1) / (s + 1))", self.bench)),
            Some(r) if !(r.is_finite() && (0.0..=0.99).contains(&r)) => bad("sensor_reflection_coefficient", format!("must be |Gamma| from 0 to 0.99, got {r}")),
            Some(_) => {}
        }
        if !errors.is_empty() {
            return Err(PlanErrors { errors });
        }
        Ok(ChainPlan {
            request: self.clone(),
            frequencies: f.iter().copied().map(Hz).collect(),
            levels: levels.into_iter().map(Dbm).collect(),
            figures: SensorFigures {
                accuracy_percent: accuracy.unwrap_or_default(),
                sensor_reflection: reflection.unwrap_or_default(),
                source_reflection,
            },
        })
    }
}

trait Bound {
    fn max_of(self, other: Self) -> Self;
    fn min_of(self, other: Self) -> Self;
}

impl Bound for Hz {
    fn max_of(self, other: Hz) -> Hz {
        Hz(self.0.max(other.0))
    }
    fn min_of(self, other: Hz) -> Hz {
        Hz(self.0.min(other.0))
    }
}

/// The readings and the gain at one frequency, as stored in the run's result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct ChainFrequencyResult {
    pub frequency_hz: f64,
    pub gain_db: f64,
    /// Standard uncertainty of the gain (k = 1), stored with the chain point.
    pub gain_uncertainty_db: f64,
    pub repeatability_db: f64,
    pub sensor_specification_db: f64,
    pub mismatch_db: f64,
    pub mismatch_limit_high_db: f64,
    pub mismatch_limit_low_db: f64,
    pub reading_standard_deviation_db: f64,
    /// Every reading: the generator's read-back level and the sensor's reading, dBm.
    pub readings: Vec<[f64; 2]>,
}

/// A completed chain calibration's result document.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct ChainRunResult {
    pub sensor_accuracy_percent: f64,
    pub sensor_reflection_coefficient: f64,
    pub source_reflection_coefficient: f64,
    pub frequencies: Vec<ChainFrequencyResult>,
}

/// A job on the bench's queue.
pub(super) struct ChainJob {
    pub id: i64,
    pub plan: Arc<ChainPlan>,
    pub submitted_by: String,
}

/// Why a chain run stopped early.
enum Stop {
    Cancelled,
    Failed(String),
}

impl From<InstrumentError> for Stop {
    fn from(e: InstrumentError) -> Stop {
        Stop::Failed(e.to_string())
    }
}

impl Engine {
    /// Validates a chain calibration request against the bench's source, its sensor and the
    /// daemon's limits without queuing it.
    pub async fn check_chain_calibration(
        &self,
        request: &ChainCalibrationRequest,
    ) -> Result<ChainPlan, SubmitError> {
        let invalid = |field: &str, message: String| {
            SubmitError::Invalid(PlanErrors {
                errors: vec![FieldError {
                    field: field.into(),
                    message,
                }],
            })
        };
        let Some(slot) = self.inner.benches.get(&request.bench) else {
            let mut known: Vec<&str> = self.inner.benches.keys().map(String::as_str).collect();
            known.sort();
            return Err(invalid(
                "bench",
                format!(
                    "no bench named {:?}; configured benches: {}",
                    request.bench,
                    known.join(", ")
                ),
            ));
        };
        let Some(sensor) = &slot.sensor else {
            return Err(invalid(
                "bench",
                format!(
                    "bench {:?} has no power sensor; add `sensor = {{ kind = \"scpi\", resource = \"...\" }}` to its [[bench]] table",
                    request.bench
                ),
            ));
        };
        let figures = self.inner.sensor_figures.get(&request.bench);
        // One lock at a time, as where a measurement plan is proved.
        let source_limits = slot.source.lock().await.limits();
        let sensor_limits = sensor.lock().await.limits();
        let ctx = ChainContext {
            source: source_limits,
            sensor: sensor_limits,
            hard_limit: self.inner.limits.max_level_at_modulator_dbm,
            bench_accuracy_percent: figures.and_then(|f| f.0),
            bench_sensor_reflection: figures.and_then(|f| f.1),
        };
        Ok(request.validate(&ctx)?)
    }

    /// Validates and queues a chain calibration; returns the run's id.
    pub async fn submit_chain_calibration(
        &self,
        request: ChainCalibrationRequest,
        submitted_by: &str,
    ) -> Result<i64, SubmitError> {
        let plan = self.check_chain_calibration(&request).await?;
        let text = serde_json::to_string(&request).unwrap_or_else(|_| "{}".into());
        let id = self
            .inner
            .store
            .create_chain_run(request.name.trim(), &request.bench, &text, submitted_by)
            .await?;
        self.inner
            .store
            .append_audit(
                submitted_by,
                "chain_run.submit",
                &format!("chain_run:{id}"),
                &text,
            )
            .await?;
        tracing::info!(chain_run = id, bench = %request.bench, name = %request.name, "chain calibration queued");
        let slot = self.inner.benches.get(&request.bench).cloned();
        if let Some(slot) = slot {
            lock(&self.inner.chain_cancels).insert(id, CancellationToken::new());
            let _ = slot.jobs.send(Work::Chain(ChainJob {
                id,
                plan: Arc::new(plan),
                submitted_by: submitted_by.to_string(),
            }));
        }
        Ok(id)
    }

    /// Cancels a queued or running chain calibration; a running one stops with RF off.
    pub async fn cancel_chain_calibration(&self, id: i64, by: &str) -> Result<(), EngineError> {
        let run = self.inner.store.chain_run(id).await?;
        let token = lock(&self.inner.chain_cancels).get(&id).cloned();
        match token {
            Some(token) if run.state == "queued" || run.state == "running" => {
                self.inner
                    .store
                    .append_audit(by, "chain_run.cancel", &format!("chain_run:{id}"), "")
                    .await?;
                token.cancel();
                Ok(())
            }
            _ => Err(EngineError::NotCancellable {
                run_id: id,
                state: run.state,
            }),
        }
    }

    /// Runs one chain calibration on its bench (called by the bench's worker).
    pub(super) async fn run_chain_job(&self, slot: &Arc<BenchSlot>, job: ChainJob) {
        let store = &self.inner.store;
        let token = lock(&self.inner.chain_cancels)
            .get(&job.id)
            .cloned()
            .unwrap_or_default();
        let finish = |end: ChainRunEnd, cause: Option<String>, chain: Option<(i64, String)>| async move {
            let state = end.as_str();
            let (chain_id, result) = chain.unzip();
            if let Err(e) = store
                .finish_chain_run(job.id, state, cause.as_deref(), chain_id, result.as_deref())
                .await
            {
                tracing::error!(chain_run = job.id, error = %e, "could not record the end of the chain calibration");
            }
            lock(&self.inner.chain_cancels).remove(&job.id);
            tracing::info!(
                chain_run = job.id,
                state,
                cause = cause.as_deref().unwrap_or(""),
                "chain calibration ended"
            );
            let _ = self.inner.events.send(ProgressEvent::ChainFinished {
                chain_run_id: job.id,
                bench: slot.name.clone(),
                state: end,
                cause,
                chain_id,
            });
        };
        if token.is_cancelled() {
            return finish(
                ChainRunEnd::Cancelled,
                Some("cancelled before it started".into()),
                None,
            )
            .await;
        }
        let Some(sensor) = slot.sensor.clone() else {
            return finish(
                ChainRunEnd::Failed,
                Some("the bench has no power sensor".into()),
                None,
            )
            .await;
        };
        if let Err(e) = store.start_chain_run(job.id).await {
            return finish(
                ChainRunEnd::Failed,
                Some(format!("the store refused to start it: {e}")),
                None,
            )
            .await;
        }
        let source = slot.source.clone();
        let plan = job.plan.clone();
        let progress = ChainProgress {
            events: self.inner.events.clone(),
            chain_run_id: job.id,
            bench: slot.name.clone(),
        };
        let task = tokio::spawn(measure_chain(plan.clone(), source, sensor, token, progress));
        let outcome = match task.await {
            Ok(outcome) => outcome,
            Err(join) => match safety::switch_off(&slot.source).await {
                Ok(()) => ChainOutcome::Failed(format!("the calibration task failed: {join}")),
                Err(e) => ChainOutcome::OutputUnconfirmed(format!(
                    "the calibration task failed ({join}) and the RF output could not be confirmed off ({e})"
                )),
            },
        };
        match outcome {
            ChainOutcome::Completed(result) => {
                let points: Vec<ChainCalibrationPoint> = result
                    .frequencies
                    .iter()
                    .map(|r| {
                        ChainCalibrationPoint::new(
                            Hz(r.frequency_hz),
                            halfwave_units::Db(r.gain_db),
                        )
                        .with_uncertainty(halfwave_units::Db(r.gain_uncertainty_db))
                    })
                    .collect();
                match store
                    .create_chain_calibration(&plan.request.name, &job.submitted_by, &points)
                    .await
                {
                    Ok(chain) => {
                        let text = serde_json::to_string(&result).unwrap_or_default();
                        finish(ChainRunEnd::Completed, None, Some((chain.id, text))).await
                    }
                    Err(e) => {
                        finish(
                            ChainRunEnd::Failed,
                            Some(format!("the chain table could not be stored: {e}")),
                            None,
                        )
                        .await
                    }
                }
            }
            ChainOutcome::Cancelled if self.inner.shutdown.is_cancelled() => {
                finish(
                    ChainRunEnd::Failed,
                    Some("the daemon shut down; submit it again".into()),
                    None,
                )
                .await
            }
            ChainOutcome::Cancelled => {
                finish(ChainRunEnd::Cancelled, Some("cancelled".into()), None).await
            }
            ChainOutcome::Failed(cause) => finish(ChainRunEnd::Failed, Some(cause), None).await,
            ChainOutcome::OutputUnconfirmed(cause) => {
                slot.safety
                    .output_unconfirmed(slot.source.clone(), cause.clone())
                    .await;
                finish(ChainRunEnd::Failed, Some(cause), None).await
            }
        }
    }
}

/// How a chain calibration's measurement ended.
enum ChainOutcome {
    Completed(ChainRunResult),
    Cancelled,
    Failed(String),
    OutputUnconfirmed(String),
}

/// Measures every frequency; RF is off when this returns, or the outcome says it could not be
/// confirmed off.
async fn measure_chain(
    plan: Arc<ChainPlan>,
    source: SharedSource,
    sensor: SharedSensor,
    cancel: CancellationToken,
    progress: ChainProgress,
) -> ChainOutcome {
    let guard = RfOffGuard::arm(source.clone());
    let result = tokio::select! {
        biased;
        _ = cancel.cancelled() => Err(Stop::Cancelled),
        r = measure_all(&plan, &source, &sensor, &progress) => r,
    };
    let off = guard.release().await;
    match (result, off) {
        (Ok(r), Ok(())) => ChainOutcome::Completed(r),
        (Err(Stop::Cancelled), Ok(())) => ChainOutcome::Cancelled,
        (Err(Stop::Failed(cause)), Ok(())) => ChainOutcome::Failed(cause),
        (r, Err(e)) => {
            let before = match r {
                Ok(_) => String::new(),
                Err(Stop::Cancelled) => "after cancel: ".into(),
                Err(Stop::Failed(c)) => format!("{c}; then "),
            };
            ChainOutcome::OutputUnconfirmed(format!(
                "{before}the RF output could not be confirmed off ({e}); the bench is held while the daemon keeps trying to switch it off"
            ))
        }
    }
}

/// Where a chain calibration reports each measured frequency.
struct ChainProgress {
    events: tokio::sync::broadcast::Sender<ProgressEvent>,
    chain_run_id: i64,
    bench: String,
}

async fn measure_all(
    plan: &ChainPlan,
    source: &SharedSource,
    sensor: &SharedSensor,
    progress: &ChainProgress,
) -> Result<ChainRunResult, Stop> {
    let mut frequencies = Vec::with_capacity(plan.frequencies.len());
    let limits = sensor.lock().await.limits();
    for &frequency in &plan.frequencies {
        let readings = measure_frequency(plan, source, sensor, frequency, limits).await;
        // RF off at the end of every frequency, whatever happened, within the stop paths'
        // budget (a silent source is then the guard's and the keeper's). When the frequency
        // already failed, its cause is kept: the guard tries again and adds the switch-off's.
        let off = safety::switch_off(source).await;
        let readings = match (readings, off) {
            (readings, Ok(())) => readings?,
            (Err(stop), Err(_)) => return Err(stop),
            (Ok(_), Err(e)) => return Err(e.into()),
        };
        let estimate: GainEstimate = gain_from_readings(&readings, plan.figures)
            .map_err(|e| Stop::Failed(format!("at {frequency}: {e}")))?;
        let _ = progress.events.send(ProgressEvent::ChainFrequency {
            chain_run_id: progress.chain_run_id,
            bench: progress.bench.clone(),
            completed_frequencies: frequencies.len() + 1,
            total_frequencies: plan.frequencies.len(),
            frequency_hz: frequency.0,
            gain_db: estimate.gain_db,
            gain_uncertainty_db: estimate.standard_uncertainty_db,
        });
        frequencies.push(ChainFrequencyResult {
            frequency_hz: frequency.0,
            gain_db: estimate.gain_db,
            gain_uncertainty_db: estimate.standard_uncertainty_db,
            repeatability_db: estimate.repeatability_db,
            sensor_specification_db: estimate.sensor_specification_db,
            mismatch_db: estimate.mismatch_db,
            mismatch_limit_high_db: estimate.mismatch_limit_high_db,
            mismatch_limit_low_db: estimate.mismatch_limit_low_db,
            reading_standard_deviation_db: estimate.reading_standard_deviation_db,
            readings: readings
                .iter()
                .map(|r| [r.generator_level.0, r.reading.0])
                .collect(),
        });
    }
    Ok(ChainRunResult {
        sensor_accuracy_percent: plan.figures.accuracy_percent,
        sensor_reflection_coefficient: plan.figures.sensor_reflection,
        source_reflection_coefficient: plan.figures.source_reflection,
        frequencies,
    })
}

/// One sensor reading with the output on, watched: a sensor that takes longer than its
/// driver's wait for a reading ([`PowerSensor::reading_time_limit`], plus a second) has the
/// output switched off first, then the run fails naming it. Without the watch, the driver's
/// retry on a fresh connection held RF on for two to three times that.
async fn read_sensor_with_rf_on(
    source: &SharedSource,
    sensor: &SharedSensor,
    frequency: Hz,
) -> Result<Dbm, Stop> {
    let mut sensor = sensor.lock().await;
    let limit = sensor.reading_time_limit() + std::time::Duration::from_secs(1);
    if let Ok(reading) = tokio::time::timeout(limit, sensor.measure()).await {
        return Ok(reading?);
    }
    let what = format!(
        "at {frequency}: the power sensor {} gave no reading within {:.1} s with the RF output on",
        sensor.resource(),
        limit.as_secs_f64()
    );
    Err(Stop::Failed(safety::switch_off_first(source, what).await))
}

/// The readings at one frequency, levels low to high; RF may be on when this returns.
async fn measure_frequency(
    plan: &ChainPlan,
    source: &SharedSource,
    sensor: &SharedSensor,
    frequency: Hz,
    limits: SensorLimits,
) -> Result<Vec<SensorReading>, Stop> {
    {
        let mut src = source.lock().await;
        src.set_output(false).await?;
        src.set_frequency(frequency).await?;
    }
    sensor.lock().await.set_frequency(frequency).await?;
    let mut readings = Vec::new();
    for (index, &level) in plan.levels.iter().enumerate() {
        // With the output (possibly) on, a source that stops answering must not keep the run
        // waiting for the transport's timeouts and retries: as in a measurement run, the step is
        // given up after `SOURCE_STEP_LIMIT` and the stop path switches the output off.
        let step = async {
            let mut src = source.lock().await;
            let read_back = src.set_level(level).await?;
            src.set_output(true).await?;
            Ok::<_, InstrumentError>(read_back)
        };
        let generator_level = match tokio::time::timeout(safety::SOURCE_STEP_LIMIT, step).await {
            Ok(result) => result?,
            Err(_) => {
                let overran = safety::level_change_overran("the RF source");
                return Err(Stop::Failed(format!("at {frequency}: {overran}")));
            }
        };
        let mut highest = f64::NEG_INFINITY;
        for _ in 0..plan.request.readings_per_level {
            let reading = read_sensor_with_rf_on(source, sensor, frequency).await?;
            highest = highest.max(reading.0);
            readings.push(SensorReading {
                generator_level,
                reading,
            });
        }
        // The interlock during the run: the next level must stay within the sensor's range.
        if let Some(next) = plan.levels.get(index + 1) {
            let expected = highest + (next.0 - level.0);
            if expected > limits.max_power.0 {
                return Err(Stop::Failed(format!(
                    "at {frequency}: {level} gave {highest:.2} dBm on the sensor, so {next} would give about {expected:.2} dBm, above its range ({}); the chain has more gain than max_expected_gain_db allowed for: lower the levels",
                    limits.max_power
                )));
            }
        }
    }
    Ok(readings)
}
