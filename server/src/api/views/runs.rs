//! Runs as the API shows them: the list, one run with its results and record, its points and a point's trace.
//!
//! Shared by the route handlers (`api::routes::runs`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use crate::store::{PointRecord, RunInstrument, RunRecord};
use serde::{Deserialize, Serialize};
use serde_json::value::RawValue;
use utoipa::ToSchema;

/// A run as listed.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct RunSummary {
    pub id: i64,
    pub device_serial: String,
    pub bench: String,
    /// The drive-chain calibration the run converts levels with (name and version).
    #[serde(default)]
    pub chain_name: String,
    #[serde(default)]
    pub chain_version: i64,
    /// queued, running, completed, failed, cancelled or interrupted.
    pub state: String,
    pub submitted_by: String,
    pub created_at_unix_ms: i64,
    pub started_at_unix_ms: Option<i64>,
    pub finished_at_unix_ms: Option<i64>,
    /// Why the run ended as it did, when it did not complete.
    pub cause: Option<String>,
    /// True for a failed run whose cause was a link or instrument fault with its points intact:
    /// it can be resumed like an interrupted run.
    #[serde(default)]
    pub resumable: bool,
}

impl From<&RunRecord> for RunSummary {
    fn from(run: &RunRecord) -> RunSummary {
        RunSummary {
            id: run.id,
            device_serial: run.device_serial.clone(),
            bench: run.bench_name.clone(),
            chain_name: run.chain_name.clone(),
            chain_version: run.chain_version,
            state: run.state.as_str().to_string(),
            submitted_by: run.submitted_by.clone(),
            created_at_unix_ms: run.created_at_unix_ms,
            started_at_unix_ms: run.started_at_unix_ms,
            finished_at_unix_ms: run.finished_at_unix_ms,
            cause: run.cause.clone(),
            resumable: run.resumable,
        }
    }
}

/// One page of runs.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct RunList {
    pub runs: Vec<RunSummary>,
    #[schema(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: u32,
    #[schema(minimum = 1, maximum = 1000)]
    pub per_page: u32,
    /// Runs matching the filter, on all pages.
    pub total: i64,
}

/// V_pi at one frequency of a run.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct FrequencyResultView {
    pub frequency_index: u32,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub v_pi_uncertainty_volts: f64,
    /// Points the fit left out, with reasons (as the engine recorded them; empty when none).
    #[schema(value_type = Vec<ExcludedPointView>)]
    pub excluded_points: serde_json::Value,
    /// Analyzer sweeps spent at this frequency (laser search, reference, every point's
    /// averages); null for runs measured before sweeps were counted.
    #[serde(default)]
    pub analyzer_sweeps: Option<i64>,
}

/// A point the V_pi fit left out (the shape the engine stores; documentation of
/// [`FrequencyResultView::excluded_points`], which is passed through as stored).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct ExcludedPointView {
    pub level_index: u32,
    /// The generator level of that point (null if it was not a number).
    pub generator_level_dbm: Option<f64>,
    /// Why the fit left it out.
    pub reason: String,
}

/// One row of a point's line table: a comb line the analysis looked for (the shape the engine
/// stores; documentation of [`PointView::lines`], which is passed through as stored).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct LineView {
    /// Sideband order: 0 the carrier, -n and +n the n-th lower and upper sidebands.
    pub order: i32,
    /// Optical frequency of the line, Hz.
    pub frequency_hz: f64,
    /// Line power integrated over the line shape with the floor removed; null when nothing is
    /// left above the floor.
    pub power_dbm: Option<f64>,
    /// Standard uncertainty of the line power, dB (null with the power).
    pub power_uncertainty_db: Option<f64>,
    pub above_floor: Option<bool>,
    /// The line's peak power in the whole-trace fit, which may lie below the floor.
    pub fitted_power_dbm: Option<f64>,
    /// Whether the fitted line's peak rises above the fitted floor.
    pub fitted_above_floor: Option<bool>,
}

/// A stored JSON array as a value: anything else (damaged or not a list) is the empty list, so the
/// view always has the documented shape.
pub fn stored_json_array(text: &str) -> serde_json::Value {
    match serde_json::from_str(text) {
        Ok(array @ serde_json::Value::Array(_)) => array,
        _ => serde_json::Value::Array(Vec::new()),
    }
}

/// One run with its plan and its per-frequency results.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct RunView {
    #[serde(flatten)]
    pub summary: RunSummary,
    /// The plan as submitted (after defaults), in the form `POST /runs` takes; null only if the
    /// stored plan cannot be read.
    #[schema(value_type = Option<crate::engine::plan::PlanRequest>)]
    pub plan: serde_json::Value,
    pub measured_points: usize,
    /// Analyzer sweeps the run spent so far, over every frequency (with or without a V_pi).
    #[serde(default)]
    pub analyzer_sweeps: i64,
    pub results: Vec<FrequencyResultView>,
    /// The source and analyzer that measured the run (their *IDN? identities at its start and
    /// at every resumption), each with the choices its driver made (axis, unit, format).
    #[serde(default)]
    pub instruments: Vec<RunInstrument>,
    /// What else the record says about how the run was made: software, analysis method,
    /// operator token and the safety limits in force.
    #[serde(default)]
    pub provenance: ProvenanceView,
}

/// The software and analysis method that executed a run, the token that submitted it and the
/// limits in force when it was queued; null members are not known (runs queued before they were
/// recorded).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct ProvenanceView {
    /// `halfwave <version> (git <commit>)`; "A then B" when a later version resumed the run.
    pub software_version: Option<String>,
    /// The analysis method's name and version (`analysis::ANALYSIS_METHOD`), joined the same way.
    pub analysis_method: Option<String>,
    /// The id of the API token that submitted the run (its name is `submitted_by`).
    pub submitted_by_token_id: Option<i64>,
    /// The daemon's hard ceiling on the level at the modulator input when the run was queued.
    pub hard_limit_at_modulator_dbm: Option<f64>,
    /// The highest level the proven plan puts on the modulator input (after the drive chain).
    pub planned_max_at_modulator_dbm: Option<f64>,
}

impl From<&RunRecord> for ProvenanceView {
    fn from(run: &RunRecord) -> ProvenanceView {
        ProvenanceView {
            software_version: run.software_version.clone(),
            analysis_method: run.analysis_method.clone(),
            submitted_by_token_id: run.submitted_by_token_id,
            hard_limit_at_modulator_dbm: run.hard_limit_at_modulator_dbm,
            planned_max_at_modulator_dbm: run.planned_max_at_modulator_dbm,
        }
    }
}

/// One measured point.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct PointView {
    pub id: i64,
    pub frequency_index: u32,
    pub level_index: u32,
    pub frequency_hz: f64,
    pub generator_level_dbm: f64,
    pub level_at_modulator_dbm: f64,
    pub v_peak_volts: f64,
    pub modulation_index: Option<f64>,
    pub modulation_index_uncertainty: Option<f64>,
    pub asymmetry_db: Option<f64>,
    /// The comb lines found (order, frequency, power ...), as the analysis reported them. Passed
    /// through as stored (never parsed into a tree and written again); an empty list when the
    /// stored table is not a list.
    #[schema(value_type = Vec<LineView>)]
    pub lines: Box<RawValue>,
    /// Method, residuals and warnings of the analysis, passed through as stored (`{"error": ...}`
    /// when the trace could not be analysed; null if the stored text is damaged).
    #[schema(value_type = Option<Object>)]
    pub analysis: Box<RawValue>,
    pub measured_at_unix_ms: i64,
}

impl From<PointRecord> for PointView {
    fn from(p: PointRecord) -> PointView {
        PointView {
            id: p.id,
            frequency_index: p.frequency_index,
            level_index: p.level_index,
            frequency_hz: p.frequency_hz,
            generator_level_dbm: p.generator_level_dbm,
            level_at_modulator_dbm: p.level_at_modulator_dbm,
            v_peak_volts: p.v_peak_volts,
            modulation_index: p.modulation_index,
            modulation_index_uncertainty: p.modulation_index_uncertainty,
            asymmetry_db: p.asymmetry_db,
            lines: stored_json_list(p.line_table_json),
            analysis: stored_json(p.analysis_json),
            measured_at_unix_ms: p.measured_at_unix_ms,
        }
    }
}

/// A JSON document from the store, checked (not parsed into a tree) and served as it is, without
/// a copy; `null` if it is not valid JSON.
pub fn stored_json(text: String) -> Box<RawValue> {
    RawValue::from_string(text).unwrap_or_else(|_| null_json())
}

/// A JSON list from the store, served as it is like [`stored_json`]; `[]` if it is not a list.
pub fn stored_json_list(text: String) -> Box<RawValue> {
    if text.trim_start().starts_with('[') {
        if let Ok(raw) = RawValue::from_string(text) {
            return raw;
        }
    }
    RawValue::from_string("[]".to_owned()).expect("[] is JSON")
}

/// The JSON `null`, as a raw value.
pub fn null_json() -> Box<RawValue> {
    RawValue::from_string("null".to_owned()).expect("null is JSON")
}

/// One page of a run's points.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct PointList {
    pub points: Vec<PointView>,
    #[schema(format = Int64, minimum = 1, maximum = 4294967295_u64)]
    pub page: u32,
    #[schema(minimum = 1, maximum = 1000)]
    pub per_page: u32,
    pub total: usize,
}

/// A trace as JSON.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct TraceView {
    pub point_id: i64,
    pub resolution_bandwidth_hz: Option<f64>,
    pub frequency_hz: Vec<f64>,
    pub power_dbm: Vec<f64>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stored_json_passes_through_unchanged_and_damage_becomes_null() {
        let stored = r#"[{"order":-1,"power_dbm":-12.5},{"order":0,"power_dbm":-3.25e0}]"#;
        let view = serde_json::to_string(&stored_json(stored.to_string())).unwrap();
        assert_eq!(view, stored, "byte for byte, number formatting included");
        assert_eq!(
            serde_json::to_string(&stored_json("{\"cut".to_string())).unwrap(),
            "null"
        );
        assert_eq!(
            serde_json::to_string(&stored_json(String::new())).unwrap(),
            "null"
        );
    }

    #[test]
    fn stored_lists_keep_their_shape() {
        let stored = r#"[{"order":0,"frequency_hz":1.0}]"#;
        assert_eq!(stored_json_list(stored.to_string()).get(), stored);
        for damaged in ["", "null", "{\"lines\":[]}", "[1,"] {
            assert_eq!(
                stored_json_list(damaged.to_string()).get(),
                "[]",
                "{damaged:?}"
            );
            assert_eq!(
                stored_json_array(damaged),
                serde_json::json!([]),
                "{damaged:?}"
            );
        }
        assert_eq!(
            stored_json_array(r#"[{"level_index":2,"reason":"outlier"}]"#)[0]["level_index"],
            2
        );
    }
}
