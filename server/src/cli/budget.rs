//! `halfwave budget RUN [--chain-uncertainty-db U] [--source-level-accuracy-db A]`: V_pi's
//! uncertainty budget per frequency of a run, from `GET /api/v1/runs/{id}/v-pi-budget` (the fit,
//! the drive chain's gain and the generator's level accuracy, combined by the GUM). The two
//! Type B inputs default to the run's chain table (`gain_uncertainty_db`) and the bench's
//! `source_level_accuracy_db`; the flags override them (from a certificate and a data sheet).

use super::client::ClientArgs;
use super::runs::{runtime, to_json};
use super::CliError;
use crate::api::views::budget::RunBudgetView;
use clap::Args;

#[derive(Debug, Args)]
pub struct BudgetArgs {
    /// The run.
    pub run_id: i64,
    /// Standard uncertainty of the drive chain's gain, dB (0 to 10); default: the run's chain
    /// calibration's own, where its table states one.
    #[arg(long, value_name = "DB", allow_negative_numbers = true)]
    pub chain_uncertainty_db: Option<f64>,
    /// The generator's level accuracy, +/- dB (0 to 10), read as a rectangular distribution;
    /// default: the bench's `source_level_accuracy_db` in the daemon's configuration.
    #[arg(long, value_name = "DB", allow_negative_numbers = true)]
    pub source_level_accuracy_db: Option<f64>,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The budgets as a table for the terminal.
pub fn budget_text(view: &RunBudgetView) -> String {
    let mut out = format!(
        "run {}: V_pi uncertainty budget (GUM, JCGM 100:2008; contributions in volts, expanded with k = 2)\n\
         chain uncertainty from {}; generator level accuracy +/- {} dB from {}\n",
        view.run_id,
        view.chain_uncertainty_from,
        view.source_level_accuracy_db,
        view.source_level_accuracy_from
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
    let mut query = Vec::new();
    if let Some(u) = args.chain_uncertainty_db {
        query.push(format!("chain_uncertainty_db={u}"));
    }
    if let Some(a) = args.source_level_accuracy_db {
        query.push(format!("source_level_accuracy_db={a}"));
    }
    let path = if query.is_empty() {
        format!("/api/v1/runs/{}/v-pi-budget", args.run_id)
    } else {
        format!(
            "/api/v1/runs/{}/v-pi-budget?{}",
            args.run_id,
            query.join("&")
        )
    };
    let view: RunBudgetView = runtime()?.block_on(client.get_json(&path))?;
    if args.client.json {
        outln!("{}", to_json(&view)?);
    } else {
        out!("{}", budget_text(&view));
    }
    Ok(())
}
