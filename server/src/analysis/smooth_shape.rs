//! The measured line shape made smooth: ln K as a cubic B-spline fitted to the RF-off reference.
//!
//! The reference trace shows the laser line through the analyzer with display noise on every
//! point (a few percent of the level). Taken point by point as the line shape, that noise becomes
//! part of the forward model: the model then changes from point to point at the 0.01 dB level, the
//! fit's segments (`fit/segments.rs`, where the model must be quadratic in dB to 0.001 dB,
//! `SEGMENT_TOLERANCE_DB`) stay a few points long and every step visits every point. Here ln K
//! is fitted instead, once per reference, with a cubic B-spline on knots a sixth of the line's
//! half-maximum width apart over the core (|x| up to two widths) and growing geometrically
//! beyond (each interval 1/12 of its distance from the centre): a Gaussian core (ln K
//! quadratic) and a Lorentzian wing (ln K = c - 2 ln|x|) are both followed closely. The fit is least squares on the displayed levels in dB,
//! L_i = 10 log10(F + exp(S(x_i))), the same noise model as the whole-trace fit (display noise is
//! a spread of the level in dB), so where a wing meets the floor F its points carry less weight
//! instead of being cut off. A small penalty on the third differences of the coefficients (zero on
//! any quadratic, so a Gaussian core is not pulled) fills intervals the data does not reach.
//! The penalised B-spline ("P-spline") is Eilers and Marx, Statistical Science 11(2), 1996.

// Index loops over parallel arrays (points, their placements, levels) and small bands read more
// plainly than zipped iterators.
#![allow(clippy::needless_range_loop)]

use super::comb::milliwatts;

/// 10 / ln 10: a natural log times this is a level in dB.
const DB_PER_NEPER: f64 = 4.342_944_819_032_518;

/// Knot intervals per half-maximum width over the core.
const KNOTS_PER_WIDTH: f64 = 6.0;
/// The core, where the knots are uniform: this many widths either side of the centre.
const CORE_WIDTHS: f64 = 2.0;
/// The smoothing needs at least this many trace points per knot interval in the core; with fewer
/// the reference is used point by point.
pub(crate) const MIN_POINTS_PER_KNOT: f64 = 2.0;
/// Weight of the third-difference penalty, in units of one point's weight (dB^2).
const PENALTY: f64 = 0.01;
/// Gauss-Newton steps on the levels after the start from ln(excess).
const STEPS: usize = 4;

/// The knot coordinate: v = x / d over the core (d the knot interval there), logarithmic beyond
/// with the same slope where the two meet, so that the intervals grow as 1/12 of |x|.
struct Warp {
    interval: f64,
    core: f64,
    scale: f64,
}

impl Warp {
    fn new(width_hz: f64) -> Warp {
        let interval = width_hz / KNOTS_PER_WIDTH;
        let core = CORE_WIDTHS * width_hz;
        Warp {
            interval,
            core,
            scale: core / interval,
        }
    }

    #[inline]
    fn coordinate(&self, x: f64) -> f64 {
        let a = x.abs();
        if a <= self.core {
            x / self.interval
        } else {
            x.signum() * self.scale * (1.0 + (a / self.core).ln())
        }
    }
}

/// The four uniform cubic B-spline weights at fraction `t` of an interval.
#[inline]
fn basis(t: f64) -> [f64; 4] {
    let s = 1.0 - t;
    let t2 = t * t;
    let t3 = t2 * t;
    [
        s * s * s / 6.0,
        (3.0 * t3 - 6.0 * t2 + 4.0) / 6.0,
        (-3.0 * t3 + 3.0 * t2 + 3.0 * t + 1.0) / 6.0,
        t3 / 6.0,
    ]
}

/// A symmetric banded matrix with three off-diagonals: `rows[i][d]` = A[i][i + d].
struct Banded {
    rows: Vec<[f64; 4]>,
}

impl Banded {
    fn zero(n: usize) -> Banded {
        Banded {
            rows: vec![[0.0; 4]; n],
        }
    }

    #[inline]
    fn add_outer(&mut self, first: usize, v: &[f64; 4], weight: f64) {
        for p in 0..4 {
            let wp = weight * v[p];
            for q in p..4 {
                self.rows[first + p][q - p] += wp * v[q];
            }
        }
    }

    /// Solves A x = b by banded Cholesky; `None` when A is not positive definite.
    fn solve(&self, b: &[f64]) -> Option<Vec<f64>> {
        let n = self.rows.len();
        // l[i][d] = L[i][i - d].
        let mut l = vec![[0.0; 4]; n];
        for i in 0..n {
            for d in (1..=3).rev() {
                if d > i {
                    continue;
                }
                let j = i - d;
                let mut s = self.rows[j][d];
                for k in i.saturating_sub(3)..j {
                    s -= l[i][i - k] * l[j][j - k];
                }
                l[i][d] = s / l[j][0];
            }
            let mut s = self.rows[i][0];
            for k in i.saturating_sub(3)..i {
                s -= l[i][i - k] * l[i][i - k];
            }
            if !(s > 0.0 && s.is_finite()) {
                return None;
            }
            l[i][0] = s.sqrt();
        }
        let mut y = vec![0.0; n];
        for i in 0..n {
            let mut s = b[i];
            for k in i.saturating_sub(3)..i {
                s -= l[i][i - k] * y[k];
            }
            y[i] = s / l[i][0];
        }
        let mut x = vec![0.0; n];
        for i in (0..n).rev() {
            let mut s = y[i];
            for k in i + 1..(i + 4).min(n) {
                s -= l[k][k - i] * x[k];
            }
            x[i] = s / l[i][0];
        }
        Some(x)
    }
}

/// Third-difference weights.
const THIRD_DIFFERENCE: [f64; 4] = [-1.0, 3.0, -3.0, 1.0];

/// Adds the penalty lambda D3^T D3 to `a`.
fn add_penalty(a: &mut Banded, lambda: f64) {
    for k in 0..a.rows.len().saturating_sub(3) {
        a.add_outer(k, &THIRD_DIFFERENCE, lambda);
    }
}

/// lambda c^T D3^T D3 c and its gradient lambda D3^T D3 c (added to `gradient`).
fn penalty(c: &[f64], lambda: f64, gradient: Option<&mut [f64]>) -> f64 {
    let mut value = 0.0;
    let mut grad = gradient;
    for k in 0..c.len().saturating_sub(3) {
        let d: f64 = (0..4).map(|p| THIRD_DIFFERENCE[p] * c[k + p]).sum();
        value += lambda * d * d;
        if let Some(g) = grad.as_deref_mut() {
            for p in 0..4 {
                g[k + p] += lambda * THIRD_DIFFERENCE[p] * d;
            }
        }
    }
    value
}

/// Where each point sits on the spline: its first coefficient and its four weights.
struct Placement {
    first: Vec<usize>,
    weights: Vec<[f64; 4]>,
    coefficients: usize,
}

fn place(freq: &[f64], centre_hz: f64, width_hz: f64) -> Placement {
    let warp = Warp::new(width_hz);
    let v: Vec<f64> = freq
        .iter()
        .map(|f| warp.coordinate(f - centre_hz))
        .collect();
    let lo = v[0].min(v[v.len() - 1]).floor();
    let hi = v[0].max(v[v.len() - 1]).ceil();
    let intervals = ((hi - lo) as usize).max(1);
    let mut first = Vec::with_capacity(v.len());
    let mut weights = Vec::with_capacity(v.len());
    for vi in v {
        let position = vi - lo;
        let j = (position.floor() as usize).min(intervals - 1);
        first.push(j);
        weights.push(basis(position - j as f64));
    }
    Placement {
        first,
        weights,
        coefficients: intervals + 3,
    }
}

#[inline]
fn spline_at(c: &[f64], first: usize, w: &[f64; 4]) -> f64 {
    w[0] * c[first] + w[1] * c[first + 1] + w[2] * c[first + 2] + w[3] * c[first + 3]
}

/// The smoothed excess over the floor (mW) at every point of the reference: exp(S(x_i)), with S
/// fitted as the module describes. `excess_mw` is the pilot (the excess point by point in the
/// core, window-averaged in the wings) that the fit starts from, `floor_mw` the floor under the
/// line, `width_hz` its half-maximum width. `None` when the trace has too few points per knot
/// interval or the fit fails; the caller then keeps the pilot.
pub(crate) fn smoothed_excess(
    freq: &[f64],
    level_dbm: &[f64],
    excess_mw: &[f64],
    centre_hz: f64,
    floor_mw: f64,
    width_hz: f64,
) -> Option<Vec<f64>> {
    let n = freq.len();
    if n < 8 || excess_mw.len() != n || level_dbm.len() != n || floor_mw.is_nan() || floor_mw <= 0.0
    {
        return None;
    }
    let h = (freq[n - 1] - freq[0]).abs() / (n - 1) as f64;
    if width_hz / KNOTS_PER_WIDTH < MIN_POINTS_PER_KNOT * h {
        return None;
    }
    let placement = place(freq, centre_hz, width_hz);
    let m = placement.coefficients;
    let lambda = PENALTY * DB_PER_NEPER * DB_PER_NEPER;

    // Start: ln of the pilot where it stands clearly above the floor (there its noise in ln is
    // the display noise), weighted equally, the penalty filling the rest.
    let mut a = Banded::zero(m);
    let mut b = vec![0.0; m];
    let mut used = 0;
    for i in 0..n {
        if excess_mw[i] > 2.0 * floor_mw {
            let (j, w) = (placement.first[i], &placement.weights[i]);
            let y = excess_mw[i].ln();
            a.add_outer(j, w, 1.0);
            for p in 0..4 {
                b[j + p] += w[p] * y;
            }
            used += 1;
        }
    }
    if used < 8 {
        return None;
    }
    // Uncovered intervals at the far ends: a weak pull towards the floor's level keeps the
    // system definite where neither the data nor the penalty (which leaves quadratics free)
    // decides.
    let anchor = 1e-6;
    let floor_ln = floor_mw.ln();
    for (k, row) in a.rows.iter_mut().enumerate() {
        row[0] += anchor;
        b[k] += anchor * floor_ln;
    }
    add_penalty(&mut a, 1.0);
    let mut c = a.solve(&b)?;

    // Gauss-Newton on the displayed levels.
    let objective = |c: &[f64]| -> f64 {
        let mut ssr = 0.0;
        for i in 0..n {
            let s = spline_at(c, placement.first[i], &placement.weights[i]);
            let model = floor_mw + milliwatts(DB_PER_NEPER * s);
            let r = DB_PER_NEPER * model.ln() - level_dbm[i];
            ssr += r * r;
        }
        ssr + penalty(c, lambda, None)
    };
    let mut current = objective(&c);
    for _ in 0..STEPS {
        let mut a = Banded::zero(m);
        let mut gradient = vec![0.0; m];
        for i in 0..n {
            let (j, w) = (placement.first[i], &placement.weights[i]);
            let e = milliwatts(DB_PER_NEPER * spline_at(&c, j, w));
            let model = floor_mw + e;
            let r = DB_PER_NEPER * model.ln() - level_dbm[i];
            let g = DB_PER_NEPER * e / model;
            a.add_outer(j, w, g * g);
            for p in 0..4 {
                gradient[j + p] += g * r * w[p];
            }
        }
        penalty(&c, lambda, Some(&mut gradient));
        add_penalty(&mut a, lambda);
        for row in a.rows.iter_mut() {
            row[0] += anchor;
        }
        let neg: Vec<f64> = gradient.iter().map(|g| -g).collect();
        let delta = a.solve(&neg)?;
        let mut accepted = false;
        let mut fraction = 1.0;
        for _ in 0..4 {
            let trial: Vec<f64> = c
                .iter()
                .zip(&delta)
                .map(|(c, d)| c + fraction * d)
                .collect();
            let value = objective(&trial);
            if value.is_finite() && value <= current {
                let gain = current - value;
                c = trial;
                current = value;
                accepted = gain > 1e-9 * current;
                break;
            }
            fraction *= 0.5;
        }
        if !accepted {
            break;
        }
    }
    let mut out: Vec<f64> = (0..n)
        .map(|i| {
            milliwatts(DB_PER_NEPER * spline_at(&c, placement.first[i], &placement.weights[i]))
        })
        .collect();
    if !out.iter().all(|v| v.is_finite()) {
        return None;
    }
    bound_unsupported_wings(&mut out, freq, centre_hz, floor_mw);
    Some(out)
}

/// Where the reference shows only its floor, nothing holds the spline down: its extrapolation
/// beyond the last points above the floor may turn upwards, and the steps on the levels cannot
/// bring it under the floor (a level far under the floor moves the displayed level by nothing).
/// A Gaussian filter's line then kept a pedestal some 16 dB under the reference's floor out to
/// the span's ends, which on a trace whose sidebands stand 20 dB above the floor read beta 0.8 %
/// high. Beyond the outermost point on each side where the smoothed excess reaches the floor
/// (3 dB above it), the excess is therefore held under a 1/x^2 fall from that point: a
/// Lorentzian wing (the slowest physical fall of a line, 1/x^2) passes unchanged, anything
/// rising is cut.
fn bound_unsupported_wings(excess: &mut [f64], freq: &[f64], centre_hz: f64, floor_mw: f64) {
    let Some(peak) = excess
        .iter()
        .enumerate()
        .max_by(|a, b| a.1.total_cmp(b.1))
        .map(|(i, _)| i)
    else {
        return;
    };
    let right = (peak..excess.len())
        .rev()
        .find(|&i| excess[i] >= floor_mw)
        .unwrap_or(peak);
    let left = (0..=peak).find(|&i| excess[i] >= floor_mw).unwrap_or(peak);
    for (support, beyond) in [(right, right + 1..excess.len()), (left, 0..left)] {
        let x_s = (freq[support] - centre_hz).abs();
        let k_s = excess[support];
        for i in beyond {
            let x = (freq[i] - centre_hz).abs().max(x_s);
            excess[i] = excess[i].min(k_s * (x_s / x).powi(2));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_banded_solver_matches_a_direct_solution() {
        // A 6 x 6 symmetric positive definite band matrix against its solution computed by hand
        // through the product: A x = b with x known.
        let n = 6;
        let mut a = Banded::zero(n);
        for i in 0..n {
            a.rows[i][0] = 10.0 + i as f64;
            if i + 1 < n {
                a.rows[i][1] = 1.0;
            }
            if i + 3 < n {
                a.rows[i][3] = 0.5;
            }
        }
        let x: Vec<f64> = (0..n).map(|i| i as f64 - 2.5).collect();
        let mut b = vec![0.0; n];
        for i in 0..n {
            for d in 0..4 {
                if i + d < n {
                    b[i] += a.rows[i][d] * x[i + d];
                    if d > 0 {
                        b[i + d] += a.rows[i][d] * x[i];
                    }
                }
            }
        }
        let solved = a.solve(&b).unwrap();
        for (s, t) in solved.iter().zip(&x) {
            assert!((s - t).abs() < 1e-12, "{s} vs {t}");
        }
    }

    #[test]
    fn the_b_spline_weights_sum_to_one_and_reproduce_a_quadratic() {
        // Partition of unity and reproduction of polynomials up to degree 3 are the defining
        // properties of uniform cubic B-splines (de Boor, A Practical Guide to Splines, ch. IX).
        // The coefficients of q(v) = v^2 are c_k = k^2 - 1/3 (the B-spline's second moment).
        for t in [0.0, 0.13, 0.5, 0.77, 1.0] {
            let w = basis(t);
            assert!((w.iter().sum::<f64>() - 1.0).abs() < 1e-15);
            let j = 5.0;
            let c: Vec<f64> = (0..4)
                .map(|p| {
                    let k = j + p as f64 - 1.0;
                    k * k - 1.0 / 3.0
                })
                .collect();
            let v = j + t;
            let value: f64 = (0..4).map(|p| w[p] * c[p]).sum();
            assert!((value - v * v).abs() < 1e-12, "t {t}: {value} vs {}", v * v);
        }
    }
}
