//! The RF-off reference's display noise, carried into the uncertainty of the fitted index.
//!
//! A measured line shape read point by point from the reference (too few points per width for
//! the smoothing of `smooth_shape`) carries the reference's display noise into the forward
//! model: every table entry is off by the noise of the reference point it was read from (in the
//! core) or by the average noise over its window (in the wings). That error is the same for every
//! line of the trace and does not show in the fit's residual, so the covariance of the fit
//! (scaled by the residual) leaves it out. It is propagated here, to first order (GUM, JCGM
//! 100:2008, 5.1.2, the law of propagation of uncertainty for uncorrelated inputs): the inputs are
//! the reference's points, each with a standard uncertainty of its level equal to the display
//! noise (a spread in dB, sigma_i = e_i' sigma_dB ln10 / 10 in power, e_i' the point's power), and
//! the sensitivity of beta to each is the fit's response to the table entries it enters,
//! -(J^T J)^-1 J^T dL/dT (computed in `fit`).
//!
//! The normalisation to the peak and the centre read from the reference only scale and shift the
//! whole table: P0 and the carrier absorb them, so they carry nothing to beta. The floor removed
//! from the reference (fitted over thousands of points) is left out.

use super::comb::median_in_place;

/// How each entry of a point-by-point measured table was read from the reference, and the noise
/// of the reference's points, in units of the normalised table.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct TableNoise {
    /// Per reference point (= table entry): the standard uncertainty of its power, divided by the
    /// peak excess that normalises the table.
    sigma: Vec<f64>,
    /// Per point: its squared offset from the line's centre, Hz^2 (the wings' window weights).
    x_sq: Vec<f64>,
    /// The table's peak entry and the half-width of the core read point by point.
    peak: usize,
    core: usize,
    /// The reference's display noise, dB (one standard deviation).
    display_noise_db: f64,
}

/// The window `(first, last)` of reference points whose x^2 K is averaged for table entry `i`, on
/// a table of `n` entries with its peak at `peak` and a core of `core` entries either side read
/// point by point: within the core `i` alone, beyond it +-|i - peak| / 8 points (at least one),
/// cut at the table's ends.
pub(crate) fn table_window(i: usize, peak: usize, core: usize, n: usize) -> (usize, usize) {
    let d = i.abs_diff(peak);
    if d <= core {
        return (i, i);
    }
    let half = (d / 8).max(1);
    (i.saturating_sub(half), (i + half).min(n - 1))
}

/// The display noise of a trace, dB: the median absolute second difference of neighbouring
/// levels over 0.6745 sqrt 6 (one standard deviation for independent normal noise; the median of
/// |N(0, 1)| is 0.6745, common practice). Second differences cancel the steady slope of a line's
/// wings, which first differences count as noise (on a reference whose Lorentzian wings cover
/// the span, the median first difference read 0.15 dB of noise as 0.17-0.19 dB).
pub(crate) fn display_noise_db(level_db: &[f64]) -> f64 {
    let mut second: Vec<f64> = level_db
        .windows(3)
        .map(|w| (w[2] - 2.0 * w[1] + w[0]).abs())
        .collect();
    median_in_place(&mut second) / (0.6745 * 6f64.sqrt())
}

impl TableNoise {
    /// The noise of a table read from reference points at offsets `offset_hz` from the line's
    /// centre with powers `power_mw` (floor included: the display noise is a fraction of the
    /// whole level), display noise `sigma_db`, normalised by `top_mw`, peak entry `peak` and core
    /// half-width `core` (see [`table_window`]).
    pub(crate) fn new(
        offset_hz: impl Iterator<Item = f64>,
        power_mw: &[f64],
        sigma_db: f64,
        top_mw: f64,
        peak: usize,
        core: usize,
    ) -> TableNoise {
        let relative = sigma_db * std::f64::consts::LN_10 / 10.0 / top_mw;
        TableNoise {
            sigma: power_mw.iter().map(|p| p * relative).collect(),
            x_sq: offset_hz.map(|x| x * x).collect(),
            peak,
            core,
            display_noise_db: sigma_db,
        }
    }

    /// The reference's display noise, dB.
    pub(crate) fn display_noise_db(&self) -> f64 {
        self.display_noise_db
    }

    /// The variance of beta from the reference's noise, given `sensitivity[j]`, the change of beta
    /// per unit change of table entry j: each point's sensitivity is the sum over the entries it
    /// enters (its own in the core; x_i^2 / (W x_j^2) for every wing entry j whose window of W
    /// points holds it), and the variance the sum of their squares times the points' variances.
    pub(crate) fn variance(&self, sensitivity: &[f64]) -> f64 {
        let n = self.sigma.len().min(sensitivity.len());
        let mut per_point = vec![0.0; n];
        // The wings' windows added as runs: a difference array of the per-x^2 weights.
        let mut runs = vec![0.0; n + 1];
        for (j, &s) in sensitivity.iter().enumerate().take(n) {
            if s == 0.0 {
                continue;
            }
            if j.abs_diff(self.peak) <= self.core {
                per_point[j] += s;
            } else {
                let (first, last) = table_window(j, self.peak, self.core, n);
                let weight = s / ((last + 1 - first) as f64 * self.x_sq[j]);
                runs[first] += weight;
                runs[last + 1] -= weight;
            }
        }
        let mut run = 0.0;
        let mut variance = 0.0;
        for i in 0..n {
            run += runs[i];
            let s = per_point[i] + run * self.x_sq[i];
            variance += (s * self.sigma[i]).powi(2);
        }
        variance
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Independent normal noise of 0.15 dB (from a seeded generator) on a steep ramp with a
    /// Lorentzian bump: read back within 5 %.
    #[test]
    fn the_display_noise_is_read_through_slopes() {
        use rand::{rngs::StdRng, SeedableRng};
        use rand_distr::{Distribution, Normal};
        let mut rng = StdRng::seed_from_u64(3);
        let noise = Normal::new(0.0, 0.15).unwrap();
        let levels: Vec<f64> = (0..4000)
            .map(|i| {
                let x = (i as f64 - 2000.0) / 40.0;
                -60.0 + 0.05 * i as f64 - 10.0 * (1.0 + x * x).log10() + noise.sample(&mut rng)
            })
            .collect();
        let read = display_noise_db(&levels);
        assert!((read / 0.15 - 1.0).abs() < 0.05, "read {read} dB");
    }

    /// Core entries are the points themselves; a wing entry averages x^2 K over +-d/8 points.
    #[test]
    fn windows_are_single_points_in_the_core_and_grow_in_the_wings() {
        assert_eq!(table_window(50, 50, 3, 101), (50, 50));
        assert_eq!(table_window(53, 50, 3, 101), (53, 53));
        assert_eq!(table_window(54, 50, 3, 101), (53, 55));
        assert_eq!(table_window(90, 50, 3, 101), (85, 95));
        assert_eq!(table_window(99, 50, 3, 101), (93, 100));
        assert_eq!(table_window(1, 50, 3, 101), (0, 7));
    }

    /// The propagation against the direct sum: beta = sum_j s_j T_j with T_j the window average
    /// of x^2 e / x_j^2, so d beta / d e_i = sum_j s_j x_i^2 / (W_j x_j^2) over the windows that
    /// hold i (written out here point by point), and the variance sum_i (d beta / d e_i)^2
    /// sigma_i^2 (GUM 5.1.2).
    #[test]
    fn the_variance_is_the_sum_of_squared_sensitivities_over_the_reference_points() {
        let n = 41;
        let peak = 20;
        let core = 4;
        let h = 1.0e6;
        let offsets: Vec<f64> = (0..n).map(|i| (i as f64 - 20.3) * h).collect();
        let power: Vec<f64> = offsets
            .iter()
            .map(|x| 1e-6 + 1.0 / (1.0 + (x / 3e6).powi(2)))
            .collect();
        let sigma_db = 0.1;
        let top = 0.9;
        let noise = TableNoise::new(offsets.iter().copied(), &power, sigma_db, top, peak, core);
        let sensitivity: Vec<f64> = (0..n).map(|j| ((j * 7) % 5) as f64 - 2.0).collect();
        let mut direct = 0.0;
        for i in 0..n {
            let mut d = 0.0;
            for j in 0..n {
                let (first, last) = table_window(j, peak, core, n);
                if (first..=last).contains(&i) {
                    let w = (last + 1 - first) as f64;
                    d += sensitivity[j] * offsets[i].powi(2) / (w * offsets[j].powi(2));
                }
            }
            let sigma = power[i] * sigma_db * std::f64::consts::LN_10 / 10.0 / top;
            direct += (d * sigma).powi(2);
        }
        let fast = noise.variance(&sensitivity);
        assert!(
            (fast / direct - 1.0).abs() < 1e-12,
            "fast {fast} direct {direct}"
        );
    }
}
