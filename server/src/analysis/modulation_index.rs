//! The modulation index from measured line powers, three ways.
//!
//! - Least squares over all resolved orders (the primary): P_n = A J_n(beta)^2 + F with unknown
//!   scale A and floor F, weighted by each line's noise. A and F enter linearly, so for each trial
//!   beta they are solved in closed form (a 2x2 system) and only beta is searched: a scan over a
//!   grid fine enough to see every local minimum (step 0.02 up to 14), then a golden-section
//!   refinement of the best few. Scanning the whole range is what keeps the answer unambiguous
//!   past the carrier null, where ratios of two lines have several solutions.
//! - First sideband over carrier: P_1 / P_0 = (J_1 / J_0)^2, monotonic below the carrier null.
//! - Carrier depletion against an RF-off reference: P_0 / P_ref = J_0(beta)^2, solved on the
//!   monotonic branch that holds the least-squares value.
//!
//! Uncertainties: for the fit, from the curvature of the profiled residual scaled by the residual
//! variance (sigma^2 = 2 s^2 / S''); for the ratio methods, the line-power uncertainties
//! propagated through the slope of the Bessel ratio.

use super::bessel::{BesselTable, J0_FIRST_ZERO, MAX_ORDER, TABLE_STEP};
use super::comb::MeasuredLine;
use serde::Serialize;

/// Largest modulation index the fit considers.
pub const FIT_BETA_MAX: f64 = 14.0;
/// Grid step of the global scan, in table rows (2 rows = 0.02).
const SCAN_ROWS: usize = 2;
/// Local minima of the scan that are refined.
const REFINED_MINIMA: usize = 5;
/// Orders below the floor kept beyond the outermost detected line on each side: they tell the
/// fit that the comb ends there.
const ORDERS_PAST_LAST_LINE: i32 = 2;
/// Margin of the scan's upper end over the last detected order of a comb that ends in the span.
const BETA_CEILING_PAST_LAST_LINE: f64 = 4.0;

/// How an estimate was made.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum IndexMethod {
    /// The whole displayed trace fitted with the instrument's line shape ([`super::fit`]).
    WholeTraceFit,
    LeastSquares,
    SidebandRatio,
    CarrierDepletion,
}

/// One estimate of the modulation index.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct IndexEstimate {
    pub method: IndexMethod,
    /// beta.
    pub value: f64,
    /// Standard uncertainty of beta.
    pub uncertainty: f64,
    /// Root-mean-square difference, in dB, between the measured lines and the comb this beta
    /// predicts (scale and floor fitted) over the orders the least-squares fit uses.
    #[serde(rename = "residual_db")]
    pub residual: f64,
    /// Orders whose powers entered this estimate.
    pub orders_used: Vec<i32>,
}

/// Weighted sums of the lines, grouped by |n| (lines +n and -n share J_n^2).
#[derive(Debug, Clone, Default)]
struct Sums {
    /// Per |n| = 0..: sum of weights.
    weight: Vec<f64>,
    /// Per |n|: sum of weight * M.
    weighted_level: Vec<f64>,
    /// Sum of weight * M^2 over all lines and the floor observation.
    weighted_square: f64,
    /// Weight and weight * level of the floor observation.
    floor_weight: f64,
    floor_weighted_level: f64,
}

impl Sums {
    fn add(&mut self, magnitude: usize, level: f64, weight: f64) {
        if self.weight.len() <= magnitude {
            self.weight.resize(magnitude + 1, 0.0);
            self.weighted_level.resize(magnitude + 1, 0.0);
        }
        self.weight[magnitude] += weight;
        self.weighted_level[magnitude] += weight * level;
        self.weighted_square += weight * level * level;
    }

    /// An observation of the floor alone (its model has no line term).
    fn add_floor(&mut self, level: f64, weight: f64) {
        self.floor_weight += weight;
        self.floor_weighted_level += weight * level;
        self.weighted_square += weight * level * level;
    }

    /// Weighted residual sum minimised over scale A >= 0 and floor F >= 0, for line shapes
    /// `j(m)` = J_m(beta); returns (S, A, F).
    fn profile(&self, values: &[f64]) -> (f64, f64, f64) {
        let s1 = self.floor_weight + self.weight.iter().sum::<f64>();
        let sm = self.floor_weighted_level + self.weighted_level.iter().sum::<f64>();
        let (mut sg, mut sgg, mut sgm) = (0.0, 0.0, 0.0);
        // Orders past `values` (beyond the table) have J = 0 and add nothing.
        for ((v, w), wm) in values.iter().zip(&self.weight).zip(&self.weighted_level) {
            let g = v * v;
            sg += w * g;
            sgg += w * g * g;
            sgm += wm * g;
        }
        let smm = self.weighted_square;
        let det = sgg * s1 - sg * sg;
        if det > 1e-12 * sgg * s1 {
            let a = (sgm * s1 - sg * sm) / det;
            let f = (sgg * sm - sg * sgm) / det;
            if a >= 0.0 && f >= 0.0 {
                return (smm - a * sgm - f * sm, a, f);
            }
        }
        // A constraint is active: floor zero, or scale zero (the fit explains nothing).
        let with_scale = if sgg > 0.0 {
            let a = (sgm / sgg).max(0.0);
            (smm - a * sgm, a, 0.0)
        } else {
            (f64::INFINITY, 0.0, 0.0)
        };
        let f = if s1 > 0.0 { (sm / s1).max(0.0) } else { 0.0 };
        let floor_only = (smm - f * sm, 0.0, f);
        if with_scale.0 <= floor_only.0 {
            with_scale
        } else {
            floor_only
        }
    }
}

/// The lines prepared for fitting: total level M_n = line power + floor, and weight 1 / sigma_n^2.
///
/// A line lost in the floor at a Bessel zero pins beta to within a thousandth (the model must
/// put almost nothing there), so the full residual has valleys far narrower than any affordable
/// scan grid. The scan therefore runs on the detected lines only, whose residual varies smoothly,
/// and every candidate it finds is refined on all lines.
#[derive(Debug, Clone)]
pub struct FitData {
    /// (order, M_n in milliwatts, weight).
    points: Vec<(i32, f64, f64)>,
    /// Lines plus the floor observation.
    observations: usize,
    /// Largest beta the scan considers.
    beta_ceiling: f64,
    all: Sums,
    detected: Sums,
}

impl FitData {
    /// Selects the orders out to two past the outermost line above the floor and weights them.
    ///
    /// The floor measured between the lines enters as one more observation (a line with
    /// J^2 = 0) with standard uncertainty `floor_sigma_mw`: the floor stays a fitted unknown, but
    /// lines lost at a Bessel zero can no longer trade it against beta.
    pub fn new(lines: &[MeasuredLine], floor_mw: f64, floor_sigma_mw: f64) -> FitData {
        let reach = lines
            .iter()
            .filter(|l| l.above_floor)
            .map(|l| l.order.abs())
            .max()
            .unwrap_or(0)
            + ORDERS_PAST_LAST_LINE;
        let reach = reach.min(MAX_ORDER as i32);
        // Where the comb ends inside the span on a side, beta cannot be much above the last
        // detected order there (orders up to about beta carry a good share of the power).
        let side_ceiling = |sign: i32| -> Option<f64> {
            let side = lines.iter().filter(|l| l.order * sign > 0);
            let outermost = side.clone().map(|l| l.order.abs()).max()?;
            let detected = side
                .filter(|l| l.above_floor)
                .map(|l| l.order.abs())
                .max()
                .unwrap_or(0);
            (detected < outermost).then_some(detected as f64 + BETA_CEILING_PAST_LAST_LINE)
        };
        let beta_ceiling = [side_ceiling(1), side_ceiling(-1)]
            .into_iter()
            .flatten()
            .fold(FIT_BETA_MAX, f64::min);
        let mut points = Vec::with_capacity(2 * reach as usize + 1);
        let mut all = Sums::default();
        let mut detected = Sums::default();
        for line in lines.iter().filter(|l| l.order.abs() <= reach) {
            let level = (line.power_mw + floor_mw).max(0.01 * floor_mw);
            let sigma = line.uncertainty_mw.max(1e-6 * level);
            let weight = 1.0 / (sigma * sigma);
            let m = line.order.unsigned_abs() as usize;
            all.add(m, level, weight);
            if line.above_floor {
                detected.add(m, level, weight);
            }
            points.push((line.order, level, weight));
        }
        let mut observations = points.len();
        if floor_sigma_mw > 0.0 && floor_mw > 0.0 {
            observations += 1;
            let weight = 1.0 / (floor_sigma_mw * floor_sigma_mw);
            all.add_floor(floor_mw, weight);
            detected.add_floor(floor_mw, weight);
        }
        FitData {
            points,
            beta_ceiling,
            observations,
            all,
            detected,
        }
    }

    /// Orders in the fit.
    pub fn orders(&self) -> Vec<i32> {
        self.points.iter().map(|p| p.0).collect()
    }

    /// Number of lines in the fit.
    pub fn len(&self) -> usize {
        self.points.len()
    }

    /// True when no line is in the fit.
    pub fn is_empty(&self) -> bool {
        self.points.is_empty()
    }

    fn profile_at(&self, table: &BesselTable, beta: f64) -> (f64, f64, f64) {
        let mut values = [0.0; MAX_ORDER + 1];
        let count = self.all.weight.len().min(MAX_ORDER + 1);
        table.values_into(beta, &mut values[..count]);
        self.all.profile(&values[..count])
    }

    fn detected_profile_at(&self, table: &BesselTable, beta: f64) -> (f64, f64, f64) {
        let mut values = [0.0; MAX_ORDER + 1];
        let count = self.detected.weight.len().min(MAX_ORDER + 1);
        table.values_into(beta, &mut values[..count]);
        self.detected.profile(&values[..count])
    }

    /// Root-mean-square dB difference between the lines and the comb of `beta` (A, F fitted).
    pub fn residual_db(&self, beta: f64) -> f64 {
        let table = BesselTable::get();
        let (_, a, f) = self.profile_at(table, beta);
        let mut sum = 0.0;
        for (order, level, _) in &self.points {
            let model = (a * table.power(*order, beta) + f).max(1e-300);
            sum += (10.0 * (level / model).log10()).powi(2);
        }
        (sum / self.points.len().max(1) as f64).sqrt()
    }
}

/// The least-squares estimate; `None` with fewer than four lines (three parameters).
pub fn least_squares(data: &FitData) -> Option<IndexEstimate> {
    if data.len() < 4 {
        return None;
    }
    let table = BesselTable::get();
    let last_row = ((data.beta_ceiling / TABLE_STEP) as usize).min(table.rows().saturating_sub(1));
    let mut scan: Vec<(usize, f64)> = Vec::with_capacity(last_row / SCAN_ROWS + 1);
    let mut row = SCAN_ROWS / 2;
    while row <= last_row {
        let values = table.row(row);
        let (s, _, _) = data.detected.profile(values);
        scan.push((row, s));
        row += SCAN_ROWS;
    }
    // Local minima of the scan (ends included), best first.
    let mut minima: Vec<(usize, f64)> = (0..scan.len())
        .filter(|&i| {
            let s = scan[i].1;
            let left = i.checked_sub(1).is_none_or(|l| scan[l].1 >= s);
            let right = scan.get(i + 1).is_none_or(|r| r.1 > s);
            left && right
        })
        .map(|i| scan[i])
        .collect();
    minima.sort_by(|a, b| a.1.total_cmp(&b.1));
    let step = SCAN_ROWS as f64 * TABLE_STEP;
    let residual = |b: f64| data.profile_at(table, b).0;
    // Each candidate to 2e-4 first, then the best one to 1e-8: the same answer as refining all
    // of them fully, for half the evaluations.
    let (coarse, _) = minima
        .iter()
        .take(REFINED_MINIMA)
        .map(|(row, _)| {
            let centre = *row as f64 * TABLE_STEP;
            golden_section(
                residual,
                (centre - 1.5 * step).max(1e-4),
                centre + 1.5 * step,
                2e-4,
            )
        })
        .min_by(|a, b| a.1.total_cmp(&b.1))?;
    let (first, first_s) = golden_section(residual, (coarse - 4e-4).max(1e-4), coarse + 4e-4, 1e-8);
    // A weak line next to a zero of its J_n has the same power on both sides of the zero, which
    // makes two narrow valleys a few thousandths apart; look at the mirror image of the minimum
    // about every such zero and keep the deeper valley.
    let mirrors = mirror_candidates(data, table, first);
    let (beta, s_min) = mirrors
        .iter()
        .map(|m| golden_section(residual, (m - 4e-4).max(1e-4), m + 4e-4, 1e-8))
        .fold(
            (first, first_s),
            |best, c| if c.1 < best.1 { c } else { best },
        );
    let h = 1e-4 * beta.max(1.0);
    let curvature = (data.profile_at(table, beta + h).0 - 2.0 * s_min
        + data.profile_at(table, (beta - h).max(0.0)).0)
        / (h * h);
    let dof = data.observations.saturating_sub(3).max(1) as f64;
    let variance = s_min.max(0.0) / dof;
    let from_curvature = if curvature > 0.0 {
        (2.0 * variance / curvature).sqrt()
    } else {
        f64::INFINITY
    };
    // Where a line sits at a Bessel zero its term in the residual is quartic, not quadratic, in
    // beta and the curvature overstates the precision; the profile interval (where the residual
    // has risen by one scaled unit, s^2) holds either way. The larger of the two is reported.
    let start = if from_curvature.is_finite() {
        from_curvature
    } else {
        1e-3
    };
    let upper = profile_half_width(residual, beta, s_min, variance, start, 1.0);
    let lower = profile_half_width(residual, beta, s_min, variance, start, -1.0);
    // The detected lines alone: at a Bessel zero of a used order this is the honest figure (the
    // vanished line pins beta only through a quartic term), elsewhere it is close to the full one.
    let detected_only = |b: f64| data.detected_profile_at(table, b).0;
    let detected_curvature = (detected_only(beta + h) - 2.0 * detected_only(beta)
        + detected_only((beta - h).max(0.0)))
        / (h * h);
    let from_detected = if detected_curvature > 0.0 {
        (2.0 * variance / detected_curvature).sqrt()
    } else {
        0.0
    };
    // A second valley that the data hardly tell apart (within two standard units) widens the
    // uncertainty to cover both.
    let ambiguity = mirrors
        .iter()
        .chain(std::iter::once(&first))
        .map(|m| golden_section(residual, (m - 4e-4).max(1e-4), m + 4e-4, 1e-8))
        .filter(|(b, sv)| (b - beta).abs() > 1e-6 && sv - s_min < 4.0 * variance)
        .map(|(b, _)| 0.5 * (b - beta).abs())
        .fold(0.0, f64::max);
    let uncertainty = from_curvature
        .min(f64::MAX)
        .max(0.5 * (upper + lower))
        .max(from_detected)
        .max(ambiguity);
    uncertainty.is_finite().then(|| IndexEstimate {
        method: IndexMethod::LeastSquares,
        value: beta,
        uncertainty,
        residual: data.residual_db(beta),
        orders_used: data.orders(),
    })
}

/// Mirror images of `beta` about the zeros of the fitted orders' J_n that lie within 0.02 of it.
fn mirror_candidates(data: &FitData, table: &BesselTable, beta: f64) -> Vec<f64> {
    const REACH: f64 = 0.02;
    let count = data.all.weight.len().min(MAX_ORDER + 1);
    table
        .zeros_within(count, (beta - REACH).max(0.0), beta + REACH)
        .into_iter()
        .map(|zero| 2.0 * zero - beta)
        .filter(|mirror| (mirror - beta).abs() > 1e-6 && *mirror > 0.0)
        .collect()
}

/// Distance from `beta` in `direction` (+1 or -1) at which `residual` exceeds `s_min + rise`:
/// doubling from `start` to bracket it, then a dozen bisections (10 % is plenty for an
/// uncertainty). Stops at beta = 0 and past the fit range.
fn profile_half_width(
    residual: impl Fn(f64) -> f64,
    beta: f64,
    s_min: f64,
    rise: f64,
    start: f64,
    direction: f64,
) -> f64 {
    let rises = |d: f64| residual(beta + direction * d) - s_min >= rise;
    let limit = if direction < 0.0 {
        beta
    } else {
        FIT_BETA_MAX + 1.0 - beta
    };
    let (mut lo, mut hi) = (0.0, start.max(1e-9));
    loop {
        if hi >= limit {
            return limit.max(lo);
        }
        if rises(hi) {
            break;
        }
        lo = hi;
        hi *= 2.0;
    }
    for _ in 0..12 {
        let mid = 0.5 * (lo + hi);
        if rises(mid) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    hi
}

/// Golden-section search for the minimum of `f` on [lo, hi] down to an interval of `tolerance`;
/// returns (x, f(x)).
fn golden_section(f: impl Fn(f64) -> f64, mut lo: f64, mut hi: f64, tolerance: f64) -> (f64, f64) {
    let ratio = (5f64.sqrt() - 1.0) / 2.0;
    let mut x1 = hi - ratio * (hi - lo);
    let mut x2 = lo + ratio * (hi - lo);
    let (mut f1, mut f2) = (f(x1), f(x2));
    while hi - lo > tolerance {
        if f1 <= f2 {
            hi = x2;
            x2 = x1;
            f2 = f1;
            x1 = hi - ratio * (hi - lo);
            f1 = f(x1);
        } else {
            lo = x1;
            x1 = x2;
            f1 = f2;
            x2 = lo + ratio * (hi - lo);
            f2 = f(x2);
        }
    }
    if f1 <= f2 {
        (x1, f1)
    } else {
        (x2, f2)
    }
}

/// Solves `g(beta) = target` on [lo, hi] where g is monotonic, by bisection.
fn solve_monotonic(g: impl Fn(f64) -> f64, target: f64, mut lo: f64, mut hi: f64) -> Option<f64> {
    let (g_lo, g_hi) = (g(lo), g(hi));
    let brackets = (g_lo - target) * (g_hi - target) <= 0.0;
    if !brackets {
        return None;
    }
    let rising = g_hi > g_lo;
    for _ in 0..80 {
        let mid = 0.5 * (lo + hi);
        if (g(mid) < target) == rising {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    Some(0.5 * (lo + hi))
}

fn line(lines: &[MeasuredLine], order: i32) -> Option<&MeasuredLine> {
    lines.iter().find(|l| l.order == order)
}

/// beta from the first sidebands over the carrier; applies below the carrier null when the
/// carrier and at least one first sideband are above the floor.
pub fn sideband_ratio(
    lines: &[MeasuredLine],
    data: &FitData,
    primary: f64,
) -> Option<IndexEstimate> {
    if primary >= J0_FIRST_ZERO {
        return None;
    }
    let carrier = line(lines, 0).filter(|l| l.above_floor)?;
    let sidebands: Vec<&MeasuredLine> = [-1, 1]
        .iter()
        .filter_map(|n| line(lines, *n))
        .filter(|l| l.above_floor)
        .collect();
    if sidebands.is_empty() {
        return None;
    }
    let count = sidebands.len() as f64;
    let mean = sidebands.iter().map(|l| l.power_mw).sum::<f64>() / count;
    let mean_sigma = sidebands
        .iter()
        .map(|l| l.uncertainty_mw.powi(2))
        .sum::<f64>()
        .sqrt()
        / count;
    let ratio = mean / carrier.power_mw;
    let ratio_sigma = ratio
        * ((mean_sigma / mean).powi(2) + (carrier.uncertainty_mw / carrier.power_mw).powi(2))
            .sqrt();
    let table = BesselTable::get();
    let bessel_ratio = |b: f64| table.power(1, b) / table.power(0, b).max(1e-300);
    let beta = solve_monotonic(bessel_ratio, ratio, 1e-6, J0_FIRST_ZERO - 1e-6)?;
    let h = 1e-4 * beta.max(1e-2);
    let slope = (bessel_ratio(beta + h) - bessel_ratio((beta - h).max(0.0))) / (2.0 * h);
    let mut orders_used: Vec<i32> = sidebands.iter().map(|l| l.order).collect();
    orders_used.push(0);
    orders_used.sort_unstable();
    let uncertainty = ratio_sigma / slope.abs();
    uncertainty.is_finite().then(|| IndexEstimate {
        method: IndexMethod::SidebandRatio,
        value: beta,
        uncertainty,
        residual: data.residual_db(beta),
        orders_used,
    })
}

/// beta from the carrier's depletion against the unmodulated carrier power (same units as the
/// line powers), on the monotonic branch of J_0^2 that holds `primary`.
pub fn carrier_depletion(
    lines: &[MeasuredLine],
    data: &FitData,
    unmodulated_mw: f64,
    unmodulated_sigma_mw: f64,
    primary: f64,
) -> Option<IndexEstimate> {
    let carrier = line(lines, 0)?;
    if unmodulated_mw.is_nan() || unmodulated_mw <= 0.0 {
        return None;
    }
    let ratio = carrier.power_mw.max(0.0) / unmodulated_mw;
    let ratio_sigma = (carrier.uncertainty_mw.powi(2) + (ratio * unmodulated_sigma_mw).powi(2))
        .sqrt()
        / unmodulated_mw;
    let table = BesselTable::get();
    // The branch: walk out from the primary value until the slope of J_0^2 changes sign.
    let slope_sign = |b: f64| {
        let (v, s) = table.value_and_slope(0, b);
        (v * s).signum()
    };
    let sign = slope_sign(primary);
    let step = 0.5 * TABLE_STEP;
    let mut lo = primary;
    while lo > step && slope_sign(lo - step) == sign {
        lo -= step;
    }
    let mut hi = primary;
    while hi < FIT_BETA_MAX && slope_sign(hi + step) == sign {
        hi += step;
    }
    let lo = if lo <= step { 0.0 } else { lo };
    let carrier_share = |b: f64| table.power(0, b);
    let beta = solve_monotonic(carrier_share, ratio.min(1.0), lo, hi)?;
    let h = 1e-4 * beta.max(1e-2);
    let slope = (carrier_share(beta + h) - carrier_share((beta - h).max(0.0))) / (2.0 * h);
    let uncertainty = ratio_sigma / slope.abs();
    uncertainty.is_finite().then(|| IndexEstimate {
        method: IndexMethod::CarrierDepletion,
        value: beta,
        uncertainty,
        residual: data.residual_db(beta),
        orders_used: vec![0],
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// J_0..J_7 at beta = 1 and beta = 3, Abramowitz & Stegun Table 9.1 (10 digits, checked
    /// against mpmath's `besselj`, a general-purpose reference library).
    const J_AT_1: [f64; 8] = [
        0.765_197_686_6,
        0.440_050_585_7,
        0.114_903_484_9,
        0.019_563_353_98,
        0.002_476_638_964,
        0.000_249_757_730_2,
        0.000_020_938_338,
        0.000_001_502_325_817,
    ];
    const J_AT_3: [f64; 8] = [
        -0.260_051_954_9,
        0.339_058_958_5,
        0.486_091_260_6,
        0.309_062_722_3,
        0.132_034_183_9,
        0.043_028_434_88,
        0.011_393_932_33,
        0.002_547_294_452,
    ];

    /// Noise-free lines P_n = scale J_n^2 for orders -7..=7 (J_-n^2 = J_n^2, DLMF 10.4.1), each
    /// with a 1 % standard uncertainty, above the floor where P_n exceeds it.
    fn lines(j: &[f64; 8], scale_mw: f64, floor_mw: f64) -> Vec<MeasuredLine> {
        (-7i32..=7)
            .map(|order| {
                let power_mw = scale_mw * j[order.unsigned_abs() as usize].powi(2);
                MeasuredLine {
                    order,
                    frequency_hz: 193.4e12 + f64::from(order) * 10e9,
                    power_mw,
                    uncertainty_mw: 0.01 * power_mw + 0.01 * floor_mw,
                    above_floor: power_mw > floor_mw,
                }
            })
            .collect()
    }

    #[test]
    fn least_squares_recovers_beta_one_from_table_values() {
        let lines = lines(&J_AT_1, 2.0, 1e-6);
        let data = FitData::new(&lines, 1e-6, 1e-7);
        let estimate = least_squares(&data).expect("enough lines");
        assert_eq!(estimate.method, IndexMethod::LeastSquares);
        assert!((estimate.value - 1.0).abs() < 1e-4, "{estimate:?}");
        // The lines are the model at beta = 1: almost nothing is left over.
        assert!(estimate.residual < 0.01, "{estimate:?}");
        assert!(estimate.uncertainty < 0.01, "{estimate:?}");
    }

    #[test]
    fn least_squares_is_unambiguous_past_the_carrier_null() {
        // At beta = 3 the carrier is weaker than sidebands 1 to 3, past J_0's first zero
        // (2.404826, DLMF 10.21(i), Table 10.21.1): the ratio of two lines has several
        // solutions, the whole comb one.
        let lines = lines(&J_AT_3, 1.0, 1e-6);
        let data = FitData::new(&lines, 1e-6, 1e-7);
        let estimate = least_squares(&data).expect("enough lines");
        assert!((estimate.value - 3.0).abs() < 1e-4, "{estimate:?}");
        // The sideband ratio applies only below the carrier null.
        assert!(sideband_ratio(&lines, &data, estimate.value).is_none());
    }

    #[test]
    fn sideband_ratio_solves_j1_over_j0() {
        // Hand-worked from A&S Table 9.1: (J_1(1) / J_0(1))^2 = (0.4400506 / 0.7651977)^2
        // = 0.330718; the ratio method must invert it to beta = 1.
        let lines = lines(&J_AT_1, 2.0, 1e-6);
        let ratio = lines[8].power_mw / lines[7].power_mw;
        assert!((ratio - 0.330_718).abs() < 1e-6, "{ratio}");
        let data = FitData::new(&lines, 1e-6, 1e-7);
        let estimate = sideband_ratio(&lines, &data, 1.0).expect("below the null");
        assert_eq!(estimate.method, IndexMethod::SidebandRatio);
        assert!((estimate.value - 1.0).abs() < 1e-5, "{estimate:?}");
        assert_eq!(estimate.orders_used, vec![-1, 0, 1]);
        // Propagated from 1 % line uncertainties: non-zero and well under the value.
        assert!(
            estimate.uncertainty > 0.0 && estimate.uncertainty < 0.05,
            "{estimate:?}"
        );
    }

    #[test]
    fn carrier_depletion_solves_j0_squared_on_the_right_branch() {
        // P_0 / P_ref = J_0(beta)^2: 0.585527 at beta = 1 (A&S Table 9.1: 0.7651977^2), and
        // 0.067627 at beta = 3, which J_0^2 also takes at beta = 1.9375 (mpmath) on the branch
        // below the null; the branch holding the primary value decides.
        for (j, beta) in [(&J_AT_1, 1.0), (&J_AT_3, 3.0)] {
            let lines = lines(j, 2.0, 1e-6);
            let data = FitData::new(&lines, 1e-6, 1e-7);
            let estimate = carrier_depletion(&lines, &data, 2.0, 0.002, beta + 0.05)
                .expect("a carrier and a reference");
            assert_eq!(estimate.method, IndexMethod::CarrierDepletion);
            assert!((estimate.value - beta).abs() < 1e-4, "{beta}: {estimate:?}");
        }
        // No reference power: no estimate.
        let lines = lines(&J_AT_1, 2.0, 1e-6);
        let data = FitData::new(&lines, 1e-6, 1e-7);
        assert!(carrier_depletion(&lines, &data, 0.0, 0.0, 1.0).is_none());
        assert!(carrier_depletion(&lines, &data, f64::NAN, 0.0, 1.0).is_none());
    }

    #[test]
    fn too_few_lines_give_no_fit() {
        // Three unknowns (beta, scale, floor) need at least four lines.
        let lines: Vec<MeasuredLine> = lines(&J_AT_1, 2.0, 1e-6)
            .into_iter()
            .filter(|l| l.order.abs() <= 1)
            .collect();
        let data = FitData::new(&lines, 0.0, 0.0);
        assert_eq!(data.len(), 3);
        assert!(least_squares(&data).is_none());
    }
}
