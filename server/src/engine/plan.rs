//! Calibration plans: what the user asks for, and the proven plan the engine runs.
//!
//! Parse, don't validate: a [`PlanRequest`] is plain serde input with units in the field names;
//! [`PlanRequest::validate`] turns it into a [`Plan`] whose every frequency and level is already
//! known to be inside the source's ranges, the analyzer's capabilities, the device's RF input limit
//! and the daemon's hard limit (after the drive chain's gain). Every invalid field is reported at
//! once, each with its path (`frequencies.stop_hz`) and a sentence that says what to change, so a
//! remote user fixes a plan in one round trip. Nothing here talks to an instrument.

use super::adaptive::AdaptiveSettings;
use crate::analysis::chain::DriveChain;
use halfwave_drivers::{AnalyzerCapabilities, SourceLimits};
use halfwave_units::{Db, Dbm, Hz, Nanometers, Seconds};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// Most frequency points one plan may hold.
pub const MAX_FREQUENCIES: usize = 1000;
/// Most drive levels per frequency one plan may hold.
pub const MAX_LEVELS: usize = 200;
/// Longest settle time accepted between setting a level and sweeping.
pub const MAX_SETTLE_S: f64 = 600.0;
/// Most analyzer sweeps averaged per point.
pub const MAX_AVERAGES: u32 = 64;
/// Sideband orders the automatic span covers on each side of the carrier unless told otherwise.
pub const DEFAULT_EXPECTED_ORDERS: u32 = 6;
/// Points per trace unless told otherwise (the analyzer's maximum caps it).
pub const DEFAULT_TRACE_POINTS: usize = 10_001;
/// The automatic resolution bandwidth is at most this fraction of the modulation frequency
/// (lines are resolved when the spacing is several times the RBW; a tenth keeps the line shapes
/// apart with margin; common practice says at least about three).
pub const AUTO_RBW_FRACTION: f64 = 0.1;
/// The smallest spacing-to-RBW ratio accepted at all (about three, common practice).
pub const MIN_SPACING_TO_RBW: f64 = 3.0;
/// Fewest distinct drive levels per frequency: V_pi comes from the slope of beta against the
/// peak voltage over a level sweep, and one level gives no slope to check a point against.
pub const MIN_LEVELS_FOR_FIT: usize = 2;
/// Levels closer than this are one setting on a generator (0.01 dB is a common level resolution;
/// common practice), so they are not two usable levels and a ramp step must be at least this.
pub const MIN_LEVEL_SEPARATION_DB: f64 = 0.01;

/// The modulator being calibrated.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct DeviceSpec {
    /// Serial number; the key of its calibration history.
    pub serial: String,
    /// Free text: the type of device.
    #[serde(default)]
    pub model: String,
    /// The largest RF level the device may see at its input (datasheet value).
    #[schema(value_type = f64)]
    pub rf_input_limit_dbm: Dbm,
    /// Optical wavelength of the laser used (for the record).
    #[serde(default = "default_wavelength_nm")]
    pub wavelength_nm: f64,
}

fn default_wavelength_nm() -> f64 {
    1550.0
}

/// Drive frequencies of a plan.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum FrequencySpec {
    /// Explicit frequencies.
    List { values_hz: Vec<f64> },
    /// `count` frequencies evenly spaced from start to stop inclusive.
    Linear {
        start_hz: f64,
        stop_hz: f64,
        count: usize,
    },
    /// `count` frequencies evenly spaced in log(frequency) from start to stop inclusive.
    Logarithmic {
        start_hz: f64,
        stop_hz: f64,
        count: usize,
    },
}

/// Generator levels applied at every frequency (the engine always ramps from low to high).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum LevelSpec {
    /// Explicit generator levels.
    List {
        #[schema(value_type = Vec<f64>)]
        values_dbm: Vec<Dbm>,
    },
    /// From start to stop (inclusive when it lands on a step) in steps of step_db.
    Ramp {
        #[schema(value_type = f64)]
        start_dbm: Dbm,
        #[schema(value_type = f64)]
        stop_dbm: Dbm,
        #[schema(value_type = f64)]
        step_db: Db,
    },
    /// Levels chosen per frequency from what was measured there (`engine::adaptive`), upward
    /// only, on a ladder of [`ADAPTIVE_RUNG_DB`] rungs from min_dbm to max_dbm (the whole range
    /// is proven against every limit before any command), until u(V_pi)/V_pi is at most
    /// target_relative_uncertainty or max_points were measured.
    Adaptive {
        #[schema(value_type = f64)]
        min_dbm: Dbm,
        #[schema(value_type = f64)]
        max_dbm: Dbm,
        /// Stop a frequency when u(V_pi)/V_pi is at or below this (from 0.0011 to 0.5; V_pi's
        /// line-shape term, 0.001, does not average down, so lower targets cannot be met).
        #[schema(minimum = 0.0011, maximum = 0.5)]
        target_relative_uncertainty: f64,
        /// The most points at one frequency (3 to 40, default 6).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(minimum = 3, maximum = 40)]
        max_points: Option<usize>,
        /// The largest step up from one point's level to the next (0.25 to 20 dB, default 6).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        #[schema(value_type = Option<f64>, minimum = 0.25, maximum = 20.0)]
        max_step_db: Option<Db>,
    },
}

/// Rung spacing of an adaptive plan's level ladder.
pub const ADAPTIVE_RUNG_DB: f64 = 0.25;
/// The lowest target an adaptive plan accepts: just above V_pi's line-shape term
/// (`analysis::vpi::V_PI_LINE_SHAPE_RELATIVE`, 0.001), which more points do not reduce.
pub const ADAPTIVE_MIN_TARGET: f64 = 0.0011;
/// Default most points per frequency of an adaptive plan.
pub const ADAPTIVE_DEFAULT_MAX_POINTS: usize = 6;
/// Default largest step up of an adaptive plan.
pub const ADAPTIVE_DEFAULT_MAX_STEP_DB: f64 = 6.0;

/// Analyzer settings; anything left out is chosen from the modulation frequency.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct AnalyzerSpec {
    /// Fixed span; default: (2 * expected_orders + 2) times the modulation frequency.
    pub span_hz: Option<f64>,
    /// Fixed resolution bandwidth; default: the widest one offered that is at most a tenth of
    /// the modulation frequency.
    pub resolution_bandwidth_hz: Option<f64>,
    /// Points per trace; default 10,001 (capped by the analyzer).
    pub points: Option<usize>,
    /// Sideband orders to keep in view on each side; default 6.
    pub expected_orders: Option<u32>,
}

/// The drive chain calibration a plan uses.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum ChainSpec {
    /// A frequency-independent loss between generator and modulator.
    FlatLoss {
        #[schema(value_type = f64)]
        loss_db: Db,
    },
    /// A stored, versioned calibration (the engine resolves it before validation).
    Stored { name: String, version: Option<i64> },
}

/// A calibration plan as submitted: plain numbers with units in their names.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct PlanRequest {
    pub device: DeviceSpec,
    /// Which configured bench runs it.
    pub bench: String,
    pub chain: ChainSpec,
    pub frequencies: FrequencySpec,
    pub levels: LevelSpec,
    /// Wait after each level change before sweeping, 0 to 600 s (default 0.2).
    #[serde(default = "default_settle_s")]
    #[schema(minimum = 0, maximum = 600, default = 0.2)]
    pub settle_s: f64,
    /// Sweeps averaged per point (in linear power), 1 to 64 (default 1).
    #[serde(default = "default_averages")]
    #[schema(minimum = 1, maximum = 64, default = 1)]
    pub averages: u32,
    #[serde(default)]
    pub analyzer: AnalyzerSpec,
    /// Take an RF-off reference trace at each frequency (carrier position, unmodulated power).
    #[serde(default = "default_true")]
    pub reference_trace: bool,
    /// Re-centre the analyzer on the drifting laser at every point.
    #[serde(default = "default_true")]
    pub carrier_tracking: bool,
    /// Free-text note kept with the run.
    #[serde(default)]
    pub note: String,
}

fn default_settle_s() -> f64 {
    0.2
}
fn default_averages() -> u32 {
    1
}
fn default_true() -> bool {
    true
}

/// One invalid field: where, and what to change.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FieldError {
    /// Path of the field in the plan JSON, e.g. `levels.stop_dbm`.
    pub field: String,
    pub message: String,
}

/// Every reason a plan was refused.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, thiserror::Error)]
#[error("the plan is invalid: {}", summary(.errors))]
pub struct PlanErrors {
    pub errors: Vec<FieldError>,
}

fn summary(errors: &[FieldError]) -> String {
    errors
        .iter()
        .map(|e| format!("{}: {}", e.field, e.message))
        .collect::<Vec<_>>()
        .join("; ")
}

/// What a plan is checked against: the daemon's configuration and the bench's instruments.
#[derive(Debug, Clone)]
pub struct PlanContext<'a> {
    /// The daemon's hard ceiling at the modulator input; no plan can raise it.
    pub hard_limit_at_modulator: Dbm,
    pub source: SourceLimits,
    pub analyzer: &'a AnalyzerCapabilities,
    /// The drive chain resolved from the plan's [`ChainSpec`]; `None` when it could not be (the
    /// other fields are still checked, so that one answer names every mistake, but such a plan
    /// never validates).
    pub chain: Option<&'a DriveChain>,
}

/// Analyzer settings for one frequency, chosen or given.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct AnalyzerChoice {
    pub span: Hz,
    pub resolution_bandwidth: Hz,
    pub points: usize,
}

/// One drive frequency of a proven plan, with its levels ascending.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FrequencyStep {
    pub frequency: Hz,
    /// Generator levels, strictly ascending.
    pub generator_levels: Vec<Dbm>,
    pub analyzer: AnalyzerChoice,
    /// Set for an adaptive plan: `generator_levels` is then the ladder the engine picks from.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub adaptive: Option<AdaptiveSettings>,
}

/// A proven plan: every value inside every limit, and at least [`MIN_LEVELS_FOR_FIT`] distinct
/// levels at every frequency. Only [`PlanRequest::validate`] makes one, and its fields are
/// private so that nothing can change it after it was proven; read it through the accessors.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Plan {
    request: PlanRequest,
    steps: Vec<FrequencyStep>,
    settle: Seconds,
    averages: u32,
    wavelength: Nanometers,
    max_level_at_modulator: Dbm,
}

impl Plan {
    /// The request the plan was proven from.
    pub fn request(&self) -> &PlanRequest {
        &self.request
    }

    /// The frequencies in the order they are measured, each with its ascending levels.
    pub fn steps(&self) -> &[FrequencyStep] {
        &self.steps
    }

    /// Wait after each level change before sweeping.
    pub fn settle(&self) -> Seconds {
        self.settle
    }

    /// Sweeps averaged per point.
    pub fn averages(&self) -> u32 {
        self.averages
    }

    /// The laser's wavelength (where the engine starts looking for the comb).
    pub fn wavelength(&self) -> Nanometers {
        self.wavelength
    }

    /// The highest level the plan puts on the modulator (after the chain), for the record.
    pub fn max_level_at_modulator(&self) -> Dbm {
        self.max_level_at_modulator
    }

    /// Number of measured points (frequencies x levels); for an adaptive plan the most it can
    /// take (frequencies x max_points).
    pub fn point_count(&self) -> usize {
        self.steps
            .iter()
            .map(|s| match &s.adaptive {
                Some(a) => a.max_points.min(s.generator_levels.len()),
                None => s.generator_levels.len(),
            })
            .sum()
    }

    /// Whether the engine chooses the levels as it goes.
    pub fn is_adaptive(&self) -> bool {
        matches!(self.request.levels, LevelSpec::Adaptive { .. })
    }
}

struct Collector(Vec<FieldError>);

impl Collector {
    fn push(&mut self, field: impl Into<String>, message: impl Into<String>) {
        self.0.push(FieldError {
            field: field.into(),
            message: message.into(),
        });
    }
}

impl PlanRequest {
    /// Checks every field and builds the proven plan, or returns every problem found.
    pub fn validate(&self, ctx: &PlanContext<'_>) -> Result<Plan, PlanErrors> {
        let mut errs = Collector(Vec::new());

        self.check_device(&mut errs);
        if self.bench.trim().is_empty() {
            errs.push("bench", "name the bench that should run this plan");
        }
        if !self.settle_s.is_finite() || self.settle_s < 0.0 || self.settle_s > MAX_SETTLE_S {
            errs.push(
                "settle_s",
                format!(
                    "must be a number of seconds from 0 to {MAX_SETTLE_S}, got {}",
                    self.settle_s
                ),
            );
        }
        if self.averages == 0 || self.averages > MAX_AVERAGES {
            errs.push(
                "averages",
                format!("must be from 1 to {MAX_AVERAGES}, got {}", self.averages),
            );
        }

        let frequencies = expand_frequencies(&self.frequencies, &ctx.source, &mut errs);
        let levels = expand_levels(&self.levels, &ctx.source, &mut errs);
        let adaptive = adaptive_settings(&self.levels, &mut errs);

        // The safety interlock: the level reaching the modulator, after the chain's gain at each
        // frequency, must stay under both the device's limit and the daemon's hard limit.
        let device_limit = self.device.rf_input_limit_dbm;
        let ceiling = if device_limit.0 < ctx.hard_limit_at_modulator.0 {
            device_limit
        } else {
            ctx.hard_limit_at_modulator
        };
        let mut max_at_modulator = Dbm(f64::NEG_INFINITY);
        if ctx.chain.is_none() {
            errs.push(
                "chain",
                "no usable drive chain, so the levels at the modulator cannot be proven safe",
            );
        }
        if let (Some(freqs), Some(levels), Some(chain)) = (&frequencies, &levels, ctx.chain) {
            let mut worst: Option<(Hz, Dbm, Dbm)> = None;
            for &f in freqs {
                for &l in levels {
                    let at_mod = chain.level_at_modulator(f, l);
                    if at_mod.0 > max_at_modulator.0 {
                        max_at_modulator = at_mod;
                    }
                    if at_mod.0 > ceiling.0 && worst.is_none_or(|(_, _, w)| at_mod.0 > w.0) {
                        worst = Some((f, l, at_mod));
                    }
                }
            }
            if let Some((f, l, at_mod)) = worst {
                let which =
                    if ceiling == device_limit && device_limit.0 < ctx.hard_limit_at_modulator.0 {
                        format!("the device's RF input limit of {:.2}", device_limit)
                    } else {
                        format!(
                            "the daemon's hard limit of {:.2}",
                            ctx.hard_limit_at_modulator
                        )
                    };
                errs.push(
                    "levels",
                    format!(
                        "at {:.6} GHz a generator level of {:.2} reaches the modulator at {:.2} (chain gain {:.2}), above {which}; lower the levels",
                        f.ghz(),
                        l,
                        at_mod,
                        Db(at_mod.0 - l.0)
                    ),
                );
            }
        }

        let mut steps = Vec::new();
        if let Some(freqs) = &frequencies {
            for (i, &f) in freqs.iter().enumerate() {
                match choose_analyzer(&self.analyzer, f, ctx.analyzer) {
                    Ok(choice) => steps.push(FrequencyStep {
                        frequency: f,
                        generator_levels: levels.clone().unwrap_or_default(),
                        analyzer: choice,
                        adaptive,
                    }),
                    Err((field, message)) => {
                        errs.push(
                            field,
                            format!("at frequency {i} ({:.6} GHz): {message}", f.ghz()),
                        );
                        break;
                    }
                }
            }
        }

        if !errs.0.is_empty() {
            return Err(PlanErrors { errors: errs.0 });
        }
        Ok(Plan {
            request: self.clone(),
            steps,
            settle: Seconds(self.settle_s),
            averages: self.averages,
            wavelength: Nanometers(self.device.wavelength_nm),
            max_level_at_modulator: max_at_modulator,
        })
    }

    fn check_device(&self, errs: &mut Collector) {
        let d = &self.device;
        let serial = d.serial.trim();
        if serial.is_empty() || serial.len() > 64 {
            errs.push(
                "device.serial",
                "give the modulator's serial number (1 to 64 characters)",
            );
        } else if !serial
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./:#".contains(c))
        {
            errs.push(
                "device.serial",
                "use letters, digits and - _ . / : # only in a serial number",
            );
        }
        if !d.rf_input_limit_dbm.is_finite() || !(-30.0..=40.0).contains(&d.rf_input_limit_dbm.0) {
            errs.push(
                "device.rf_input_limit_dbm",
                format!(
                    "must be the datasheet's maximum RF input in dBm (-30 to 40), got {}",
                    d.rf_input_limit_dbm
                ),
            );
        }
        if !d.wavelength_nm.is_finite() || !(200.0..=5000.0).contains(&d.wavelength_nm) {
            errs.push(
                "device.wavelength_nm",
                format!(
                    "must be an optical wavelength in nm (200 to 5000), got {}",
                    d.wavelength_nm
                ),
            );
        }
    }
}

fn expand_frequencies(
    spec: &FrequencySpec,
    limits: &SourceLimits,
    errs: &mut Collector,
) -> Option<Vec<Hz>> {
    let in_range = |f: f64| f >= limits.min_frequency.0 && f <= limits.max_frequency.0;
    let range_text = format!(
        "the source's range {:.6} to {:.6} GHz",
        limits.min_frequency.ghz(),
        limits.max_frequency.ghz()
    );
    // What is wrong with a frequency: not one at all (whatever the source, also when the bench is
    // unknown and its range with it), or outside the source's range.
    let problem = |f: f64| -> Option<String> {
        if !f.is_finite() || f <= 0.0 {
            Some(format!(
                "{f} Hz is not a frequency; give a value above 0 Hz"
            ))
        } else if !in_range(f) {
            Some(format!("{f} Hz is outside {range_text}"))
        } else {
            None
        }
    };
    let values: Vec<f64> = match spec {
        FrequencySpec::List { values_hz } => {
            if values_hz.is_empty() {
                errs.push("frequencies.values_hz", "give at least one frequency");
                return None;
            }
            if values_hz.len() > MAX_FREQUENCIES {
                errs.push(
                    "frequencies.values_hz",
                    format!(
                        "at most {MAX_FREQUENCIES} frequencies per plan, got {}",
                        values_hz.len()
                    ),
                );
                return None;
            }
            let mut bad = false;
            for (i, f) in values_hz.iter().enumerate() {
                if let Some(message) = problem(*f) {
                    errs.push(format!("frequencies.values_hz[{i}]"), message);
                    bad = true;
                }
            }
            if bad {
                return None;
            }
            let mut v = values_hz.clone();
            v.sort_by(f64::total_cmp);
            v.dedup();
            v
        }
        FrequencySpec::Linear {
            start_hz,
            stop_hz,
            count,
        }
        | FrequencySpec::Logarithmic {
            start_hz,
            stop_hz,
            count,
        } => {
            let mut bad = false;
            for (name, f) in [("start_hz", start_hz), ("stop_hz", stop_hz)] {
                if let Some(message) = problem(*f) {
                    errs.push(format!("frequencies.{name}"), message);
                    bad = true;
                }
            }
            if *count == 0 || *count > MAX_FREQUENCIES {
                errs.push(
                    "frequencies.count",
                    format!("must be from 1 to {MAX_FREQUENCIES}, got {count}"),
                );
                bad = true;
            }
            if !bad && stop_hz < start_hz {
                errs.push("frequencies.stop_hz", "must not be below start_hz");
                bad = true;
            }
            if !bad && *count > 1 && stop_hz == start_hz {
                errs.push(
                    "frequencies.count",
                    "start_hz equals stop_hz, so count must be 1",
                );
                bad = true;
            }
            if bad {
                return None;
            }
            let n = *count;
            let log = matches!(spec, FrequencySpec::Logarithmic { .. });
            (0..n)
                .map(|i| {
                    let t = if n == 1 {
                        0.0
                    } else {
                        i as f64 / (n - 1) as f64
                    };
                    // The end points are the user's numbers exactly, not ln/exp round trips.
                    if i == 0 {
                        *start_hz
                    } else if i + 1 == n {
                        *stop_hz
                    } else if log {
                        (start_hz.ln() + t * (stop_hz.ln() - start_hz.ln())).exp()
                    } else {
                        start_hz + t * (stop_hz - start_hz)
                    }
                })
                .collect()
        }
    };
    // The spacing arithmetic cannot leave the range for inputs that passed the checks above;
    // this keeps that true if the arithmetic ever changes.
    if let Some((i, f)) = values
        .iter()
        .enumerate()
        .find(|(_, f)| !f.is_finite() || !in_range(**f))
    {
        errs.push(
            "frequencies",
            format!("frequency {i} came out as {f} Hz, outside {range_text}; give the frequencies as a list"),
        );
        return None;
    }
    Some(values.into_iter().map(Hz).collect())
}

/// The generator levels of every frequency, ascending, at least [`MIN_LEVELS_FOR_FIT`] of them
/// and each at least [`MIN_LEVEL_SEPARATION_DB`] from the next. Counts are computed with checked
/// arithmetic: a step so small that the count would not fit is refused, never wrapped.
fn expand_levels(
    spec: &LevelSpec,
    limits: &SourceLimits,
    errs: &mut Collector,
) -> Option<Vec<Dbm>> {
    let in_range = |l: f64| l >= limits.min_level.0 && l <= limits.max_level.0;
    let range_text = format!(
        "the source's range {:.2} to {:.2}",
        limits.min_level, limits.max_level
    );
    // Where to point the user when there are too few levels.
    let (few_field, few_hint) = match spec {
        LevelSpec::List { .. } => ("levels.values_dbm", "add levels"),
        LevelSpec::Ramp { .. } => (
            "levels.stop_dbm",
            "raise stop_dbm above start_dbm by at least one step",
        ),
        LevelSpec::Adaptive { .. } => ("levels.max_dbm", "raise max_dbm above min_dbm by a few dB"),
    };
    let values: Vec<f64> = match spec {
        LevelSpec::List { values_dbm } => {
            let values_dbm: Vec<f64> = values_dbm.iter().map(|l| l.0).collect();
            if values_dbm.is_empty() {
                errs.push(
                    "levels.values_dbm",
                    format!("give at least {MIN_LEVELS_FOR_FIT} levels (a V_pi fit needs a level sweep)"),
                );
                return None;
            }
            if values_dbm.len() > MAX_LEVELS {
                errs.push(
                    "levels.values_dbm",
                    format!(
                        "at most {MAX_LEVELS} levels per frequency, got {}",
                        values_dbm.len()
                    ),
                );
                return None;
            }
            let mut bad = false;
            for (i, l) in values_dbm.iter().enumerate() {
                if !l.is_finite() || !in_range(*l) {
                    errs.push(
                        format!("levels.values_dbm[{i}]"),
                        format!("{l} dBm is outside {range_text}"),
                    );
                    bad = true;
                }
            }
            if bad {
                return None;
            }
            // Levels always ramp from low to high, whatever order they were given in; a level
            // given twice is measured once.
            let mut v = values_dbm;
            v.sort_by(f64::total_cmp);
            v.dedup();
            if let Some(pair) = v
                .windows(2)
                .find(|pair| pair[1] - pair[0] < MIN_LEVEL_SEPARATION_DB)
            {
                errs.push(
                    "levels.values_dbm",
                    format!(
                        "{} dBm and {} dBm are less than {MIN_LEVEL_SEPARATION_DB} dB apart, which a generator sets alike; remove one or move them apart",
                        pair[0], pair[1]
                    ),
                );
                return None;
            }
            v
        }
        LevelSpec::Ramp {
            start_dbm,
            stop_dbm,
            step_db,
        } => {
            let (start_dbm, stop_dbm, step_db) = (&start_dbm.0, &stop_dbm.0, &step_db.0);
            let mut bad = false;
            for (name, l) in [("start_dbm", start_dbm), ("stop_dbm", stop_dbm)] {
                if !l.is_finite() || !in_range(*l) {
                    errs.push(
                        format!("levels.{name}"),
                        format!("{l} dBm is outside {range_text}"),
                    );
                    bad = true;
                }
            }
            if !step_db.is_finite() || *step_db < MIN_LEVEL_SEPARATION_DB {
                errs.push(
                    "levels.step_db",
                    format!(
                        "must be a step of at least {MIN_LEVEL_SEPARATION_DB} dB (finer steps are one setting on a generator), got {step_db}"
                    ),
                );
                bad = true;
            }
            if !bad && stop_dbm < start_dbm {
                errs.push(
                    "levels.stop_dbm",
                    "must not be below start_dbm (levels ramp from low to high)",
                );
                bad = true;
            }
            if bad {
                return None;
            }
            match ramp_level_count(*start_dbm, *stop_dbm, *step_db) {
                Some(count) => (0..count)
                    // Never past stop_dbm, even by a rounding error: stop_dbm was range-checked.
                    .map(|i| (start_dbm + i as f64 * step_db).min(*stop_dbm))
                    .collect(),
                None => {
                    errs.push(
                        "levels.step_db",
                        format!(
                            "a step of {step_db} dB from {start_dbm} to {stop_dbm} dBm gives more than {MAX_LEVELS} levels per frequency; use a larger step"
                        ),
                    );
                    return None;
                }
            }
        }
        LevelSpec::Adaptive {
            min_dbm, max_dbm, ..
        } => {
            let (min_dbm, max_dbm) = (&min_dbm.0, &max_dbm.0);
            let mut bad = false;
            for (name, l) in [("min_dbm", min_dbm), ("max_dbm", max_dbm)] {
                if !l.is_finite() || !in_range(*l) {
                    errs.push(
                        format!("levels.{name}"),
                        format!("{l} dBm is outside {range_text}"),
                    );
                    bad = true;
                }
            }
            if !bad && max_dbm <= min_dbm {
                errs.push(
                    "levels.max_dbm",
                    "must be above min_dbm (adaptive levels go from low to high)",
                );
                bad = true;
            }
            if bad {
                return None;
            }
            // Every rung, and max_dbm itself, is proven like a ramp's levels.
            match ramp_level_count(*min_dbm, *max_dbm, ADAPTIVE_RUNG_DB) {
                Some(count) => {
                    let mut v: Vec<f64> = (0..count)
                        .map(|i| (min_dbm + i as f64 * ADAPTIVE_RUNG_DB).min(*max_dbm))
                        .collect();
                    if v.last()
                        .is_some_and(|l| max_dbm - l >= MIN_LEVEL_SEPARATION_DB)
                    {
                        v.push(*max_dbm);
                    }
                    v
                }
                None => {
                    errs.push(
                        "levels.max_dbm",
                        format!(
                            "an adaptive range wider than {} dB has more than {MAX_LEVELS} rungs of {ADAPTIVE_RUNG_DB} dB; narrow it",
                            (MAX_LEVELS - 1) as f64 * ADAPTIVE_RUNG_DB
                        ),
                    );
                    return None;
                }
            }
        }
    };
    if values.len() < MIN_LEVELS_FOR_FIT {
        errs.push(
            few_field,
            format!(
                "gives {} distinct level(s) per frequency; a V_pi fit needs at least {MIN_LEVELS_FOR_FIT}; {few_hint}",
                values.len()
            ),
        );
        return None;
    }
    Some(values.into_iter().map(Dbm).collect())
}

/// The adaptive settings of an adaptive level form, with defaults filled in; `None` for the
/// other forms and for invalid settings (reported in `errs`).
fn adaptive_settings(spec: &LevelSpec, errs: &mut Collector) -> Option<AdaptiveSettings> {
    let LevelSpec::Adaptive {
        target_relative_uncertainty,
        max_points,
        max_step_db,
        ..
    } = spec
    else {
        return None;
    };
    let floor = crate::analysis::vpi::V_PI_LINE_SHAPE_RELATIVE;
    let target = *target_relative_uncertainty;
    let mut ok = true;
    if !(target.is_finite() && (ADAPTIVE_MIN_TARGET..=0.5).contains(&target)) {
        errs.push(
            "levels.target_relative_uncertainty",
            format!(
                "must be from {ADAPTIVE_MIN_TARGET} to 0.5, got {target}: V_pi's line-shape term ({floor}) does not average down over points, so a lower target cannot be met"
            ),
        );
        ok = false;
    }
    let max_points = max_points.unwrap_or(ADAPTIVE_DEFAULT_MAX_POINTS);
    if !(super::adaptive::MIN_ADAPTIVE_POINTS..=40).contains(&max_points) {
        errs.push(
            "levels.max_points",
            format!(
                "must be from {} to 40, got {max_points}",
                super::adaptive::MIN_ADAPTIVE_POINTS
            ),
        );
        ok = false;
    }
    let max_step_db = max_step_db.map_or(ADAPTIVE_DEFAULT_MAX_STEP_DB, |step| step.0);
    if !(max_step_db.is_finite() && (ADAPTIVE_RUNG_DB..=20.0).contains(&max_step_db)) {
        errs.push(
            "levels.max_step_db",
            format!("must be from {ADAPTIVE_RUNG_DB} to 20 dB, got {max_step_db}"),
        );
        ok = false;
    }
    ok.then_some(AdaptiveSettings {
        target_relative_uncertainty: target,
        max_points,
        max_step_db,
    })
}

/// Levels in a ramp from `start` to `stop` (inclusive when it lands on a step, within 1e-9 of a
/// step), or `None` when there would be more than [`MAX_LEVELS`]. The quotient is compared as a
/// float before any conversion, so no step, however small, can overflow the count.
fn ramp_level_count(start_dbm: f64, stop_dbm: f64, step_db: f64) -> Option<usize> {
    let steps = ((stop_dbm - start_dbm) / step_db + 1e-9).floor();
    if !steps.is_finite() || steps < 0.0 || steps >= MAX_LEVELS as f64 {
        return None;
    }
    // In range by the check above, so the conversion is exact.
    let count = (steps as usize).checked_add(1)?;
    (count <= MAX_LEVELS).then_some(count)
}

/// Picks span, resolution bandwidth and points for one modulation frequency.
fn choose_analyzer(
    spec: &AnalyzerSpec,
    modulation: Hz,
    caps: &AnalyzerCapabilities,
) -> Result<AnalyzerChoice, (&'static str, String)> {
    let orders = spec.expected_orders.unwrap_or(DEFAULT_EXPECTED_ORDERS);
    if orders == 0 || orders > 40 {
        return Err((
            "analyzer.expected_orders",
            format!("must be from 1 to 40, got {orders}"),
        ));
    }
    let points = spec
        .points
        .unwrap_or(DEFAULT_TRACE_POINTS.min(caps.max_points));
    if points < 101 || points > caps.max_points {
        return Err((
            "analyzer.points",
            format!(
                "must be from 101 to {} (the analyzer's maximum), got {points}",
                caps.max_points
            ),
        ));
    }
    let rbw = match spec.resolution_bandwidth_hz {
        Some(r) => {
            if !r.is_finite() || r <= 0.0 {
                return Err((
                    "analyzer.resolution_bandwidth_hz",
                    format!("must be a positive bandwidth in Hz, got {r}"),
                ));
            }
            Hz(r)
        }
        None => {
            let target = modulation.0 * AUTO_RBW_FRACTION;
            let widest_fit = caps
                .resolution_bandwidths
                .iter()
                .copied()
                .filter(|r| r.0 <= target)
                .fold(None::<Hz>, |best, r| match best {
                    Some(b) if b.0 >= r.0 => Some(b),
                    _ => Some(r),
                });
            match widest_fit.or_else(|| caps.resolution_bandwidths.first().copied()) {
                Some(r) => r,
                None => {
                    return Err((
                        "analyzer.resolution_bandwidth_hz",
                        "the analyzer lists no resolution bandwidths; give one".to_string(),
                    ))
                }
            }
        }
    };
    if modulation.0 < MIN_SPACING_TO_RBW * rbw.0 {
        return Err((
            "analyzer.resolution_bandwidth_hz",
            format!(
                "the line spacing {:.3} MHz is below {MIN_SPACING_TO_RBW} times the resolution bandwidth {:.3} MHz, so the sidebands cannot be resolved; raise the frequency or use a finer resolution",
                modulation.0 / 1e6,
                rbw.0 / 1e6
            ),
        ));
    }
    let span = match spec.span_hz {
        Some(s) => {
            if !s.is_finite() || s <= 0.0 {
                return Err((
                    "analyzer.span_hz",
                    format!("must be a positive span in Hz, got {s}"),
                ));
            }
            Hz(s)
        }
        None => Hz((2.0 * orders as f64 + 2.0) * modulation.0),
    };
    if span.0 < caps.min_span.0 || span.0 > caps.max_span.0 {
        return Err((
            "analyzer.span_hz",
            format!(
                "a span of {:.3} GHz is outside the analyzer's {:.3} to {:.3} GHz; {}",
                span.ghz(),
                caps.min_span.ghz(),
                caps.max_span.ghz(),
                if spec.span_hz.is_none() {
                    "lower analyzer.expected_orders or give span_hz"
                } else {
                    "change span_hz"
                }
            ),
        ));
    }
    if span.0 < 2.0 * modulation.0 {
        return Err((
            "analyzer.span_hz",
            "the span must show at least the carrier and both first sidebands (twice the modulation frequency)".to_string(),
        ));
    }
    // Each line needs a few points across its resolution width to be measured.
    let point_spacing = span.0 / (points - 1) as f64;
    if point_spacing > rbw.0 / 2.0 {
        return Err((
            "analyzer.points",
            format!(
                "{points} points over {:.3} GHz are {:.3} MHz apart, coarser than half the resolution bandwidth {:.3} MHz; use more points or a smaller span",
                span.ghz(),
                point_spacing / 1e6,
                rbw.0 / 1e6
            ),
        ));
    }
    Ok(AnalyzerChoice {
        span,
        resolution_bandwidth: rbw,
        points,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn caps() -> AnalyzerCapabilities {
        AnalyzerCapabilities {
            min_frequency: Hz(180e12),
            max_frequency: Hz(200e12),
            min_span: Hz(1e6),
            max_span: Hz(5e12),
            resolution_bandwidths: vec![
                Hz(1e6),
                Hz(5e6),
                Hz(10e6),
                Hz(20e6),
                Hz(50e6),
                Hz(100e6),
                Hz(200e6),
                Hz(500e6),
            ],
            max_points: 20_001,
            typical_sweep_time: Seconds(0.5),
        }
    }

    fn source() -> SourceLimits {
        SourceLimits {
            min_frequency: Hz(100e6),
            max_frequency: Hz(40e9),
            min_level: Dbm(-30.0),
            max_level: Dbm(25.0),
        }
    }

    fn dbm_list(levels: Vec<f64>) -> Vec<Dbm> {
        levels.into_iter().map(Dbm).collect()
    }

    fn request(levels: LevelSpec) -> PlanRequest {
        PlanRequest {
            device: DeviceSpec {
                serial: "TEST-PM-1".into(),
                model: "test modulator".into(),
                rf_input_limit_dbm: Dbm(24.0),
                wavelength_nm: 1550.0,
            },
            bench: "bench-1".into(),
            chain: ChainSpec::FlatLoss { loss_db: Db(3.0) },
            frequencies: FrequencySpec::Logarithmic {
                start_hz: 1e9,
                stop_hz: 20e9,
                count: 4,
            },
            levels,
            settle_s: 0.1,
            averages: 1,
            analyzer: AnalyzerSpec::default(),
            reference_trace: true,
            carrier_tracking: true,
            note: String::new(),
        }
    }

    fn validate(req: &PlanRequest, hard: f64) -> Result<Plan, PlanErrors> {
        let chain = DriveChain::flat_loss(Db(3.0));
        let caps = caps();
        req.validate(&PlanContext {
            hard_limit_at_modulator: Dbm(hard),
            source: source(),
            analyzer: &caps,
            chain: Some(&chain),
        })
    }

    #[test]
    fn a_frequency_that_is_not_one_is_named_as_such_and_one_out_of_range_with_the_range() {
        let mut req = request(LevelSpec::Ramp {
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(10.0),
            step_db: Db(5.0),
        });
        req.frequencies = FrequencySpec::List {
            values_hz: vec![-1.0, 0.0, f64::NAN, 50e9, 2e9],
        };
        let err = validate(&req, 30.0).unwrap_err();
        let message = |i: usize| {
            err.errors
                .iter()
                .find(|e| e.field == format!("frequencies.values_hz[{i}]"))
                .map(|e| e.message.clone())
                .unwrap_or_else(|| panic!("values_hz[{i}] not named: {err}"))
        };
        for i in 0..3 {
            assert!(message(i).contains("give a value above 0 Hz"), "{err}");
            assert!(!message(i).contains("range"), "{err}");
        }
        assert!(message(3).contains("outside the source's range"), "{err}");
        assert!(
            !err.errors.iter().any(|e| e.field.ends_with("[4]")),
            "{err}"
        );
    }

    #[test]
    fn level_over_device_limit_is_refused() {
        // 25 dBm from the generator minus a 3 dB chain loss is 22 dBm at the modulator, above a
        // device limit of 20 dBm (the daemon's hard limit of 30 dBm is not the binding one).
        let mut req = request(LevelSpec::Ramp {
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(25.0),
            step_db: Db(5.0),
        });
        req.device.rf_input_limit_dbm = Dbm(20.0);
        let err = validate(&req, 30.0).unwrap_err();
        assert_eq!(err.errors.len(), 1, "{err}");
        assert_eq!(err.errors[0].field, "levels");
        assert!(
            err.errors[0].message.contains("device's RF input limit"),
            "{err}"
        );
        assert!(err.errors[0].message.contains("22.00 dBm"), "{err}");
    }

    #[test]
    fn hard_limit_wins_over_a_higher_device_limit() {
        let req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![10.0, 20.0]),
        });
        // 20 dBm - 3 dB = 17 dBm at the modulator, above a hard limit of 15 dBm.
        let err = validate(&req, 15.0).unwrap_err();
        assert!(err.errors[0].message.contains("hard limit"), "{err}");
        assert!(validate(&req, 17.5).is_ok());
    }

    #[test]
    fn every_invalid_field_is_reported_at_once() {
        let mut req = request(LevelSpec::Ramp {
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(10.0),
            step_db: Db(0.0),
        });
        req.frequencies = FrequencySpec::Linear {
            start_hz: 1e9,
            stop_hz: 1e15,
            count: 5,
        };
        req.settle_s = -1.0;
        req.device.serial = String::new();
        let err = validate(&req, 24.0).unwrap_err();
        let fields: Vec<&str> = err.errors.iter().map(|e| e.field.as_str()).collect();
        for f in [
            "device.serial",
            "settle_s",
            "frequencies.stop_hz",
            "levels.step_db",
        ] {
            assert!(fields.contains(&f), "{f} missing from {fields:?}");
        }
    }

    #[test]
    fn levels_always_ramp_upwards() {
        let req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![10.0, -5.0, 3.0, 10.0]),
        });
        let plan = validate(&req, 24.0).unwrap();
        assert_eq!(
            plan.steps()[0].generator_levels,
            vec![Dbm(-5.0), Dbm(3.0), Dbm(10.0)]
        );
        assert_eq!(plan.point_count(), 4 * 3);
    }

    #[test]
    fn logarithmic_frequencies_are_geometric() {
        let mut req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![0.0, 3.0]),
        });
        req.frequencies = FrequencySpec::Logarithmic {
            start_hz: 0.2e9,
            stop_hz: 20e9,
            count: 3,
        };
        let plan = validate(&req, 24.0).unwrap();
        let f: Vec<f64> = plan.steps().iter().map(|s| s.frequency.0).collect();
        // Geometric mean of 0.2 and 20 GHz is 2 GHz.
        assert!((f[1] - 2e9).abs() < 1.0, "{f:?}");
        assert_eq!(f[0], 0.2e9);
        assert_eq!(f[2], 20e9);
    }

    #[test]
    fn automatic_analyzer_settings_resolve_the_lines() {
        let req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![0.0, 3.0]),
        });
        let plan = validate(&req, 24.0).unwrap();
        for step in plan.steps() {
            let a = step.analyzer;
            assert!(a.resolution_bandwidth.0 <= step.frequency.0 * AUTO_RBW_FRACTION);
            assert_eq!(
                a.span.0,
                (2.0 * DEFAULT_EXPECTED_ORDERS as f64 + 2.0) * step.frequency.0
            );
        }
        // 1 GHz spacing: widest RBW at most 100 MHz is 100 MHz.
        assert_eq!(plan.steps()[0].analyzer.resolution_bandwidth, Hz(100e6));
    }

    #[test]
    fn spacing_below_three_resolution_widths_is_refused() {
        let mut req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![0.0, 3.0]),
        });
        req.analyzer.resolution_bandwidth_hz = Some(500e6);
        let err = validate(&req, 24.0).unwrap_err();
        assert_eq!(err.errors[0].field, "analyzer.resolution_bandwidth_hz");
        assert!(
            err.errors[0].message.contains("cannot be resolved"),
            "{err}"
        );
    }

    #[test]
    fn unknown_fields_are_refused() {
        let json = r#"{"device":{"serial":"A","rf_input_limit_dbm":20,"colour":"red"},
            "bench":"b","chain":{"kind":"flat_loss","loss_db":1},
            "frequencies":{"kind":"list","values_hz":[1e9]},
            "levels":{"kind":"list","values_dbm":[0]}}"#;
        let err = serde_json::from_str::<PlanRequest>(json).unwrap_err();
        assert!(err.to_string().contains("colour"), "{err}");
    }

    /// The field names of a refused plan.
    fn refused_fields(req: &PlanRequest) -> Vec<String> {
        let err = validate(req, 24.0).expect_err("the plan must be refused");
        err.errors.into_iter().map(|e| e.field).collect()
    }

    #[test]
    fn a_vanishing_ramp_step_is_refused_not_wrapped_into_zero_levels() {
        // A step of 1e-18 dB over 25 dB is 2.5e19 steps, more than a 64-bit count holds: the old
        // `floor() as usize + 1` saturated and wrapped to 0 levels, and the run "completed" empty.
        for step_db in [1e-18, 6.5e-18, 1e-300, f64::MIN_POSITIVE, 5e-324] {
            let req = request(LevelSpec::Ramp {
                start_dbm: Dbm(-5.0),
                stop_dbm: Dbm(20.0),
                step_db: Db(step_db),
            });
            assert_eq!(
                refused_fields(&req),
                vec!["levels.step_db"],
                "step {step_db}"
            );
        }
    }

    #[test]
    fn a_ramp_with_more_levels_than_allowed_is_refused_by_count() {
        // 0.01 dB from -30 to 25 dBm is 5,501 levels: a real step, but too many.
        let req = request(LevelSpec::Ramp {
            start_dbm: Dbm(-30.0),
            stop_dbm: Dbm(25.0),
            step_db: Db(0.01),
        });
        let err = validate(&req, 30.0).unwrap_err();
        assert_eq!(err.errors.len(), 1, "{err}");
        assert_eq!(err.errors[0].field, "levels.step_db");
        assert!(
            err.errors[0].message.contains("more than 200 levels"),
            "{err}"
        );
    }

    fn adaptive(min_dbm: f64, max_dbm: f64, target: f64) -> LevelSpec {
        LevelSpec::Adaptive {
            min_dbm: Dbm(min_dbm),
            max_dbm: Dbm(max_dbm),
            target_relative_uncertainty: target,
            max_points: None,
            max_step_db: None,
        }
    }

    #[test]
    fn an_adaptive_range_is_proven_rung_by_rung_like_a_ramp() {
        // 20 dBm device limit, 3 dB chain loss: a top of 23.3 dBm reaches the modulator at
        // 20.3 dBm, above the limit, and is refused before any command although the engine
        // might never have gone that high.
        let mut req = request(adaptive(0.0, 23.3, 0.003));
        req.device.rf_input_limit_dbm = Dbm(20.0);
        let err = validate(&req, 30.0).unwrap_err();
        assert!(
            err.errors.iter().any(|e| e.field == "levels"
                && e.message.contains("20.30 dBm")
                && e.message.contains("device's RF input limit")),
            "{err:?}"
        );
        let plan = validate(&request(adaptive(0.0, 20.1, 0.003)), 30.0).unwrap();
        let step = &plan.steps()[0];
        let ladder = &step.generator_levels;
        // 0 to 20 dBm in 0.25 dB rungs (81), then 20.1 dBm itself: the top is a rung too.
        assert_eq!(ladder.len(), 82);
        assert_eq!(ladder.last(), Some(&Dbm(20.1)));
        assert!(ladder.windows(2).all(|w| w[1].0 > w[0].0));
        let settings = step.adaptive.expect("adaptive settings");
        assert_eq!(settings.max_points, ADAPTIVE_DEFAULT_MAX_POINTS);
        assert_eq!(settings.max_step_db, ADAPTIVE_DEFAULT_MAX_STEP_DB);
        assert!(plan.is_adaptive());
        // The progress total is the most points it can take.
        assert_eq!(plan.point_count(), 4 * ADAPTIVE_DEFAULT_MAX_POINTS);
    }

    #[test]
    fn adaptive_settings_outside_their_ranges_are_refused_by_name() {
        let err = validate(&request(adaptive(0.0, 20.0, 0.0005)), 30.0).unwrap_err();
        assert!(
            err.errors
                .iter()
                .any(|e| e.field == "levels.target_relative_uncertainty"
                    && e.message.contains("line-shape term")),
            "{err:?}"
        );
        let req = request(LevelSpec::Adaptive {
            min_dbm: Dbm(0.0),
            max_dbm: Dbm(20.0),
            target_relative_uncertainty: 0.003,
            max_points: Some(2),
            max_step_db: Some(Db(0.1)),
        });
        let err = validate(&req, 30.0).unwrap_err();
        let fields: Vec<&str> = err.errors.iter().map(|e| e.field.as_str()).collect();
        assert!(fields.contains(&"levels.max_points"), "{fields:?}");
        assert!(fields.contains(&"levels.max_step_db"), "{fields:?}");
        let err = validate(&request(adaptive(10.0, 10.0, 0.003)), 30.0).unwrap_err();
        assert!(
            err.errors.iter().any(|e| e.field == "levels.max_dbm"),
            "{err:?}"
        );
        // The lowest target accepted is accepted exactly (the schema's minimum).
        assert!(validate(&request(adaptive(0.0, 20.0, ADAPTIVE_MIN_TARGET)), 30.0).is_ok());
        // max_points: at most 40 (README, "Adaptive levels"), 40 itself accepted.
        let with_points = |max_points| {
            request(LevelSpec::Adaptive {
                min_dbm: Dbm(0.0),
                max_dbm: Dbm(20.0),
                target_relative_uncertainty: 0.003,
                max_points: Some(max_points),
                max_step_db: None,
            })
        };
        let err = validate(&with_points(41), 30.0).unwrap_err();
        assert!(
            err.errors
                .iter()
                .any(|e| e.field == "levels.max_points" && e.message.contains("to 40, got 41")),
            "{err:?}"
        );
        assert_eq!(
            validate(&with_points(40), 30.0).unwrap().point_count(),
            4 * 40
        );
    }

    #[test]
    fn the_adaptive_form_reads_with_the_names_of_the_plan_format() {
        let req: LevelSpec = serde_json::from_str(
            r#"{"kind": "adaptive", "min_dbm": -5, "max_dbm": 18, "target_relative_uncertainty": 0.003}"#,
        )
        .unwrap();
        assert_eq!(req, adaptive(-5.0, 18.0, 0.003));
    }

    #[test]
    fn ramp_count_never_overflows() {
        assert_eq!(ramp_level_count(3.0, 3.0, 1.0), Some(1));
        assert_eq!(ramp_level_count(0.0, 20.0, 2.5), Some(9));
        assert_eq!(ramp_level_count(0.0, 199.0, 1.0), Some(MAX_LEVELS));
        assert_eq!(ramp_level_count(0.0, 200.0, 1.0), None);
        assert_eq!(ramp_level_count(-5.0, 20.0, 1e-18), None);
        assert_eq!(ramp_level_count(-f64::MAX, f64::MAX, 1.0), None);
        assert_eq!(ramp_level_count(0.0, 1.0, 0.0), None);
        assert_eq!(ramp_level_count(1.0, 0.0, 1.0), None);
    }

    #[test]
    fn a_single_level_is_refused_naming_the_field() {
        // [3, 3] is one level given twice; [3] is one level: neither gives a V_pi fit.
        for values_dbm in [vec![3.0, 3.0], vec![3.0]] {
            let req = request(LevelSpec::List {
                values_dbm: dbm_list(values_dbm.clone()),
            });
            let err = validate(&req, 24.0).unwrap_err();
            assert_eq!(err.errors.len(), 1, "{values_dbm:?}: {err}");
            assert_eq!(err.errors[0].field, "levels.values_dbm");
            assert!(err.errors[0].message.contains("at least 2"), "{err}");
        }
        // A ramp that starts and stops at the same level is one level too.
        let req = request(LevelSpec::Ramp {
            start_dbm: Dbm(3.0),
            stop_dbm: Dbm(3.0),
            step_db: Db(1.0),
        });
        assert_eq!(refused_fields(&req), vec!["levels.stop_dbm"]);
        // So is a ramp whose stop is less than one step above its start.
        let req = request(LevelSpec::Ramp {
            start_dbm: Dbm(3.0),
            stop_dbm: Dbm(3.5),
            step_db: Db(1.0),
        });
        assert_eq!(refused_fields(&req), vec!["levels.stop_dbm"]);
        // An empty list is refused as well.
        let req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![]),
        });
        assert_eq!(refused_fields(&req), vec!["levels.values_dbm"]);
    }

    #[test]
    fn levels_closer_than_a_generator_resolves_are_refused() {
        let req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![3.0, 3.001, 6.0]),
        });
        let err = validate(&req, 24.0).unwrap_err();
        assert_eq!(err.errors[0].field, "levels.values_dbm");
        assert!(err.errors[0].message.contains("apart"), "{err}");
        let req = request(LevelSpec::Ramp {
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(1.0),
            step_db: Db(0.001),
        });
        assert_eq!(refused_fields(&req), vec!["levels.step_db"]);
    }

    #[test]
    fn a_ramp_never_passes_its_stop_level() {
        // 0.3 / 0.1 is 2.9999999999999996 in binary floating point and 3 x 0.1 is
        // 0.30000000000000004: the last level must still be the stop level, not above it.
        let req = request(LevelSpec::Ramp {
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(0.3),
            step_db: Db(0.1),
        });
        let plan = validate(&req, 24.0).unwrap();
        let levels = &plan.steps()[0].generator_levels;
        assert_eq!(levels.len(), 4, "{levels:?}");
        assert_eq!(levels.last(), Some(&Dbm(0.3)));
        assert!(levels.windows(2).all(|w| w[0].0 < w[1].0), "{levels:?}");
    }

    #[test]
    fn every_frequency_of_a_proven_plan_has_enough_levels_for_a_fit() {
        let req = request(LevelSpec::Ramp {
            start_dbm: Dbm(0.0),
            stop_dbm: Dbm(10.0),
            step_db: Db(5.0),
        });
        let plan = validate(&req, 24.0).unwrap();
        assert_eq!(plan.steps().len(), 4);
        for step in plan.steps() {
            assert!(
                step.generator_levels.len() >= MIN_LEVELS_FOR_FIT,
                "{step:?}"
            );
        }
        assert_eq!(plan.point_count(), 4 * 3);
    }

    #[test]
    fn an_oversized_frequency_list_is_refused_before_it_is_sorted() {
        let mut req = request(LevelSpec::List {
            values_dbm: dbm_list(vec![0.0, 3.0]),
        });
        req.frequencies = FrequencySpec::List {
            values_hz: vec![1e9; MAX_FREQUENCIES + 1],
        };
        assert_eq!(refused_fields(&req), vec!["frequencies.values_hz"]);
    }
}
