//! The line spacing a trace shows, read from the trace alone.
//!
//! The comb's lines are the peaks that stand clear of everything around them: a point above the
//! floor by 10 dB (and eight noise widths) that is the highest point until the trace has fallen
//! by [`PROMINENCE_DB`] on both sides. Noise ripples on a line's flank or on the Lorentzian wings
//! between strong lines never fall that far before meeting a higher point, so they are not
//! counted. The spacing is the smallest peak-to-peak distance of which (nearly) every distance is
//! a whole multiple (lines lost at a Bessel zero leave gaps of two or more spacings), refined by a
//! straight-line fit of the peak positions against their orders.

use halfwave_units::{Hz, Trace};
use serde::Serialize;

/// A line must stand this far above the trace on both sides before a higher point.
const PROMINENCE_DB: f64 = 6.0;
/// A candidate line must rise this far above the floor.
const ABOVE_FLOOR_DB: f64 = 10.0;
/// Share of the peak distances that must be whole multiples of the spacing.
const MULTIPLE_SHARE: f64 = 0.8;

/// The spacing shown by a trace.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SpacingEstimate {
    pub spacing_hz: Hz,
    /// Lines that entered the estimate.
    pub lines: usize,
    /// Root-mean-square distance of the lines from the fitted grid, Hz.
    pub scatter_hz: f64,
}

/// Estimates the line spacing; `None` when fewer than two lines stand clear or they do not lie
/// on a common grid.
pub fn estimate_spacing(trace: &Trace) -> Option<SpacingEstimate> {
    let freq = trace.frequency_hz();
    let level = trace.power_dbm();
    let n = level.len();
    if n < 8 {
        return None;
    }
    let stride = (n / 512).max(1);
    let mut sample: Vec<f64> = level.iter().step_by(stride).copied().collect();
    let mid = sample.len() / 2;
    let floor = *sample.select_nth_unstable_by(mid, f64::total_cmp).1;
    let mut steps: Vec<f64> = level
        .windows(2)
        .step_by(stride)
        .map(|w| (w[1] - w[0]).abs())
        .collect();
    let mid = steps.len() / 2;
    let sigma = *steps.select_nth_unstable_by(mid, f64::total_cmp).1 / (0.6745 * 2f64.sqrt());
    let threshold = floor + ABOVE_FLOOR_DB.max(8.0 * sigma);
    let mut peaks: Vec<f64> = Vec::new();
    let clear = |i: usize, step: isize| -> bool {
        let top = level[i];
        let mut j = i as isize;
        loop {
            j += step;
            if j < 0 || j as usize >= n {
                return false;
            }
            let v = level[j as usize];
            if v > top {
                return false;
            }
            if v < top - PROMINENCE_DB {
                return true;
            }
        }
    };
    for i in 1..n - 1 {
        let v = level[i];
        if v < threshold || v < level[i - 1] || v < level[i + 1] {
            continue;
        }
        if clear(i, -1) && clear(i, 1) {
            // Sub-sample position: power centroid of the top 3 dB of the line.
            let (mut lo, mut hi) = (i, i);
            while lo > 0 && level[lo - 1] > v - 3.0 {
                lo -= 1;
            }
            while hi + 1 < n && level[hi + 1] > v - 3.0 {
                hi += 1;
            }
            let (mut m0, mut m1) = (0.0, 0.0);
            for k in lo..=hi {
                let w = super::comb::milliwatts(level[k] - v);
                m0 += w;
                m1 += w * freq[k];
            }
            peaks.push(m1 / m0);
        }
    }
    if peaks.len() < 2 {
        return None;
    }
    let distances: Vec<f64> = peaks.windows(2).map(|w| w[1] - w[0]).collect();
    let mut candidates = distances.clone();
    candidates.sort_by(f64::total_cmp);
    let share_of_multiples = |d: f64| -> f64 {
        let fits = distances
            .iter()
            .filter(|x| {
                let k = (*x / d).round();
                k >= 1.0 && (*x - k * d).abs() < 0.1 * d
            })
            .count();
        fits as f64 / distances.len() as f64
    };
    let rough = candidates
        .iter()
        .copied()
        .find(|d| share_of_multiples(*d) >= MULTIPLE_SHARE)?;
    // Orders relative to the first peak, then a least-squares line through (order, position).
    let orders: Vec<f64> = peaks
        .iter()
        .map(|p| ((p - peaks[0]) / rough).round())
        .collect();
    let count = peaks.len() as f64;
    let mean_k = orders.iter().sum::<f64>() / count;
    let mean_f = peaks.iter().sum::<f64>() / count;
    let (mut skk, mut skf) = (0.0, 0.0);
    for (k, f) in orders.iter().zip(&peaks) {
        skk += (k - mean_k) * (k - mean_k);
        skf += (k - mean_k) * (f - mean_f);
    }
    if skk <= 0.0 {
        return None;
    }
    let spacing = skf / skk;
    let intercept = mean_f - spacing * mean_k;
    let scatter = (orders
        .iter()
        .zip(&peaks)
        .map(|(k, f)| (f - intercept - spacing * k).powi(2))
        .sum::<f64>()
        / count)
        .sqrt();
    (spacing > 0.0 && scatter < 0.1 * spacing).then_some(SpacingEstimate {
        spacing_hz: Hz(spacing),
        lines: peaks.len(),
        scatter_hz: scatter,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::synthetic::SyntheticComb;
    use rand::{rngs::StdRng, SeedableRng};
    use rand_distr::{Distribution, Normal};

    #[test]
    fn reads_the_spacing_of_combs_with_and_without_a_carrier() {
        // Landmarks (DLMF 10.21): the carrier vanishes at beta = 2.4048 and the first sidebands
        // at 3.8317; the spacing is read from the lines that remain either way.
        for (seed, (beta, spacing)) in [
            (0.05, 1e9),
            (1.0, 2.5e9),
            (2.404_825_557_695_773, 1e9),
            (3.8317, 0.7e9),
            (5.5, 1e9),
        ]
        .into_iter()
        .enumerate()
        {
            let comb = SyntheticComb::centred(
                Hz(193.1e12),
                Hz(0.31 * spacing),
                Hz(spacing),
                beta,
                (beta + 5.0_f64).ceil(),
            );
            let mut rng = StdRng::seed_from_u64(seed as u64);
            let noise = Normal::new(0.0, 0.3).unwrap();
            let trace = comb.trace(&mut || noise.sample(&mut rng)).unwrap();
            let found = estimate_spacing(&trace).expect("a spacing");
            assert!(
                (found.spacing_hz.0 - spacing).abs() < 1e-3 * spacing,
                "beta {beta}: {found:?}"
            );
        }
    }
}
