//! One Levenberg-Marquardt step: the normal equations solved by Cholesky, parameters held on
//! their bounds, the bounds themselves, and the step taken and damped.

use super::line_shape::{LineShape, ShapeKind};
use super::model::{mix_of_weight, wing_level, Evaluation, Problem, LORENTZIAN_HELD};
use super::{ASYM, BETA, ETA, ETA_FALL, LN_FLOOR, LN_WIDTH, LN_WIDTH_L, NP};

/// Solves the active part of `m x = b` by Cholesky; `None` when not positive definite.
#[allow(clippy::needless_range_loop)]
pub(super) fn solve(m: &[[f64; NP]; NP], b: &[f64; NP], active: &[bool; NP]) -> Option<[f64; NP]> {
    let mut idx = [0usize; NP];
    let mut k = 0;
    for i in (0..NP).filter(|&i| active[i]) {
        idx[k] = i;
        k += 1;
    }
    let mut l = [[0.0; NP]; NP];
    for r in 0..k {
        for c in 0..=r {
            let mut s = m[idx[r]][idx[c]];
            for q in 0..c {
                s -= l[r][q] * l[c][q];
            }
            if r == c {
                if s <= 0.0 || !s.is_finite() {
                    return None;
                }
                l[r][r] = s.sqrt();
            } else {
                l[r][c] = s / l[c][c];
            }
        }
    }
    let mut y = [0.0; NP];
    for r in 0..k {
        let mut s = b[idx[r]];
        for q in 0..r {
            s -= l[r][q] * y[q];
        }
        y[r] = s / l[r][r];
    }
    let mut x = [0.0; NP];
    for r in (0..k).rev() {
        let mut s = y[r];
        for q in r + 1..k {
            s -= l[q][r] * x[q];
        }
        x[r] = s / l[r][r];
    }
    let mut out = [0.0; NP];
    for (r, &i) in idx[..k].iter().enumerate() {
        out[i] = x[r];
    }
    Some(out)
}

/// Diagonal of the inverse of the active part of `m` (the variances up to a scale).
pub(super) fn inverse_diagonal(m: &[[f64; NP]; NP], active: &[bool; NP]) -> [f64; NP] {
    let mut out = [f64::INFINITY; NP];
    for i in 0..NP {
        if !active[i] {
            continue;
        }
        let mut e = [0.0; NP];
        e[i] = 1.0;
        if let Some(x) = solve(m, &e, active) {
            out[i] = x[i];
        }
    }
    out
}

/// Solves `m x = b` for a step from `p` (see [`solve`]), holding every parameter that stands on
/// a bound of [`stepped`] and whose step would push it further out: the step of the others is
/// then the one for that parameter held, not one computed as if it moved and then cut off by
/// the bound (which, with a pseudo-Voigt's Lorentzian width pressed against its lower limit,
/// made the fit alternate between refused and tiny steps for tens of iterations).
pub(super) fn solve_within_bounds(
    m: &[[f64; NP]; NP],
    b: &[f64; NP],
    active: &[bool; NP],
    p: &[f64; NP],
    shape0: &LineShape,
) -> Option<[f64; NP]> {
    let x = solve(m, b, active)?;
    let mut held = *active;
    let mut any = false;
    for slot in 0..NP {
        if !active[slot] || x[slot] == 0.0 {
            continue;
        }
        let (lo, hi) = bounds(p, slot, shape0);
        let margin = bound_margin(p[slot]);
        let pinned =
            (x[slot] < 0.0 && p[slot] <= lo + margin) || (x[slot] > 0.0 && p[slot] >= hi - margin);
        if pinned {
            held[slot] = false;
            any = true;
        }
    }
    if any {
        solve(m, b, &held)
    } else {
        Some(x)
    }
}

/// The pseudo-Voigt's Lorentzian width's range, Hz: within a factor of 20 (e^3) of the start's
/// Gaussian width, as that width's own range.
pub(super) fn lorentzian_width_range(shape0: &LineShape) -> (f64, f64) {
    let w = shape0.width_hz.max(1e-3);
    (w * (-3.0_f64).exp(), w * 3.0_f64.exp())
}

/// How near a bound of [`bounds`] a parameter at `value` counts as standing on it: the bound up
/// to rounding (the residual AM's bound moves with beta).
fn bound_margin(value: f64) -> f64 {
    1e-9 * (1.0 + value.abs())
}

/// The range [`stepped`] keeps parameter `slot` in, at the parameters `p`.
pub(super) fn bounds(p: &[f64; NP], slot: usize, shape0: &LineShape) -> (f64, f64) {
    match slot {
        BETA => (1e-6, f64::INFINITY),
        // Residual AM weaker than the phase modulation: at small beta a depth m and an index
        // beta give the same first sidebands as the two swapped, and only this picks the
        // physical one.
        ASYM => {
            let a = p[BETA].min(0.5);
            (-a, a)
        }
        // A mix at or under LORENTZIAN_HELD has its wing level held (see [`free_parameters`]);
        // when its Lorentzian width stands at the narrowest end of its range there, a rise of the
        // mix at that level would take the width under it (`stepped` moves the mix back), so the
        // mix cannot rise. (Until v14 of [`super::ANALYSIS_METHOD`] its range was 0-1 there too,
        // so [`solve_within_bounds`] solved a step as if the mix rose, and the other parameters
        // stepped by what they would take with it, refused every other time: 79 of the 136 fits
        // at the iteration limit in the repeated draws stood there.)
        ETA if shape0.kind == ShapeKind::PseudoVoigt
            && p[ETA] <= LORENTZIAN_HELD
            && p[LN_WIDTH_L] <= bounds(p, LN_WIDTH_L, shape0).0 + bound_margin(p[LN_WIDTH_L]) =>
        {
            // (`stepped` asks at its trial, whose mix may have stepped under 0: never a range
            // that ends under its start.)
            (0.0, p[ETA].max(0.0))
        }
        ETA => (0.0, 1.0),
        // Widths within a factor of 20 of the start: a part with little weight cannot run away
        // (and widen every line's window with it).
        LN_WIDTH_L if shape0.kind == ShapeKind::Voigt => {
            // A Voigt's Lorentzian part may be a small fraction of its Gaussian (a laser line
            // far narrower than the filter): within a factor of 20 of its own start.
            let w = shape0.width_l_hz.max(1e-3).ln();
            (w - 3.0, w + 3.0)
        }
        LN_WIDTH => {
            let w = shape0.width_hz.max(1e-3).ln();
            (w - 3.0, w + 3.0)
        }
        // The Lorentzian width within the same factor, at the mix `p` holds (see [`wing_level`]).
        LN_WIDTH_L => {
            let (narrowest, widest) = lorentzian_width_range(shape0);
            (wing_level(p[ETA], narrowest), wing_level(p[ETA], widest))
        }
        _ => (f64::NEG_INFINITY, f64::INFINITY),
    }
}

/// A fit started from another shape's optimum (its rival) that must beat the rival's reduced
/// chi-squared to be kept is given up when, after a step, its own residual and the minimum its
/// Gauss-Newton model predicts both stand above this factor times the rival's:
/// - on the fine segments, times the rival's reduced chi-squared. On the benchmark's 1 MHz-laser
///   trace the Voigt started from the pseudo-Voigt's optimum (reduced chi-squared 1.013) stood at
///   2.57 (predicting 2.57) at its first point on the fine segments and ended there after eight
///   evaluations. In the randomised study under v8, of the 70 Voigt fits started from a
///   pseudo-Voigt, the 9 this gave up all ended at least 1.6 times above the pseudo-Voigt.
/// - on the coarse segments, times the rival's sum of squares on the same segments
///   ([`rival_ssr`]), once the fit stands near the minimum its model predicts (its residual under
///   [`NEAR_MINIMUM`] times that minimum): the coarse segments' own error, up to
///   [`COARSE_FACTOR`] times the fine tolerance, holds both residuals alike above the noise, so
///   they are compared there and not against the rival's fine one (against which three fits that
///   went on to win stood at 1.5-2.5 times); and far from its minimum a fit's prediction is not
///   yet its own (fits that went on to win predicted 1.5-1.7 times with residuals 40 times the
///   rival's). Checked on the histories of the randomised study's 73 Voigt fits started from a
///   pseudo-Voigt (51 won, 14 lost, 8 given up on the fine segments) and on those of the 747 in
///   the 3,200 draws of `coverage_holds_over_repeated_noise_draws` (547, 125 and 75): it gives
///   up every fit the fine rule gave up, at its first coarse steps, and no other (where the
///   others stood above 1.5 times, their residual was at least 2.8 times the prediction; where
///   they stood near their minimum, at most 1.46 times, and those all lost). The 1 MHz-laser
///   trace's Voigt, whose predicted minimum stood at 2.7 times the pseudo-Voigt's reduced
///   chi-squared from its first step on, is now given up before its fine cut.
pub(super) const ABANDON_FACTOR: f64 = 1.5;

/// How near the minimum its Gauss-Newton model predicts a fit must stand (its sum of squares
/// under this factor times the predicted one) for the coarse rule of [`ABANDON_FACTOR`] to judge
/// it. In the histories that set the rule, the fits given up stood within 1.6 % of it where they
/// were judged, the others at least 2.8 times above it where they stood above 1.5 times the
/// rival; any factor from 1.1 to 2 gives the same outcomes.
pub(super) const NEAR_MINIMUM: f64 = 1.25;

/// A Gauss-Newton step in ln F below minus this is taken as ln(1 + d) (see [`stepped`]). Until
/// v9 of [`super::ANALYSIS_METHOD`] every step was taken as d; with it the 1 MHz-laser
/// benchmark trace took 5 % fewer instructions, the other five traces the same to the bit, and
/// the randomised study printed the same coverage, 95th percentile and maximum (median 0.0104 %
/// against 0.0106 %; no row worse by more than its last digit).
pub(super) const FLOOR_FALL: f64 = 0.5;

/// Largest change of ln F in one step: ln 10.
const FLOOR_STEP: f64 = std::f64::consts::LN_10;

/// The parameters `p` moved by `delta`, kept where the model is physical (see [`bounds`]).
pub(super) fn stepped(p: &[f64; NP], delta: &[f64; NP], shape0: &LineShape) -> [f64; NP] {
    let mut trial: [f64; NP] = std::array::from_fn(|i| p[i] + delta[i]);
    // Beta falls by at most a factor of four per step: at 0 its slope vanishes (the sidebands'
    // J_n^2 is flat there), so a step from a start far too high (the line-by-line estimate on
    // lines sitting on each other's Lorentzian wings) that overshot to the bound stayed there.
    trial[BETA] = trial[BETA].max(0.25 * p[BETA]);
    // A step that asks the floor to fall by more than half (d < -0.5 in ln F) is taken as the
    // step of a model linear in F, ln(1 + d), at least -ln 10: under the lines' wings the level
    // c ln(F + A) is nearly linear in F, and the Gauss-Newton step d in ln F moves F by F*/F - 1,
    // so by at most one neper per step (the benchmark's 1 MHz-laser trace walked its floor down
    // 5 nepers that way, one evaluation per step). Where the floor is read on its own points a
    // step that large is far from the optimum anyway, and the damping refuses an overshoot.
    if delta[LN_FLOOR] < -FLOOR_FALL {
        trial[LN_FLOOR] = p[LN_FLOOR] + (1.0 + delta[LN_FLOOR]).max(0.1).ln();
    }
    // The floor moves by at most a factor of ten per step. Where the lines' wings cover every
    // point, the floor hardly changes the model, its row of J^T J is small, and a Gauss-Newton
    // step may throw it tens of nepers away: the benchmark's 1 MHz-laser trace, read with the
    // Voigt profile from its pseudo-Voigt fit, had its first step put ln F at +1.8 from -16.6
    // (the optimum is -13.7) with every other parameter near its optimum, and refused six
    // damped steps, each a whole evaluation, before one was taken.
    // (By comparisons, not `clamp`, which panics on a NaN bound: a step that is not a number
    // stays one, and the trial is refused.)
    let (floor_low, floor_high) = (p[LN_FLOOR] - FLOOR_STEP, p[LN_FLOOR] + FLOOR_STEP);
    if trial[LN_FLOOR] < floor_low {
        trial[LN_FLOOR] = floor_low;
    } else if trial[LN_FLOOR] > floor_high {
        trial[LN_FLOOR] = floor_high;
    }
    // A pseudo-Voigt's mix falls by at most a factor of four per step (see [`ETA_FALL`]).
    if shape0.kind == ShapeKind::PseudoVoigt && p[ETA] > LORENTZIAN_HELD {
        trial[ETA] = trial[ETA].max(ETA_FALL * p[ETA]);
    }
    // Beta first: the residual AM's range depends on it; the mix before the wing level, whose
    // range depends on it.
    for slot in [BETA, ASYM, ETA, LN_WIDTH] {
        let (lo, hi) = bounds(&trial, slot, shape0);
        trial[slot] = trial[slot].clamp(lo, hi);
    }
    if shape0.kind == ShapeKind::PseudoVoigt && trial[ETA] > LORENTZIAN_HELD {
        // A mix that would put the Lorentzian width out of its range at the step's wing level
        // is moved instead of that level (the better determined of the two): the mix whose
        // D = e^A / w_L^2 at the range's end ([`wing_weight`]). Clamping the level instead
        // raised the wings 45 times on the synthetic beta 1 trace's first step (the mix from
        // 0.02 to 0.91 with w_L at its lower end), and that fit took 16 iterations instead of 7.
        let (lo, hi) = bounds(&trial, LN_WIDTH_L, shape0);
        let (narrowest, widest) = lorentzian_width_range(shape0);
        let level = trial[LN_WIDTH_L];
        let at_end = if level < lo {
            Some(narrowest)
        } else if level > hi {
            Some(widest)
        } else {
            None
        };
        if let Some(width) = at_end {
            trial[ETA] =
                mix_of_weight((level - 2.0 * width.ln()).exp()).clamp(LORENTZIAN_HELD, 1.0);
        }
    }
    let (lo, hi) = bounds(&trial, LN_WIDTH_L, shape0);
    trial[LN_WIDTH_L] = trial[LN_WIDTH_L].clamp(lo, hi);
    trial
}

/// The points less the parameters (all of them, free or not) of `eval`, at least 1: the
/// divisor of the variance per point while the fit runs.
pub(super) fn degrees_of_freedom(prob: &Problem, eval: &Evaluation) -> f64 {
    (eval.points as f64 + prob.block_n - NP as f64).max(1.0)
}

/// delta^T M delta over the `active` parameters: with M = J^T J, a step's squared length in
/// standard uncertainties once divided by the variance per point.
pub(super) fn quadratic_norm(delta: &[f64; NP], m: &[[f64; NP]; NP], active: &[bool; NP]) -> f64 {
    bilinear(delta, m, delta, active)
}

/// a^T M b over the `active` parameters.
#[allow(clippy::needless_range_loop)]
fn bilinear(a: &[f64; NP], m: &[[f64; NP]; NP], b: &[f64; NP], active: &[bool; NP]) -> f64 {
    let mut sum = 0.0;
    for i in 0..NP {
        for j in 0..NP {
            if active[i] && active[j] {
                sum += a[i] * m[i][j] * b[j];
            }
        }
    }
    sum
}

/// How far back along the last step a new step must turn (its component along the last step, as
/// a share of that step's length in the metric J^T J) for [`damp_reversal`] to shorten it.
pub(super) const REVERSAL: f64 = 0.3;

/// A step `delta` that turns back along the `last` step taken, by a share rho of it (in the
/// metric `m` = J^T J): the Gauss-Newton steps overshoot (the model's curvature along that line is
/// 1 + rho times what J^T J says), and the fit zig-zags across the valley, each step undoing most
/// of the one before (in 20 of the 24 pseudo-Voigt fits of the randomised study that ran to the
/// iteration limit under v11 of [`super::ANALYSIS_METHOD`], beta's step changed sign on at least
/// half of the accepted steps, by a fraction of its uncertainty each time). Under that
/// curvature the minimum along the line lies 1 / (1 + rho) of the way along the new step
/// (Aitken's extrapolation of a sequence whose differences shrink by -rho), so the step is scaled
/// by that; rho is taken at most 1 (half the step).
pub(super) fn damp_reversal(
    delta: [f64; NP],
    last: &[f64; NP],
    m: &[[f64; NP]; NP],
    active: &[bool; NP],
) -> [f64; NP] {
    let length = quadratic_norm(last, m, active);
    let rho = -bilinear(&delta, m, last, active) / length;
    // (A last step of no length, or not a number, gives no rho and no change.)
    if length > 0.0 && rho > REVERSAL {
        let scale = 1.0 / (1.0 + rho.min(1.0));
        delta.map(|d| d * scale)
    } else {
        delta
    }
}

/// The undamped (Gauss-Newton) step from `eval` at `p` within the bounds of [`stepped`], and the
/// decrease of the sum of squares its quadratic model promises (the step dotted with -J^T r).
pub(super) fn undamped_step(
    prob: &Problem,
    eval: &Evaluation,
    p: &[f64; NP],
    shape0: &LineShape,
) -> Option<([f64; NP], f64)> {
    let neg: [f64; NP] = std::array::from_fn(|i| -eval.jtr[i]);
    let mut undamped = eval.jtj;
    for (i, row) in undamped.iter_mut().enumerate() {
        row[i] += 1e-30;
    }
    let step = solve_within_bounds(&undamped, &neg, &prob.active, p, shape0)?;
    let gain = (0..NP)
        .filter(|&i| prob.active[i])
        .map(|i| step[i] * neg[i])
        .sum::<f64>();
    Some((step, gain))
}
