//! Whether a trace's modulation index can be promised within 1 %, and a named warning when it
//! cannot.
//!
//! The fit's combined standard uncertainty is honest (the randomised study and the repeated-draw
//! probe in `tests/measurement_truth.rs` show |error| <= 2u on about 99 % of traces), so a trace
//! whose relative standard uncertainty is at most a third of 1 % gives beta within 1 % at three
//! standard uncertainties (about 99.7 % for a normal error). A trace beyond that (a small index
//! under display noise, lines sampled at about one point per width, a shape the trace cannot
//! pin down) still gives its beta and uncertainty, which the V_pi fit weighs as it should, but
//! the analysis says so by name and says what limits it: the trace's noise, the reference's
//! noise or the line-shape term.

use super::fit::WholeTraceFit;
use serde::Serialize;

/// Largest relative standard uncertainty of beta for which the analysis promises beta within
/// 1 % without a warning: 1 % at a coverage factor of 3.
pub const PROMISED_RELATIVE_UNCERTAINTY: f64 = 0.01 / 3.0;

/// A named condition on a result that is still given: `code` is stable (snake case, for
/// programs), `message` is for the operator and says what to change.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AnalysisWarning {
    pub code: &'static str,
    pub message: String,
}

/// Beta's uncertainty by part, and what the analysis knew of the trace, when it judges the
/// precision.
#[derive(Debug, Clone, Copy)]
pub struct IndexPrecision {
    pub beta: f64,
    /// Standard uncertainties of beta: the trace's own scatter, the reference's display noise,
    /// the line-shape term, and the three combined.
    pub statistical: f64,
    pub reference: f64,
    pub line_shape: f64,
    pub combined: f64,
    /// Points across the fitted line width (FWHM).
    pub points_per_line_width: f64,
    /// Display noise between the lines, dB.
    pub noise_sigma_db: f64,
}

impl IndexPrecision {
    /// The parts of `fit`'s uncertainty, on a trace sampled at `points_per_line_width` with
    /// display noise `noise_sigma_db`.
    pub fn of_fit(fit: &WholeTraceFit, points_per_line_width: f64, noise_sigma_db: f64) -> Self {
        IndexPrecision {
            beta: fit.modulation_index,
            statistical: fit.uncertainty_statistical,
            reference: fit.uncertainty_reference,
            line_shape: fit.uncertainty_line_shape,
            combined: fit.uncertainty_combined,
            points_per_line_width,
            noise_sigma_db,
        }
    }

    /// The warning for a beta that cannot be promised within 1 %, or `None`.
    pub fn warning(&self) -> Option<AnalysisWarning> {
        let beta = self.beta.abs();
        let relative = self.combined / beta;
        if relative <= PROMISED_RELATIVE_UNCERTAINTY {
            return None;
        }
        let advice = if self.reference >= self.statistical.max(self.line_shape) {
            "the RF-off reference's display noise dominates: average the reference trace, or \
             record it with more points per line width so that its shape is smoothed"
                .to_string()
        } else if self.line_shape >= self.statistical {
            "the line-shape term dominates: give an RF-off reference trace with at least 8 points \
             per line width so that the analyzer's own line shape is used"
                .to_string()
        } else {
            let mut causes = Vec::new();
            if beta < 0.3 {
                causes.push(format!(
                    "the index is small ({beta:.3}): raise the drive level"
                ));
            }
            if self.points_per_line_width < 3.0 {
                causes.push(format!(
                    "the lines are sampled at {:.1} points per width: record more points over \
                     the span or narrow it",
                    self.points_per_line_width
                ));
            }
            if self.noise_sigma_db > 0.05 {
                causes.push(format!(
                    "the display noise is {:.2} dB: average more sweeps",
                    self.noise_sigma_db
                ));
            }
            if causes.is_empty() {
                causes.push("raise the drive level or average more sweeps".to_string());
            }
            format!("the trace's own scatter dominates; {}", causes.join("; "))
        };
        let percent = |u: f64| 100.0 * u / beta;
        Some(AnalysisWarning {
            code: "index_not_within_one_percent",
            message: format!(
                "beta {:.5} has a standard uncertainty of {:.2} % (trace {:.2} %, reference {:.2} \
                 %, line shape {:.2} %), more than the {:.2} % that keeps it within 1 % at three \
                 standard uncertainties; {advice}",
                self.beta,
                percent(self.combined),
                percent(self.statistical),
                percent(self.reference),
                percent(self.line_shape),
                100.0 * PROMISED_RELATIVE_UNCERTAINTY,
            ),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn precision(statistical: f64, reference: f64, line_shape: f64) -> IndexPrecision {
        IndexPrecision {
            beta: 0.2,
            statistical,
            reference,
            line_shape,
            combined: (statistical.powi(2) + reference.powi(2) + line_shape.powi(2)).sqrt(),
            points_per_line_width: 1.2,
            noise_sigma_db: 0.1,
        }
    }

    #[test]
    fn a_beta_within_a_third_of_one_percent_carries_no_warning() {
        // 0.2 * 0.0033 = 6.6e-4, just under the limit (6.67e-4).
        assert_eq!(precision(6.6e-4, 0.0, 0.0).warning(), None);
        let warned = precision(6.8e-4, 0.0, 0.0)
            .warning()
            .expect("over the limit");
        assert_eq!(warned.code, "index_not_within_one_percent");
        assert!(warned.message.contains("0.34 %"), "{}", warned.message);
    }

    #[test]
    fn the_warning_names_the_part_that_dominates_and_what_to_change() {
        let trace = precision(2e-3, 1e-4, 2e-4).warning().unwrap().message;
        assert!(trace.contains("trace's own scatter"), "{trace}");
        assert!(trace.contains("raise the drive level"), "{trace}");
        assert!(trace.contains("1.2 points per width"), "{trace}");
        assert!(trace.contains("0.10 dB"), "{trace}");
        let reference = precision(1e-4, 2e-3, 2e-4).warning().unwrap().message;
        assert!(reference.contains("average the reference"), "{reference}");
        let shape = precision(1e-4, 1e-4, 2e-3).warning().unwrap().message;
        assert!(shape.contains("line-shape term"), "{shape}");
    }
}
