//! Whether two measurements of one quantity agree: the difference, its combined standard
//! uncertainty, and the normalised error E_n used in proficiency testing.
//!
//! E_n = (b - a) / sqrt(U_a² + U_b²) with expanded uncertainties U = k·u at k = 2; |E_n| <= 1
//! counts as agreement, |E_n| > 1 as a significant difference (ISO 13528:2015, the E_n number;
//! ISO/IEC 17043 uses the same criterion; clause numbers from memory, so not cited). The two
//! uncertainties are treated as independent. For two runs through the same drive chain that is
//! cautious: the chain's calibration error is common to both and cancels in the difference, so
//! the true combined uncertainty is smaller and a difference flagged here is there all the more.

/// Coverage factor of the expanded uncertainties in E_n (about 95 % for a normal distribution).
pub const COVERAGE_FACTOR: f64 = 2.0;

/// Two measurements compared.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Agreement {
    /// b - a, in the measurements' unit.
    pub difference: f64,
    /// sqrt(u_a² + u_b²), standard (k = 1).
    pub combined_standard_uncertainty: f64,
    /// E_n, see the module documentation.
    pub normalized_error: f64,
    /// |E_n| > 1.
    pub significant: bool,
}

/// Compares `b ± u_b` with `a ± u_a` (standard uncertainties). `None` when a value or an
/// uncertainty is not finite, an uncertainty is negative, or both are zero (E_n is undefined).
pub fn agreement(a: f64, u_a: f64, b: f64, u_b: f64) -> Option<Agreement> {
    if ![a, u_a, b, u_b].iter().all(|v| v.is_finite()) || u_a < 0.0 || u_b < 0.0 {
        return None;
    }
    let combined = u_a.hypot(u_b);
    if combined == 0.0 {
        return None;
    }
    let difference = b - a;
    let normalized_error = difference / (COVERAGE_FACTOR * combined);
    Some(Agreement {
        difference,
        combined_standard_uncertainty: combined,
        normalized_error,
        significant: normalized_error.abs() > 1.0,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_normalised_error_of_a_hand_worked_pair() {
        // Worked by hand: u_a = 0.003 V, u_b = 0.004 V combine to 0.005 V (a 3-4-5 triangle);
        // U = 2 x 0.005 = 0.010 V. A difference of 0.008 V gives E_n = 0.8 (agree), 0.012 V
        // gives E_n = 1.2 (significant), and the sign follows b - a.
        let agree = agreement(3.000, 0.003, 3.008, 0.004).expect("defined");
        assert!((agree.combined_standard_uncertainty - 0.005).abs() < 1e-15);
        assert!((agree.normalized_error - 0.8).abs() < 1e-9);
        assert!(!agree.significant);
        let differ = agreement(3.000, 0.003, 2.988, 0.004).expect("defined");
        assert!((differ.normalized_error + 1.2).abs() < 1e-9);
        assert!(differ.significant);
    }

    #[test]
    fn undefined_comparisons_are_refused() {
        assert!(agreement(3.0, 0.0, 3.1, 0.0).is_none());
        assert!(agreement(3.0, -0.01, 3.1, 0.01).is_none());
        assert!(agreement(f64::NAN, 0.01, 3.1, 0.01).is_none());
    }
}
