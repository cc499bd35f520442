//! V_pi's uncertainty budget of a run, per frequency and per term.
//!
//! Shared by the route handlers (`api::routes::budget`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// One line of a budget table.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct BudgetRowView {
    pub quantity: String,
    /// `A` or `B` (GUM 4.2, 4.3).
    pub evaluation: String,
    pub distribution: String,
    /// The input's standard uncertainty, in `unit`.
    pub standard_uncertainty: f64,
    /// `V` or `dB`.
    pub unit: String,
    pub sensitivity_volts_per_unit: f64,
    pub contribution_volts: f64,
}

/// The budget of V_pi at one frequency of the run.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct FrequencyBudgetView {
    pub frequency_index: u32,
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub rows: Vec<BudgetRowView>,
    pub combined_standard_uncertainty_volts: f64,
    pub coverage_factor: f64,
    pub expanded_uncertainty_volts: f64,
}

/// A run's budgets, one per frequency with a V_pi.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct RunBudgetView {
    pub run_id: i64,
    /// Where the chain's uncertainty came from: `query`, or `chain calibration NAME vN`.
    pub chain_uncertainty_from: String,
    /// The generator level accuracy used, +/- dB.
    pub source_level_accuracy_db: f64,
    /// Where it came from: `query`, or `bench NAME configuration`.
    pub source_level_accuracy_from: String,
    pub frequencies: Vec<FrequencyBudgetView>,
}
