//! One fit of the comb model with a given line shape, iterated to its optimum (or given up
//! against a rival shape), and its result with uncertainties.

use super::line_shape::{LineShape, ShapeKind};
use super::model::{
    assemble, evaluate, free_parameters, params_shape, wing_level, Problem, Workspace,
};
use super::reference_noise_propagation::reference_noise_uncertainty;
use super::segments::{fine_tolerance_db, set_windows};
use super::step::{
    damp_reversal, degrees_of_freedom, inverse_diagonal, quadratic_norm, solve_within_bounds,
    stepped, undamped_step, ABANDON_FACTOR, NEAR_MINIMUM,
};
use super::{
    is_mixed, mirrored_across_zero, start_p0, wings_between_lines, FitStart, Fitted, FittedModel,
    WholeTraceFit, ASYM, BETA, CENTRE, ETA, FINAL_STEP, LN_FLOOR, LN_P0, LN_WIDTH, LN_WIDTH_L,
    LORENTZIAN_START, MAX_ITERATIONS, NP, RECUT_STEP, SHAPE_SYSTEMATIC_MEASURED,
    SHAPE_SYSTEMATIC_MIXED, SHAPE_SYSTEMATIC_PARAMETRIC,
};
use crate::analysis::bessel::MAX_ORDER;
use crate::analysis::AnalysisError;
use halfwave_units::{Hz, Trace};

/// The `rival`'s parameters (another shape's fit to the same trace) in the slots of this fit's
/// problem, its shape's own slots taken from `p` (the rival's shape carries its widths and mix).
fn rival_params(prob: &Problem, model: &FittedModel, p: &[f64; NP]) -> [f64; NP] {
    let mut q = *p;
    q[BETA] = model.beta;
    q[LN_P0] = model.p0_mw.ln();
    q[CENTRE] = (model.carrier_hz - prob.centre0) / prob.centre_scale;
    q[LN_FLOOR] = model.floor_mw.ln();
    q[ASYM] = model.asymmetry;
    q
}

/// The sum of squares of the `rival`'s model (another shape's fit to the same trace) on the
/// segments in force when they are coarse, for comparing like with like there (see
/// [`ABANDON_FACTOR`]); `None` without a rival or on fine segments. It is summed over the windows
/// and runs in force (the first coarse ones are cut on the rival's model, later ones on the fit's
/// own). It overwrites the workspace's line sums: called right after the segments are cut,
/// before the fit's own evaluation on them.
pub(super) fn rival_ssr(
    prob: &Problem,
    rival: Option<&Fitted>,
    p: &[f64; NP],
    ws: &mut Workspace,
) -> Option<f64> {
    let (_, model) = rival?;
    if !prob.coarse {
        return None;
    }
    let q = rival_params(prob, model, p);
    // With the Jacobian, though only the sum is read: every other evaluation takes it, and a
    // second kind of call made the compiler keep the flag's tests in the fit's loops (0.3-0.6 %
    // more instructions on every benchmark trace, counted).
    Some(evaluate(prob, &model.shape, &q, ws, true).ssr)
}

/// One fit of the comb model with the line shape `shape0` from `start`. With a `rival` (the fit
/// of another shape to the same trace, whose reduced chi-squared this one must beat to be kept),
/// it is given up with an error as soon as it clearly cannot (see [`ABANDON_FACTOR`]).
#[allow(clippy::needless_range_loop, clippy::too_many_arguments)]
pub(super) fn fit_once(
    ws: &mut Workspace,
    trace: &Trace,
    spacing: Hz,
    shape0: &LineShape,
    start: &FitStart,
    noise_variance: f64,
    segment_tolerance_db: f64,
    rival: Option<&Fitted>,
) -> Result<(WholeTraceFit, FittedModel), AnalysisError> {
    let freq = trace.frequency_hz();
    let level = trace.power_dbm();
    let fm = spacing.0;
    let (first, last) = (freq[0], freq[freq.len() - 1]);
    let step = (last - first) / (freq.len() - 1) as f64;
    // Orders whose centre lies within the span, and two beyond each end for their skirts.
    let reach_orders =
        (((start.carrier_hz - first).max(last - start.carrier_hz)) / fm).ceil() as i32 + 2;
    let max_order = reach_orders.min(MAX_ORDER as i32).max(1);
    let parametric = shape0.kind != ShapeKind::Measured;
    let segment_tolerance_db = fine_tolerance_db(shape0, segment_tolerance_db);
    let mut base = [true; NP];
    base[ASYM] = start.asymmetry;
    base[LN_WIDTH] = parametric;
    base[ETA] = shape0.kind == ShapeKind::PseudoVoigt;
    base[LN_WIDTH_L] = parametric;
    let mut prob = Problem {
        freq,
        level,
        spacing: fm,
        max_order,
        block_n: 0.0,
        block_sum: 0.0,
        block_sq: 0.0,
        active: base,
        centre_scale: shape0.width_hz.max(step),
        centre0: start.carrier_hz,
        segment_tolerance_db,
        // A measured shape has no parameters, so the windows and segments set at the start stay
        // near those at the optimum: it is cut at the fine tolerance once, from the start.
        coarse: segment_tolerance_db > 0.0 && parametric,
        on_grid: shape0.on_grid_of(freq),
    };
    let p0_start = start_p0(start, max_order);
    let mut p = [0.0; NP];
    p[BETA] = start.beta.max(1e-4);
    p[LN_P0] = p0_start.ln();
    p[CENTRE] = 0.0;
    // A measured shape's reference shows the analyzer's floor under no line's wings, while the
    // floor read between the comb's lines may hold their wings (tens of dB above it on a laser's
    // Lorentzian line): the fit starts from the lower of the two.
    let floor_start = if shape0.floor_mw > 0.0 {
        start.floor_mw.min(shape0.floor_mw)
    } else {
        start.floor_mw
    };
    p[LN_FLOOR] = floor_start.max(1e-30).ln();
    p[ASYM] = 0.0;
    p[LN_WIDTH] = shape0.width_hz.max(1e-3).ln();
    p[ETA] = if shape0.kind == ShapeKind::PseudoVoigt {
        if shape0.eta < LORENTZIAN_START
            && wings_between_lines(freq, level, fm, start, p0_start, shape0.width_hz, max_order)
        {
            LORENTZIAN_START
        } else {
            shape0.eta
        }
    } else {
        0.0
    };
    p[LN_WIDTH_L] = if shape0.kind == ShapeKind::PseudoVoigt {
        wing_level(p[ETA], shape0.width_l_hz)
    } else {
        shape0.width_l_hz.max(1e-3).ln()
    };

    // Against a rival (a Voigt started from a pseudo-Voigt's optimum), the first coarse segments
    // are cut on the rival's model at its optimum: the start is matched to it, so the two models
    // are nearly the same function there, and the rival's shape costs a fraction of the fit's
    // own (a Voigt's Faddeeva function at every point the cut computes). Until v15 of
    // [`super::ANALYSIS_METHOD`] they were cut on the fit's own start: on the benchmark's
    // 1 MHz-laser trace that cut took 3.09 M of the 5.64 M instructions of the Voigt's attempt
    // (given up after its first step), and 1.92 M on the rival's model.
    match rival {
        Some((_, model)) if prob.coarse => {
            let q = rival_params(&prob, model, &p);
            set_windows(&mut prob, &model.shape, &q, ws);
        }
        _ => set_windows(&mut prob, shape0, &p, ws),
    }
    let mut rival_coarse_ssr = rival_ssr(&prob, rival, &p, ws);
    let mut shape = params_shape(shape0, &p);
    prob.active = free_parameters(&base, &p);
    // Every free parameter is fitted from the first step: a parametric shape's width and mix are
    // as far off at the start as P0 and the floor (the start's small Lorentzian part puts wings
    // far above the floor between the lines, which drags P0 down); a measured shape starts from
    // its reference's floor (until v6 of [`super::ANALYSIS_METHOD`], P0 and a floor read
    // between the lines were first put right in those two alone, about a fifth of the fit's
    // work on the simulated bench's trace).
    let mut eval = evaluate(&prob, &shape, &p, ws, true);
    // The parameters at which the workspace holds `eval`'s line sums and gradients (`None` after
    // a refused trial overwrote them).
    let mut workspace_at = Some(p);
    let mut lambda = 1e-3;
    // The last step taken (parameters after it less before), for [`damp_reversal`]; none after
    // the segments were cut again (a step that then turns back follows the new segments' sum of
    // squares, not an overshoot: the first step on the fine segments often does).
    let mut last_step: Option<[f64; NP]> = None;
    let mut iterations = 0;
    let mut rewindowed = false;
    // Whether beta stood more than 5 % from its start after the last accepted step.
    let mut beta_was_far = false;
    // The lengths (standard uncertainties) of the last two steps taken, the last first, for the
    // contraction that [`FINAL_STEP`] judges by.
    let mut taken: [Option<f64>; 2] = [None, None];
    // Cut at the fine tolerance from the start (a measured shape): as if near the optimum.
    let mut recut_near_optimum = !parametric && segment_tolerance_db > 0.0;
    let p_start_beta = p[BETA];
    let mut pass = 0;
    loop {
        iterations += 1;
        let converged = iterations > MAX_ITERATIONS || lambda > 1e6;
        if converged {
            // The windows and segments were set for the starting parameters: set them for the
            // fitted ones (a parametric shape that grew a Lorentzian part reaches further, a
            // line that grew needs finer segments) and go on while that changes the residual.
            // Not needed when they were set near the optimum already (a step under one
            // standard uncertainty, the steps after it smaller).
            let before = (eval.points, eval.ssr);
            if pass == 0 && !recut_near_optimum {
                pass = 1;
                prob.coarse = false;
                set_windows(&mut prob, &shape, &p, ws);
                last_step = None;
                let after = evaluate(&prob, &shape, &p, ws, true);
                if after.points > before.0 + before.0 / 50
                    || (after.ssr - before.1).abs() > 1e-6 * before.1
                {
                    eval = after;
                    workspace_at = Some(p);
                    lambda = 1e-3;
                    iterations = iterations.min(MAX_ITERATIONS - 10);
                    continue;
                }
                eval = after;
                workspace_at = Some(p);
            }
            break;
        }
        let mut damped = eval.jtj;
        for i in 0..NP {
            if prob.active[i] {
                damped[i][i] = damped[i][i] * (1.0 + lambda) + 1e-30;
            }
        }
        let neg: [f64; NP] = std::array::from_fn(|i| -eval.jtr[i]);
        let Some(delta) = solve_within_bounds(&damped, &neg, &prob.active, &p, shape0) else {
            lambda *= 10.0;
            continue;
        };
        // A step that turns back along the last one (their product in the metric J^T J under
        // minus REVERSAL of the last one's squared length) is shortened by Aitken's rule (below).
        let delta = match last_step {
            Some(last) => damp_reversal(delta, &last, &eval.jtj, &prob.active),
            None => delta,
        };
        let trial = stepped(&p, &delta, shape0);
        let trial_shape = params_shape(shape0, &trial);
        // With the Jacobian: a step is taken far more often than refused, and the accepted
        // trial's evaluation is then the next step's (the Jacobian does not change the sum of
        // squares, so the steps are those of evaluating the trial without it).
        let trial_eval = evaluate(&prob, &trial_shape, &trial, ws, true);
        workspace_at = None;
        if trial_eval.ssr.is_finite() && trial_eval.ssr < eval.ssr {
            let gain = (eval.ssr - trial_eval.ssr) / eval.ssr.max(1e-300);
            // The step's length in standard uncertainties of the parameters (its Mahalanobis
            // norm against the covariance s^2 (J^T J)^-1): delta^T J^T J delta / s^2.
            let norm = quadratic_norm(&delta, &eval.jtj, &prob.active);
            let dof = degrees_of_freedom(&prob, &eval);
            let step_in_uncertainties = (norm / (trial_eval.ssr / dof).max(1e-300)).sqrt();
            last_step = Some(std::array::from_fn(|i| trial[i] - p[i]));
            p = trial;
            shape = trial_shape;
            // Near the optimum (a step under [`RECUT_STEP`] standard uncertainties) the windows
            // and segments are set again for parameters close to the fitted ones; before that,
            // only when beta moved far from where they were set. On the coarse segments it must
            // stay far for two steps: a parametric shape's first steps, its width and mix still
            // far off, may throw beta off by a tenth and back (on the benchmark's beta 1 trace
            // the cut made there and the four evaluations on it were 44 % of the fit's
            // instructions), and the fine cut near the optimum follows anyway.
            let beta_far = (p[BETA] - p_start_beta).abs() > 0.05 * p_start_beta;
            let recut = !recut_near_optimum && step_in_uncertainties < RECUT_STEP;
            let rewindow = recut || (!rewindowed && beta_far && (beta_was_far || !prob.coarse));
            beta_was_far = beta_far;
            taken = [Some(step_in_uncertainties), taken[0]];
            if rewindow {
                if recut {
                    prob.coarse = false;
                }
                set_windows(&mut prob, &shape, &p, ws);
                last_step = None;
                rewindowed = true;
                recut_near_optimum |= recut;
                rival_coarse_ssr = rival_ssr(&prob, rival, &p, ws);
            }
            let active = free_parameters(&base, &p);
            eval = if rewindow {
                prob.active = active;
                evaluate(&prob, &shape, &p, ws, true)
            } else if active == prob.active || (0..NP).all(|i| prob.active[i] || !active[i]) {
                // Fewer free parameters (a width held when the mix reached a bound): the trial's
                // J^T J and J^T r hold the remaining ones' entries as they are, and the held
                // ones' entries are never read.
                prob.active = active;
                trial_eval
            } else {
                // More: the line sums at the nodes are the trial's, only the assembly is redone.
                prob.active = active;
                assemble(&prob, &p, ws, true)
            };
            workspace_at = Some(p);
            lambda = (lambda / 5.0).max(1e-9);
            // Against the rival's reduced chi-squared on the fine segments; on the coarse ones,
            // whose own error (up to COARSE_FACTOR times the fine tolerance) may hold either
            // residual far above the noise, against the rival's sum of squares on the same
            // segments, once the fit stands near the minimum its Gauss-Newton model predicts.
            let to_beat = match (rival, rival_coarse_ssr) {
                (Some((_, model)), Some(ssr)) if prob.coarse => {
                    Some((ssr, "coarse", model.shape.kind))
                }
                (Some((fitted, model)), _) if !prob.coarse => Some((
                    fitted.reduced_chi_squared * noise_variance * degrees_of_freedom(&prob, &eval),
                    "fine",
                    model.shape.kind,
                )),
                _ => None,
            };
            if let Some((rival_sum, segments, rival_kind)) = to_beat {
                let bar = ABANDON_FACTOR * rival_sum;
                // The sum of squares at the minimum of the Gauss-Newton model from `eval`.
                let gain = undamped_step(&prob, &eval, &p, shape0).map_or(0.0, |(_, gain)| gain);
                let predicted = eval.ssr - gain.max(0.0);
                let near_minimum = !prob.coarse || eval.ssr < NEAR_MINIMUM * predicted;
                if eval.ssr > bar && predicted > bar && near_minimum {
                    return Err(AnalysisError::FitFailed(format!(
                        "the {:?} shape was given up: on the {segments} segments its residual stayed above \
                         {ABANDON_FACTOR} times the {rival_kind:?} shape's, which it had to beat",
                        shape0.kind
                    )));
                }
            }
            if !recut && (gain < 1e-7 || step_in_uncertainties < 0.05) {
                // Converged: the step moved the parameters by under a twentieth of their
                // standard uncertainties (or changed the residual by under 1e-7 of itself).
                lambda = f64::INFINITY;
            } else if recut_near_optimum {
                // The next (undamped) step from here, from this evaluation's J^T J and J^T r
                // (right after the fine cut too), is taken without evaluating the model where it
                // lands, and ends the fit, when the step after it would be under a twentieth of
                // the standard uncertainties (the test above would stop the fit right after it):
                // when the next step itself is that small, or when it is under [`FINAL_STEP`]
                // and the contraction the fit has shown (the next step over the last one, or
                // right after a cut the last step over the one before) makes the step after it
                // that small, away from the Bessel zeros. J^T J changes by a negligible amount
                // over such a step, and the sum of squares where it lands is taken as its
                // quadratic model's.
                if let Some((next, norm)) = undamped_step(&prob, &eval, &p, shape0) {
                    let variance = (eval.ssr / degrees_of_freedom(&prob, &eval)).max(1e-300);
                    let next_length = (norm.max(0.0) / variance).sqrt();
                    let contraction = match taken {
                        [Some(last), _] if !rewindow => Some(next_length / last.max(1e-300)),
                        [Some(last), Some(before)] => Some(last / before.max(1e-300)),
                        _ => None,
                    };
                    let step_after = contraction.map_or(f64::INFINITY, |ratio| ratio * next_length);
                    // Last, and only when the rest holds: not near a zero of a line's J_n, where
                    // the line's power has no slope in beta and J^T J changes fast with it.
                    if norm >= 0.0
                        && (next_length < 0.05
                            || (next_length < FINAL_STEP
                                && step_after < 0.05
                                && mirrored_across_zero(p[BETA], max_order).is_none()))
                    {
                        p = stepped(&p, &next, shape0);
                        shape = params_shape(shape0, &p);
                        eval.ssr = (eval.ssr - norm).max(0.0);
                        iterations += 1;
                        lambda = f64::INFINITY;
                    }
                }
            }
        } else {
            // Refused. When the undamped (Gauss-Newton) step from here promises under 0.001 in
            // chi-squared, the fit stands at the minimum of its quadratic model (beta within
            // about 0.03 of its uncertainty of it): further refusals, each a whole evaluation,
            // would only raise the damping until it stops.
            let variance = (eval.ssr / degrees_of_freedom(&prob, &eval)).max(1e-300);
            if prob.coarse {
                // A step of under three standard uncertainties refused on the coarse segments:
                // their own error (up to COARSE_FACTOR times the fine tolerance) is what stops
                // the fit here, so it goes on from here on the fine ones.
                let norm = quadratic_norm(&delta, &eval.jtj, &prob.active);
                if norm / variance < 9.0 {
                    prob.coarse = false;
                    set_windows(&mut prob, &shape, &p, ws);
                    last_step = None;
                    rewindowed = true;
                    recut_near_optimum = true;
                    prob.active = free_parameters(&base, &p);
                    eval = evaluate(&prob, &shape, &p, ws, true);
                    workspace_at = Some(p);
                    continue;
                }
            }
            let promised = undamped_step(&prob, &eval, &p, shape0).map(|(_, gain)| gain);
            lambda = match promised {
                Some(gain) if gain / variance < 1e-3 => f64::INFINITY,
                _ => lambda * 4.0,
            };
        }
    }
    let n_total = eval.points as f64 + prob.block_n;
    let n_params = prob.active.iter().filter(|a| **a).count() as f64;
    let dof = (n_total - n_params).max(1.0);
    let variance = eval.ssr / dof;
    // When the shape's mix or widths are not determined (a part with no weight), the covariance
    // is taken with them held.
    let mut inv = inverse_diagonal(&eval.jtj, &prob.active);
    for held in [[ETA, NP, NP], [ETA, LN_WIDTH, LN_WIDTH_L]] {
        if inv[BETA].is_finite() && inv[BETA] > 0.0 {
            break;
        }
        let mut fewer = prob.active;
        for slot in held {
            if slot < NP {
                fewer[slot] = false;
            }
        }
        inv = inverse_diagonal(&eval.jtj, &fewer);
    }
    let u_stat = (variance * inv[BETA]).sqrt();
    let beta = p[BETA];
    let relative = if !parametric {
        SHAPE_SYSTEMATIC_MEASURED
    } else if shape.kind == ShapeKind::PseudoVoigt && is_mixed(shape.eta) {
        (SHAPE_SYSTEMATIC_MIXED * (0.3 / p[BETA].max(1e-6)).min(1.0))
            .max(SHAPE_SYSTEMATIC_PARAMETRIC)
    } else {
        SHAPE_SYSTEMATIC_PARAMETRIC
    };
    let u_shape = relative * beta;
    let u_reference = match shape.table_noise.as_deref() {
        Some(noise) => match workspace_at {
            // The workspace holds the gradients the covariance above was taken from (at the
            // parameters before a last step too small to evaluate): used as they are.
            Some(at) => reference_noise_uncertainty(&prob, &shape, noise, &at, ws, &eval),
            None => {
                let held = evaluate(&prob, &shape, &p, ws, true);
                reference_noise_uncertainty(&prob, &shape, noise, &p, ws, &held)
            }
        },
        None => 0.0,
    };
    let u_combined = (u_stat * u_stat + u_reference * u_reference + u_shape * u_shape).sqrt();
    if !(beta.is_finite() && u_stat.is_finite() && u_combined.is_finite()) {
        return Err(AnalysisError::FitFailed(format!(
            "the whole-trace fit did not converge (beta {beta}, uncertainty {u_stat}, with the reference's noise {u_reference})"
        )));
    }
    let p0 = p[LN_P0].exp();
    let floor = p[LN_FLOOR].exp();
    let fc = prob.centre0 + p[CENTRE] * prob.centre_scale;
    let orders: Vec<i32> = (-max_order..=max_order)
        .filter(|n| {
            let (lo, hi) = ws.ranges[(n + max_order) as usize];
            hi >= lo
        })
        .collect();
    let fit = WholeTraceFit {
        modulation_index: beta,
        uncertainty_statistical: u_stat,
        uncertainty_reference: u_reference,
        uncertainty_line_shape: u_shape,
        uncertainty_combined: u_combined,
        line_peak_power_dbm: 10.0 * p0.log10(),
        floor_dbm: 10.0 * floor.log10(),
        carrier_frequency_hz: Hz(fc),
        carrier_uncertainty_hz: (variance * inv[CENTRE]).sqrt() * prob.centre_scale,
        residual_am_depth: p[ASYM],
        residual_am_uncertainty: if prob.active[ASYM] {
            (variance * inv[ASYM]).sqrt()
        } else {
            0.0
        },
        line_shape: shape.kind,
        line_width_hz: shape.fwhm(),
        line_shape_eta: shape.eta,
        lorentzian_width_hz: if parametric { shape.width_l_hz } else { 0.0 },
        residual_db: (eval.ssr / n_total.max(1.0)).sqrt(),
        reduced_chi_squared: variance / noise_variance,
        points_under_lines: eval.points,
        points_in_floor_block: prob.block_n as usize,
        iterations,
        orders,
    };
    let model = FittedModel {
        shape: shape.into_owned(),
        beta,
        p0_mw: p0,
        floor_mw: floor,
        carrier_hz: fc,
        spacing_hz: fm,
        asymmetry: p[ASYM],
        max_order,
    };
    Ok((fit, model))
}
