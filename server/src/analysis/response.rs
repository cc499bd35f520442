//! V_pi versus frequency: the modulator's electro-optic response.
//!
//! The response in dB is 20 log10(V_pi(f_ref) / V_pi(f)) with the lowest measured frequency as
//! the reference (a voltage ratio, hence 20 log10): 0 dB at the reference, negative where the
//! modulator needs more voltage for the same phase. The frequencies where it first falls by 3 dB
//! and 6 dB are interpolated linearly between the measured frequencies that bracket them; a
//! response that never falls that far gives `None` rather than an extrapolated guess.

use super::AnalysisError;
use halfwave_units::{Hz, VoltsPeak};
use serde::{Deserialize, Serialize};

/// V_pi measured at one drive frequency.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct VpiAtFrequency {
    #[serde(rename = "frequency_hz")]
    pub frequency: Hz,
    #[serde(rename = "v_pi_volts")]
    pub v_pi: VoltsPeak,
    #[serde(rename = "v_pi_uncertainty_volts")]
    pub uncertainty: VoltsPeak,
}

/// One point of the response curve.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ResponsePoint {
    pub frequency_hz: Hz,
    pub v_pi_volts: VoltsPeak,
    /// 20 log10(V_pi(f_ref) / V_pi(f)).
    pub response_db: f64,
    /// Standard uncertainty of `response_db`, from both V_pi uncertainties.
    pub response_uncertainty_db: f64,
}

/// The electro-optic response over the measured frequencies.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ResponseCurve {
    pub reference_frequency_hz: Hz,
    pub points: Vec<ResponsePoint>,
    /// Where the response first falls to -3 dB.
    pub f_3db_hz: Option<Hz>,
    /// Where the response first falls to -6 dB.
    pub f_6db_hz: Option<Hz>,
}

/// 20 / ln 10: converts a relative voltage uncertainty to dB.
const DB_PER_RELATIVE: f64 = 20.0 / std::f64::consts::LN_10;

/// Builds the response curve; the points may come in any order.
pub fn response_curve(points: &[VpiAtFrequency]) -> Result<ResponseCurve, AnalysisError> {
    if points.is_empty() {
        return Err(AnalysisError::BadResponse(
            "no V_pi values; measure V_pi at one frequency or more".into(),
        ));
    }
    for p in points {
        let valid = p.frequency.0.is_finite()
            && p.frequency.0 >= 0.0
            && p.v_pi.0.is_finite()
            && p.v_pi.0 > 0.0
            && p.uncertainty.0.is_finite()
            && p.uncertainty.0 >= 0.0;
        if !valid {
            return Err(AnalysisError::BadResponse(format!(
                "the point at {} has V_pi {} +- {}; frequencies must be finite, V_pi positive and the uncertainty not negative",
                p.frequency, p.v_pi, p.uncertainty
            )));
        }
    }
    let mut sorted = points.to_vec();
    sorted.sort_by(|a, b| a.frequency.0.total_cmp(&b.frequency.0));
    if let Some(pair) = sorted.windows(2).find(|w| w[0].frequency == w[1].frequency) {
        return Err(AnalysisError::BadResponse(format!(
            "two V_pi values at {}; combine them into one before building the curve",
            pair[0].frequency
        )));
    }
    let reference = sorted[0];
    let reference_relative = reference.uncertainty.0 / reference.v_pi.0;
    let curve: Vec<ResponsePoint> = sorted
        .iter()
        .enumerate()
        .map(|(i, p)| {
            let relative = p.uncertainty.0 / p.v_pi.0;
            // The reference point's own response is 0 dB exactly; others carry both uncertainties.
            let combined = if i == 0 {
                0.0
            } else {
                (relative.powi(2) + reference_relative.powi(2)).sqrt()
            };
            ResponsePoint {
                frequency_hz: p.frequency,
                v_pi_volts: p.v_pi,
                response_db: 20.0 * (reference.v_pi.0 / p.v_pi.0).log10(),
                response_uncertainty_db: DB_PER_RELATIVE * combined,
            }
        })
        .collect();
    Ok(ResponseCurve {
        reference_frequency_hz: reference.frequency,
        f_3db_hz: first_crossing(&curve, -3.0),
        f_6db_hz: first_crossing(&curve, -6.0),
        points: curve,
    })
}

/// The first frequency where the response falls to `level` dB, by linear interpolation.
fn first_crossing(curve: &[ResponsePoint], level: f64) -> Option<Hz> {
    curve.windows(2).find_map(|pair| {
        let (a, b) = (pair[0], pair[1]);
        (a.response_db > level && b.response_db <= level).then(|| {
            let t = (a.response_db - level) / (a.response_db - b.response_db);
            Hz(a.frequency_hz.0 + t * (b.frequency_hz.0 - a.frequency_hz.0))
        })
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn at(ghz: f64, v_pi: f64) -> VpiAtFrequency {
        VpiAtFrequency {
            frequency: Hz::from_ghz(ghz),
            v_pi: VoltsPeak(v_pi),
            uncertainty: VoltsPeak(0.01 * v_pi),
        }
    }

    #[test]
    fn doubling_v_pi_is_minus_6_02_db() {
        // A voltage ratio of 2 is 20 log10(2) = 6.0206 dB (definition of the decibel).
        let curve = response_curve(&[at(10.0, 8.0), at(1.0, 4.0)]).unwrap();
        assert_eq!(curve.reference_frequency_hz, Hz::from_ghz(1.0));
        assert!((curve.points[1].response_db + 6.0206).abs() < 1e-4);
        assert_eq!(curve.points[0].response_db, 0.0);
        // 1 % on each V_pi: sqrt(2) % combined, 20/ln10 * 0.01414 = 0.1228 dB.
        assert!((curve.points[1].response_uncertainty_db - 0.1228).abs() < 1e-3);
    }

    #[test]
    fn finds_the_3_and_6_db_frequencies() {
        // A response falling linearly by 0.5 dB per GHz from 1 GHz reaches -3 dB at 7 GHz and
        // -6 dB at 13 GHz (exact for linear interpolation of a linear response).
        let v_ref = 3.5;
        let points: Vec<VpiAtFrequency> = (0..20)
            .map(|k| {
                let ghz = 1.0 + 1.7 * k as f64;
                let response_db = -0.5 * (ghz - 1.0);
                at(ghz, v_ref * 10f64.powf(-response_db / 20.0))
            })
            .collect();
        let curve = response_curve(&points).unwrap();
        assert!((curve.f_3db_hz.unwrap().ghz() - 7.0).abs() < 1e-9);
        assert!((curve.f_6db_hz.unwrap().ghz() - 13.0).abs() < 1e-9);
    }

    #[test]
    fn a_flat_response_has_no_corner() {
        let curve = response_curve(&[at(1.0, 4.0), at(5.0, 4.4), at(9.0, 4.9)]).unwrap();
        assert!(curve.f_3db_hz.is_none() && curve.f_6db_hz.is_none());
        assert!((curve.points[2].response_db - 20.0 * (4.0f64 / 4.9).log10()).abs() < 1e-12);
    }

    #[test]
    fn refuses_bad_points() {
        assert!(response_curve(&[]).is_err());
        assert!(response_curve(&[at(1.0, 0.0)]).is_err());
        assert!(response_curve(&[at(1.0, 4.0), at(1.0, 4.1)]).is_err());
    }
}
