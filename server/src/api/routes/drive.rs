//! The drive planner over HTTP: which generator level gives a wanted modulation index on a
//! device at one frequency through a drive chain, or which index a given generator level gives.
//!
//! V_pi comes from the device's record by the lookup rule of `store/history.rs` (pinned run,
//! else the newest completed run covering the frequency, or `run_id`), interpolated in
//! frequency; outside the measured range the answer is refused unless `extrapolate=true`, and
//! then flagged. The chain is a stored calibration by name (newest version unless
//! `chain_version`) or a flat loss. The arithmetic is [`crate::analysis::drive_plan`]. A level
//! that would put more on the modulator than the device's RF input limit or the daemon's
//! `limits.max_level_at_modulator_dbm` is refused with the limit named: the planner never hands
//! out a level the engine would refuse to set.

use crate::analysis::budget::chain_uncertainty_at;
use crate::analysis::chain::{ChainPoint, DriveChain};
use crate::analysis::drive_plan::{solve_drive, DriveInputs, DriveTarget};
use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::routes::devices::{check_frequency, device_calibrations};
use crate::api::views::drive::{DriveAnswer, DriveChainUsed, DriveLimits, DriveVpi, SolvedFor};
use crate::api::AppState;
use crate::config::DEFAULT_MAX_LEVEL_AT_MODULATOR_DBM;
use crate::store::StoreError;
use axum::extract::State;
use axum::Json;
use halfwave_units::{Db, Dbm, Hz};
use serde::Deserialize;
use utoipa::IntoParams;

/// The largest modulation index the planner is asked for (as for spectrum prediction).
pub const MAX_PLANNED_INDEX: f64 = 50.0;
/// Generator levels accepted for the inverse question, dBm.
pub const GENERATOR_LEVEL_RANGE_DBM: (f64, f64) = (-200.0, 100.0);
/// A flat chain loss, dB, as a plan accepts it (negative: a net gain).
pub const FLAT_LOSS_RANGE_DB: (f64, f64) = (-60.0, 100.0);
/// The largest chain uncertainty accepted, dB.
pub const MAX_CHAIN_UNCERTAINTY_DB: f64 = 20.0;

/// The question: one of `modulation_index` / `generator_level_dbm`, one of `chain` /
/// `chain_loss_db`.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct DriveQuery {
    /// RF frequency, Hz (required).
    #[param(value_type = f64, required = true, exclusive_minimum = 0, maximum = 1e12)]
    pub frequency_hz: Option<f64>,
    /// The modulation index wanted (peak phase deviation, rad): the answer is the generator
    /// level. Give this or `generator_level_dbm`.
    #[param(exclusive_minimum = 0, maximum = 50)]
    pub modulation_index: Option<f64>,
    /// A generator level: the answer is the modulation index it gives. Give this or
    /// `modulation_index`.
    #[param(minimum = -200, maximum = 100)]
    pub generator_level_dbm: Option<f64>,
    /// A stored drive-chain calibration by name. Give this or `chain_loss_db`.
    #[param(min_length = 1, max_length = 200)]
    pub chain: Option<String>,
    /// The version of `chain`; default the newest.
    #[param(minimum = 1)]
    pub chain_version: Option<i64>,
    /// A frequency-independent loss from generator to modulator, dB (negative for a net gain).
    /// Give this or `chain`.
    #[param(minimum = -60, maximum = 100)]
    pub chain_loss_db: Option<f64>,
    /// Standard uncertainty of the chain's gain, dB (default: a stored calibration's own at the
    /// frequency, from its `gain_uncertainty_db` column as the V_pi budget takes it; 0 for a flat
    /// loss or a table that states none).
    #[param(minimum = 0, maximum = 20)]
    pub chain_uncertainty_db: Option<f64>,
    /// Take V_pi from this completed run of the device instead of by the lookup rule.
    pub run_id: Option<i64>,
    /// Extrapolate V_pi outside the measured range (the answer is flagged); default false.
    pub extrapolate: Option<bool>,
}

/// The checked question.
struct Question {
    frequency: Hz,
    target: DriveTarget,
    chain: ChainQuestion,
    /// The asker's, when given (else the stored calibration's own).
    chain_uncertainty: Option<Db>,
}

enum ChainQuestion {
    Stored { name: String, version: Option<i64> },
    FlatLoss(f64),
}

fn in_range(value: f64, (low, high): (f64, f64)) -> bool {
    value.is_finite() && value >= low && value <= high
}

/// Every problem with the query at once.
fn check_query(query: &DriveQuery) -> Result<Question, Problem> {
    let mut errors = Vec::new();
    let frequency = match check_frequency(query.frequency_hz) {
        Ok(f) => Some(Hz(f)),
        Err(problem) => {
            errors.extend(problem.errors);
            None
        }
    };
    let target = match (query.modulation_index, query.generator_level_dbm) {
        (Some(_), Some(_)) => {
            errors.push(FieldProblem::new(
                "generator_level_dbm",
                "give either modulation_index (to get the generator level) or generator_level_dbm (to get the modulation index), not both",
            ));
            None
        }
        (None, None) => {
            errors.push(FieldProblem::new(
                "modulation_index",
                "missing; give the modulation index wanted (e.g. modulation_index=1.2), or generator_level_dbm to get the index a level gives",
            ));
            None
        }
        (Some(beta), None) if !(beta.is_finite() && beta > 0.0 && beta <= MAX_PLANNED_INDEX) => {
            errors.push(FieldProblem::new(
                "modulation_index",
                format!(
                    "{beta} is not a modulation index above 0 and at most {MAX_PLANNED_INDEX} rad"
                ),
            ));
            None
        }
        (Some(beta), None) => Some(DriveTarget::ModulationIndex(beta)),
        (None, Some(level)) if !in_range(level, GENERATOR_LEVEL_RANGE_DBM) => {
            errors.push(FieldProblem::new(
                "generator_level_dbm",
                format!(
                    "{level} is not a generator level from {} to {} dBm",
                    GENERATOR_LEVEL_RANGE_DBM.0, GENERATOR_LEVEL_RANGE_DBM.1
                ),
            ));
            None
        }
        (None, Some(level)) => Some(DriveTarget::GeneratorLevel(Dbm(level))),
    };
    let chain = match (&query.chain, query.chain_loss_db) {
        (Some(_), Some(_)) => {
            errors.push(FieldProblem::new(
                "chain_loss_db",
                "give either chain (a stored calibration's name) or chain_loss_db (a flat loss), not both",
            ));
            None
        }
        (None, None) => {
            errors.push(FieldProblem::new(
                "chain",
                "missing; name a stored drive-chain calibration (chain=NAME) or give a flat loss (chain_loss_db=3)",
            ));
            None
        }
        (Some(name), None) if name.trim().is_empty() || name.chars().count() > 200 => {
            errors.push(FieldProblem::new(
                "chain",
                "a chain calibration's name has 1 to 200 characters, not only spaces",
            ));
            None
        }
        (Some(name), None) => Some(ChainQuestion::Stored {
            name: name.clone(),
            version: query.chain_version,
        }),
        (None, Some(loss)) if !in_range(loss, FLAT_LOSS_RANGE_DB) => {
            errors.push(FieldProblem::new(
                "chain_loss_db",
                format!(
                    "{loss} is not a loss from {} to {} dB",
                    FLAT_LOSS_RANGE_DB.0, FLAT_LOSS_RANGE_DB.1
                ),
            ));
            None
        }
        (None, Some(loss)) => Some(ChainQuestion::FlatLoss(loss)),
    };
    if query.chain_version.is_some() && query.chain.is_none() {
        errors.push(FieldProblem::new(
            "chain_version",
            "a version belongs to a stored calibration: give chain=NAME with it",
        ));
    }
    if query.chain_version.is_some_and(|v| v < 1) {
        errors.push(FieldProblem::new("chain_version", "versions start at 1"));
    }
    let chain_uncertainty = query.chain_uncertainty_db.unwrap_or(0.0);
    if !in_range(chain_uncertainty, (0.0, MAX_CHAIN_UNCERTAINTY_DB)) {
        errors.push(FieldProblem::new(
            "chain_uncertainty_db",
            format!("{chain_uncertainty} is not a standard uncertainty from 0 to {MAX_CHAIN_UNCERTAINTY_DB} dB"),
        ));
    }
    match (frequency, target, chain) {
        (Some(frequency), Some(target), Some(chain)) if errors.is_empty() => Ok(Question {
            frequency,
            target,
            chain,
            chain_uncertainty: query.chain_uncertainty_db.map(Db),
        }),
        _ => {
            let detail = errors
                .iter()
                .map(|e| format!("{}: {}", e.field, e.message))
                .collect::<Vec<_>>()
                .join("; ");
            Err(Problem::invalid(detail, errors))
        }
    }
}

/// The query parameter that carries `target`.
fn target_field(target: DriveTarget) -> &'static str {
    match target {
        DriveTarget::ModulationIndex(_) => "modulation_index",
        DriveTarget::GeneratorLevel(_) => "generator_level_dbm",
    }
}

/// The chain asked for, with what to report about it.
async fn resolve_chain(
    state: &AppState,
    question: &ChainQuestion,
    frequency: Hz,
) -> Result<(DriveChain, DriveChainUsed), Problem> {
    // The stored table's own standard uncertainty at the frequency, where it states one.
    let mut stated_uncertainty = None;
    let (chain, name, version, loss_db) = match question {
        ChainQuestion::FlatLoss(loss) => {
            (DriveChain::flat_loss(Db(*loss)), None, None, Some(*loss))
        }
        ChainQuestion::Stored { name, version } => {
            let store = state.store();
            let found = match version {
                Some(v) => store.chain_calibration_version(name, *v).await,
                None => store.latest_chain_calibration(name).await,
            };
            let calibration = found.map_err(|e| match e {
                StoreError::NotFound { .. } => Problem::invalid_field(
                    if version.is_some() { "chain_version" } else { "chain" },
                    format!(
                        "no chain calibration {name:?}{}; list them with `halfwave chain list` or GET /api/v1/chain-calibrations",
                        version.map(|v| format!(" version {v}")).unwrap_or_default()
                    ),
                ),
                other => Problem::from(other),
            })?;
            stated_uncertainty = chain_uncertainty_at(
                &calibration
                    .points
                    .iter()
                    .map(|p| (p.frequency(), p.gain_uncertainty_db.map(Db)))
                    .collect::<Vec<_>>(),
                frequency,
            );
            let points = calibration
                .points
                .iter()
                .map(|p| ChainPoint {
                    frequency: p.frequency(),
                    gain: p.gain(),
                })
                .collect();
            let chain = DriveChain::new(points).map_err(|e| {
                Problem::invalid_field("chain", format!("the stored calibration is unusable: {e}"))
            })?;
            (
                chain,
                Some(calibration.name),
                Some(calibration.version),
                None,
            )
        }
    };
    let points = chain.points();
    let outside_table = loss_db.is_none()
        && points.len() > 1
        && (frequency.0 < points[0].frequency.0
            || frequency.0 > points[points.len() - 1].frequency.0);
    let used = DriveChainUsed {
        name,
        version,
        loss_db,
        gain_db: chain.gain_at(frequency).0,
        gain_uncertainty_db: stated_uncertainty.map_or(0.0, |u| u.0),
        outside_table,
    };
    Ok((chain, used))
}

/// The generator level for a wanted modulation index on the device at one frequency through a
/// drive chain, or (with `generator_level_dbm` instead of `modulation_index`) the modulation
/// index a generator level gives; with V_pi and the run it came from, the uncertainty of the
/// level in dB, and the limits it was checked against. beta = pi V_peak / V_pi, V_peak into
/// 50 ohm. Outside the measured range of V_pi the answer is refused unless `extrapolate=true`
/// (then `v_pi.extrapolated` is true). A level over the device's RF input limit or the daemon's
/// limit at the modulator is refused (422, the limit named). The level is a suggestion: check it
/// against the modulator's rated RF input and your local practice before switching RF on.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/drive", tag = "planning", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number"), DriveQuery),
    responses((status = 200, body = DriveAnswer), (status = 401, body = Problem),
              (status = 404, description = "No such device or no completed calibration", body = Problem),
              (status = 422, description = "A parameter missing, doubled or out of range; the frequency outside the calibrated range (without extrapolate=true); no such chain calibration; run_id not a calibration of the device; or the level over the device's or the daemon's limit", body = Problem)))]
pub async fn plan_drive(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    ApiQuery(query): ApiQuery<DriveQuery>,
) -> Result<Json<DriveAnswer>, Problem> {
    let question = check_query(&query)?;
    let device = state.store().device_by_serial(&serial).await?;
    let calibrations = device_calibrations(&state, &serial).await?;
    let extrapolate = query.extrapolate.unwrap_or(false);
    let (vpi, extrapolated) = calibrations
        .set
        .vpi_for_drive(question.frequency, query.run_id, extrapolate)
        .map_err(|e| match e {
            StoreError::OutsideMeasuredRange { .. } | StoreError::NotCovered { .. } => {
                Problem::invalid_field(
                    "frequency_hz",
                    format!(
                        "{e}; or ask again with extrapolate=true (`halfwave drive --extrapolate`) for an extrapolated V_pi (flagged, with a wider uncertainty)"
                    ),
                )
            }
            other => Problem::from(other),
        })?;
    let (chain, mut chain_used) =
        resolve_chain(&state, &question.chain, question.frequency).await?;
    if let Some(given) = question.chain_uncertainty {
        chain_used.gain_uncertainty_db = given.0;
    }
    let inputs = DriveInputs {
        v_pi: vpi.v_pi_volts,
        v_pi_uncertainty: vpi.v_pi_uncertainty_volts,
        chain_gain: chain.gain_at(question.frequency),
        chain_gain_uncertainty: Db(chain_used.gain_uncertainty_db),
    };
    // The inputs are checked above and V_pi is positive, so what is left is an index too small
    // to give any power in floating point (below about 1e-150): the asker's field.
    let solution = solve_drive(&inputs, question.target).map_err(|e| {
        Problem::invalid_field(
            target_field(question.target),
            format!("the drive cannot be worked out: {e}"),
        )
    })?;
    let device_limit = device.rf_input_limit_dbm;
    let daemon_limit = state
        .engine()
        .map_or(DEFAULT_MAX_LEVEL_AT_MODULATOR_DBM, |engine| {
            engine.limits().max_level_at_modulator_dbm
        })
        .value();
    let limit = device_limit.min(daemon_limit);
    let at_modulator = solution.level_at_modulator.0;
    if at_modulator > limit {
        let which = if device_limit <= daemon_limit {
            format!("device {serial}'s RF input limit of {device_limit} dBm")
        } else {
            format!("the daemon's limit at the modulator (limits.max_level_at_modulator_dbm) of {daemon_limit} dBm")
        };
        return Err(Problem::invalid_field(
            target_field(question.target),
            format!(
                "beta {:.4} at {} needs {:.2} dBm at the modulator (generator {:.2} dBm through a chain gain of {:.2} dB), above {which}; ask for less",
                solution.modulation_index,
                question.frequency,
                at_modulator,
                solution.generator_level.0,
                inputs.chain_gain.0
            ),
        ));
    }
    Ok(Json(DriveAnswer {
        serial,
        frequency_hz: question.frequency.0,
        solved_for: match question.target {
            DriveTarget::ModulationIndex(_) => SolvedFor::GeneratorLevel,
            DriveTarget::GeneratorLevel(_) => SolvedFor::ModulationIndex,
        },
        modulation_index: solution.modulation_index,
        modulation_index_uncertainty: solution.modulation_index_uncertainty,
        generator_level_dbm: solution.generator_level.0,
        level_uncertainty_db: solution.level_uncertainty.0,
        level_at_modulator_dbm: at_modulator,
        v_peak_volts: solution.v_peak.0,
        chain: chain_used,
        v_pi: DriveVpi {
            run_id: vpi.run_id,
            pinned: vpi.pinned,
            selection: vpi.selection,
            v_pi_volts: vpi.v_pi_volts.0,
            v_pi_uncertainty_volts: vpi.v_pi_uncertainty_volts.0,
            lower_frequency_hz: vpi.lower_frequency_hz.0,
            upper_frequency_hz: vpi.upper_frequency_hz.0,
            interpolated: !extrapolated && vpi.lower_frequency_hz != vpi.upper_frequency_hz,
            extrapolated,
        },
        limits: DriveLimits {
            device_limit_dbm: device_limit,
            daemon_limit_dbm: daemon_limit,
            limit_at_modulator_dbm: limit,
            margin_db: limit - at_modulator,
            within_limits: true,
        },
    }))
}
