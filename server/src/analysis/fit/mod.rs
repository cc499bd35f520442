//! The whole displayed trace fitted with a forward model of the instrument.
//!
//! What an analyzer shows for a phase-modulated laser is, point by point,
//!
//! ```text
//! M(f) = F + P0 * sum_n w_n * K(f - f_c - n f_m),   w_n = J_n(beta)^2 (1 + a n)^2
//! ```
//!
//! the Jacobi-Anger comb (DLMF 10.12.1: line powers J_n(beta)^2) seen through the instrument's
//! line shape K (unit peak) on top of a floor F, with w_n = (J_n + (m/2)(J_{n-1} + J_{n+1}))^2
//! when residual amplitude modulation of depth m in phase with the drive is present:
//! (1 + m cos wt) e^{i beta sin wt} has lines i^n [J_n + (m/2)(J_{n-1} + J_{n+1})]
//! = i^n J_n (1 + m n / beta) by the recurrence J_{n-1} + J_{n+1} = (2n / x) J_n (DLMF 10.6.1),
//! so that w_n = J_n^2 (1 + a n)^2 with a = m / beta: the first-order asymmetry. The quadrature
//! part of the AM, second order in m, is left out. K is either measured (the RF-off reference trace: the laser line as this analyzer
//! shows it, floor removed, normalised, its wings averaged over a window growing with the
//! distance from the line, or, with enough points per width, smoothed as a spline in ln K (see
//! `smooth_shape`), read back by cubic interpolation at any sub-sample offset) or
//! parametric: a pseudo-Voigt (unit-peak mix of a Gaussian and a Lorentzian, with both widths and
//! the mix fitted: a Gaussian at eta = 0 and a Lorentzian at eta = 1) or, when the pseudo-Voigt
//! settles on a real mix, also the true Voigt profile (the Gaussian convolved with the
//! Lorentzian, from the Faddeeva function, see `faddeeva`), the one with the smaller residual
//! kept. A measured shape that leaves a residual above the noise is tried against the
//! parametric ones the same way.
//!
//! The fit is weighted least squares on the displayed levels in dB: display noise is a spread of
//! the level in dB, on the lines and on the floor alike, so every point carries the same weight
//! and the residual of point i is 10 log10 M(f_i) - y_i. beta, ln P0, f_c, ln F and a (and the
//! shape's width and mix when parametric) are found by Levenberg-Marquardt with the analytic
//! Jacobian, starting from the line-by-line estimate (which has already chosen the branch past
//! the carrier null). Points where no line reaches a thousandth of the floor only inform F; they
//! enter as one block (count, sum, sum of squares of their levels), exactly, so the cost grows
//! with the points under the lines, not with the span.
//!
//! Uncertainty (GUM, JCGM 100:2008): the statistical part is the covariance (J^T J)^-1 scaled by
//! the residual variance s^2 = SSR / (N - p) (Type A, clause 4.2); the line-shape part is a
//! stated relative term ([`SHAPE_SYSTEMATIC_MEASURED`], [`SHAPE_SYSTEMATIC_PARAMETRIC`], Type B,
//! clause 4.3) for what the shape model may get wrong; both are reported and combined in
//! quadrature (clause 5.1.2, uncorrelated inputs).
//!
//! The modules: `line_shape` (K and its slopes), `segments` (the windows, each line's reach and
//! the cut into segments), `model` (the residual and J^T J summed over the segments), `step`
//! (one Levenberg-Marquardt step within the bounds), `iterate` (one shape's fit to its optimum,
//! with its uncertainties) and `reference_noise_propagation`; this file holds the result types
//! and [`fit_trace`], which chooses among the shapes and the starts.

use super::bessel::BesselTable;
use super::AnalysisError;
use halfwave_units::{Hz, Trace};
use serde::Serialize;

/// 10 / ln 10: a natural log times this is a level in dB.
const DB_PER_NEPER: f64 = 4.342_944_819_032_518;

/// A line contributes to a point when it reaches this fraction of the floor there (0.004 dB).
const CONTRIBUTION_FLOOR: f64 = 1e-3;

/// Relative standard uncertainty of beta for the line-shape model when K is measured on the
/// reference trace. Set from the randomised study in `tests/measurement_truth.rs`: the largest
/// root-mean-square excess of |error| over the statistical uncertainty among its conditions with
/// a measured shape, rounded up.
pub const SHAPE_SYSTEMATIC_MEASURED: f64 = 5e-4;
/// The same for the parametric shapes (pseudo-Voigt or Voigt), which cannot follow an
/// analyzer's own filter exactly; set the same way from the conditions without a reference.
pub const SHAPE_SYSTEMATIC_PARAMETRIC: f64 = 1e-3;
/// The same when the pseudo-Voigt is kept with a real mix (Lorentzian fraction between 0.02 and
/// 0.98; the Voigt profile, fitted from it, did not describe the trace better): a pseudo-Voigt
/// follows a true Voigt profile (a Gaussian filter seen with a laser's Lorentzian line) only to
/// about a percent of the peak in the wings, and the weak sidebands of a small index sit on
/// those wings. It applies below beta = 0.3 and falls as 0.3 / beta above
/// (a larger index rests on many strong lines, not on two weak ones; never below
/// [`SHAPE_SYSTEMATIC_PARAMETRIC`]). Set from the randomised study's true-Voigt traces read
/// without a reference: the largest |error| there was 1.66 % at beta 0.27 and 0.66 % at 0.8, so
/// that this term covers them at k = 2.
pub const SHAPE_SYSTEMATIC_MIXED: f64 = 1e-2;

/// Most Levenberg-Marquardt iterations.
const MAX_ITERATIONS: usize = 40;

/// A step (in standard uncertainties of the parameters, its Mahalanobis norm) under which the
/// fit is near enough its optimum for the segments to be cut again at the fine tolerance. The
/// coarse segments' steps are hundreds of uncertainties long until the last one or two, and on
/// the benchmark's traces the step after one of 2-5 u moved the parameters by 0.003-0.05 u,
/// little against the 1-5 u between the coarse and the fine segments' optima: that step is not
/// taken on the coarse segments.
const RECUT_STEP: f64 = 10.0;

/// On the fine segments, after an accepted step (or the fine cut that followed one), the next
/// Gauss-Newton step is taken without evaluating the model where it lands, and ends the fit,
/// when it is under this many standard uncertainties of the parameters (its Mahalanobis norm),
/// the contraction the fit has shown puts the step after it under 0.05 of them (the convergence
/// test's bound), and beta is not within [`NEAR_ZERO`] of a zero of a fitted line's J_n. The
/// contraction is the next step's length over the last one's (right after a cut, the last one's
/// over the one before it), times the next step's length. Away from the zeros the benchmark's
/// fits contract fast near the optimum (beta 6's coarse steps 95, 14.9, 0.34 u, its first fine
/// one 0.96 u; the bench trace's 54 u, then 0.23 u), and five of the six benchmark fits save their
/// last evaluation (9-14 % of their instructions) with beta moved by at most 5e-5 of its
/// uncertainty (the 1 MHz-laser trace's last step, 1.73 u after one of 12.3 u, is still
/// evaluated). At the carrier's null
/// the simulated bench's fit contracted by 0.3-0.85 per step (6.4, 2.1, 1.8, 0.56, 0.18 u): a step
/// of 1.8 u taken unevaluated left beta 0.075 of its uncertainty from the exact sum's, and even a
/// last step of 0.051 u moved the statistical uncertainty by 2.6 % (a line's power has no slope at
/// its zero, so J^T J changes fast with beta there); unit test
/// `the_fast_fit_gives_the_beta_of_the_exact_sum_on_both_kinds_of_trace`. Until v16 of
/// [`super::ANALYSIS_METHOD`] only a step under 0.05 u was taken so, and not right after the cut.
const FINAL_STEP: f64 = 2.0;

/// Parameter slots.
const BETA: usize = 0;
const LN_P0: usize = 1;
const CENTRE: usize = 2;
const LN_FLOOR: usize = 3;
const ASYM: usize = 4;
const LN_WIDTH: usize = 5;
const ETA: usize = 6;
/// The Voigt's ln of its Lorentzian width; the pseudo-Voigt's level of its far wings,
/// ln(D w_L^2) with D about eta ([`wing_level`]).
const LN_WIDTH_L: usize = 7;
const NP: usize = 8;

mod iterate;
mod line_shape;
mod model;
mod reference_noise_propagation;
mod segments;
mod step;
#[cfg(test)]
mod tests;

use iterate::fit_once;
use line_shape::unit_gaussian;
pub use line_shape::{LineShape, ShapeKind};
use model::WORKSPACE;
use segments::SEGMENT_TOLERANCE_DB;

/// Where the fit starts.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitStart {
    pub beta: f64,
    pub carrier_hz: f64,
    pub floor_mw: f64,
    /// Peak power of the strongest line above the floor, mW (sets P0).
    pub strongest_line_peak_mw: f64,
    /// Fit the residual-AM depth.
    pub asymmetry: bool,
}

impl FitStart {
    /// The start from the line-by-line measurement `comb` and its index estimate `beta`, with
    /// the residual-AM depth fitted.
    pub fn from_comb(comb: &super::comb::MeasuredComb, beta: f64) -> FitStart {
        FitStart {
            beta,
            carrier_hz: comb.carrier_frequency_hz,
            floor_mw: comb.floor_mw,
            strongest_line_peak_mw: comb.lines.iter().map(|l| l.power_mw).fold(0.0, f64::max),
            asymmetry: true,
        }
    }
}

/// The result of the whole-trace fit.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct WholeTraceFit {
    pub modulation_index: f64,
    /// Statistical standard uncertainty (covariance scaled by the residual; GUM Type A).
    pub uncertainty_statistical: f64,
    /// The RF-off reference's display noise carried through a measured shape read point by point
    /// (GUM Type A, propagated; 0 for a smoothed or parametric shape, see `reference_noise`).
    pub uncertainty_reference: f64,
    /// Stated line-shape model term (GUM Type B).
    pub uncertainty_line_shape: f64,
    /// The three combined in quadrature.
    pub uncertainty_combined: f64,
    /// Peak power of a line of unit weight (w_n = 1): P0 with K normalised to unit peak.
    pub line_peak_power_dbm: f64,
    pub floor_dbm: f64,
    pub carrier_frequency_hz: Hz,
    pub carrier_uncertainty_hz: f64,
    /// Depth m of residual amplitude modulation in phase with the drive (the first-order
    /// asymmetry: w_n = J_n^2 (1 + m n / beta)^2), and its standard uncertainty.
    pub residual_am_depth: f64,
    pub residual_am_uncertainty: f64,
    pub line_shape: ShapeKind,
    /// Full width at half maximum of the whole line shape (fitted when parametric).
    pub line_width_hz: f64,
    /// Lorentzian fraction of the pseudo-Voigt (0 when measured or a Voigt).
    pub line_shape_eta: f64,
    /// Full width at half maximum of the pseudo-Voigt's or the Voigt's Lorentzian part (0 when
    /// measured).
    pub lorentzian_width_hz: f64,
    /// Root-mean-square residual over all points, dB.
    pub residual_db: f64,
    /// Residual variance over the display noise variance measured between the lines.
    pub reduced_chi_squared: f64,
    /// Points under the lines fitted one by one, and floor points fitted as one block.
    pub points_under_lines: usize,
    pub points_in_floor_block: usize,
    pub iterations: usize,
    /// Orders in the model.
    pub orders: Vec<i32>,
}

/// A fitted model that can be evaluated on any axis (for plots).
#[derive(Debug, Clone, PartialEq)]
pub struct FittedModel {
    pub shape: LineShape,
    pub beta: f64,
    pub p0_mw: f64,
    pub floor_mw: f64,
    pub carrier_hz: f64,
    pub spacing_hz: f64,
    /// Residual AM depth m.
    pub asymmetry: f64,
    pub max_order: i32,
}

/// Weight of line `n` with residual AM of depth `m` in phase with the drive, and its slopes in
/// beta and m: c_n = J_n + (m/2)(J_{n-1} + J_{n+1}) (= J_n (1 + m n / beta) by DLMF 10.6.1, but
/// without the division, so that it stays regular as beta goes to 0), w_n = c_n^2.
#[inline]
fn line_weight(table: &BesselTable, n: i32, beta: f64, m: f64) -> (f64, f64, f64) {
    let (j, dj) = table.value_and_slope(n, beta);
    let (jm, djm) = table.value_and_slope(n - 1, beta);
    let (jp, djp) = table.value_and_slope(n + 1, beta);
    let c = j + 0.5 * m * (jm + jp);
    let dc = dj + 0.5 * m * (djm + djp);
    (c * c, 2.0 * c * dc, c * (jm + jp))
}

impl FittedModel {
    /// Relative weight of line `n`.
    pub fn weight(&self, n: i32) -> f64 {
        line_weight(BesselTable::get(), n, self.beta, self.asymmetry).0
    }

    /// Power of line `n` (mW) as the model has it: P0 w_n times the shape's peak.
    pub fn line_power_mw(&self, n: i32) -> f64 {
        self.p0_mw * self.weight(n)
    }

    /// Displayed level in dBm at each of `frequencies_hz`.
    pub fn levels_dbm(&self, frequencies_hz: &[f64]) -> Vec<f64> {
        let amplitudes: Vec<f64> = (-self.max_order..=self.max_order)
            .map(|n| self.p0_mw * self.weight(n))
            .collect();
        frequencies_hz
            .iter()
            .map(|f| {
                let mut m = self.floor_mw;
                for (k, a) in amplitudes.iter().enumerate() {
                    let n = k as i32 - self.max_order;
                    m += a * self
                        .shape
                        .eval(f - self.carrier_hz - n as f64 * self.spacing_hz)
                        .k;
                }
                10.0 * m.max(1e-300).log10()
            })
            .collect()
    }
}

/// The reduced chi-squared above which the fit is tried again from other starting indices.
const CHI2_RETRY: f64 = 1.5;
/// The reduced chi-squared above which the model is taken not to describe the trace.
pub const CHI2_REFUSE: f64 = 30.0;
/// Starting indices tried when the first fit leaves a residual far above the noise.
const RETRY_BETAS: [f64; 14] = [
    0.05, 0.15, 0.3, 0.6, 1.0, 1.5, 2.0, 2.6, 3.2, 4.0, 5.0, 6.5, 8.0, 10.0,
];

/// Fits the whole trace. `noise_sigma_db` (the display noise measured between the lines) is used
/// for the reduced chi-squared: a fit whose residual stays far above it is tried again from
/// other starting indices, and refused when none describes the trace.
pub fn fit_trace(
    trace: &Trace,
    spacing: Hz,
    shape: &LineShape,
    start: &FitStart,
    noise_sigma_db: f64,
) -> Result<(WholeTraceFit, FittedModel), AnalysisError> {
    fit_trace_segmented(
        trace,
        spacing,
        shape,
        start,
        noise_sigma_db,
        SEGMENT_TOLERANCE_DB,
    )
}

/// [`fit_trace`] with the segments cut to `segment_tolerance_db` (0: every point a node).
pub(crate) fn fit_trace_segmented(
    trace: &Trace,
    spacing: Hz,
    shape: &LineShape,
    start: &FitStart,
    noise_sigma_db: f64,
    segment_tolerance_db: f64,
) -> Result<(WholeTraceFit, FittedModel), AnalysisError> {
    WORKSPACE.with(|ws| {
        let mut ws = ws.borrow_mut();
        let noise = (noise_sigma_db * noise_sigma_db).max(1e-12);
        let mut fit = |shape: &LineShape, start: &FitStart, rival: Option<&Fitted>| {
            fit_once(
                &mut ws,
                trace,
                spacing,
                shape,
                start,
                noise,
                segment_tolerance_db,
                rival,
            )
        };
        let first = fit(shape, start, None);
        let mut best = if shape.kind == ShapeKind::PseudoVoigt {
            best_parametric(&mut fit, shape, start, first)
        } else {
            first
        };
        // A measured shape that leaves a residual above the noise (a reference whose line the
        // analyzer showed differently, or too noisy to read the wings), or whose fit failed: the
        // parametric shapes are tried too, and kept when they describe the trace clearly better.
        if shape.kind == ShapeKind::Measured
            && best.as_ref().map_or(true, |m| m.0.reduced_chi_squared > CHI2_RETRY)
        {
            let width = best.as_ref().map_or(shape.width_hz, |m| m.0.line_width_hz);
            let pv = LineShape::pseudo_voigt(width, width, 0.0);
            let first = fit(&pv, start, None);
            keep_better(&mut best, best_parametric(&mut fit, &pv, start, first), 0.9);
        }
        // Far above the noise, or failed: other starting indices (the line-by-line start may be
        // on the wrong side of a Bessel zero, or far off on lines that overlap).
        if best.as_ref().map_or(true, |b| b.0.reduced_chi_squared > 3.0 * CHI2_RETRY) {
            for beta in RETRY_BETAS {
                if (beta - start.beta).abs() < 0.05 * start.beta {
                    continue;
                }
                let from = FitStart { beta, ..*start };
                keep_better(&mut best, fit(shape, &from, None), 0.9);
            }
        }
        // Near a zero of one of the lines' J_n, that line's power J_n^2 is the same on both sides
        // of the zero, and on a coarsely sampled trace the other lines may not tell the two
        // apart clearly enough for the fit not to settle on the wrong one: the mirror image is
        // tried too and the smaller residual kept.
        let mirror = best.as_ref().ok().and_then(|(fitted, model)| {
            mirrored_across_zero(fitted.modulation_index, model.max_order).map(|beta| {
                (
                    model.shape.clone(),
                    FitStart {
                        beta,
                        ..start_from(fitted, model, start.asymmetry)
                    },
                )
            })
        });
        if let Some((shape, from)) = mirror {
            keep_better(&mut best, fit(&shape, &from, None), 1.0);
        }
        let best = best?;
        if best.0.reduced_chi_squared > CHI2_REFUSE {
            return Err(AnalysisError::FitFailed(format!(
                "the comb model does not describe the trace: its residual is {:.2} dB against a display noise of \
                 {:.2} dB (beta {:.4}); check the modulation frequency, that one laser is on the analyzer and that \
                 the span holds the comb",
                best.0.residual_db,
                noise.sqrt(),
                best.0.modulation_index
            )));
        }
        Ok(best)
    })
}

/// A fit's result and its model.
type Fitted = (WholeTraceFit, FittedModel);

/// Puts `candidate` in `best` when it succeeded and its reduced chi-squared is under `factor`
/// times the best's; a failed best counts as the worst residual (a fit whose beta ran down to its
/// bound, where its slope vanishes, must not stop the other starts from being kept).
fn keep_better(
    best: &mut Result<Fitted, AnalysisError>,
    candidate: Result<Fitted, AnalysisError>,
    factor: f64,
) {
    if let Ok(candidate) = candidate {
        if best.as_ref().map_or(true, |b| {
            candidate.0.reduced_chi_squared < factor * b.0.reduced_chi_squared
        }) {
            *best = Ok(candidate);
        }
    }
}

/// The best parametric fit, by `fit`, from a first pseudo-Voigt fit `first` (from the start
/// `shape`): when its residual is above the noise, the pseudo-Voigt again from mixes nearer a
/// Lorentzian (it may settle on the wrong one); when the mix it settles on is real, the Voigt
/// profile as well.
fn best_parametric(
    fit: &mut impl FnMut(&LineShape, &FitStart, Option<&Fitted>) -> Result<Fitted, AnalysisError>,
    shape: &LineShape,
    start: &FitStart,
    first: Result<Fitted, AnalysisError>,
) -> Result<Fitted, AnalysisError> {
    let mut best = first;
    if best
        .as_ref()
        .map_or(true, |b| b.0.reduced_chi_squared > CHI2_RETRY)
    {
        for eta in [0.5, 0.98] {
            let other_shape = LineShape::pseudo_voigt(shape.width_hz, shape.width_l_hz, eta);
            keep_better(&mut best, fit(&other_shape, start, None), 0.9);
        }
    }
    // A pseudo-Voigt that settled on a real mix may stand for a true Voigt profile (a Gaussian
    // filter seen with a laser's Lorentzian line), which it follows only to about a percent of
    // the peak in the wings: the Voigt is fitted from it too, and the shape with the smaller
    // residual kept; the Voigt's fit is given up as soon as it clearly cannot be (see
    // [`ABANDON_FACTOR`]).
    let voigt_start = match &best {
        Ok(pv @ (fitted, model)) if is_mixed(model.shape.eta) => Some((
            LineShape::voigt_like(&model.shape),
            start_from(fitted, model, start.asymmetry),
            pv.clone(),
        )),
        _ => None,
    };
    if let Some((voigt, from_fit, pv)) = voigt_start {
        keep_better(&mut best, fit(&voigt, &from_fit, Some(&pv)), 1.0);
    }
    best
}

/// A start at a fit's result (for fitting it again with another shape or index).
fn start_from(fitted: &WholeTraceFit, model: &FittedModel, asymmetry: bool) -> FitStart {
    FitStart {
        beta: fitted.modulation_index,
        carrier_hz: fitted.carrier_frequency_hz.0,
        floor_mw: model.floor_mw,
        strongest_line_peak_mw: (-model.max_order..=model.max_order)
            .map(|n| model.line_power_mw(n))
            .fold(0.0, f64::max),
        asymmetry,
    }
}

/// How near (relative) a zero of some J_n (|n| <= the orders fitted) a fitted index must be for
/// its mirror image across that zero to be tried.
const NEAR_ZERO: f64 = 0.02;

/// The mirror image 2 z - beta of `beta` across the zero z of J_n (0 <= n <= `max_order`) nearest
/// to it, when one lies within [`NEAR_ZERO`] of `beta` (see [`BesselTable::zeros_within`]).
pub(super) fn mirrored_across_zero(beta: f64, max_order: i32) -> Option<f64> {
    let orders = usize::try_from(max_order).map_or(0, |n| n + 1);
    BesselTable::get()
        .zeros_within(orders, beta * (1.0 - NEAR_ZERO), beta * (1.0 + NEAR_ZERO))
        .into_iter()
        .min_by(|a, b| (a - beta).abs().total_cmp(&(b - beta).abs()))
        .filter(|z| (z - beta).abs() > 1e-6 * beta)
        .map(|z| 2.0 * z - beta)
}

/// The start's P0 (mW): the strongest line's peak over the strongest J_n(beta)^2 of the orders
/// up to `max_order`.
fn start_p0(start: &FitStart, max_order: i32) -> f64 {
    let table = BesselTable::get();
    let strongest = (-max_order..=max_order)
        .map(|n| table.power(n, start.beta))
        .fold(0.0, f64::max)
        .max(1e-12);
    start.strongest_line_peak_mw.max(1e-30) / strongest
}

/// The Lorentzian fraction a pseudo-Voigt fit starts from, at least, when the trace shows wings
/// between its lines ([`wings_between_lines`]); without them it starts from the shape's own (0
/// from the line-by-line start). Until v10 of [`super::ANALYSIS_METHOD`] every pseudo-Voigt
/// started from at least 0.02, and the Gaussian synthetic benchmark traces spent their first
/// steps on a Lorentzian part they then dropped; started from 0, the benchmark's 1 MHz-laser
/// trace (whose wings cover the span) took 2.3 times the instructions.
const LORENTZIAN_START: f64 = 0.02;

/// How far (dB) the trace must stand, midway between two neighbouring lines, above the start's
/// model with Gaussian lines for [`wings_between_lines`] to see wings there. The synthetic
/// benchmark traces stand at most 0.06 dB above it, the 1 MHz-laser trace 12.3 dB.
const WING_EXCESS_DB: f64 = 3.0;

/// The largest fall of a pseudo-Voigt's mix in one step (a factor): with its Lorentzian part
/// fitted by its wing level ([`wing_level`]), a step that takes the mix to 0 keeps that level and
/// widens the Lorentzian to a pedestal under the whole span; the 1 MHz-laser trace's first
/// fine step did so and was refused four times (13 iterations instead of 11).
const ETA_FALL: f64 = 0.25;

/// Whether the trace stands more than [`WING_EXCESS_DB`] above the start's model (P0 `p0`) with
/// Gaussian lines of full width `width_hz` (the floor, and the Gaussian tails of the two lines
/// on either side) midway between some two neighbouring lines: the mean, in dB, of the points within a
/// twentieth of the spacing of the midpoint. Lorentzian wings that lift the level between the
/// lines show there; a floor read between the lines does not, as the start's floor is that
/// level.
fn wings_between_lines(
    freq: &[f64],
    level: &[f64],
    spacing: f64,
    start: &FitStart,
    p0: f64,
    width_hz: f64,
    max_order: i32,
) -> bool {
    let table = BesselTable::get();
    let inv_width_sq = 1.0 / (width_hz * width_hz);
    let gaussian = |x: f64| unit_gaussian(x * x * inv_width_sq);
    let half = 0.05 * spacing;
    (-max_order..max_order).any(|n| {
        let mid = start.carrier_hz + (n as f64 + 0.5) * spacing;
        let lo = freq.partition_point(|f| *f < mid - half);
        let hi = freq.partition_point(|f| *f <= mid + half);
        if hi <= lo {
            return false;
        }
        let seen = level[lo..hi].iter().sum::<f64>() / (hi - lo) as f64;
        let model = start.floor_mw
            + (n - 1..=n + 2)
                .map(|k| {
                    p0 * table.power(k, start.beta)
                        * gaussian(mid - start.carrier_hz - k as f64 * spacing)
                })
                .sum::<f64>();
        seen - 10.0 * model.max(1e-300).log10() > WING_EXCESS_DB
    })
}

/// A pseudo-Voigt whose Lorentzian fraction is neither nearly 0 nor nearly 1.
fn is_mixed(eta: f64) -> bool {
    eta > 0.02 && eta < 0.98
}
