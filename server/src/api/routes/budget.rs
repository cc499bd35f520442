//! V_pi's uncertainty budget for a run, per frequency (GUM, JCGM 100:2008; the arithmetic is
//! `analysis::budget`).
//!
//! The fit's standard uncertainty is the run's own. The chain's standard uncertainty and the
//! generator's level accuracy are query parameters: a chain calibration stores gains without
//! uncertainties (typed tables and Touchstone files alike), and neither the source profiles nor
//! the bench configuration state a level accuracy, so the caller gives both from the chain's
//! calibration certificate and the generator's data sheet.

use crate::analysis::budget::{v_pi_budget, BudgetInputs, BudgetRow, VpiBudget};
use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::AppState;
use axum::extract::State;
use axum::Json;
use halfwave_units::{Db, Volts};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};

/// The Type B inputs the store does not hold.
#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct BudgetQuery {
    /// Standard uncertainty of the drive chain's gain, dB (0 to 10), e.g. from its calibration
    /// certificate.
    #[param(minimum = 0, maximum = 10)]
    pub chain_uncertainty_db: f64,
    /// The generator's level accuracy, +/- dB (0 to 10) as its data sheet states it; read as a
    /// rectangular distribution (GUM 4.3.7).
    #[param(minimum = 0, maximum = 10)]
    pub source_level_accuracy_db: f64,
}

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
    pub frequencies: Vec<FrequencyBudgetView>,
}

fn row_view(r: BudgetRow) -> BudgetRowView {
    BudgetRowView {
        quantity: r.quantity.into(),
        evaluation: r.evaluation.into(),
        distribution: r.distribution.into(),
        standard_uncertainty: r.standard_uncertainty,
        unit: r.unit.into(),
        sensitivity_volts_per_unit: r.sensitivity_volts_per_unit,
        contribution_volts: r.contribution_volts,
    }
}

/// The uncertainty budget of V_pi at each frequency of a run: the fit (Type A), the drive
/// chain's gain and the generator's level accuracy (Type B), combined in quadrature and
/// expanded with k = 2.
#[utoipa::path(get, path = "/api/v1/runs/{run_id}/v-pi-budget", tag = "runs", security(("bearer" = [])),
    params(("run_id" = i64, Path, description = "Run id"), BudgetQuery),
    responses((status = 200, body = RunBudgetView), (status = 401, body = Problem), (status = 404, body = Problem),
              (status = 422, body = Problem)))]
pub async fn run_budget(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(run_id): ApiPath<i64>,
    ApiQuery(query): ApiQuery<BudgetQuery>,
) -> Result<Json<RunBudgetView>, Problem> {
    let mut errors = Vec::new();
    for (field, value) in [
        ("chain_uncertainty_db", query.chain_uncertainty_db),
        ("source_level_accuracy_db", query.source_level_accuracy_db),
    ] {
        if !(0.0..=10.0).contains(&value) {
            errors.push(FieldProblem::new(
                field,
                format!("{value} dB is not between 0 and 10 dB"),
            ));
        }
    }
    if !errors.is_empty() {
        return Err(Problem::invalid(
            "the budget's inputs are out of range",
            errors,
        ));
    }
    let store = state.store();
    store.run(run_id).await?;
    let results = store.frequency_results(run_id).await?;
    let mut frequencies = Vec::with_capacity(results.len());
    for r in results {
        let budget: Option<VpiBudget> = v_pi_budget(BudgetInputs {
            v_pi: Volts(r.v_pi_volts),
            fit_uncertainty: Volts(r.v_pi_uncertainty_volts),
            chain_uncertainty: Db(query.chain_uncertainty_db),
            source_level_accuracy: Db(query.source_level_accuracy_db),
        });
        // A stored V_pi that is not positive has no budget; it is left out, not invented.
        if let Some(b) = budget {
            frequencies.push(FrequencyBudgetView {
                frequency_index: r.frequency_index,
                frequency_hz: r.frequency_hz,
                v_pi_volts: b.v_pi_volts,
                rows: b.rows.into_iter().map(row_view).collect(),
                combined_standard_uncertainty_volts: b.combined_standard_uncertainty_volts,
                coverage_factor: b.coverage_factor,
                expanded_uncertainty_volts: b.expanded_uncertainty_volts,
            });
        }
    }
    Ok(Json(RunBudgetView {
        run_id,
        frequencies,
    }))
}
