//! V_pi at one frequency from a drive-level sweep.
//!
//! beta = (pi / V_pi) V_pk: the modulation index grows in proportion to the peak drive voltage,
//! so V_pi comes from a straight-line fit through the origin, weighted by each beta's
//! uncertainty. Real sweeps break the line: an amplifier compresses or heats at the top levels, a
//! line lost in the floor or a wrong chain entry throws one point off. Such points are found
//! against a robust first slope (the median of beta / V_pk), flagged with the reason, and left
//! out of the fit; what remains gives V_pi with its standard uncertainty, inflated by the Birge
//! ratio sqrt(chi^2 / (n - 1)) when the points scatter more than their stated uncertainties
//! (common practice). When the sweep brackets the carrier null (beta = 2.4048, DLMF 10.21), the
//! drive voltage at the null gives a second, independent V_pi.

use super::bessel::J0_FIRST_ZERO;
use super::fit::{SHAPE_SYSTEMATIC_MEASURED, SHAPE_SYSTEMATIC_PARAMETRIC};
use super::AnalysisError;
use halfwave_units::VoltsPeak;
use serde::Serialize;
use std::f64::consts::PI;

/// No point's standard uncertainty is taken below this fraction of its beta (the line-shape term
/// of the trace fit, [`SHAPE_SYSTEMATIC_MEASURED`]): a point whose noise happens to be tiny, such
/// as one near the carrier null, cannot carry the fit alone.
pub const POINT_UNCERTAINTY_FLOOR_RELATIVE: f64 = SHAPE_SYSTEMATIC_MEASURED;
/// The line-shape term is common to every point of a sweep (one reference trace, one shape
/// model at one frequency): it does not average down over the points, so it enters V_pi's
/// uncertainty as a fully correlated relative term (GUM, JCGM 100:2008, 5.2), at the larger of
/// the two shape terms since the sweep does not say which shape its traces used.
pub const V_PI_LINE_SHAPE_RELATIVE: f64 = SHAPE_SYSTEMATIC_PARAMETRIC;
/// ... nor below this absolute value of beta.
const POINT_UNCERTAINTY_FLOOR_ABSOLUTE: f64 = 1e-5;

/// A point is off the line when it misses by more than this many standard uncertainties...
const OUTLIER_SIGMAS: f64 = 4.0;
/// ...and by more than this fraction of the line's value (a model tolerance, so that very precise
/// points are not thrown out for tiny curvature of the chain calibration).
const OUTLIER_FRACTION: f64 = 0.02;

/// One measured point of a drive sweep.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DrivePoint {
    /// Peak drive voltage at the modulator.
    #[serde(rename = "v_peak_volts")]
    pub v_peak: VoltsPeak,
    /// Measured modulation index.
    pub modulation_index: f64,
    /// Its standard uncertainty.
    #[serde(rename = "modulation_index_uncertainty")]
    pub uncertainty: f64,
}

/// A point left out of the fit, and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ExcludedPoint {
    /// Position in the input.
    pub index: usize,
    pub reason: String,
}

/// V_pi from the drive voltage at which the carrier vanishes.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CarrierNull {
    /// Peak drive voltage where beta crosses 2.4048 (interpolated between the bracketing points).
    pub v_peak_volts: VoltsPeak,
    /// pi V_null / 2.4048.
    pub v_pi_volts: VoltsPeak,
}

/// The result of the sweep fit.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VpiFit {
    #[serde(rename = "v_pi_volts")]
    pub v_pi: VoltsPeak,
    /// Combined standard uncertainty: the fit's (inflated when the points disagree) and the
    /// correlated line-shape term, in quadrature.
    #[serde(rename = "v_pi_uncertainty_volts")]
    pub v_pi_uncertainty: VoltsPeak,
    /// The fit's part alone.
    pub v_pi_uncertainty_statistical_volts: VoltsPeak,
    /// The line-shape part alone ([`V_PI_LINE_SHAPE_RELATIVE`] of V_pi).
    pub v_pi_uncertainty_line_shape_volts: VoltsPeak,
    /// pi / V_pi, the modulation index per volt of peak drive.
    pub index_per_volt: f64,
    /// chi^2 / (n - 1) of the used points (with the floored uncertainties).
    pub reduced_chi_squared: f64,
    /// Factor applied to the slope's uncertainty: sqrt(reduced chi^2) when above 1 (the points
    /// disagree more than their uncertainties say), else 1.
    pub uncertainty_inflation: f64,
    /// The floor put under each point's relative uncertainty.
    pub point_uncertainty_floor_relative: f64,
    /// Index (in the input) of the point with the largest weight in the slope, and its share of
    /// the total weight (w V^2 / sum w V^2).
    pub heaviest_point: Option<usize>,
    pub heaviest_weight_share: f64,
    /// Indices of the points in the fit.
    pub used: Vec<usize>,
    pub excluded: Vec<ExcludedPoint>,
    pub carrier_null: Option<CarrierNull>,
}

/// Fits beta = (pi / V_pi) V_pk through the origin over a drive sweep.
pub fn fit_v_pi(points: &[DrivePoint]) -> Result<VpiFit, AnalysisError> {
    let floored: Vec<DrivePoint> = points
        .iter()
        .map(|p| DrivePoint {
            uncertainty: p
                .uncertainty
                .max(POINT_UNCERTAINTY_FLOOR_RELATIVE * p.modulation_index.abs())
                .max(POINT_UNCERTAINTY_FLOOR_ABSOLUTE),
            ..*p
        })
        .collect();
    let original = points;
    let points = &floored[..];
    let mut excluded = Vec::new();
    let mut usable = Vec::with_capacity(points.len());
    for (index, p) in original.iter().enumerate() {
        let valid = p.v_peak.0.is_finite()
            && p.v_peak.0 > 0.0
            && p.modulation_index.is_finite()
            && p.modulation_index >= 0.0
            && p.uncertainty.is_finite()
            && p.uncertainty > 0.0;
        if valid {
            usable.push(index);
        } else {
            excluded.push(ExcludedPoint {
                index,
                reason: format!(
                    "not a usable measurement (V_pk {}, beta {}, uncertainty {}): each needs a positive \
                     drive voltage, a non-negative index and a positive uncertainty",
                    p.v_peak, p.modulation_index, p.uncertainty
                ),
            });
        }
    }
    if usable.len() < 2 {
        return Err(AnalysisError::BadSweep(format!(
            "{} usable point(s) of {}; at least two drive levels with a measured modulation index are needed",
            usable.len(),
            points.len()
        )));
    }

    // Robust first slope, then fit and re-classify until the set is stable.
    let mut ratios: Vec<f64> = usable
        .iter()
        .map(|&i| points[i].modulation_index / points[i].v_peak.0)
        .collect();
    ratios.sort_by(f64::total_cmp);
    let mut slope = ratios[ratios.len() / 2];
    let mut voltages: Vec<f64> = usable.iter().map(|&i| points[i].v_peak.0).collect();
    voltages.sort_by(f64::total_cmp);
    let median_voltage = voltages[voltages.len() / 2];
    let mut used: Vec<usize> = usable.clone();
    for _ in 0..10 {
        let next: Vec<usize> = usable
            .iter()
            .copied()
            .filter(|&i| off_the_line(&points[i], slope).is_none())
            .collect();
        if next.len() < 2 {
            break;
        }
        let (fitted, _) = weighted_slope(points, &next);
        let stable = next == used && (fitted - slope).abs() <= 1e-12 * slope.abs();
        used = next;
        slope = fitted;
        if stable {
            break;
        }
    }
    if used.len() < 2 {
        return Err(AnalysisError::BadSweep(
            "fewer than two points lie on a common line through the origin; check the drive chain and the traces"
                .into(),
        ));
    }
    let (slope, slope_sigma) = weighted_slope(points, &used);
    if slope <= 0.0 {
        return Err(AnalysisError::BadSweep(
            "the modulation index does not grow with drive voltage; check that RF reaches the modulator".into(),
        ));
    }
    for &i in usable.iter().filter(|i| !used.contains(i)) {
        let p = &points[i];
        let miss = (p.modulation_index - slope * p.v_peak.0) / (slope * p.v_peak.0);
        let percent = 100.0 * miss.abs();
        let reason = if miss < 0.0 && p.v_peak.0 >= median_voltage {
            format!(
                "beta {:.4} is {percent:.1} % below the line at a high drive level ({}): amplifier compression or heating",
                p.modulation_index, p.v_peak
            )
        } else if miss < 0.0 {
            format!(
                "beta {:.4} is {percent:.1} % below the line: a line lost in the floor or a wrong chain entry",
                p.modulation_index
            )
        } else {
            format!(
                "beta {:.4} is {percent:.1} % above the line: a misidentified comb order or a wrong chain entry",
                p.modulation_index
            )
        };
        excluded.push(ExcludedPoint { index: i, reason });
    }
    excluded.sort_by_key(|e| e.index);
    let chi2: f64 = used
        .iter()
        .map(|&i| {
            let p = &points[i];
            ((p.modulation_index - slope * p.v_peak.0) / p.uncertainty).powi(2)
        })
        .sum();
    let reduced = chi2 / (used.len() - 1) as f64;
    let inflation = reduced.max(1.0).sqrt();
    let slope_sigma = slope_sigma * inflation;
    let weights: Vec<(usize, f64)> = used
        .iter()
        .map(|&i| (i, (points[i].v_peak.0 / points[i].uncertainty).powi(2)))
        .collect();
    let total: f64 = weights.iter().map(|w| w.1).sum();
    let heaviest = weights.iter().copied().max_by(|a, b| a.1.total_cmp(&b.1));
    let v_pi = PI / slope;
    let statistical = PI * slope_sigma / (slope * slope);
    let line_shape = V_PI_LINE_SHAPE_RELATIVE * v_pi;
    Ok(VpiFit {
        v_pi_uncertainty_statistical_volts: VoltsPeak(statistical),
        v_pi_uncertainty_line_shape_volts: VoltsPeak(line_shape),
        uncertainty_inflation: inflation,
        point_uncertainty_floor_relative: POINT_UNCERTAINTY_FLOOR_RELATIVE,
        heaviest_point: heaviest.map(|h| h.0),
        heaviest_weight_share: heaviest.map_or(0.0, |h| h.1 / total),
        v_pi: VoltsPeak(v_pi),
        v_pi_uncertainty: VoltsPeak(statistical.hypot(line_shape)),
        index_per_volt: slope,
        reduced_chi_squared: reduced,
        carrier_null: carrier_null(points, &used),
        used,
        excluded,
    })
}

/// The relative miss of a point from the line, when it is off by both criteria.
fn off_the_line(p: &DrivePoint, slope: f64) -> Option<f64> {
    let expected = slope * p.v_peak.0;
    let miss = p.modulation_index - expected;
    (miss.abs() > OUTLIER_SIGMAS * p.uncertainty && miss.abs() > OUTLIER_FRACTION * expected)
        .then_some(miss / expected)
}

/// Weighted least-squares slope through the origin and its standard uncertainty
/// (k = sum w V beta / sum w V^2, sigma_k = 1 / sqrt(sum w V^2), w = 1 / sigma_beta^2).
fn weighted_slope(points: &[DrivePoint], used: &[usize]) -> (f64, f64) {
    let (mut svb, mut svv) = (0.0, 0.0);
    for &i in used {
        let p = &points[i];
        let w = 1.0 / (p.uncertainty * p.uncertainty);
        svb += w * p.v_peak.0 * p.modulation_index;
        svv += w * p.v_peak.0 * p.v_peak.0;
    }
    (svb / svv, 1.0 / svv.sqrt())
}

fn carrier_null(points: &[DrivePoint], used: &[usize]) -> Option<CarrierNull> {
    let mut sorted: Vec<&DrivePoint> = used.iter().map(|&i| &points[i]).collect();
    sorted.sort_by(|a, b| a.v_peak.0.total_cmp(&b.v_peak.0));
    sorted.windows(2).find_map(|pair| {
        let (a, b) = (pair[0], pair[1]);
        let brackets = a.modulation_index < J0_FIRST_ZERO && b.modulation_index >= J0_FIRST_ZERO;
        brackets.then(|| {
            let t =
                (J0_FIRST_ZERO - a.modulation_index) / (b.modulation_index - a.modulation_index);
            let v_null = a.v_peak.0 + t * (b.v_peak.0 - a.v_peak.0);
            CarrierNull {
                v_peak_volts: VoltsPeak(v_null),
                v_pi_volts: VoltsPeak(PI * v_null / J0_FIRST_ZERO),
            }
        })
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::chain::DriveChain;
    use crate::analysis::synthetic::SyntheticComb;
    use crate::analysis::{analyze_trace, AnalysisOptions};
    use halfwave_units::{Db, Dbm, Hz};
    use rand::{rngs::StdRng, Rng, SeedableRng};
    use rand_distr::{Distribution, Normal};

    /// Invented modulator for the tests.
    const V_PI: f64 = 4.2;

    fn ideal(v: f64, uncertainty: f64) -> DrivePoint {
        DrivePoint {
            v_peak: VoltsPeak(v),
            modulation_index: PI * v / V_PI,
            uncertainty,
        }
    }

    #[test]
    fn v_pi_from_a_nine_level_sweep_of_synthetic_traces() {
        // Nine generator levels 3 dB apart through a 2 dB chain; each trace drawn from the
        // Jacobi-Anger line powers with 0.3 dB noise and a drifting carrier, analysed, and the
        // fitted betas turned into V_pi (beta = pi V_pk / V_pi, domain primer). The sweep crosses
        // the carrier null, so the null gives V_pi a second way.
        let chain = DriveChain::flat_loss(Db(2.0));
        let spacing = Hz(2.0e9);
        let mut rng = StdRng::seed_from_u64(9);
        let noise = Normal::new(0.0, 0.3).unwrap();
        let points: Vec<DrivePoint> = (0..9)
            .map(|k| {
                let generator = Dbm(2.0 + 3.0 * k as f64);
                let v = chain.level_at_modulator(spacing, generator).to_volts_peak();
                let beta = PI * v.0 / V_PI;
                let drift = spacing * rng.random_range(-0.5..0.5);
                let synthetic =
                    SyntheticComb::centred(Hz(193.4e12), drift, spacing, beta, (beta + 5.5).ceil());
                let trace = synthetic.trace(&mut || noise.sample(&mut rng)).unwrap();
                let result =
                    analyze_trace(&trace, spacing, None, &AnalysisOptions::default()).unwrap();
                DrivePoint {
                    v_peak: v,
                    modulation_index: result.modulation_index.value,
                    uncertainty: result.modulation_index.uncertainty,
                }
            })
            .collect();
        let fit = fit_v_pi(&points).unwrap();
        assert!((fit.v_pi.0 - V_PI).abs() < 0.01 * V_PI, "{fit:?}");
        assert!(fit.v_pi_uncertainty.0 > 0.0 && fit.v_pi_uncertainty.0 < 0.01 * V_PI);
        assert!(fit.excluded.is_empty(), "{:?}", fit.excluded);
        let null = fit.carrier_null.unwrap();
        assert!((null.v_pi_volts.0 - V_PI).abs() < 0.02 * V_PI, "{null:?}");
    }

    #[test]
    fn flags_compression_and_a_stray_point() {
        let mut points: Vec<DrivePoint> = (1..=9).map(|k| ideal(0.4 * k as f64, 0.005)).collect();
        points[7].modulation_index *= 0.92; // top levels compressed
        points[8].modulation_index *= 0.85;
        points[3].modulation_index *= 1.2; // a misidentified order
        let fit = fit_v_pi(&points).unwrap();
        assert!((fit.v_pi.0 - V_PI).abs() < 1e-9, "{fit:?}");
        assert_eq!(fit.used, vec![0, 1, 2, 4, 5, 6]);
        let reasons: Vec<(usize, &str)> = fit
            .excluded
            .iter()
            .map(|e| (e.index, e.reason.as_str()))
            .collect();
        assert_eq!(reasons.len(), 3);
        assert!(reasons[0].1.contains("above the line"), "{reasons:?}");
        assert!(reasons[1].1.contains("compression"), "{reasons:?}");
        assert!(reasons[2].1.contains("compression"), "{reasons:?}");
    }

    #[test]
    fn uncertainty_follows_the_weighted_fit() {
        // Two exact points: k = sum w V b / sum w V^2, sigma_k = 1 / sqrt(sum w V^2) (weighted
        // least squares through the origin); V_pi = pi / k, sigma = pi sigma_k / k^2.
        let points = [ideal(1.0, 0.01), ideal(2.0, 0.02)];
        let fit = fit_v_pi(&points).unwrap();
        let svv: f64 = 1.0 / 0.01f64.powi(2) + 4.0 / 0.02f64.powi(2);
        let k = PI / V_PI;
        let expected = PI * (1.0 / svv.sqrt()) / (k * k);
        assert!(
            (fit.v_pi_uncertainty_statistical_volts.0 - expected).abs() < 1e-12 * expected.max(1.0)
        );
        // Combined with the correlated line-shape term in quadrature (GUM 5.1.2).
        let combined = expected.hypot(V_PI_LINE_SHAPE_RELATIVE * V_PI);
        assert!((fit.v_pi_uncertainty.0 - combined).abs() < 1e-9 * combined);
        assert!(fit.carrier_null.is_none());
    }

    #[test]
    fn no_single_point_carries_the_fit() {
        // Nine points with 0.2 % uncertainty, one of them (near the carrier null) claiming 1e-6
        // and biased by +1 %: without a floor it would hold 99.9 % of the weight and pull V_pi
        // 1 % off. With the floor (the line-shape term of the trace fit) its weight share is about
        // a half, the result moves half as far, and the reduced chi-squared exposes the
        // disagreement and inflates the uncertainty.
        let mut points: Vec<DrivePoint> = (1..=9).map(|k| ideal(0.35 * k as f64, 0.002)).collect();
        points[6].modulation_index *= 1.01;
        points[6].uncertainty = 1e-6;
        let fit = fit_v_pi(&points).unwrap();
        assert_eq!(fit.heaviest_point, Some(6));
        assert!((0.3..0.7).contains(&fit.heaviest_weight_share), "{fit:?}");
        assert!((fit.v_pi.0 - V_PI).abs() < 0.007 * V_PI, "{fit:?}");
        assert!(fit.reduced_chi_squared > 4.0, "{fit:?}");
        assert!(fit.uncertainty_inflation > 2.0, "{fit:?}");
        assert_eq!(
            fit.point_uncertainty_floor_relative,
            POINT_UNCERTAINTY_FLOOR_RELATIVE
        );
    }

    #[test]
    fn refuses_sweeps_without_two_good_points() {
        assert!(fit_v_pi(&[]).is_err());
        assert!(fit_v_pi(&[ideal(1.0, 0.01)]).is_err());
        let with_bad = [ideal(1.0, 0.01), ideal(f64::NAN, 0.01), ideal(2.0, 0.0)];
        assert!(matches!(
            fit_v_pi(&with_bad),
            Err(AnalysisError::BadSweep(_))
        ));
        let one_bad = [ideal(1.0, 0.01), ideal(2.0, 0.01), ideal(-1.0, 0.01)];
        let fit = fit_v_pi(&one_bad).unwrap();
        assert_eq!(fit.excluded.len(), 1);
        assert!(fit.excluded[0].reason.contains("not a usable measurement"));
    }
}
