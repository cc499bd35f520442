//! Where the model is evaluated: each line's window and reach, and the trace cut into segments
//! on which the model is a quadratic through its nodes to within a tolerance in dB.

use super::line_shape::LineShape;
use super::model::{Problem, Segment, ShapeRow, Workspace, COARSE_FACTOR};
use super::{
    line_weight, ASYM, BETA, CENTRE, CONTRIBUTION_FLOOR, DB_PER_NEPER, LN_FLOOR, LN_P0, NP,
};
use crate::analysis::bessel::{BesselTable, MAX_ORDER};

/// Largest difference (dB) between the model and its quadratic through a segment's nodes,
/// checked at the segment's quarter points when the segments are cut. Far below the display
/// noise of any analyzer (0.01-0.5 dB per point), and on the same side nowhere for long: the
/// tests `segments_change_the_fit_by_a_small_fraction_of_its_uncertainty` and
/// `the_fast_fit_gives_the_beta_of_the_exact_sum_on_both_kinds_of_trace` bound its effect (at
/// 0.002 dB the simulated bench's trace at the carrier null moved by 0.050 of its uncertainty,
/// at 0.001 dB by 0.019).
pub(super) const SEGMENT_TOLERANCE_DB: f64 = 0.001;
/// A measured shape read point by point carries its reference's display noise into the model,
/// which then jumps from point to point by about that noise: its segments are cut to this share
/// of the noise instead, when that is looser than [`SEGMENT_TOLERANCE_DB`]. At 0.001 dB the
/// benchmark's 1 GHz trace (0.15 dB of reference noise) needed 3,548 nodes for its 10,001
/// points; at a tenth of the noise (0.015 dB) its fit took 48 % fewer instructions and beta moved
/// by 0.003 of its uncertainty. The model between the nodes is then the quadratic through them,
/// and the reference-noise term (`reference_noise_uncertainty`) propagates the noise of the
/// entries the model reads there, so the uncertainty is that of the fit as taken.
pub(super) const SEGMENT_TOLERANCE_REFERENCE_NOISE: f64 = 0.1;

/// The fine tolerance for `shape` given the fit's `segment_tolerance_db` (0, the exact sum, stays
/// 0): [`SEGMENT_TOLERANCE_REFERENCE_NOISE`] of the reference's display noise for a shape read
/// point by point, when looser, but never looser than the coarse segments' tolerance, whatever
/// noise the reference showed.
pub(super) fn fine_tolerance_db(shape: &LineShape, segment_tolerance_db: f64) -> f64 {
    match shape.table_noise.as_deref() {
        Some(noise) if segment_tolerance_db > 0.0 => segment_tolerance_db.max(
            (SEGMENT_TOLERANCE_REFERENCE_NOISE * noise.display_noise_db())
                .min(COARSE_FACTOR * segment_tolerance_db),
        ),
        _ => segment_tolerance_db,
    }
}
/// Longest segment, points.
const MAX_SEGMENT_POINTS: usize = 256;

/// Sets the point range of every line, the floor block and the segments (cut where the model
/// at `p` is quadratic in dB within [`SEGMENT_TOLERANCE_DB`]) for the parameters `p`.
pub(super) fn set_windows(
    prob: &mut Problem,
    shape: &LineShape,
    p: &[f64; NP],
    ws: &mut Workspace,
) {
    let table = BesselTable::get();
    let n_points = prob.freq.len();
    let nmax = prob.max_order;
    let beta = p[BETA];
    let p0 = p[LN_P0].exp();
    let floor = p[LN_FLOOR].exp();
    let fc = prob.centre0 + p[CENTRE] * prob.centre_scale;
    ws.ranges.clear();
    ws.bound_amplitude.clear();
    ws.centres.clear();
    for n in -nmax..=nmax {
        // The largest weight this line may take while beta moves by 10 %: lines at a Bessel
        // zero keep their window.
        let mut bound: f64 = 0.0;
        for f in [0.9, 0.95, 1.0, 1.05, 1.1] {
            let (j, _) = table.value_and_slope(n, beta * f);
            let (jm, _) = table.value_and_slope(n - 1, beta * f);
            let (jp, _) = table.value_and_slope(n + 1, beta * f);
            bound = bound.max((j.abs() + 0.5 * p[ASYM].abs() * (jm.abs() + jp.abs())).powi(2));
        }
        ws.bound_amplitude.push(p0 * bound);
        let ratio = CONTRIBUTION_FLOOR * floor / (p0 * bound).max(1e-300);
        let (left, right) = shape.reach(ratio);
        let centre = fc + n as f64 * prob.spacing;
        let lo = prob.freq.partition_point(|f| *f < centre - left);
        let hi = prob.freq.partition_point(|f| *f <= centre + right);
        if hi > lo && left + right > 0.0 {
            ws.ranges.push((lo, hi - 1));
        } else {
            ws.ranges.push((1, 0));
        }
        let at = prob.freq.partition_point(|f| *f < centre);
        if at < n_points {
            ws.centres.push(at);
        }
    }
    // The points under the lines: the lines' ranges merged where they overlap or touch.
    ws.intervals.clear();
    ws.intervals
        .extend(ws.ranges.iter().copied().filter(|(lo, hi)| hi >= lo));
    ws.intervals.sort_unstable();
    let mut merged = 0;
    for k in 0..ws.intervals.len() {
        let (lo, hi) = ws.intervals[k];
        if merged > 0 && lo <= ws.intervals[merged - 1].1 + 1 {
            let last = &mut ws.intervals[merged - 1].1;
            *last = (*last).max(hi);
        } else {
            ws.intervals[merged] = (lo, hi);
            merged += 1;
        }
    }
    ws.intervals.truncate(merged);
    // The floor block: the points between the intervals, in order.
    let (mut bn, mut bs, mut bq) = (0.0, 0.0, 0.0);
    let mut from = 0;
    for k in 0..=ws.intervals.len() {
        let (to, resume) = ws
            .intervals
            .get(k)
            .map_or((n_points, n_points), |&(lo, hi)| (lo, hi + 1));
        for &y in &prob.level[from..to] {
            bn += 1.0;
            bs += y;
            bq += y * y;
        }
        from = resume;
    }
    prob.block_n = bn;
    prob.block_sum = bs;
    prob.block_sq = bq;
    cut_segments(prob, shape, p, ws);
    let node_count = ws.nodes.len();
    for s in ws.s.iter_mut() {
        if s.len() < node_count {
            s.resize(node_count, 0.0);
        }
    }
    ws.node_freq.clear();
    ws.node_freq.extend(ws.nodes.iter().map(|&i| prob.freq[i]));
    ws.node_level.resize(node_count, 0.0);
    ws.node_gradient.resize(node_count, [0.0; NP]);
    ws.node_e.resize(node_count, [0.0; NP]);
    ws.node_r.resize(node_count, 0.0);
    ws.node_ranges.clear();
    for &(lo, hi) in &ws.ranges {
        if hi < lo {
            ws.node_ranges.push((1, 0));
            continue;
        }
        let first = ws.nodes.partition_point(|i| *i < lo);
        let end = ws.nodes.partition_point(|i| *i <= hi);
        ws.node_ranges.push(if end > first {
            (first, end - 1)
        } else {
            (1, 0)
        });
    }
    limit_reach(prob, shape, p, ws);
}

/// Share of the lines' level at a node that the lines left out of the sum there may carry
/// together (4e-4 dB at most, under half the segments' [`SEGMENT_TOLERANCE_DB`]).
pub(super) const LOCAL_SHARE_DROPPED: f64 = 1e-4;

/// Sets the runs of nodes on which each line is summed ([`Workspace::line_runs`]): within its
/// node range (where it reaches a thousandth of the floor), a line is left out at a node where,
/// even with the largest weight it may take while beta moves by 10 %, it is under
/// [`LOCAL_SHARE_DROPPED`] of the lines' sum there divided by the number of lines reaching the
/// node, so that the lines left out carry under that share together. The local level is the
/// lines' sum without the floor (a floor read high at the start would otherwise drop more).
/// Near a strong line's centre its neighbours' far wings then drop out, which on a trace whose
/// lines' wings reach every point (a laser's Lorentzian line) leaves a few lines per node
/// instead of all. With tolerance 0 (the exact sum) every line keeps its whole node range.
pub(super) fn limit_reach(prob: &Problem, shape: &LineShape, p: &[f64; NP], ws: &mut Workspace) {
    let node_count = ws.nodes.len();
    ws.line_runs.clear();
    ws.line_run_start.clear();
    if prob.segment_tolerance_db <= 0.0 {
        for &(lo, hi) in &ws.node_ranges {
            ws.line_run_start.push(ws.line_runs.len());
            if hi >= lo {
                ws.line_runs.push((lo, hi));
            }
        }
        ws.line_run_start.push(ws.line_runs.len());
        return;
    }
    let table = BesselTable::get();
    let nmax = prob.max_order;
    let p0 = p[LN_P0].exp();
    let fc = prob.centre0 + p[CENTRE] * prob.centre_scale;
    let width = (2 * nmax + 1) as usize;
    let mut amplitude = [0.0; 2 * MAX_ORDER + 1];
    for (slot, n) in amplitude.iter_mut().zip(-nmax..=nmax) {
        *slot = p0 * line_weight(table, n, p[BETA], p[ASYM]).0;
    }
    // Node by node (each node's K values lie side by side in the cut's row for its point), the
    // lines whose node range holds the node: their sum sets the node's threshold, then each is
    // kept or not, opening and closing its runs.
    let mut shape_at = [0.0; 2 * MAX_ORDER + 1];
    let mut open = [usize::MAX; 2 * MAX_ORDER + 1];
    ws.closed_runs.clear();
    for k in 0..node_count {
        let row = ws.point_row[ws.nodes[k]];
        let (first, end, cells) = if row == u32::MAX {
            (0, width, None)
        } else {
            let r = ws.shape_rows[row as usize];
            (
                r.first,
                r.end,
                Some(&ws.point_shape[r.start..r.start + (r.end - r.first)]),
            )
        };
        let mut total = 0.0;
        let mut count = 0u32;
        for slot in first..end {
            let (lo, hi) = ws.node_ranges[slot];
            if k < lo || k > hi {
                continue;
            }
            // K as the cut computed it at this node's point (the same expression where the cut
            // did not compute the level there).
            let v = match cells {
                Some(cells) => cells[slot - first],
                None => {
                    let n = slot as i32 - nmax;
                    shape.eval(ws.node_freq[k] - fc - n as f64 * prob.spacing).k
                }
            };
            shape_at[slot] = v;
            total += amplitude[slot] * v;
            count += 1;
        }
        let threshold = total * (LOCAL_SHARE_DROPPED / f64::from(count.max(1)));
        for slot in first..end {
            let (lo, hi) = ws.node_ranges[slot];
            if k < lo || k > hi {
                continue;
            }
            let keep = ws.bound_amplitude[slot] * shape_at[slot] >= threshold;
            match (keep, open[slot]) {
                (true, usize::MAX) => open[slot] = k,
                (false, from) if from != usize::MAX => {
                    ws.closed_runs.push((slot, from, k - 1));
                    open[slot] = usize::MAX;
                }
                _ => {}
            }
        }
    }
    for (slot, from) in open.iter().enumerate().take(width) {
        if *from != usize::MAX {
            ws.closed_runs.push((slot, *from, ws.node_ranges[slot].1));
        }
    }
    // Grouped by line, each line's runs in node order (a line's runs close in that order).
    let mut per_line = [0usize; 2 * MAX_ORDER + 2];
    for &(slot, _, _) in &ws.closed_runs {
        per_line[slot + 1] += 1;
    }
    for slot in 0..width {
        per_line[slot + 1] += per_line[slot];
    }
    ws.line_run_start.extend_from_slice(&per_line[..=width]);
    ws.line_runs.resize(ws.closed_runs.len(), (0, 0));
    let mut next = per_line;
    for &(slot, from, to) in &ws.closed_runs {
        ws.line_runs[next[slot]] = (from, to);
        next[slot] += 1;
    }
}

/// Cuts the intervals under the lines into segments: each as long as the model at `p` stays
/// within [`SEGMENT_TOLERANCE_DB`] of its quadratic through the segment's ends and middle (checked
/// at the quarter points), and never longer than the distance from its start to the nearest line
/// centre, so that no line centre lies inside a segment, where it could hide between the checked
/// points (until v4 of [`super::ANALYSIS_METHOD`] half that distance, which cut 3-31 % more
/// nodes on the benchmark traces for no gain the tests could see).
fn cut_segments(prob: &Problem, shape: &LineShape, p: &[f64; NP], ws: &mut Workspace) {
    let table = BesselTable::get();
    let nmax = prob.max_order;
    let p0 = p[LN_P0].exp();
    let floor = p[LN_FLOOR].exp();
    let fc = prob.centre0 + p[CENTRE] * prob.centre_scale;
    let mut amplitudes = [0.0; 2 * MAX_ORDER + 1];
    let amplitudes = &mut amplitudes[..(2 * nmax + 1) as usize];
    for (slot, n) in amplitudes.iter_mut().zip(-nmax..=nmax) {
        *slot = p0 * line_weight(table, n, p[BETA], p[ASYM]).0;
    }
    let amplitudes = &*amplitudes;
    // Per order slot, the line on the measured table's grid (when the trace lies on it).
    let mut grid_lines = [None; 2 * MAX_ORDER + 1];
    if prob.on_grid {
        for (line, n) in grid_lines.iter_mut().zip(-nmax..=nmax) {
            *line = Some(shape.grid_line(prob.freq[0], fc + n as f64 * prob.spacing));
        }
    }
    let ranges = &ws.ranges;
    // The lines that reach a point lie between the first slot up to which some line reaches
    // past it (the running largest last point) and the last slot from which on some line starts
    // at or before it (the running smallest first point, from the end): only those are checked.
    let width = amplitudes.len();
    let mut reach_end = [0usize; 2 * MAX_ORDER + 1];
    let mut reach_start = [usize::MAX; 2 * MAX_ORDER + 1];
    let (reach_end, reach_start) = (&mut reach_end[..width], &mut reach_start[..width]);
    let mut furthest = 0;
    for (end, &(lo, hi)) in reach_end.iter_mut().zip(ranges) {
        if hi >= lo {
            furthest = furthest.max(hi);
        }
        *end = furthest;
    }
    let mut nearest = usize::MAX;
    for (start, &(lo, hi)) in reach_start.iter_mut().zip(ranges).rev() {
        if hi >= lo {
            nearest = nearest.min(lo);
        }
        *start = nearest;
    }
    let (reach_end, reach_start) = (&*reach_end, &*reach_start);
    // The model's level at each point, computed once (the halving below asks for the same
    // points again) in a row of its own. Only the previous cut's points are cleared (a cut
    // computes the level at a few points per node, not at every point).
    let n_points = prob.freq.len();
    let mut point_row = std::mem::take(&mut ws.point_row);
    let mut rows = std::mem::take(&mut ws.shape_rows);
    if point_row.len() == n_points {
        for row in &rows {
            point_row[row.point] = u32::MAX;
        }
    } else {
        point_row.clear();
        point_row.resize(n_points, u32::MAX);
    }
    rows.clear();
    let mut point_shape = std::mem::take(&mut ws.point_shape);
    point_shape.clear();
    // The slots' bounds of the last point asked for: the cut asks for points near each other,
    // so each bound is found by walking from the last one (a step or none) rather than by a
    // binary search, whose branches the processor cannot predict.
    let (mut first_hint, mut end_hint) = (0, 0);
    let mut level_at = |i: usize| -> f64 {
        if point_row[i] != u32::MAX {
            return rows[point_row[i] as usize].level;
        }
        let f = prob.freq[i];
        let mut m = floor;
        first_hint = partition_from(reach_end, first_hint, |end| end < i);
        end_hint = partition_from(reach_start, end_hint, |start| start <= i);
        let (first, end) = (first_hint, end_hint.max(first_hint));
        let start = point_shape.len();
        point_shape.extend((first..end).map(|slot| {
            let (lo, hi) = ranges[slot];
            if i < lo || i > hi {
                return 0.0;
            }
            let n = slot as i32 - nmax;
            let x = f - fc - n as f64 * prob.spacing;
            let v = match &grid_lines[slot] {
                Some(line) => shape.grid_value(line, i, x).0,
                None => shape.eval(x).k,
            };
            m += amplitudes[slot] * v;
            v
        }));
        let level = DB_PER_NEPER * m.max(1e-300).ln();
        point_row[i] = rows.len() as u32;
        rows.push(ShapeRow {
            point: i,
            level,
            start,
            first,
            end,
        });
        level
    };
    let centres = &ws.centres;
    let nearest_centre = |i: usize| -> usize {
        let k = centres.partition_point(|c| *c < i);
        let after = centres.get(k).map_or(usize::MAX, |c| c - i);
        let before = if k > 0 {
            i - centres[k - 1]
        } else {
            usize::MAX
        };
        after.min(before)
    };
    let freq = prob.freq;
    let level = prob.level;
    let tolerance = prob.tolerance_db();
    ws.nodes.clear();
    ws.segments.clear();
    let mut under = 0;
    for &(lo, hi) in &ws.intervals {
        under += hi + 1 - lo;
        ws.nodes.push(lo);
        let mut a = lo;
        let mut level_a = level_at(a);
        if lo == hi {
            let slot = (ws.nodes.len() - 1) as u32;
            ws.segments.push(segment(freq, level, &[a], &[slot], a, a));
            continue;
        }
        // Each segment starts from twice the length of the one before, so that the cuts cost a
        // few model evaluations per segment.
        let mut previous = 4;
        while a < hi {
            let reach = nearest_centre(a).clamp(2, MAX_SEGMENT_POINTS);
            let mut len = reach.min(hi - a).min(2 * previous);
            let level_c = loop {
                let (b, c) = (a + len / 2, a + len);
                let level_c = level_at(c);
                if len <= 2 {
                    // Every point of the segment is a node: nothing to check.
                    break level_c;
                }
                let level_b = level_at(b);
                let (xa, xb, xc) = (freq[a], freq[b], freq[c]);
                let (wa, wb, wc) = (
                    level_a / ((xa - xb) * (xa - xc)),
                    level_b / ((xb - xa) * (xb - xc)),
                    level_c / ((xc - xa) * (xc - xb)),
                );
                let quadratic = |i: usize| {
                    let x = freq[i];
                    wa * (x - xb) * (x - xc) + wb * (x - xa) * (x - xc) + wc * (x - xa) * (x - xb)
                };
                let (q1, q3) = (a + len / 4, a + (3 * len) / 4);
                if (quadratic(q1) - level_at(q1)).abs() <= tolerance
                    && (quadratic(q3) - level_at(q3)).abs() <= tolerance
                {
                    break level_c;
                }
                len /= 2;
            };
            let (b, c) = (a + len / 2, a + len);
            let first = (ws.nodes.len() - 1) as u32;
            let last_point = if c == hi { c } else { c - 1 };
            let seg = if b > a && b < c {
                ws.nodes.push(b);
                ws.nodes.push(c);
                segment(
                    freq,
                    level,
                    &[a, b, c],
                    &[first, first + 1, first + 2],
                    a,
                    last_point,
                )
            } else {
                ws.nodes.push(c);
                segment(freq, level, &[a, c], &[first, first + 1], a, last_point)
            };
            ws.segments.push(seg);
            previous = len;
            a = c;
            level_a = level_c;
        }
    }
    ws.points_under = under;
    ws.shape_rows = rows;
    ws.point_row = point_row;
    ws.point_shape = point_shape;
}

/// `slice.partition_point(pred)` (`pred` true on a first part of `slice`, false on the rest),
/// found by walking from `hint`: a few steps when the answer lies near it.
#[inline(always)]
fn partition_from(slice: &[usize], hint: usize, pred: impl Fn(usize) -> bool) -> usize {
    let mut k = hint.min(slice.len());
    while k > 0 && !pred(slice[k - 1]) {
        k -= 1;
    }
    while k < slice.len() && pred(slice[k]) {
        k += 1;
    }
    k
}

/// The Lagrange basis of a segment's nodes (one, two or three): l_j(f), 1 at node j and 0 at the
/// others, so that the quadratic through the nodes' values v_j is sum_j l_j(f) v_j.
pub(super) struct Lagrange {
    pub(super) x: [f64; 3],
    /// The basis' denominators, once per segment (a division per node and point cost as much as
    /// the rest of the segment's sums).
    pub(super) inv: [f64; 3],
    pub(super) count: usize,
}

impl Lagrange {
    /// The basis of the nodes at the points `at` of the axis `freq`.
    pub(super) fn new(freq: &[f64], at: &[usize]) -> Lagrange {
        let count = at.len().min(3);
        let mut x = [0.0; 3];
        for (slot, i) in x.iter_mut().zip(at) {
            *slot = freq[*i];
        }
        let mut inv = [0.0; 3];
        for j in 0..count {
            let mut d = 1.0;
            for k in 0..count {
                if k != j {
                    d *= x[j] - x[k];
                }
            }
            inv[j] = 1.0 / d;
        }
        Lagrange { x, inv, count }
    }

    /// l_j(f) for every node (0 beyond `count`).
    #[inline(always)]
    #[allow(clippy::needless_range_loop)]
    pub(super) fn at(&self, f: f64) -> [f64; 3] {
        let mut l = [0.0; 3];
        for j in 0..self.count {
            let mut v = self.inv[j];
            for k in 0..self.count {
                if k != j {
                    v *= f - self.x[k];
                }
            }
            l[j] = v;
        }
        l
    }
}

/// The statistics of one segment with nodes at the points `at` (node slots `slots`) over its
/// points `first..=last`.
#[allow(clippy::needless_range_loop)]
pub(super) fn segment(
    freq: &[f64],
    level: &[f64],
    at: &[usize],
    slots: &[u32],
    first: usize,
    last: usize,
) -> Segment {
    let count = at.len();
    let basis = Lagrange::new(freq, at);
    // Summed in locals, which the optimiser keeps in registers, and stored once.
    let (mut g, mut h, mut yy) = ([0.0; 6], [0.0; 3], 0.0);
    for i in first..=last {
        let l = basis.at(freq[i]);
        let y = level[i];
        g[0] += l[0] * l[0];
        g[1] += l[0] * l[1];
        g[2] += l[0] * l[2];
        g[3] += l[1] * l[1];
        g[4] += l[1] * l[2];
        g[5] += l[2] * l[2];
        for j in 0..count {
            h[j] += l[j] * y;
        }
        yy += y * y;
    }
    let mut seg = Segment {
        slots: [0; 3],
        count: count as u8,
        g,
        h,
        yy,
    };
    seg.slots[..count].copy_from_slice(slots);
    seg
}
