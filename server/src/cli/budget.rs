//! `halfwave budget RUN --chain-uncertainty-db U --source-level-accuracy-db A`: V_pi's
//! uncertainty budget per frequency of a run, from `GET /api/v1/runs/{id}/v-pi-budget` (the fit,
//! the drive chain's gain and the generator's level accuracy, combined by the GUM). The two
//! Type B inputs come from the chain's calibration certificate and the generator's data sheet:
//! nothing stored holds them yet.

use super::client::ClientArgs;
use super::runs::{runtime, to_json};
use super::CliError;
use crate::api::routes::budget::RunBudgetView;
use clap::Args;

#[derive(Debug, Args)]
pub struct BudgetArgs {
    /// The run.
    pub run_id: i64,
    /// Standard uncertainty of the drive chain's gain, dB (0 to 10).
    #[arg(long, value_name = "DB", allow_negative_numbers = true)]
    pub chain_uncertainty_db: f64,
    /// The generator's level accuracy, +/- dB (0 to 10), read as a rectangular distribution.
    #[arg(long, value_name = "DB", allow_negative_numbers = true)]
    pub source_level_accuracy_db: f64,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The budgets as a table for the terminal.
pub fn budget_text(view: &RunBudgetView) -> String {
    let mut out = format!(
        "run {}: V_pi uncertainty budget (GUM, JCGM 100:2008; contributions in volts, expanded with k = 2)\n",
        view.run_id
    );
    for f in &view.frequencies {
        out.push_str(&format!(
            "\n{:.3} GHz  V_pi {:.4} V\n",
            f.frequency_hz / 1e9,
            f.v_pi_volts
        ));
        for r in &f.rows {
            out.push_str(&format!(
                "  {:<44} {}  u = {:<10.4} {:<2}  c = {:<8.4}  {:.4} V\n",
                r.quantity,
                r.evaluation,
                r.standard_uncertainty,
                r.unit,
                r.sensitivity_volts_per_unit,
                r.contribution_volts
            ));
        }
        out.push_str(&format!(
            "  combined standard uncertainty {:.4} V, expanded (k = {}) {:.4} V ({:.2} %)\n",
            f.combined_standard_uncertainty_volts,
            f.coverage_factor,
            f.expanded_uncertainty_volts,
            100.0 * f.expanded_uncertainty_volts / f.v_pi_volts
        ));
    }
    if view.frequencies.is_empty() {
        out.push_str("no V_pi in this run yet\n");
    }
    out
}

/// `halfwave budget`.
pub fn run(args: BudgetArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    let path = format!(
        "/api/v1/runs/{}/v-pi-budget?chain_uncertainty_db={}&source_level_accuracy_db={}",
        args.run_id, args.chain_uncertainty_db, args.source_level_accuracy_db
    );
    let view: RunBudgetView = runtime()?.block_on(client.get_json(&path))?;
    if args.client.json {
        outln!("{}", to_json(&view)?);
    } else {
        out!("{}", budget_text(&view));
    }
    Ok(())
}
