//! V_pi's uncertainty budget for a run, per frequency (GUM, JCGM 100:2008; the arithmetic is
//! `analysis::budget`).
//!
//! The fit's standard uncertainty is the run's own. The chain's standard uncertainty comes from
//! the run's chain calibration where its table states one per frequency (`gain_uncertainty_db`,
//! the larger of the two entries around the frequency: `analysis::budget::chain_uncertainty_at`),
//! and the generator's level accuracy from the bench's `source_level_accuracy_db` in the daemon's
//! configuration. A query parameter overrides either (for a chain table stored without
//! uncertainties, a Touchstone cascade, or a certificate read later); where neither is known the
//! answer is 422 naming the parameter to give. Each answer says where its inputs came from.

use crate::analysis::budget::{
    chain_uncertainty_at, v_pi_budget, BudgetInputs, BudgetRow, VpiBudget,
};
use crate::api::auth::Viewer;
use crate::api::params::{ApiPath, ApiQuery};
use crate::api::problem::{FieldProblem, Problem};
use crate::api::views::budget::{BudgetRowView, FrequencyBudgetView, RunBudgetView};
use crate::api::AppState;
use axum::extract::State;
use axum::Json;
use halfwave_units::{Db, Hz, VoltsPeak};
use serde::Deserialize;
use utoipa::IntoParams;

/// Type B inputs that override the stored ones.
#[derive(Debug, Default, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct BudgetQuery {
    /// Standard uncertainty of the drive chain's gain, dB (0 to 10), e.g. from its calibration
    /// certificate; default: the run's chain calibration's own, where it states one.
    #[param(minimum = 0, maximum = 10)]
    pub chain_uncertainty_db: Option<f64>,
    /// The generator's level accuracy, +/- dB (0 to 10) as its data sheet states it; read as a
    /// rectangular distribution (GUM 4.3.7); default: the bench's `source_level_accuracy_db`.
    #[param(minimum = 0, maximum = 10)]
    pub source_level_accuracy_db: Option<f64>,
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
        if let Some(value) = value.filter(|v| !(0.0..=10.0).contains(v)) {
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
    Ok(Json(budget_for_run(&state, run_id, &query).await?))
}

/// The reason a run has no budget, for the report and the export: the problem's detail and
/// the fields it names.
pub fn unavailable_reason(problem: &Problem) -> String {
    let mut reason = problem.detail.clone();
    for field in &problem.errors {
        reason.push_str(&format!("; {}: {}", field.field, field.message));
    }
    reason
}

/// The budget of a run with `query`'s overrides (already range-checked), for the route, the
/// calibration report and the export. A 422 names the input that is not known.
pub async fn budget_for_run(
    state: &AppState,
    run_id: i64,
    query: &BudgetQuery,
) -> Result<RunBudgetView, Problem> {
    let store = state.store();
    let run = store.run(run_id).await?;
    let results = store.frequency_results(run_id).await?;

    let (source_level_accuracy, source_level_accuracy_from) = match query
        .source_level_accuracy_db
    {
        Some(value) => (Db(value), "query".to_string()),
        None => match (
            run.source_level_accuracy_db.map(Db),
            state
                .engine()
                .ok()
                .and_then(|engine| engine.source_level_accuracy(&run.bench_name)),
        ) {
            (Some(value), _) => (
                value,
                format!(
                    "bench {} configuration, recorded with the run at submission",
                    run.bench_name
                ),
            ),
            (None, Some(value)) => (value, format!("bench {} configuration", run.bench_name)),
            (None, None) => {
                return Err(Problem::invalid(
                    "the generator's level accuracy is not known",
                    vec![FieldProblem::new(
                        "source_level_accuracy_db",
                        format!(
                            "bench {:?} states no source_level_accuracy_db in this daemon's configuration; give the generator's +/- level accuracy from its data sheet (`halfwave budget --source-level-accuracy-db`)",
                            run.bench_name
                        ),
                    )],
                ))
            }
        },
    };
    // The chain table's own uncertainties, unless the query gives one for every frequency.
    let (chain_table, chain_uncertainty_from): (Vec<(Hz, Option<Db>)>, String) =
        match query.chain_uncertainty_db {
            Some(_) => (Vec::new(), "query".to_string()),
            None => (
                store
                    .chain_calibration(run.chain_calibration_id)
                    .await?
                    .points
                    .iter()
                    .map(|p| (p.frequency(), p.gain_uncertainty_db.map(Db)))
                    .collect(),
                format!(
                    "chain calibration {} v{}",
                    run.chain_name, run.chain_version
                ),
            ),
        };

    let mut frequencies = Vec::with_capacity(results.len());
    for r in results {
        let chain_uncertainty = match query.chain_uncertainty_db {
            Some(value) => Db(value),
            None => chain_uncertainty_at(&chain_table, Hz(r.frequency_hz)).ok_or_else(|| {
                Problem::invalid(
                    "the drive chain's uncertainty is not known",
                    vec![FieldProblem::new(
                        "chain_uncertainty_db",
                        format!(
                            "chain calibration {:?} v{} states no gain uncertainty at {} GHz; give the chain's standard uncertainty in dB from its calibration certificate (`halfwave budget --chain-uncertainty-db`)",
                            run.chain_name,
                            run.chain_version,
                            r.frequency_hz / 1e9
                        ),
                    )],
                )
            })?,
        };
        let budget: Option<VpiBudget> = v_pi_budget(BudgetInputs {
            v_pi: VoltsPeak(r.v_pi_volts),
            fit_uncertainty: VoltsPeak(r.v_pi_uncertainty_volts),
            chain_uncertainty,
            source_level_accuracy,
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
    Ok(RunBudgetView {
        run_id,
        chain_uncertainty_from,
        source_level_accuracy_db: source_level_accuracy.0,
        source_level_accuracy_from,
        frequencies,
    })
}
