//! Hostile input for the trace analysis: seeded random traces, line spacings, references and
//! options of every odd kind a file, an API request or an instrument's reply can carry (flat,
//! spiky, huge levels, spans of a few hertz or near the top of f64, uneven point spacing, a
//! spacing that is zero, negative or not a number). The analysis must answer each with a result
//! whose numbers are finite or an error that says something, and never panic (the standing rule:
//! bad input anywhere gets a clear error, never a panic).

use super::synthetic::SyntheticComb;
use super::trace_analysis::{analyze_trace, AnalysisOptions};
use halfwave_units::{Hz, Trace};
use rand::{rngs::StdRng, Rng, SeedableRng};

/// A trace of `points` points of some hostile kind (chosen by `kind`), or `None` when the values
/// drawn are not a trace at all (the trace type refuses them itself, which is tested elsewhere).
fn hostile_trace(rng: &mut StdRng, kind: u32) -> Option<Trace> {
    let points = match rng.random_range(0..4) {
        0 => rng.random_range(3..12),
        1 => rng.random_range(12..400),
        2 => rng.random_range(400..4000),
        _ => 10_001,
    };
    let centre: f64 = match rng.random_range(0..4) {
        0 => 193.4e12,
        1 => rng.random_range(-1e12..1e12),
        2 => 1e300,
        _ => rng.random_range(1.0..1e6),
    };
    let span = match rng.random_range(0..4) {
        0 => rng.random_range(1e9..1e11),
        1 => rng.random_range(1e-3..10.0),
        2 => centre.abs() * 1e-9 + 1.0,
        _ => rng.random_range(1e6..1e9),
    };
    let uneven = rng.random_bool(0.2);
    let mut frequency = Vec::with_capacity(points);
    let mut f = centre - span / 2.0;
    for _ in 0..points {
        frequency.push(f);
        let step = span / points as f64;
        f += if uneven {
            step * rng.random_range(0.01..3.0)
        } else {
            step
        };
    }
    let floor = rng.random_range(-120.0..-40.0);
    let power: Vec<f64> = (0..points)
        .map(|i| match kind {
            // Flat, or flat with display noise.
            0 => floor,
            1 => floor + rng.random_range(-0.5..0.5),
            // One spike, or a few.
            2 => {
                if i == points / 2 {
                    floor + 60.0
                } else {
                    floor
                }
            }
            3 => {
                if rng.random_bool(0.01) {
                    floor + rng.random_range(10.0..80.0)
                } else {
                    floor + rng.random_range(-0.3..0.3)
                }
            }
            // Levels far beyond any instrument, either way.
            4 => rng.random_range(-1e6..1e6),
            5 => {
                if i % 2 == 0 {
                    1e300
                } else {
                    -1e300
                }
            }
            // A step, a ramp.
            6 => {
                if i < points / 2 {
                    floor
                } else {
                    floor + 50.0
                }
            }
            _ => floor + 80.0 * i as f64 / points as f64,
        })
        .collect();
    Trace::new(frequency, power, None).ok()
}

/// A comb a real analyzer could show, with display noise, on `points` points, its spacing, and
/// its RF-off reference (the same laser line, unmodulated).
fn plausible_comb(rng: &mut StdRng, points: usize) -> Option<(Trace, Hz, Trace)> {
    let spacing = Hz(rng.random_range(0.5e9..5e9));
    let beta = rng.random_range(0.0..6.0);
    let mut comb = SyntheticComb::centred(
        Hz(193.4e12),
        Hz(rng.random_range(-1.0..1.0) * spacing.0),
        spacing,
        beta,
        (beta + 6.0).ceil(),
    );
    comb.points = points;
    let noise = rng.random_range(0.0..0.5);
    let mut seeded = StdRng::seed_from_u64(rng.random());
    let trace = comb
        .trace(&mut || seeded.random_range(-noise..=noise))
        .ok()?;
    comb.modulation_index = 0.0;
    let reference = comb
        .trace(&mut || seeded.random_range(-noise..=noise))
        .ok()?;
    Some((trace, spacing, reference))
}

fn hostile_spacing(rng: &mut StdRng, trace: &Trace) -> Hz {
    let f = trace.frequency_hz();
    let span = f[f.len() - 1] - f[0];
    Hz(match rng.random_range(0..8) {
        0 => 0.0,
        1 => -1e9,
        2 => f64::NAN,
        3 => f64::INFINITY,
        4 => span * rng.random_range(1e-6..1e-3),
        5 => span * rng.random_range(2.0..100.0),
        6 => 1e-300,
        _ => span * rng.random_range(0.01..0.5),
    })
}

fn hostile_options(rng: &mut StdRng) -> AnalysisOptions {
    let mut options = AnalysisOptions::default();
    if rng.random_bool(0.3) {
        options.resolution_bandwidth = Some(Hz(match rng.random_range(0..5) {
            0 => 0.0,
            1 => -1e6,
            2 => f64::NAN,
            3 => 1e30,
            _ => rng.random_range(1e3..1e9),
        }));
    }
    if rng.random_bool(0.2) {
        options.max_order = rng.random_range(0..200);
    }
    if rng.random_bool(0.2) {
        options.detection_threshold_db = match rng.random_range(0..3) {
            0 => f64::NAN,
            1 => -10.0,
            _ => 500.0,
        };
    }
    options
}

#[test]
fn hostile_traces_get_a_finite_answer_or_an_error_never_a_panic() {
    let mut rng = StdRng::seed_from_u64(20261204);
    let (mut answered, mut refused, mut cases) = (0, 0, 0);
    for case in 0..400u32 {
        let plausible = if case % 3 == 0 {
            let points = [5, 40, 1001, 10_001][rng.random_range(0..4)];
            plausible_comb(&mut rng, points)
        } else {
            None
        };
        let (trace, spacing, reference) = match plausible {
            // A plausible comb with its own spacing (or the trace's estimate of it) and its
            // reference, or with hostile ones.
            Some((trace, spacing, reference)) => {
                let spacing = match rng.random_range(0..5) {
                    0 | 1 => spacing,
                    2 => super::spacing::estimate_spacing(&trace).map_or(spacing, |s| s.spacing_hz),
                    _ => hostile_spacing(&mut rng, &trace),
                };
                let reference = match rng.random_range(0..4) {
                    0 | 1 => Some(reference),
                    2 => None,
                    _ => {
                        let kind = rng.random_range(0..8);
                        hostile_trace(&mut rng, kind)
                    }
                };
                (trace, spacing, reference)
            }
            None => {
                let kind = rng.random_range(0..8);
                let Some(trace) = hostile_trace(&mut rng, kind) else {
                    continue;
                };
                let spacing = hostile_spacing(&mut rng, &trace);
                let reference = match rng.random_range(0..3) {
                    0 => {
                        let kind = rng.random_range(0..8);
                        hostile_trace(&mut rng, kind)
                    }
                    1 => Some(trace.clone()),
                    _ => None,
                };
                (trace, spacing, reference)
            }
        };
        let options = hostile_options(&mut rng);
        cases += 1;
        let outcome = std::panic::catch_unwind(|| {
            analyze_trace(&trace, spacing, reference.as_ref(), &options)
        });
        let described = || {
            let f = trace.frequency_hz();
            format!(
                "case {case}: {} points from {:e} to {:e} Hz, spacing {:?}, reference {}, options {options:?}",
                f.len(),
                f[0],
                f[f.len() - 1],
                spacing,
                reference.is_some()
            )
        };
        match outcome {
            Err(_) => panic!("the analysis panicked on {}", described()),
            Ok(Ok(analysis)) => {
                answered += 1;
                let beta = &analysis.modulation_index;
                assert!(
                    beta.value.is_finite() && beta.value >= 0.0 && beta.uncertainty.is_finite(),
                    "a result with beta {} +- {} on {}",
                    beta.value,
                    beta.uncertainty,
                    described()
                );
            }
            Ok(Err(e)) => {
                refused += 1;
                assert!(
                    e.to_string().len() > 20,
                    "an error that says little ({e}) on {}",
                    described()
                );
            }
        }
    }
    println!("hostile traces: {cases} analysed, {answered} answered, {refused} refused");
    assert!(cases >= 300, "only {cases} cases were traces at all");
    assert!(
        answered > 0 && refused > 0,
        "{answered} answered, {refused} refused"
    );
}
