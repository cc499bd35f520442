//! The RF-off reference's display noise, in a measured shape read point by point, carried
//! through the fit to an uncertainty of beta.

use super::line_shape::{db_to_mw, LineShape};
use super::model::{Evaluation, Problem, Workspace};
use super::segments::Lagrange;
use super::step::solve;
use super::{line_weight, ASYM, BETA, CENTRE, DB_PER_NEPER, LN_P0, NP};
use crate::analysis::bessel::BesselTable;
use crate::analysis::reference_noise::TableNoise;

/// The standard uncertainty of beta from the reference's display noise in a measured shape read
/// point by point (see `reference_noise`). A change dT_j of table entry j changes the model's
/// level at point i by dL_i = c P0 sum_n w_n dK(f_i - f_n)/dT_j dT_j / M_i, and the fitted
/// parameters by -(J^T J)^-1 J^T dL; beta's row of (J^T J)^-1 dotted with each point's gradient,
/// q_i, gives beta's sensitivity to T_j as -sum_i q_i dL_i/dT_j. The gradients and levels at the
/// points between nodes are the segments' quadratics through the nodes (as the fit takes them);
/// each line is summed where the fit sums it ([`Workspace::line_runs`]). `eval` is the evaluation
/// at `p` whose line sums and gradients the workspace holds.
#[allow(clippy::needless_range_loop)]
pub(super) fn reference_noise_uncertainty(
    prob: &Problem,
    shape: &LineShape,
    noise: &TableNoise,
    p: &[f64; NP],
    ws: &mut Workspace,
    eval: &Evaluation,
) -> f64 {
    let mut unit = [0.0; NP];
    unit[BETA] = 1.0;
    let Some(row) = solve(&eval.jtj, &unit, &prob.active) else {
        return f64::NAN;
    };
    let c = DB_PER_NEPER;
    let p0 = p[LN_P0].exp();
    let node_count = ws.nodes.len();
    let mut q_node = std::mem::take(&mut ws.noise_node);
    q_node.clear();
    q_node.extend(
        ws.node_gradient[..node_count]
            .iter()
            .map(|d| (0..NP).map(|i| row[i] * d[i]).sum::<f64>()),
    );
    // Per point under the lines: q_i c P0 / M_i (0 in the floor block, where no line reaches).
    let mut per_point = std::mem::take(&mut ws.noise_point);
    per_point.clear();
    per_point.resize(prob.freq.len(), 0.0);
    let mut at = [0usize; 3];
    for seg in &ws.segments {
        let count = seg.count as usize;
        for j in 0..count {
            at[j] = ws.nodes[seg.slots[j] as usize];
        }
        let basis = Lagrange::new(prob.freq, &at[..count]);
        for i in at[0]..=at[count - 1] {
            let l = basis.at(prob.freq[i]);
            let (mut q, mut level) = (0.0, 0.0);
            for j in 0..count {
                let slot = seg.slots[j] as usize;
                q += l[j] * q_node[slot];
                level += l[j] * ws.node_level[slot];
            }
            // 1 / M from the level in dB by the branch-free 10^(L/10) (to 1e-8, far below what an
            // uncertainty needs): the library `exp` was a sixth of this term's time.
            per_point[i] = q * c * p0 * db_to_mw(-level);
        }
    }
    let table = BesselTable::get();
    let nmax = prob.max_order;
    let fc = prob.centre0 + p[CENTRE] * prob.centre_scale;
    let mut sensitivity = std::mem::take(&mut ws.noise_sensitivity);
    sensitivity.clear();
    sensitivity.resize(shape.table.len(), 0.0);
    // The trace's points one table step apart (the reference on the same axis): whole runs at a
    // time, else point by point.
    let freq = prob.freq;
    // (every point within a thousandth of a step of its place on the table's grid: the absolute
    // frequencies' rounding makes single steps differ by parts in 1e8; the fit's own grid check
    // is stricter).
    let uniform = prob.on_grid || shape.steps_apart(freq, 1e-3);
    for n in -nmax..=nmax {
        let slot = (n + nmax) as usize;
        let (w, _, _) = line_weight(table, n, p[BETA], p[ASYM]);
        let centre = fc + n as f64 * prob.spacing;
        for &(first, last) in &ws.line_runs[ws.line_run_start[slot]..ws.line_run_start[slot + 1]] {
            let (a, b) = (ws.nodes[first], ws.nodes[last]);
            if uniform {
                shape.add_run_sensitivity(freq[a] - centre, w, &per_point[a..=b], &mut sensitivity);
            } else {
                for i in a..=b {
                    shape.add_table_sensitivity(
                        freq[i] - centre,
                        w * per_point[i],
                        &mut sensitivity,
                    );
                }
            }
        }
    }
    let u = noise.variance(&sensitivity).sqrt();
    ws.noise_node = q_node;
    ws.noise_point = per_point;
    ws.noise_sensitivity = sensitivity;
    u
}
