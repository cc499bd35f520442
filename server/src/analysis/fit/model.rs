//! The forward model evaluated over the trace: the thread's buffers, the problem a fit works on,
//! the pseudo-Voigt's wing-level mapping, and the residual with J^T J summed segment by segment.

use super::line_shape::{LineShape, ShapeKind};
use super::{
    line_weight, ASYM, BETA, CENTRE, DB_PER_NEPER, ETA, LN_FLOOR, LN_P0, LN_WIDTH, LN_WIDTH_L, NP,
};
use crate::analysis::bessel::BesselTable;
use std::borrow::Cow;
use std::cell::RefCell;

/// Buffers kept between fits on one thread, so that a sweep's traces reuse them.
#[derive(Default)]
pub(super) struct Workspace {
    /// Per node: sum over lines of w K and of the derivatives (see `evaluate`).
    pub(super) s: [Vec<f64>; 7],
    /// (first, last) point index of each line (inclusive), per order slot.
    pub(super) ranges: Vec<(usize, usize)>,
    /// (first, last) node slot of each line (inclusive), per order slot.
    pub(super) node_ranges: Vec<(usize, usize)>,
    /// Runs of node slots (first, last, inclusive) on which each line is summed: the line's
    /// node range less the nodes where it is negligible against the other lines there (see
    /// [`limit_reach`]); line slot `s` owns `line_runs[line_run_start[s]..line_run_start[s + 1]]`.
    pub(super) line_runs: Vec<(usize, usize)>,
    pub(super) line_run_start: Vec<usize>,
    /// Per order slot: the largest amplitude P0 w_n the line may take while beta moves by 10 %.
    pub(super) bound_amplitude: Vec<f64>,
    /// Scratch for [`limit_reach`]: the runs (order slot, first node, last node) in the order
    /// they close.
    pub(super) closed_runs: Vec<(usize, usize, usize)>,
    /// Merged intervals of points under the lines.
    pub(super) intervals: Vec<(usize, usize)>,
    /// Point index of each node, ascending, and its frequency.
    pub(super) nodes: Vec<usize>,
    pub(super) node_freq: Vec<f64>,
    /// The points under the lines, cut into pieces on which the model is quadratic.
    pub(super) segments: Vec<Segment>,
    /// Model level (dB) and its gradient at each node.
    pub(super) node_level: Vec<f64>,
    pub(super) node_gradient: Vec<[f64; NP]>,
    /// Per node, summed over its segments: sum_k G_jk D_k (see [`assemble`]) and (G M - h)_j.
    pub(super) node_e: Vec<[f64; NP]>,
    pub(super) node_r: Vec<f64>,
    /// Point index of every line centre within the span, ascending.
    pub(super) centres: Vec<usize>,
    /// Points under the lines.
    pub(super) points_under: usize,
    /// The points at which the last cut computed the model, in the order it did (see
    /// [`ShapeRow`]), and per point the index of its row there, `u32::MAX` where the level was
    /// not computed (only the rows' points are cleared before the next cut).
    pub(super) shape_rows: Vec<ShapeRow>,
    pub(super) point_row: Vec<u32>,
    /// The rows' K values, each row's slots one after the other.
    pub(super) point_shape: Vec<f64>,
    /// Scratch for [`reference_noise_uncertainty`]: per node and per point, beta's row of
    /// (J^T J)^-1 dotted with the gradient (per point times c P0 / M), per table entry beta's
    /// sensitivity.
    pub(super) noise_node: Vec<f64>,
    pub(super) noise_point: Vec<f64>,
    pub(super) noise_sensitivity: Vec<f64>,
}

/// A point at which the segment cut computed the model: its level, and each line's K there
/// (read again by [`limit_reach`] at the nodes) for the order slots `first..end`, those whose
/// window may hold the point, stored from `start` in [`Workspace::point_shape`]; K is 0 at the
/// other slots and at those whose window does not hold the point.
#[derive(Debug, Clone, Copy)]
pub(super) struct ShapeRow {
    pub(super) point: usize,
    /// The model's level, dB.
    pub(super) level: f64,
    pub(super) start: usize,
    pub(super) first: usize,
    pub(super) end: usize,
}

/// Points between nodes on which the model in dB is taken as the quadratic through the nodes
/// (Lagrange interpolation in frequency; exact when the segment's points are its nodes). The
/// sum of squared residuals over the segment's points is then exactly
/// `M^T G M - 2 h^T M + yy` with M the model at the nodes, G_jk = sum l_j(f_i) l_k(f_i),
/// h_j = sum l_j(f_i) y_i and yy = sum y_i^2, so that a fit step costs per node, not per point.
#[derive(Debug, Clone, Copy)]
pub(super) struct Segment {
    /// Node slots (the first `count` are used).
    pub(super) slots: [u32; 3],
    pub(super) count: u8,
    /// G in the order 00, 01, 02, 11, 12, 22.
    pub(super) g: [f64; 6],
    pub(super) h: [f64; 3],
    pub(super) yy: f64,
}

impl Segment {
    #[inline]
    pub(super) fn g(&self, j: usize, k: usize) -> f64 {
        const INDEX: [[usize; 3]; 3] = [[0, 1, 2], [1, 3, 4], [2, 4, 5]];
        self.g[INDEX[j][k]]
    }
}

thread_local! {
    pub(super) static WORKSPACE: RefCell<Workspace> = RefCell::new(Workspace::default());
}

/// Fixed data of one fit.
pub(super) struct Problem<'a> {
    pub(super) freq: &'a [f64],
    pub(super) level: &'a [f64],
    pub(super) spacing: f64,
    pub(super) max_order: i32,
    /// Floor block: count, sum and sum of squares of the levels (dB).
    pub(super) block_n: f64,
    pub(super) block_sum: f64,
    pub(super) block_sq: f64,
    pub(super) active: [bool; NP],
    /// Scale of the centre parameter (Hz per unit).
    pub(super) centre_scale: f64,
    pub(super) centre0: f64,
    /// See [`SEGMENT_TOLERANCE_DB`]; 0 makes every point a node (the exact sum).
    pub(super) segment_tolerance_db: f64,
    /// Far from the optimum the segments are cut [`COARSE_FACTOR`] times looser (see
    /// [`Problem::tolerance_db`]).
    pub(super) coarse: bool,
    /// A measured shape whose table grid the trace's points lie on ([`LineShape::on_grid_of`]).
    pub(super) on_grid: bool,
}

/// How much looser the segments' tolerance is while a parametric shape's fit is still far from
/// the optimum (before its step falls under [`RECUT_STEP`] standard uncertainties, or a step of
/// under three is refused): fewer nodes for the first steps, whose accuracy does not reach the
/// result (the segments are cut again at the fine tolerance near the optimum and the fit goes on
/// from there). Only the tolerance: the lines left out at each node are those of
/// [`LOCAL_SHARE_DROPPED`] throughout. A measured shape is cut once, at the fine tolerance (its
/// width and mix do not move, so the second cut cost more than the coarse steps saved: 30 % of
/// the fit on the simulated bench's trace, counted). Until v7 of [`super::ANALYSIS_METHOD`] 10;
/// at 100 (0.1 dB, still under the display noise of the traces the study draws) the parametric
/// benchmark traces took 10-14 % fewer instructions than at 10 and their beta moved by under
/// 2e-4 of its uncertainty; at 1000 the beta 2.5 trace took a step more.
pub(super) const COARSE_FACTOR: f64 = 100.0;

impl Problem<'_> {
    /// The segments' tolerance in force, dB.
    pub(super) fn tolerance_db(&self) -> f64 {
        if self.coarse {
            COARSE_FACTOR * self.segment_tolerance_db
        } else {
            self.segment_tolerance_db
        }
    }
}

pub(super) struct Evaluation {
    pub(super) ssr: f64,
    pub(super) jtj: [[f64; NP]; NP],
    pub(super) jtr: [f64; NP],
    pub(super) points: usize,
}

/// The line shape at the parameters `p`: a measured shape has no parameters and is borrowed
/// (its table is not copied on every step); a pseudo-Voigt (no table) takes its widths and mix,
/// a Voigt its two widths (its table of w is built again when they moved).
pub(super) fn params_shape<'a>(base: &'a LineShape, p: &[f64; NP]) -> Cow<'a, LineShape> {
    if base.kind == ShapeKind::Measured {
        return Cow::Borrowed(base);
    }
    if base.kind == ShapeKind::Voigt {
        let (gaussian, lorentzian) = (p[LN_WIDTH].exp(), p[LN_WIDTH_L].exp());
        if gaussian == base.width_hz && lorentzian == base.width_l_hz {
            return Cow::Borrowed(base);
        }
        return Cow::Owned(LineShape::voigt(gaussian, lorentzian));
    }
    let mut s = base.clone();
    s.eta = p[ETA].clamp(0.0, 1.0);
    s.wing_slope_share = wing_slope_share(s.eta);
    s.width_hz = p[LN_WIDTH].exp();
    s.width_l_hz = (0.5 * (p[LN_WIDTH_L] - wing_weight(s.eta).ln())).exp();
    s.inv_width_sq = 1.0 / (s.width_hz * s.width_hz);
    s.inv_width_l_sq = 1.0 / (s.width_l_hz * s.width_l_hz);
    Cow::Owned(s)
}

/// The pseudo-Voigt's parameter in the slot [`LN_WIDTH_L`]: ln(D w_L^2) with D =
/// [`wing_weight`](eta), the level of its far wings (K ~ eta w_L^2 / (4 x^2), D about eta above
/// [`LORENTZIAN_HELD`]). Fitted with the mix, it makes the valley along which a weak Lorentzian
/// part trades its weight for its width at a fixed wing level straight: fitted by its width
/// (until v10 of [`super::ANALYSIS_METHOD`]), that valley is curved, and in the randomised study
/// 44 of 327 pseudo-Voigt fits crept along it, step refused after step taken, until the
/// iteration limit.
pub(super) fn wing_level(eta: f64, lorentzian_width_hz: f64) -> f64 {
    wing_weight(eta).ln() + 2.0 * lorentzian_width_hz.max(1e-3).ln()
}

/// D = sqrt(eta^2 + LORENTZIAN_HELD^2): the weight that, with the Lorentzian width, sets the
/// wing level A = ln(D w_L^2) ([`wing_level`]). Far above [`LORENTZIAN_HELD`] it is eta (A the
/// wings' own level); far below, LORENTZIAN_HELD (the width then moves with A alone, the wings
/// with eta). Until v13 of [`super::ANALYSIS_METHOD`] D was max(eta, 1e-3), whose corner put a
/// kink in the model along eta: the demo's traces at 10-16 GHz (a Gaussian filter seen with a
/// laser line 2,000 times narrower, drawn by the simulator with a Lorentzian share of about
/// 7e-4) settled there, stepping across the corner and back for 24-41 iterations.
pub(super) fn wing_weight(eta: f64) -> f64 {
    eta.hypot(LORENTZIAN_HELD)
}

/// The mix whose [`wing_weight`] is `weight` (0 for a weight under LORENTZIAN_HELD's).
pub(super) fn mix_of_weight(weight: f64) -> f64 {
    (weight * weight - LORENTZIAN_HELD * LORENTZIAN_HELD)
        .max(0.0)
        .sqrt()
}

/// (eta / D)^2 with D = [`wing_weight`](eta): see [`LineShape::eval`].
pub(super) fn wing_slope_share(eta: f64) -> f64 {
    let share = eta / wing_weight(eta);
    share * share
}

/// A Lorentzian part of at most this share of the peak has its width held (see
/// [`free_parameters`]): a Lorentzian of weight 1e-5 and any width fits a nearly Gaussian line
/// equally well, and its width then creeps for tens of steps that change nothing else. Until
/// v13 of [`super::ANALYSIS_METHOD`] 1e-3 ([`PART_HELD`]), which held the width of the demo's
/// lines (a share of about 7e-4, see [`wing_weight`]): their fits could not reach it, and
/// where their V_pi landed depended on where the fits stopped, by up to 0.1 %. At 1e-4 the
/// demo's fits at 10-16 GHz settle at shares of 5e-4 to 3e-3 in 14-19 iterations on average
/// (34, 32 and 29 before; at 20 GHz 26 against 9) and their V_pi lie within 0.03 % of the
/// scenario's.
pub(super) const LORENTZIAN_HELD: f64 = 1e-4;

/// A Gaussian part of at most this share of the peak (eta at least 1 - PART_HELD) has its width
/// held (see [`free_parameters`]).
const PART_HELD: f64 = 1e-3;

pub(super) fn free_parameters(base: &[bool; NP], p: &[f64; NP]) -> [bool; NP] {
    let mut active = *base;
    if base[ETA] {
        // A part with nearly no weight: its width is held ([`LORENTZIAN_HELD`], [`PART_HELD`]).
        if p[ETA] <= LORENTZIAN_HELD {
            active[LN_WIDTH_L] = false;
        }
        if p[ETA] >= 1.0 - PART_HELD {
            active[LN_WIDTH] = false;
        }
    }
    active
}

// Index loops over parallel arrays and small matrices read more plainly than zipped iterators.
#[allow(clippy::needless_range_loop)]
pub(super) fn evaluate(
    prob: &Problem,
    shape: &LineShape,
    p: &[f64; NP],
    ws: &mut Workspace,
    jacobian: bool,
) -> Evaluation {
    let table = BesselTable::get();
    let beta = p[BETA];
    let fc = prob.centre0 + p[CENTRE] * prob.centre_scale;
    let a = p[ASYM];
    let node_count = ws.nodes.len();
    // The sums this evaluation writes: K alone without the Jacobian; no shape slopes for a
    // measured shape (`assemble` reads those only for free shape parameters).
    let used = match (jacobian, shape.kind) {
        (false, _) => 1,
        (true, ShapeKind::Measured) => 4,
        (true, _) => 7,
    };
    for s in &mut ws.s[..used] {
        s[..node_count].fill(0.0);
    }
    let nmax = prob.max_order;
    for n in -nmax..=nmax {
        let slot = (n + nmax) as usize;
        let runs = &ws.line_runs[ws.line_run_start[slot]..ws.line_run_start[slot + 1]];
        if runs.is_empty() {
            continue;
        }
        let (w, dw_beta, dw_a) = line_weight(table, n, beta, a);
        let centre = fc + n as f64 * prob.spacing;
        let [s0, s1, s2, s3, s4, s5, s6] = &mut ws.s;
        for &(lo, hi) in runs {
            // The run's nodes as slices of one length, so that the loops index them unchecked.
            let run = lo..hi + 1;
            let freq = &ws.node_freq[run.clone()];
            let s0 = &mut s0[run.clone()];
            if jacobian && shape.kind == ShapeKind::Measured {
                // A measured shape has no parameters: its three slopes are zero. On the table's
                // grid the line reads it at one fraction of a step for all its points
                // ([`GridLine`]), else point by point.
                let points = &ws.nodes[run.clone()];
                let (s1, s2, s3) = (&mut s1[run.clone()], &mut s2[run.clone()], &mut s3[run]);
                let mut add = |k: usize, (v, dv): (f64, f64)| {
                    s0[k] += w * v;
                    s1[k] += dw_beta * v;
                    s2[k] += w * dv;
                    s3[k] += dw_a * v;
                };
                if prob.on_grid {
                    let line = shape.grid_line(prob.freq[0], centre);
                    for k in 0..freq.len() {
                        add(k, shape.grid_value(&line, points[k], freq[k] - centre));
                    }
                } else {
                    for k in 0..freq.len() {
                        add(k, shape.measured_value(freq[k] - centre));
                    }
                }
            } else if jacobian {
                let (s1, s2, s3) = (
                    &mut s1[run.clone()],
                    &mut s2[run.clone()],
                    &mut s3[run.clone()],
                );
                let (s4, s5, s6) = (&mut s4[run.clone()], &mut s5[run.clone()], &mut s6[run]);
                for k in 0..freq.len() {
                    let v = shape.eval(freq[k] - centre);
                    s0[k] += w * v.k;
                    s1[k] += dw_beta * v.k;
                    s2[k] += w * v.dx;
                    s3[k] += dw_a * v.k;
                    s4[k] += w * v.dw;
                    s5[k] += w * v.de;
                    s6[k] += w * v.dl;
                }
            } else {
                for k in 0..freq.len() {
                    s0[k] += w * shape.eval(freq[k] - centre).k;
                }
            }
        }
    }
    assemble(prob, p, ws, jacobian)
}

/// The sum of squares (and with `jacobian`, J^T J and J^T r) at the parameters `p` from the line
/// sums at the nodes that [`evaluate`] left in the workspace: the levels at the nodes, then the
/// segments' quadratic forms. The sums do not depend on P0 and the floor, nor on which
/// parameters are free, so this alone serves when a step frees more parameters (`fit_once`).
#[allow(clippy::needless_range_loop)]
pub(super) fn assemble(
    prob: &Problem,
    p: &[f64; NP],
    ws: &mut Workspace,
    jacobian: bool,
) -> Evaluation {
    let p0 = p[LN_P0].exp();
    let floor = p[LN_FLOOR].exp();
    let node_count = ws.nodes.len();
    let c = DB_PER_NEPER;
    let width_active = prob.active[LN_WIDTH];
    let eta_active = prob.active[ETA];
    let asym_active = prob.active[ASYM];
    let width_l_active = prob.active[LN_WIDTH_L];
    {
        let [s0, s1, s2, s3, s4, s5, s6] = &ws.s;
        for k in 0..node_count {
            let m = floor + p0 * s0[k];
            let m = if m > 1e-300 { m } else { 1e-300 };
            ws.node_level[k] = c * m.ln();
            if !jacobian {
                continue;
            }
            let g = c / m;
            let gp = g * p0;
            let mut jr = [0.0; NP];
            jr[BETA] = gp * s1[k];
            jr[LN_P0] = gp * s0[k];
            jr[CENTRE] = -gp * s2[k] * prob.centre_scale;
            jr[LN_FLOOR] = g * floor;
            if asym_active {
                jr[ASYM] = gp * s3[k];
            }
            if width_active {
                jr[LN_WIDTH] = gp * s4[k];
            }
            if eta_active {
                jr[ETA] = gp * s5[k];
            }
            if width_l_active {
                jr[LN_WIDTH_L] = gp * s6[k];
            }
            ws.node_gradient[k] = jr;
        }
    }
    let mut e = Evaluation {
        ssr: 0.0,
        jtj: [[0.0; NP]; NP],
        jtr: [0.0; NP],
        points: ws.points_under,
    };
    if jacobian {
        ws.node_e[..node_count].fill([0.0; NP]);
        ws.node_r[..node_count].fill(0.0);
    }
    // A measured shape frees at most beta, ln P0, the centre, ln F and a: the sums below run
    // over those alone (the other parameters' gradients are zero).
    if prob.active[LN_WIDTH..].iter().any(|a| *a) {
        segment_sums::<NP>(prob, ws, &mut e, jacobian);
    } else {
        segment_sums::<{ ASYM + 1 }>(prob, ws, &mut e, jacobian);
    }
    // The floor block: r_i = L_F - y_i with L_F = c ln F.
    if prob.block_n > 0.0 {
        let lf = c * floor.ln();
        e.ssr += prob.block_n * lf * lf - 2.0 * lf * prob.block_sum + prob.block_sq;
        if jacobian {
            e.jtj[LN_FLOOR][LN_FLOOR] += prob.block_n * c * c;
            e.jtr[LN_FLOOR] += c * (prob.block_n * lf - prob.block_sum);
        }
    }
    if jacobian {
        for row in 0..NP {
            for col in 0..row {
                e.jtj[row][col] = e.jtj[col][row];
            }
        }
    }
    e
}

/// The segments' part of [`assemble`]: the sum of squares and, with `jacobian`, J^T J and J^T r
/// from the levels and gradients at the nodes, with the gradients' first `Q` entries (the
/// others zero).
#[allow(clippy::needless_range_loop)]
fn segment_sums<const Q: usize>(
    prob: &Problem,
    ws: &mut Workspace,
    e: &mut Evaluation,
    jacobian: bool,
) {
    let node_count = ws.nodes.len();
    for seg in &ws.segments {
        let count = seg.count as usize;
        let mut levels = [0.0; 3];
        for j in 0..count {
            levels[j] = ws.node_level[seg.slots[j] as usize];
        }
        // (G M)_j - h_j: the residual weighted by node j's interpolation weight, summed.
        let mut weighted = [0.0; 3];
        let mut gm_m = 0.0;
        let mut h_m = 0.0;
        for j in 0..count {
            let mut gm = 0.0;
            for k in 0..count {
                gm += seg.g(j, k) * levels[k];
            }
            gm_m += gm * levels[j];
            h_m += seg.h[j] * levels[j];
            weighted[j] = gm - seg.h[j];
        }
        e.ssr += gm_m - 2.0 * h_m + seg.yy;
        if !jacobian {
            continue;
        }
        // The segment's J^T J is D^T G D and its J^T r is D^T (G M - h) (D the gradients at its
        // nodes): node j collects E_j = sum_k G_jk D_k and (G M - h)_j, so that both are summed
        // over nodes below (a node shared by two segments once).
        for j in 0..count {
            let sj = seg.slots[j] as usize;
            let mut ej = [0.0; NP];
            for k in 0..count {
                let g = seg.g(j, k);
                let dk = &ws.node_gradient[seg.slots[k] as usize];
                for q in 0..Q {
                    ej[q] += g * dk[q];
                }
            }
            let acc = &mut ws.node_e[sj];
            for q in 0..Q {
                acc[q] += ej[q];
            }
            ws.node_r[sj] += weighted[j];
        }
    }
    if jacobian {
        // J^T J = sum_k D_k E_k^T and J^T r = sum_k D_k (G M - h)_k, two rows per pass over the
        // nodes (their sums stay in registers, and each node's gradient and E are read half as
        // often as row by row, which waited on memory; the gradients of parameters not free are
        // zero).
        let mut rows = [0usize; NP];
        let mut count = 0;
        for row in 0..Q {
            if prob.active[row] {
                rows[count] = row;
                count += 1;
            }
        }
        for pair in rows[..count].chunks(2) {
            // (An odd last row is summed twice over, its second copy dropped.) Only the columns
            // from the pair's first row on: `assemble` copies the upper triangle into the lower.
            let (r0, r1) = (pair[0], pair.get(1).copied());
            let r1_slot = r1.unwrap_or(r0);
            let (acc0, acc1, jr0, jr1) = match r0 {
                0 => row_pair_sums::<0, Q>(ws, node_count, r0, r1_slot),
                1 => row_pair_sums::<1, Q>(ws, node_count, r0, r1_slot),
                2 => row_pair_sums::<2, Q>(ws, node_count, r0, r1_slot),
                3 => row_pair_sums::<3, Q>(ws, node_count, r0, r1_slot),
                4 => row_pair_sums::<4, Q>(ws, node_count, r0, r1_slot),
                5 => row_pair_sums::<5, Q>(ws, node_count, r0, r1_slot),
                _ => row_pair_sums::<6, Q>(ws, node_count, r0, r1_slot),
            };
            e.jtr[r0] = jr0;
            e.jtj[r0] = acc0;
            if let Some(r1) = r1 {
                e.jtr[r1] = jr1;
                e.jtj[r1] = acc1;
            }
        }
    }
}

/// Rows `r0` and `r1` of J^T J (columns `FROM..Q`, `FROM` at most `r0`; the others 0) and their
/// entries of J^T r, summed over the nodes from the gradients and E left by [`segment_sums`]; the
/// column range a constant, so that both rows' sums stay in registers.
#[inline(always)]
#[allow(clippy::needless_range_loop)]
fn row_pair_sums<const FROM: usize, const Q: usize>(
    ws: &Workspace,
    node_count: usize,
    r0: usize,
    r1: usize,
) -> ([f64; NP], [f64; NP], f64, f64) {
    let mut acc0 = [0.0; NP];
    let mut acc1 = [0.0; NP];
    let (mut jr0, mut jr1) = (0.0, 0.0);
    for k in 0..node_count {
        let d = &ws.node_gradient[k];
        let (v0, v1) = (d[r0], d[r1]);
        let r = ws.node_r[k];
        jr0 += v0 * r;
        jr1 += v1 * r;
        let ek = &ws.node_e[k];
        for col in FROM..Q {
            acc0[col] += v0 * ek[col];
            acc1[col] += v1 * ek[col];
        }
    }
    (acc0, acc1, jr0, jr1)
}
