//! `halfwave compare RUN_A RUN_B`: two runs' V_pi side by side, per frequency, with the difference,
//! its combined standard uncertainty and whether it is significant (E_n, see
//! [`crate::analysis::agreement`]); e.g. a modulator's calibration against last year's, or two
//! benches on one modulator. Exits 3 ([`super::FINDING_EXIT_CODE`]) when any common frequency
//! differs significantly, so a script can act on it, and 1 on a failure like every command.

use super::client::ClientArgs;
use super::runs::{runtime, to_json};
use super::CliError;
use crate::store::RunComparison;
use clap::Args;

#[derive(Debug, Args)]
pub struct CompareArgs {
    /// Run A, the reference.
    pub run_a: i64,
    /// Run B, compared with A.
    pub run_b: i64,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The comparison as a table for the terminal.
pub fn comparison_text(comparison: &RunComparison) -> String {
    let volts = |v: Option<f64>| v.map_or_else(|| "-".to_string(), |v| format!("{v:.4}"));
    let mut out = format!(
        "run {} (A) against run {} (B); standard uncertainties (1 sigma); significant when |E_n| > 1 (k = 2)\n",
        comparison.run_a, comparison.run_b
    );
    out.push_str(
        "  frequency   V_pi A (V)  u A (V)   V_pi B (V)  u B (V)   B - A (V)   u (V)    B - A (%)   E_n\n",
    );
    for row in &comparison.rows {
        let verdict = match row.significant {
            Some(true) => "  significant",
            _ => "",
        };
        out.push_str(&format!(
            "{:>8.3} GHz  {:>10}  {:>7}   {:>10}  {:>7}   {:>9}   {:>7}  {:>9}  {:>5}{verdict}\n",
            row.frequency_hz / 1e9,
            volts(row.v_pi_a_volts),
            volts(row.v_pi_a_uncertainty_volts),
            volts(row.v_pi_b_volts),
            volts(row.v_pi_b_uncertainty_volts),
            row.difference_volts
                .map_or_else(|| "-".to_string(), |v| format!("{v:+.4}")),
            volts(row.difference_uncertainty_volts),
            row.difference_percent
                .map_or_else(|| "-".to_string(), |v| format!("{v:+.3}")),
            row.normalized_error
                .map_or_else(|| "-".to_string(), |v| format!("{v:+.2}")),
        ));
    }
    let common = comparison
        .rows
        .iter()
        .filter(|r| r.normalized_error.is_some())
        .count();
    let significant = comparison
        .rows
        .iter()
        .filter(|r| r.significant == Some(true))
        .count();
    out.push_str(&format!(
        "{common} common frequencies, {significant} with a significant difference\n"
    ));
    out
}

/// `halfwave compare`.
pub fn run(args: CompareArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let comparison: RunComparison = client
            .get_json(&format!(
                "/api/v1/runs/{}/compare/{}",
                args.run_a, args.run_b
            ))
            .await?;
        if args.client.json {
            outln!("{}", to_json(&comparison)?);
        } else {
            out!("{}", comparison_text(&comparison));
        }
        let significant: Vec<String> = comparison
            .rows
            .iter()
            .filter(|r| r.significant == Some(true))
            .map(|r| format!("{:.3} GHz", r.frequency_hz / 1e9))
            .collect();
        if significant.is_empty() {
            Ok(())
        } else {
            Err(CliError::Finding(format!(
                "runs {} and {} differ significantly at {}",
                args.run_a,
                args.run_b,
                significant.join(", ")
            )))
        }
    })
}
