//! The uncertainty budget of V_pi at one frequency, by the GUM (JCGM 100:2008).
//!
//! V_pi comes from beta = (pi / V_pi) V_pk with V_pk computed from the level at the modulator,
//! L_mod = L_gen + G_chain (dBm into 50 ohm, V_pk proportional to 10^(L_mod / 20)). A level
//! error common to every point of the sweep scales every V_pk alike, so it does not show in the
//! scatter the fit sees; it scales V_pi by the same factor. Hence three uncorrelated inputs:
//! - the fit of beta against V_pk (Type A, GUM 4.2: the fit's own standard uncertainty of V_pi,
//!   sensitivity 1);
//! - the drive chain's gain (Type B, GUM 4.3: its standard uncertainty in dB as the calibration
//!   states it), sensitivity dV_pi/dG = V_pi ln(10) / 20 per dB;
//! - the generator's level accuracy (Type B, GUM 4.3.7: a stated +/- a dB limit read as a
//!   rectangular distribution, standard uncertainty a / sqrt(3)), same sensitivity.
//!
//! Combined in quadrature (GUM 5.1.2, law of propagation for uncorrelated inputs) and expanded
//! with k = 2 (GUM 6.3; about 95 % for a near-normal result). With these sensitivities 0.1 dB of
//! chain error is 1.15 % of V_pi.

use halfwave_units::{Db, Hz, VoltsPeak};
use serde::Serialize;

/// Coverage factor of the expanded uncertainty (GUM 6.2.1, 6.3.3).
pub const COVERAGE_FACTOR: f64 = 2.0;

/// Relative change of V_pi per dB of level error: ln(10) / 20.
pub fn relative_sensitivity_per_db() -> f64 {
    std::f64::consts::LN_10 / 20.0
}

/// What the budget is computed from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BudgetInputs {
    pub v_pi: VoltsPeak,
    /// Standard uncertainty of V_pi from the fit alone.
    pub fit_uncertainty: VoltsPeak,
    /// Standard uncertainty of the chain's gain at this frequency.
    pub chain_uncertainty: Db,
    /// The generator's stated level accuracy, +/- this many dB (rectangular).
    pub source_level_accuracy: Db,
}

/// One line of the budget table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BudgetRow {
    /// What the input is.
    pub quantity: &'static str,
    /// `A` (statistics of the measurement) or `B` (other knowledge), GUM 4.2 / 4.3.
    pub evaluation: &'static str,
    /// How the input's standard uncertainty was obtained.
    pub distribution: &'static str,
    /// The input's standard uncertainty, in `unit`.
    pub standard_uncertainty: f64,
    /// `V` or `dB`.
    pub unit: &'static str,
    /// dV_pi / d(input), volts per `unit`.
    pub sensitivity_volts_per_unit: f64,
    /// |sensitivity| x standard uncertainty, volts.
    pub contribution_volts: f64,
}

/// The whole budget.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VpiBudget {
    pub v_pi_volts: f64,
    pub rows: Vec<BudgetRow>,
    pub combined_standard_uncertainty_volts: f64,
    pub coverage_factor: f64,
    pub expanded_uncertainty_volts: f64,
}

/// The budget; `None` when an input is negative or not finite, or V_pi is not positive.
pub fn v_pi_budget(inputs: BudgetInputs) -> Option<VpiBudget> {
    let values = [
        inputs.v_pi.0,
        inputs.fit_uncertainty.0,
        inputs.chain_uncertainty.0,
        inputs.source_level_accuracy.0,
    ];
    if values.iter().any(|v| !v.is_finite() || *v < 0.0) || inputs.v_pi.0 <= 0.0 {
        return None;
    }
    let per_db = inputs.v_pi.0 * relative_sensitivity_per_db();
    let source_standard = inputs.source_level_accuracy.0 / 3f64.sqrt();
    let rows = vec![
        BudgetRow {
            quantity: "fit of beta against the peak drive voltage",
            evaluation: "A",
            distribution: "the fit's standard uncertainty",
            standard_uncertainty: inputs.fit_uncertainty.0,
            unit: "V",
            sensitivity_volts_per_unit: 1.0,
            contribution_volts: inputs.fit_uncertainty.0,
        },
        BudgetRow {
            quantity: "drive chain gain",
            evaluation: "B",
            distribution: "standard uncertainty as stated",
            standard_uncertainty: inputs.chain_uncertainty.0,
            unit: "dB",
            sensitivity_volts_per_unit: per_db,
            contribution_volts: per_db * inputs.chain_uncertainty.0,
        },
        BudgetRow {
            quantity: "generator level accuracy",
            evaluation: "B",
            distribution: "rectangular, +/- limit / sqrt(3)",
            standard_uncertainty: source_standard,
            unit: "dB",
            sensitivity_volts_per_unit: per_db,
            contribution_volts: per_db * source_standard,
        },
    ];
    let combined = rows
        .iter()
        .map(|r| r.contribution_volts.powi(2))
        .sum::<f64>()
        .sqrt();
    Some(VpiBudget {
        v_pi_volts: inputs.v_pi.0,
        rows,
        combined_standard_uncertainty_volts: combined,
        coverage_factor: COVERAGE_FACTOR,
        expanded_uncertainty_volts: COVERAGE_FACTOR * combined,
    })
}

/// The chain's standard uncertainty at `f` from a calibration table's per-frequency values
/// (`(frequency, uncertainty)`, sorted by frequency, `None` where the table states none): the
/// larger of the two entries that bracket `f` (an interpolated gain is no better known than
/// either end; no credit is taken for interpolation), the end entry's beyond the table's ends,
/// the entry's own at a tabulated frequency. `None` when an entry it needs states none.
pub fn chain_uncertainty_at(table: &[(Hz, Option<Db>)], f: Hz) -> Option<Db> {
    let above = table.partition_point(|(frequency, _)| frequency.0 <= f.0);
    let below = above.checked_sub(1).map(|i| table[i]);
    match (below, table.get(above).copied()) {
        (Some((frequency, u)), _) if frequency.0 == f.0 => u,
        (Some((_, lo)), Some((_, hi))) => Some(Db(lo?.0.max(hi?.0))),
        (Some((_, only)), None) | (None, Some((_, only))) => only,
        (None, None) => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn chain_uncertainty_takes_the_larger_bracketing_entry_and_holds_at_the_ends() {
        let table = [
            (Hz(1e9), Some(Db(0.05))),
            (Hz(2e9), Some(Db(0.08))),
            (Hz(3e9), None),
        ];
        assert_eq!(chain_uncertainty_at(&table, Hz(1e9)), Some(Db(0.05)));
        assert_eq!(chain_uncertainty_at(&table, Hz(1.5e9)), Some(Db(0.08)));
        assert_eq!(chain_uncertainty_at(&table, Hz(0.5e9)), Some(Db(0.05)));
        assert_eq!(chain_uncertainty_at(&table, Hz(2e9)), Some(Db(0.08)));
        // An entry that states none leaves the neighbourhood unknown, never zero.
        assert_eq!(chain_uncertainty_at(&table, Hz(2.5e9)), None);
        assert_eq!(chain_uncertainty_at(&table, Hz(4e9)), None);
        assert_eq!(chain_uncertainty_at(&[], Hz(1e9)), None);
    }

    #[test]
    fn a_tenth_of_a_decibel_of_chain_error_is_1_15_percent_of_v_pi() {
        // V_pk is proportional to 10^(L/20): 0.1 dB is a factor 10^(0.005) = 1.011579 (definition
        // of the decibel), i.e. 1.16 % to first order, ln(10)/200 = 1.1513 %.
        let b = v_pi_budget(BudgetInputs {
            v_pi: VoltsPeak(4.0),
            fit_uncertainty: VoltsPeak(0.0),
            chain_uncertainty: Db(0.1),
            source_level_accuracy: Db(0.0),
        })
        .unwrap();
        let relative = b.combined_standard_uncertainty_volts / 4.0;
        assert!((relative - 0.011_512_925).abs() < 1e-9, "{relative}");
        assert!((10f64.powf(0.005) - 1.0 - relative).abs() < 1e-4);
    }

    #[test]
    fn inputs_combine_in_quadrature_with_a_rectangular_source_term() {
        // GUM 4.3.7: a +/- a limit read as rectangular has u = a / sqrt(3); GUM 5.1.2: the
        // combined standard uncertainty is the root sum of squares of the contributions.
        // Worked by hand: V_pi = 5 V, fit 0.03 V, chain 0.05 dB, source +/- 0.5 dB.
        // per dB: 5 x 0.115129255 = 0.575646273 V; chain 0.028782314 V; source
        // 0.5 / 1.732050808 = 0.288675135 dB -> 0.166174765 V; combined
        // sqrt(0.03^2 + 0.028782314^2 + 0.166174765^2) = 0.171296451 V.
        let b = v_pi_budget(BudgetInputs {
            v_pi: VoltsPeak(5.0),
            fit_uncertainty: VoltsPeak(0.03),
            chain_uncertainty: Db(0.05),
            source_level_accuracy: Db(0.5),
        })
        .unwrap();
        assert_eq!(b.rows.len(), 3);
        assert!((b.rows[1].contribution_volts - 0.028_782_314).abs() < 1e-8);
        assert!((b.rows[2].standard_uncertainty - 0.288_675_135).abs() < 1e-8);
        assert!((b.rows[2].contribution_volts - 0.166_174_765).abs() < 1e-8);
        assert!((b.combined_standard_uncertainty_volts - 0.171_296_451).abs() < 1e-8);
        assert_eq!(
            b.expanded_uncertainty_volts,
            2.0 * b.combined_standard_uncertainty_volts
        );
        assert!(v_pi_budget(BudgetInputs {
            chain_uncertainty: Db(-0.1),
            ..BudgetInputs {
                v_pi: VoltsPeak(5.0),
                fit_uncertainty: VoltsPeak(0.03),
                chain_uncertainty: Db(0.05),
                source_level_accuracy: Db(0.5),
            }
        })
        .is_none());
    }

    /// README's worked figures ("V_pi's uncertainty budget"): the demo's 0.2 GHz result, 3.3241 V
    /// with 0.0034 V from the fit (the demo's printed table), with 0.05 dB for the chain and
    /// +/- 0.5 dB for the generator gives contributions of 0.003 V, 0.019 V and 0.110 V, 0.112 V
    /// combined and 0.224 V expanded. By hand (GUM 4.3.7, 5.1.2): 3.3241 x ln(10)/20 = 0.38271 V
    /// per dB; x 0.05 = 0.01914 V; x 0.5/sqrt(3) = 0.11048 V; sqrt(0.0034^2 + 0.01914^2 +
    /// 0.11048^2) = 0.11218 V.
    #[test]
    fn the_readme_worked_budget_holds() {
        let budget = v_pi_budget(BudgetInputs {
            v_pi: VoltsPeak(3.3241),
            fit_uncertainty: VoltsPeak(0.0034),
            chain_uncertainty: Db(0.05),
            source_level_accuracy: Db(0.5),
        })
        .unwrap();
        let contributions: Vec<f64> = budget.rows.iter().map(|r| r.contribution_volts).collect();
        let rounded = |v: f64| (v * 1000.0).round() / 1000.0;
        assert_eq!(
            contributions
                .iter()
                .map(|c| rounded(*c))
                .collect::<Vec<_>>(),
            [0.003, 0.019, 0.110],
            "{contributions:?}"
        );
        assert!(
            (contributions[1] - 0.01914).abs() < 1e-5,
            "{contributions:?}"
        );
        assert!(
            (contributions[2] - 0.11048).abs() < 1e-5,
            "{contributions:?}"
        );
        assert!((budget.combined_standard_uncertainty_volts - 0.11218).abs() < 1e-5);
        assert_eq!(rounded(budget.combined_standard_uncertainty_volts), 0.112);
        assert_eq!(rounded(budget.expanded_uncertainty_volts), 0.224);
    }
}
