//! The typed rows the store reads and the inputs it writes.
//!
//! Rows read from the database keep plain numbers with the unit in the field name
//! (`frequency_hz: f64`), because that is what the columns hold and what the API serializes; each
//! offers accessors that return the unit types. Inputs the engine hands over take the unit types
//! (`Hz`, `Dbm`, `VoltsPeak`) so a level cannot be stored as a voltage. Times are milliseconds since
//! the Unix epoch (UTC). JSON documents (plan, line table, analysis, fit) are `serde_json::Value`,
//! so the store does not depend on the engine's or the analysis's types.

use halfwave_units::{Db, Dbm, Hz, Nanometers, Trace, VoltsPeak};
use serde::{Deserialize, Serialize};
use std::fmt;

/// Where a run is in its life. Stored as the lowercase word.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum RunState {
    Queued,
    Running,
    Completed,
    Failed,
    Cancelled,
    /// The daemon stopped while the run was running; its committed points are intact and it can be
    /// resumed.
    Interrupted,
}

impl RunState {
    /// Every state, in life order.
    pub const ALL: [RunState; 6] = [
        RunState::Queued,
        RunState::Running,
        RunState::Completed,
        RunState::Failed,
        RunState::Cancelled,
        RunState::Interrupted,
    ];

    /// The word stored in the `state` column.
    pub fn as_str(self) -> &'static str {
        match self {
            RunState::Queued => "queued",
            RunState::Running => "running",
            RunState::Completed => "completed",
            RunState::Failed => "failed",
            RunState::Cancelled => "cancelled",
            RunState::Interrupted => "interrupted",
        }
    }

    /// Parses the stored word.
    pub fn parse(word: &str) -> Option<RunState> {
        RunState::ALL.into_iter().find(|s| s.as_str() == word)
    }

    /// True for states a run never leaves (completed, failed, cancelled).
    pub fn is_final(self) -> bool {
        matches!(
            self,
            RunState::Completed | RunState::Failed | RunState::Cancelled
        )
    }
}

impl fmt::Display for RunState {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A `state` column holding a word that is not a [`RunState`].
#[derive(Debug, thiserror::Error)]
#[error("unknown run state {0:?}")]
pub struct UnknownRunState(pub String);

impl TryFrom<String> for RunState {
    type Error = UnknownRunState;
    fn try_from(word: String) -> Result<RunState, UnknownRunState> {
        RunState::parse(&word).ok_or(UnknownRunState(word))
    }
}

/// A modulator to register (or update, keyed by serial number).
#[derive(Debug, Clone, PartialEq)]
pub struct NewDevice {
    pub serial: String,
    pub model: String,
    /// The most RF power the modulator may receive (from its datasheet).
    pub rf_input_limit: Dbm,
    /// The optical wavelength it is calibrated at.
    pub wavelength: Nanometers,
}

/// A registered modulator.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct DeviceRecord {
    pub id: i64,
    pub serial: String,
    pub model: String,
    pub rf_input_limit_dbm: f64,
    pub wavelength_nm: f64,
    pub created_at_unix_ms: i64,
    pub updated_at_unix_ms: i64,
}

impl DeviceRecord {
    pub fn rf_input_limit(&self) -> Dbm {
        Dbm(self.rf_input_limit_dbm)
    }

    pub fn wavelength(&self) -> Nanometers {
        Nanometers(self.wavelength_nm)
    }
}

/// An instrument identity seen at a resource, with when it was first and last seen.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct InstrumentRecord {
    pub id: i64,
    pub manufacturer: String,
    pub model: String,
    pub serial: String,
    pub firmware: String,
    pub resource: String,
    pub first_seen_unix_ms: i64,
    pub last_seen_unix_ms: i64,
}

/// An instrument that measured a run, in its role.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, sqlx::FromRow, utoipa::ToSchema)]
pub struct RunInstrument {
    /// `source` or `analyzer`.
    pub role: String,
    pub manufacturer: String,
    pub model: String,
    pub serial: String,
    pub firmware: String,
    /// The VISA-style resource string it answered at.
    pub resource: String,
    /// What the driver chose when it connected (how it reads the frequency axis and in which
    /// unit, the trace format, where the source's limits came from), as the run last saw it.
    #[sqlx(skip)]
    #[serde(default)]
    pub connection: Vec<ConnectionNoteRecord>,
    /// `connection` as stored (a JSON array).
    #[serde(skip)]
    #[schema(ignore)]
    pub(crate) connection_json: String,
}

/// One choice a driver made at connect: what it is about and what was chosen, with why.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ConnectionNoteRecord {
    /// What the note is about, e.g. `frequency axis`.
    pub item: String,
    /// What was chosen and why.
    pub value: String,
}

impl RunInstrument {
    /// The identity as one line: the four *IDN? fields joined by " / ", then the resource (no
    /// commas of its own, so a CSV cell holding it needs no quoting unless a field has one).
    pub fn identity_line(&self) -> String {
        format!(
            "{} / {} / {} / {} @ {}",
            self.manufacturer, self.model, self.serial, self.firmware, self.resource
        )
    }
}

/// One row of a drive-chain calibration: the net gain from generator to modulator at a frequency
/// (level at modulator = generator level + gain; a loss is a negative gain).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, sqlx::FromRow)]
pub struct ChainCalibrationPoint {
    pub frequency_hz: f64,
    pub gain_db: f64,
    /// The gain's standard uncertainty, dB, where the calibration states one.
    pub gain_uncertainty_db: Option<f64>,
}

impl ChainCalibrationPoint {
    pub fn new(frequency: Hz, gain: Db) -> ChainCalibrationPoint {
        ChainCalibrationPoint {
            frequency_hz: frequency.value(),
            gain_db: gain.value(),
            gain_uncertainty_db: None,
        }
    }

    /// The same point with the gain's standard uncertainty.
    pub fn with_uncertainty(self, standard_uncertainty: Db) -> ChainCalibrationPoint {
        ChainCalibrationPoint {
            gain_uncertainty_db: Some(standard_uncertainty.value()),
            ..self
        }
    }

    pub fn frequency(&self) -> Hz {
        Hz(self.frequency_hz)
    }

    pub fn gain(&self) -> Db {
        Db(self.gain_db)
    }
}

/// A stored drive-chain calibration version, its points sorted by frequency.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChainCalibration {
    pub id: i64,
    pub name: String,
    pub version: i64,
    pub created_at_unix_ms: i64,
    pub created_by: String,
    pub points: Vec<ChainCalibrationPoint>,
    /// The files the table was computed from, in cascade order (empty for a typed table).
    pub sources: Vec<ChainCalibrationSource>,
}

/// One file a chain calibration was computed from: a two-port of the chain or the modulator's
/// one-port load, named, with the SHA-256 of its bytes.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, sqlx::FromRow)]
pub struct ChainCalibrationSource {
    /// `two_port` or `load` (see [`ChainCalibrationSource::ROLES`]).
    pub role: String,
    pub file_name: String,
    /// 64 lowercase hexadecimal digits.
    pub sha256: String,
}

impl ChainCalibrationSource {
    /// The roles a source file can have.
    pub const ROLES: [&'static str; 2] = ["two_port", "load"];
}

/// The header row of a chain calibration (without its points).
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ChainCalibrationHeader {
    pub id: i64,
    pub name: String,
    pub version: i64,
    pub created_at_unix_ms: i64,
    pub created_by: String,
}

/// A run to queue.
#[derive(Debug, Clone, PartialEq)]
pub struct NewRun {
    /// The sweep plan as the engine serialized it.
    pub plan: serde_json::Value,
    pub device_id: i64,
    pub bench_name: String,
    pub chain_calibration_id: i64,
    pub submitted_by: String,
    /// What measured and judged it, and the limits in force (migration 0011).
    pub provenance: RunProvenance,
}

/// What a run records when it is queued beyond its plan (migration 0011): the software and
/// analysis method versions, the submitting token's id and the safety limits in force. `None`
/// means not known (runs from before 0011, or seeded by tests); the default knows nothing.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct RunProvenance {
    /// [`crate::version::software_version`] of the daemon that queued it.
    pub software_version: Option<String>,
    /// [`crate::analysis::ANALYSIS_METHOD`] of that daemon.
    pub analysis_method: Option<String>,
    /// The id of the API token that submitted it (`api_tokens.id`).
    pub submitted_by_token_id: Option<i64>,
    /// The daemon's hard ceiling at the modulator input when it was queued.
    pub hard_limit_at_modulator: Option<Dbm>,
    /// The highest level the proven plan puts on the modulator (after the chain).
    pub planned_max_at_modulator: Option<Dbm>,
    /// The bench's generator level accuracy (+/- dB) in force when it was queued (migration
    /// 0014), so a later configuration change leaves the run's V_pi budget alone.
    pub source_level_accuracy: Option<Db>,
}

/// A stored run, with its device's serial number.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct RunRecord {
    pub id: i64,
    pub plan_json: String,
    pub device_id: i64,
    pub device_serial: String,
    pub bench_name: String,
    pub chain_calibration_id: i64,
    /// The drive-chain calibration the run used: its name and version.
    pub chain_name: String,
    pub chain_version: i64,
    #[sqlx(try_from = "String")]
    pub state: RunState,
    pub submitted_by: String,
    pub created_at_unix_ms: i64,
    pub started_at_unix_ms: Option<i64>,
    pub finished_at_unix_ms: Option<i64>,
    /// Why the run ended as it did (failure, cancel or interruption), when known.
    pub cause: Option<String>,
    /// A failed run whose points are intact and whose cause was a link or instrument fault: it
    /// can be resumed like an interrupted one.
    pub resumable: bool,
    /// The software that queued and executed it ("A then B" when a later version resumed it);
    /// `None` for runs from before migration 0011.
    pub software_version: Option<String>,
    /// The analysis method and version that judged its points, joined the same way.
    pub analysis_method: Option<String>,
    /// The id of the API token that submitted it (`submitted_by` is its name).
    pub submitted_by_token_id: Option<i64>,
    /// The daemon's hard ceiling at the modulator input when the run was queued.
    pub hard_limit_at_modulator_dbm: Option<f64>,
    /// The highest level the proven plan puts on the modulator.
    pub planned_max_at_modulator_dbm: Option<f64>,
    /// The generator level accuracy (+/- dB) recorded when the run was queued.
    pub source_level_accuracy_db: Option<f64>,
}

impl RunRecord {
    /// The plan as JSON.
    pub fn plan(&self) -> Result<serde_json::Value, super::StoreError> {
        serde_json::from_str(&self.plan_json).map_err(|e| super::StoreError::CorruptRow {
            what: "run plan",
            detail: format!("run {}: {e}", self.id),
        })
    }
}

/// Which runs to list. Results are newest first (by creation time).
#[derive(Debug, Clone, PartialEq)]
pub struct RunFilter {
    pub device_id: Option<i64>,
    pub device_serial: Option<String>,
    pub state: Option<RunState>,
    /// Created at or after this time.
    pub created_from_unix_ms: Option<i64>,
    /// Created strictly before this time.
    pub created_before_unix_ms: Option<i64>,
    /// Page size, 1 to [`RunFilter::MAX_LIMIT`].
    pub limit: u32,
    /// Runs to skip (page number times page size).
    pub offset: u32,
}

impl RunFilter {
    /// The largest page the store returns.
    pub const MAX_LIMIT: u32 = 1000;
}

impl Default for RunFilter {
    fn default() -> RunFilter {
        RunFilter {
            device_id: None,
            device_serial: None,
            state: None,
            created_from_unix_ms: None,
            created_before_unix_ms: None,
            limit: 50,
            offset: 0,
        }
    }
}

/// One page of runs and how many runs match the filter in all.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunPage {
    pub runs: Vec<RunRecord>,
    pub total: i64,
}

/// A measured point to commit, with its trace.
#[derive(Debug, Clone, PartialEq)]
pub struct NewPoint<'a> {
    pub run_id: i64,
    pub frequency_index: u32,
    pub level_index: u32,
    pub frequency: Hz,
    pub generator_level: Dbm,
    pub level_at_modulator: Dbm,
    pub v_peak: VoltsPeak,
    /// The fitted modulation index; `None` when the analysis could not fit one (the reason is in
    /// `analysis`). The point is still stored so a resumed run does not measure it again.
    pub modulation_index: Option<f64>,
    pub modulation_index_uncertainty: Option<f64>,
    /// Power of the -1 order over the +1 order, when both lines were found.
    pub asymmetry: Option<Db>,
    /// The measured comb lines (order, frequency, power, above floor ...).
    pub line_table: serde_json::Value,
    /// The rest of the analysis (method, residuals, warnings ...).
    pub analysis: serde_json::Value,
    pub trace: &'a Trace,
    /// Analyzer sweeps this point cost (its averages, plus the laser search and reference
    /// sweeps for the first point after them).
    pub analyzer_sweeps: u32,
}

/// A stored point (without its trace; see [`super::Store::point_trace`]).
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct PointRecord {
    pub id: i64,
    pub run_id: i64,
    #[sqlx(try_from = "i64")]
    pub frequency_index: u32,
    #[sqlx(try_from = "i64")]
    pub level_index: u32,
    pub frequency_hz: f64,
    pub generator_level_dbm: f64,
    pub level_at_modulator_dbm: f64,
    pub v_peak_volts: f64,
    pub modulation_index: Option<f64>,
    pub modulation_index_uncertainty: Option<f64>,
    pub asymmetry_db: Option<f64>,
    pub line_table_json: String,
    pub analysis_json: String,
    pub measured_at_unix_ms: i64,
}

impl PointRecord {
    pub fn frequency(&self) -> Hz {
        Hz(self.frequency_hz)
    }

    pub fn generator_level(&self) -> Dbm {
        Dbm(self.generator_level_dbm)
    }

    pub fn level_at_modulator(&self) -> Dbm {
        Dbm(self.level_at_modulator_dbm)
    }

    pub fn v_peak(&self) -> VoltsPeak {
        VoltsPeak(self.v_peak_volts)
    }
}

/// An RF-off reference trace of a run frequency.
#[derive(Debug, Clone, PartialEq)]
pub struct ReferenceTrace {
    pub run_id: i64,
    pub frequency_index: u32,
    pub frequency_hz: f64,
    pub measured_at_unix_ms: i64,
    pub trace: Trace,
}

/// V_pi at one frequency of a run, to store (replaces an earlier result for the same frequency
/// index, as a resumed run refits with more points).
#[derive(Debug, Clone, PartialEq)]
pub struct NewFrequencyResult {
    pub run_id: i64,
    pub frequency_index: u32,
    pub frequency: Hz,
    pub v_pi: VoltsPeak,
    /// Standard uncertainty of `v_pi`.
    pub v_pi_uncertainty: VoltsPeak,
    /// The points left out of the fit, each with its reason.
    pub excluded_points: serde_json::Value,
    /// The fit's details (slope, residuals, method ...).
    pub fit: serde_json::Value,
}

/// A stored per-frequency result.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct FrequencyResultRecord {
    pub id: i64,
    pub run_id: i64,
    #[sqlx(try_from = "i64")]
    pub frequency_index: u32,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub v_pi_uncertainty_volts: f64,
    pub excluded_points_json: String,
    pub fit_json: String,
    pub computed_at_unix_ms: i64,
}

impl FrequencyResultRecord {
    pub fn frequency(&self) -> Hz {
        Hz(self.frequency_hz)
    }

    pub fn v_pi(&self) -> VoltsPeak {
        VoltsPeak(self.v_pi_volts)
    }

    pub fn v_pi_uncertainty(&self) -> VoltsPeak {
        VoltsPeak(self.v_pi_uncertainty_volts)
    }
}

/// A run with everything measured in it (traces are fetched one by one).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunDetail {
    pub run: RunRecord,
    /// Points ordered by frequency index, then level index.
    pub points: Vec<PointRecord>,
    /// Per-frequency results ordered by frequency index.
    pub results: Vec<FrequencyResultRecord>,
}

/// One V_pi of a device's history: a frequency of one of its completed runs.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct VpiHistoryEntry {
    pub run_id: i64,
    pub finished_at_unix_ms: i64,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub v_pi_uncertainty_volts: f64,
}

/// How the run that answers a V_pi lookup, or that a device plot shows, was chosen (the rule is in
/// [`super::history`]). Serialized as the snake-case word.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum RunSelection {
    /// The device's pinned reference calibration.
    Pinned,
    /// The caller named the run.
    Requested,
    /// No run is pinned: the newest completed run whose measured range covers the frequency (a
    /// lookup) or every frequency the device was calibrated at (a plot).
    NewestCovering,
    /// Plots only: no run is pinned and none covers every frequency the device was calibrated
    /// at, so the newest completed run.
    Newest,
}

impl RunSelection {
    /// The word used in JSON and in the `Halfwave-Run-Selection` header.
    pub fn as_str(self) -> &'static str {
        match self {
            RunSelection::Pinned => "pinned",
            RunSelection::Requested => "requested",
            RunSelection::NewestCovering => "newest_covering",
            RunSelection::Newest => "newest",
        }
    }
}

/// The run pinned as a device's reference calibration.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct PinRecord {
    pub device_id: i64,
    pub run_id: i64,
    /// The token name (or `cli`) that pinned it.
    pub pinned_by: String,
    pub pinned_at_unix_ms: i64,
    pub note: String,
}

/// What a pin or an unpin changed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PinChange {
    pub serial: String,
    /// The pin now in force (`None` after an unpin).
    pub pinned: Option<PinRecord>,
    /// The run pinned before the change, if any.
    pub previous_run_id: Option<i64>,
}

/// One completed run of a device with its V_pi per frequency (ascending in frequency).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CalibrationRun {
    pub run_id: i64,
    pub finished_at_unix_ms: i64,
    pub values: Vec<VpiHistoryEntry>,
}

impl CalibrationRun {
    /// The lowest and highest measured frequency, Hz (`None` without values).
    pub fn range_hz(&self) -> Option<(f64, f64)> {
        let lowest = self.values.first()?.frequency_hz;
        let highest = self.values.last()?.frequency_hz;
        Some((lowest, highest))
    }

    /// True when `frequency_hz` lies within the measured range (ends included): V_pi can be
    /// interpolated there without extrapolating.
    pub fn covers(&self, frequency_hz: f64) -> bool {
        self.range_hz()
            .is_some_and(|(lo, hi)| lo <= frequency_hz && frequency_hz <= hi)
    }
}

/// A device's completed calibrations with V_pi results, newest first, and its pinned reference
/// calibration. What V_pi lookups and device plots choose from (see [`super::history`]).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DeviceCalibrationSet {
    pub serial: String,
    pub pinned: Option<PinRecord>,
    /// Newest first (by finish time, then id).
    pub runs: Vec<CalibrationRun>,
}

/// V_pi at a requested frequency from one completed run of a device (chosen by the lookup rule,
/// see [`super::history`]), interpolated linearly between the two measured frequencies around it
/// (the same weights for the uncertainty).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct InterpolatedVpi {
    pub run_id: i64,
    /// How that run was chosen.
    pub selection: RunSelection,
    /// True when that run is the device's pinned reference calibration.
    pub pinned: bool,
    pub frequency_hz: Hz,
    pub v_pi_volts: VoltsPeak,
    pub v_pi_uncertainty_volts: VoltsPeak,
    /// The measured frequencies the value comes from (equal when the frequency was measured).
    pub lower_frequency_hz: Hz,
    pub upper_frequency_hz: Hz,
}

/// One frequency of a comparison of two runs. The difference fields are present when both runs
/// measured the frequency.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ComparisonRow {
    pub frequency_hz: f64,
    pub v_pi_a_volts: Option<f64>,
    pub v_pi_b_volts: Option<f64>,
    /// Standard uncertainty (k = 1) of run A's V_pi.
    pub v_pi_a_uncertainty_volts: Option<f64>,
    /// Standard uncertainty (k = 1) of run B's V_pi.
    pub v_pi_b_uncertainty_volts: Option<f64>,
    /// 100 * (b - a) / a.
    pub difference_percent: Option<f64>,
    /// b - a.
    pub difference_volts: Option<f64>,
    /// sqrt(u_a² + u_b²), the two runs taken as independent (cautious when they share a chain).
    pub difference_uncertainty_volts: Option<f64>,
    /// E_n = (b - a) / (2 sqrt(u_a² + u_b²)) (ISO 13528's normalised error at k = 2).
    pub normalized_error: Option<f64>,
    /// |E_n| > 1: the runs disagree by more than their uncertainties allow.
    pub significant: Option<bool>,
}

/// Two runs side by side, per frequency (ascending; frequencies only one run has appear with the
/// other side empty).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct RunComparison {
    pub run_a: i64,
    pub run_b: i64,
    pub rows: Vec<ComparisonRow>,
}

/// An entry of the audit log.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct AuditEntry {
    pub id: i64,
    pub at_unix_ms: i64,
    pub actor: String,
    pub action: String,
    pub subject: String,
    pub detail: String,
}
