//! Adaptive drive levels: which generator level to measure next at one frequency, from what was
//! measured there so far.
//!
//! A blind ramp spends most of its analyzer sweeps at levels that say little about V_pi. With the
//! plan's `adaptive` level form the engine measures on a fine ladder of levels over the plan's
//! range (every rung proven against every limit at validation, exactly as a ramp's levels), going
//! up only, and aims each next point at the next modulation index of [`TARGET_INDICES`]: well
//! conditioned indices around the first carrier null (beta 1.2 and 1.9 below it, 2.7 just past
//! it as a cross-check of the branch, DLMF 10.21 for the zero at 2.4048). The level for a wanted
//! index comes from the current V_pi estimate: the fit of the points so far; with one readable
//! point, its beta / V_pk; before any, the prior (the device's stored V_pi at this frequency, else
//! the previous frequency's); with none, the bottom of the range.
//!
//! It stops when the fit's relative standard uncertainty is at or below the plan's target with at
//! least [`MIN_ADAPTIVE_POINTS`] points and one past the carrier null (or the range's top
//! measured), after the plan's maximum number of points, or when the range is used up. No step up
//! is larger than the plan's `max_step_db`.

use crate::analysis::chain::{generator_level_for_index, DriveChain};
use crate::analysis::{bessel::J0_FIRST_ZERO, fit_v_pi, DrivePoint};
use halfwave_units::{Dbm, Hz, VoltsPeak};
use std::f64::consts::PI;

/// The modulation indices the points aim at, in order (each next point aims at the first one
/// clearly above the highest beta measured so far).
pub const TARGET_INDICES: [f64; 8] = [1.2, 1.9, 2.7, 3.3, 3.9, 4.5, 5.1, 5.7];
/// Fewest points before the uncertainty target may end a frequency (three let the V_pi fit find
/// one point off the line).
pub const MIN_ADAPTIVE_POINTS: usize = 3;
/// A next target must lie this far above the highest beta measured so far.
const TARGET_MARGIN: f64 = 0.3;
/// Spacing kept between the last few points when the wanted indices lie beyond the range.
const SPREAD_DB: f64 = 3.0;
/// A beta below this is too weak to estimate V_pi from one point.
const MIN_READABLE_INDEX: f64 = 0.05;

/// The adaptive settings of a proven plan.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AdaptiveSettings {
    /// Stop when u(V_pi) / V_pi is at or below this.
    pub target_relative_uncertainty: f64,
    /// The most points at one frequency.
    pub max_points: usize,
    /// The largest step up from one point's level to the next.
    pub max_step_db: f64,
}

/// One point measured at this frequency.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AdaptivePoint {
    /// Rung of the ladder it was measured at.
    pub rung: usize,
    pub v_peak: VoltsPeak,
    /// Modulation index and its standard uncertainty, when the trace could be analysed.
    pub index: Option<(f64, f64)>,
}

/// Why a frequency ended.
#[derive(Debug, Clone, PartialEq)]
pub enum AdaptiveStop {
    /// u(V_pi)/V_pi reached the target.
    TargetReached { relative_uncertainty: f64 },
    /// The plan's maximum number of points was measured.
    MaxPoints,
    /// The top of the level range was measured.
    TopOfRange,
}

impl std::fmt::Display for AdaptiveStop {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            AdaptiveStop::TargetReached {
                relative_uncertainty,
            } => write!(
                f,
                "u(V_pi)/V_pi {relative_uncertainty:.2e} reached the target"
            ),
            AdaptiveStop::MaxPoints => {
                write!(f, "the plan's maximum number of points was measured")
            }
            AdaptiveStop::TopOfRange => write!(f, "the top of the level range was measured"),
        }
    }
}

/// What to do next at this frequency.
#[derive(Debug, Clone, PartialEq)]
pub enum AdaptiveStep {
    /// Measure at this rung of the ladder.
    Measure(usize),
    Stop(AdaptiveStop),
}

/// The current V_pi estimate from the points measured so far (see the module doc), if any.
pub fn estimate_v_pi(measured: &[AdaptivePoint], prior: Option<VoltsPeak>) -> Option<VoltsPeak> {
    let readable: Vec<DrivePoint> = measured
        .iter()
        .filter_map(|p| {
            let (beta, u) = p.index?;
            (beta.is_finite() && beta >= MIN_READABLE_INDEX && u.is_finite() && u > 0.0).then_some(
                DrivePoint {
                    v_peak: p.v_peak,
                    modulation_index: beta,
                    uncertainty: u,
                },
            )
        })
        .collect();
    if readable.len() >= 2 {
        if let Ok(fit) = fit_v_pi(&readable) {
            return Some(fit.v_pi);
        }
    }
    // The strongest readable point alone.
    readable
        .iter()
        .max_by(|a, b| a.modulation_index.total_cmp(&b.modulation_index))
        .map(|p| VoltsPeak(PI * p.v_peak.0 / p.modulation_index))
        .or(prior.filter(|v| v.0.is_finite() && v.0 > 0.0))
}

/// The next step at frequency `f`: `ladder` is the frequency's ascending generator levels,
/// `measured` the points so far (in the order measured), `prior` the V_pi expected before any.
pub fn next_step(
    ladder: &[Dbm],
    chain: &DriveChain,
    f: Hz,
    measured: &[AdaptivePoint],
    prior: Option<VoltsPeak>,
    settings: &AdaptiveSettings,
) -> AdaptiveStep {
    let Some(top) = ladder.len().checked_sub(1) else {
        return AdaptiveStep::Stop(AdaptiveStop::TopOfRange);
    };
    let last_rung = measured.iter().map(|p| p.rung).max();
    let betas = measured.iter().filter_map(|p| p.index.map(|i| i.0));
    let highest_beta = betas.fold(f64::NEG_INFINITY, f64::max);

    if let Some(relative) = relative_uncertainty(measured) {
        let cross_checked = highest_beta > J0_FIRST_ZERO || last_rung == Some(top);
        if measured.len() >= MIN_ADAPTIVE_POINTS
            && cross_checked
            && relative <= settings.target_relative_uncertainty
        {
            return AdaptiveStep::Stop(AdaptiveStop::TargetReached {
                relative_uncertainty: relative,
            });
        }
    }
    if measured.len() >= settings.max_points {
        return AdaptiveStep::Stop(AdaptiveStop::MaxPoints);
    }
    if last_rung == Some(top) {
        return AdaptiveStep::Stop(AdaptiveStop::TopOfRange);
    }

    // The lowest rung allowed next (above the last point) and the highest (one step up at most).
    let lowest = last_rung.map_or(0, |r| r + 1);
    let highest = match last_rung {
        None => top,
        Some(r) => {
            let ceiling = ladder[r].0 + settings.max_step_db;
            ladder
                .partition_point(|l| l.0 <= ceiling + 1e-9)
                .saturating_sub(1)
        }
    }
    .max(lowest);

    let wanted = estimate_v_pi(measured, prior).and_then(|v_pi| {
        let target = TARGET_INDICES
            .iter()
            .copied()
            .find(|t| *t > highest_beta + TARGET_MARGIN || !highest_beta.is_finite())?;
        generator_level_for_index(chain, f, target, v_pi)
    });
    // Leave room below the top for the fewest points a fit needs, SPREAD_DB apart, when the
    // wanted level lies beyond the range.
    let still_needed = MIN_ADAPTIVE_POINTS.saturating_sub(measured.len() + 1);
    let room_ceiling = ladder[top].0 - still_needed as f64 * SPREAD_DB;
    let room = ladder
        .partition_point(|l| l.0 <= room_ceiling + 1e-9)
        .saturating_sub(1)
        .max(lowest);
    let rung = match wanted {
        // The rung nearest the wanted level, within what is allowed.
        Some(level) => nearest_rung(ladder, level).min(room).clamp(lowest, highest),
        // Nothing to aim with: the bottom first, then the largest allowed step up.
        None if last_rung.is_none() => 0,
        None => highest.min(room).max(lowest),
    };
    AdaptiveStep::Measure(rung)
}

/// u(V_pi)/V_pi of the points so far, when they can be fitted.
pub fn relative_uncertainty(measured: &[AdaptivePoint]) -> Option<f64> {
    let points: Vec<DrivePoint> = measured
        .iter()
        .filter_map(|p| {
            let (beta, u) = p.index?;
            Some(DrivePoint {
                v_peak: p.v_peak,
                modulation_index: beta,
                uncertainty: u,
            })
        })
        .collect();
    let fit = fit_v_pi(&points).ok()?;
    Some(fit.v_pi_uncertainty.0 / fit.v_pi.0)
}

fn nearest_rung(ladder: &[Dbm], level: Dbm) -> usize {
    let above = ladder.partition_point(|l| l.0 < level.0);
    match above {
        0 => 0,
        n if n >= ladder.len() => ladder.len() - 1,
        n if (ladder[n].0 - level.0) < (level.0 - ladder[n - 1].0) => n,
        n => n - 1,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::chain::ChainPoint;
    use halfwave_units::Db;

    fn flat_chain(gain_db: f64) -> DriveChain {
        DriveChain::new(vec![ChainPoint {
            frequency: Hz(1e9),
            gain: Db(gain_db),
        }])
        .unwrap()
    }

    fn ladder(min: f64, max: f64, rung: f64) -> Vec<Dbm> {
        let n = ((max - min) / rung).round() as usize;
        (0..=n).map(|i| Dbm(min + i as f64 * rung)).collect()
    }

    const SETTINGS: AdaptiveSettings = AdaptiveSettings {
        target_relative_uncertainty: 0.003,
        max_points: 6,
        max_step_db: 6.0,
    };

    /// A modulator that follows beta = pi V_pk / V_pi exactly, measured with 0.1 % uncertainty.
    fn measure(chain: &DriveChain, ladder: &[Dbm], rung: usize, v_pi: f64) -> AdaptivePoint {
        let v_peak = chain
            .level_at_modulator(Hz(1e9), ladder[rung])
            .to_volts_peak();
        let beta = PI * v_peak.0 / v_pi;
        AdaptivePoint {
            rung,
            v_peak,
            index: Some((beta, 1e-3 * beta)),
        }
    }

    fn run(
        prior: Option<VoltsPeak>,
        v_pi: f64,
        l: &[Dbm],
        s: &AdaptiveSettings,
    ) -> Vec<AdaptivePoint> {
        let chain = flat_chain(-1.0);
        let mut measured = Vec::new();
        loop {
            match next_step(l, &chain, Hz(1e9), &measured, prior, s) {
                AdaptiveStep::Measure(rung) => measured.push(measure(&chain, l, rung, v_pi)),
                AdaptiveStep::Stop(_) => return measured,
            }
        }
    }

    #[test]
    fn with_a_good_prior_three_points_hit_the_targets_and_cross_the_null() {
        let l = ladder(0.0, 30.0, 0.25);
        let measured = run(Some(VoltsPeak(5.0)), 5.2, &l, &SETTINGS);
        assert_eq!(measured.len(), MIN_ADAPTIVE_POINTS, "{measured:?}");
        let betas: Vec<f64> = measured.iter().map(|p| p.index.unwrap().0).collect();
        // Upward only, the last past the carrier null (J0's first zero 2.4048, DLMF 10.21).
        assert!(betas.windows(2).all(|w| w[1] > w[0]), "{betas:?}");
        assert!(betas[2] > J0_FIRST_ZERO, "{betas:?}");
        // The first aims at 1.2 with a prior 4 % off and a 0.25 dB ladder: within 10 %.
        assert!((betas[0] - 1.2).abs() < 0.12, "{betas:?}");
    }

    #[test]
    fn without_a_prior_it_starts_at_the_bottom_and_never_steps_more_than_allowed() {
        let l = ladder(-5.0, 30.0, 0.25);
        let s = AdaptiveSettings {
            max_points: 10,
            ..SETTINGS
        };
        let measured = run(None, 5.2, &l, &s);
        assert_eq!(measured[0].rung, 0);
        for pair in measured.windows(2) {
            let step = l[pair[1].rung].0 - l[pair[0].rung].0;
            assert!(step > 0.0 && step <= 6.0 + 1e-9, "step {step} dB");
        }
        let last = measured.last().unwrap().index.unwrap().0;
        assert!(last > J0_FIRST_ZERO, "{measured:?}");
        assert!(measured.len() <= s.max_points);
    }

    #[test]
    fn a_range_too_low_for_the_null_ends_at_its_top() {
        // At 0 dBm after -1 dB the peak voltage is 0.28 V: beta 0.17 on a 5.2 V modulator.
        let l = ladder(-10.0, 0.0, 0.25);
        let measured = run(Some(VoltsPeak(5.2)), 5.2, &l, &SETTINGS);
        let rungs: Vec<usize> = measured.iter().map(|p| p.rung).collect();
        // Three points 3 dB apart (12 rungs of 0.25 dB), the last at the top.
        assert_eq!(rungs, vec![l.len() - 25, l.len() - 13, l.len() - 1]);
    }

    #[test]
    fn an_unreachable_target_stops_at_the_most_points() {
        let s = AdaptiveSettings {
            target_relative_uncertainty: 1e-6,
            ..SETTINGS
        };
        let l = ladder(0.0, 40.0, 0.25);
        let measured = run(Some(VoltsPeak(5.2)), 5.2, &l, &s);
        assert_eq!(measured.len(), s.max_points);
    }

    #[test]
    fn unreadable_points_step_up_by_the_largest_allowed_step() {
        let chain = flat_chain(0.0);
        let l = ladder(0.0, 20.0, 0.5);
        let measured = [AdaptivePoint {
            rung: 0,
            v_peak: VoltsPeak(0.3),
            index: None,
        }];
        assert_eq!(
            next_step(&l, &chain, Hz(1e9), &measured, None, &SETTINGS),
            AdaptiveStep::Measure(12)
        );
    }
}
