//! Speed of the trace analysis: comb location, line measurement and the least-squares fit on a
//! 10,001-point trace, the work done for every spectrum a sweep records.
//!
//! Run with `cargo bench -p halfwave-server --bench analysis`. Targets on a 2-core machine: the
//! whole-trace fit (`fit::fit_trace`, started from the line-by-line estimate) under 1 ms median,
//! timed in the same run as the line-by-line method it starts from (`measure_comb` +
//! `least_squares`), so that the two can be compared; the whole `analyze_trace` (both, plus the
//! spacing check and the cross-checks) is timed as well.
//!
//! Two kinds of trace: synthetic combs at beta 1, 2.5 and 6 (Gaussian lines, no reference, so
//! the pseudo-Voigt is fitted), and a trace drawn by the simulator's physics as the simulated
//! bench shows it at 0.2 GHz (`bench trace`: a Gaussian filter widened by the laser's Lorentzian
//! linewidth, whose wings cover the whole span, read with the line shape measured on an RF-off
//! reference), and the same at a 1 MHz laser linewidth read without a reference (the
//! pseudo-Voigt settles on a real mix, so the Voigt profile is fitted too: the dearest parametric
//! case), and the bench at 1 GHz over a 20 GHz span, whose 10 points per width are too few for
//! the smoothing, so the reference is read point by point and its noise propagated.
//!
//! Two clocks: criterion's usual wall clock, and the CPU time of the benchmark thread
//! (`CLOCK_THREAD_CPUTIME_ID`, the `cpu-time` group). On a machine shared with other builds the wall
//! clock also counts the time the thread waited for a core; the thread CPU time does not, so it
//! is what the analysis itself costs.

// libc::clock_gettime(CLOCK_THREAD_CPUTIME_ID): the CPU time of the measuring thread.
#![allow(unsafe_code)]

use criterion::measurement::{Measurement, ValueFormatter};
use criterion::{criterion_group, Criterion, Throughput};
use halfwave::analysis::comb::{measure_comb, measure_reference, MeasuredComb};
use halfwave::analysis::fit::{fit_trace, FitStart, LineShape};
use halfwave::analysis::modulation_index::{least_squares, FitData};
use halfwave::analysis::synthetic::SyntheticComb;
use halfwave::analysis::{analyze_trace, AnalysisOptions};
use halfwave::units::{Hz, Trace};
use halfwave_drivers::sim::physics::{self, OpticalLine, Rendering};
use halfwave_drivers::sim::scenario::FilterShape;
use rand::{rngs::StdRng, SeedableRng};
use rand_distr::{Distribution, Normal};
use std::hint::black_box;

const SPACING: Hz = Hz(1.0e9);

fn trace(beta: f64) -> Trace {
    let synthetic = SyntheticComb::centred(Hz(193.4e12), Hz(0.37e9), SPACING, beta, 12.0);
    let mut rng = StdRng::seed_from_u64(42);
    let noise = Normal::new(0.0, 0.3).expect("valid noise width");
    synthetic
        .trace(&mut || noise.sample(&mut rng))
        .expect("valid synthetic trace")
}

/// A trace as the simulated bench shows it at 0.2 GHz (the default scenario's 50 kHz laser
/// linewidth, 20 MHz resolution, -72 dBm floor, 0.15 dB display noise, 2.8 GHz span), drawn by the
/// simulator's physics; `beta` 0 gives the RF-off reference.
fn bench_trace(beta: f64, seed: u64) -> Trace {
    bench_trace_with_laser(beta, seed, 50e3)
}

/// [`bench_trace`] with a laser of linewidth `laser_linewidth_hz`.
fn bench_trace_with_laser(beta: f64, seed: u64, laser_linewidth_hz: f64) -> Trace {
    bench_trace_over(beta, seed, laser_linewidth_hz, 0.2e9, 1.4e9)
}

/// [`bench_trace`] with a laser of linewidth `laser_linewidth_hz`, lines `spacing` apart and a
/// span of +-`half_span_hz`.
fn bench_trace_over(
    beta: f64,
    seed: u64,
    laser_linewidth_hz: f64,
    spacing: f64,
    half_span_hz: f64,
) -> Trace {
    let carrier = 193.4e12 - 37e6;
    let lines: Vec<OpticalLine> = physics::comb_lines(beta, 0.0, 0.0)
        .into_iter()
        .map(|l| OpticalLine {
            frequency_hz: carrier + l.order as f64 * spacing,
            power_mw: 4.6 * l.relative_power,
        })
        .collect();
    let rendering = Rendering {
        start_hz: 193.4e12 - half_span_hz,
        stop_hz: 193.4e12 + half_span_hz,
        points: 10_001,
        resolution_bandwidth_hz: 20e6,
        filter: FilterShape::Gaussian,
        laser_linewidth_hz,
        noise_floor_dbm: -72.0,
        display_noise_db: 0.15,
    };
    let levels = physics::render_trace(&lines, &rendering, &mut StdRng::seed_from_u64(seed));
    Trace::new(rendering.frequencies_hz(), levels, None).expect("valid rendered trace")
}

/// One benchmarked trace and what the fit starts from.
struct Case {
    name: String,
    trace: Trace,
    reference: Option<Trace>,
    spacing: Hz,
    options: AnalysisOptions,
    comb: MeasuredComb,
    start: FitStart,
    shape: LineShape,
}

impl Case {
    /// A synthetic comb read without a reference (pseudo-Voigt shape).
    fn synthetic(beta: f64) -> Case {
        let trace = trace(beta);
        assert_eq!(trace.len(), 10_001);
        Case::without_reference(format!("beta {beta}"), trace, SPACING)
    }

    /// `trace` read without a reference, as `analyze_trace` reads it: the fit starts from a
    /// pseudo-Voigt as wide as the estimated resolution bandwidth.
    fn without_reference(name: String, trace: Trace, spacing: Hz) -> Case {
        let options = AnalysisOptions::default();
        let comb = measure_comb(&trace, spacing, None, &options).expect("comb found");
        let shape = LineShape::pseudo_voigt(
            comb.resolution_bandwidth_hz,
            comb.resolution_bandwidth_hz,
            0.0,
        );
        Case::new(name, trace, None, spacing, options, comb, shape)
    }

    /// The simulated bench's 0.2 GHz trace at beta 1.6, read with its RF-off reference (measured
    /// shape), as `analyze_trace` reads it.
    fn simulated_bench() -> Case {
        Case::with_reference(
            "bench trace 0.2 GHz".into(),
            bench_trace(1.6, 7),
            bench_trace(0.0, 8),
            Hz(0.2e9),
        )
    }

    /// The simulated bench at 1 GHz over +-10 GHz: 10 points per resolution width, too few for
    /// the smoothing, so the reference is read point by point and its display noise propagated
    /// to beta's uncertainty (`reference_noise`).
    fn point_by_point_reference() -> Case {
        Case::with_reference(
            "bench trace 1 GHz, shape read point by point".into(),
            bench_trace_over(1.6, 7, 50e3, 1e9, 10e9),
            bench_trace_over(0.0, 8, 50e3, 1e9, 10e9),
            Hz(1e9),
        )
    }

    /// `trace` read with the measured shape of `reference`, as `analyze_trace` reads it.
    fn with_reference(name: String, trace: Trace, reference: Trace, spacing: Hz) -> Case {
        let first =
            measure_comb(&trace, spacing, None, &AnalysisOptions::default()).expect("comb found");
        let options = AnalysisOptions {
            resolution_bandwidth: Some(Hz(first.resolution_bandwidth_hz)),
            ..AnalysisOptions::default()
        };
        let carrier = measure_reference(
            &reference,
            first.resolution_bandwidth_hz,
            first.window_half_width_hz,
            options.detection_threshold_db,
        )
        .expect("reference carrier found");
        let comb = measure_comb(&trace, spacing, Some(carrier.frequency_hz), &options)
            .expect("comb found");
        let shape = LineShape::measured(&reference, 8.0).expect("the reference gives a shape");
        Case::new(name, trace, Some(reference), spacing, options, comb, shape)
    }

    /// The simulated bench's 0.2 GHz trace at beta 1.6 with a 1 MHz laser line, read without a
    /// reference: the pseudo-Voigt settles on a real mix (4.5 % Lorentzian), so the Voigt
    /// profile is fitted from it as well and the two compared (the simulator's filter is a
    /// pseudo-Voigt, which is kept).
    fn bench_without_reference() -> Case {
        Case::without_reference(
            "bench trace 0.2 GHz, 1 MHz laser, no reference".into(),
            bench_trace_with_laser(1.6, 9, 1e6),
            Hz(0.2e9),
        )
    }

    fn new(
        name: String,
        trace: Trace,
        reference: Option<Trace>,
        spacing: Hz,
        options: AnalysisOptions,
        comb: MeasuredComb,
        shape: LineShape,
    ) -> Case {
        let data = FitData::new(&comb.lines, comb.floor_mw, comb.floor_uncertainty_mw);
        let start = FitStart::from_comb(&comb, least_squares(&data).expect("index").value);
        // Builds the Bessel table before timing (it is built once per process).
        analyze_trace(&trace, spacing, reference.as_ref(), &options).expect("the trace analyses");
        Case {
            name,
            trace,
            reference,
            spacing,
            options,
            comb,
            start,
            shape,
        }
    }

    fn fit(&self) -> halfwave::analysis::fit::WholeTraceFit {
        fit_trace(
            black_box(&self.trace),
            self.spacing,
            &self.shape,
            &self.start,
            self.comb.noise_sigma_db,
        )
        .expect("the trace fits")
        .0
    }
}

fn cases() -> Vec<Case> {
    let mut cases: Vec<Case> = [1.0, 2.5, 6.0].into_iter().map(Case::synthetic).collect();
    cases.push(Case::simulated_bench());
    cases.push(Case::bench_without_reference());
    cases.push(Case::point_by_point_reference());
    cases
}

/// Times the whole analysis, the old method and the whole-trace fit of each case, named after
/// `prefix`.
fn register<M: Measurement + 'static>(c: &mut Criterion<M>, prefix: &str, cases: &[Case]) {
    for case in cases {
        let name = &case.name;
        c.bench_function(&format!("{prefix}analyze_trace 10001 points {name}"), |b| {
            b.iter(|| {
                analyze_trace(
                    black_box(&case.trace),
                    case.spacing,
                    case.reference.as_ref(),
                    &case.options,
                )
            })
        });
        c.bench_function(
            &format!("{prefix}old method (lines + least squares) {name}"),
            |b| {
                b.iter(|| {
                    let comb =
                        measure_comb(black_box(&case.trace), case.spacing, None, &case.options)
                            .unwrap();
                    let data = FitData::new(&comb.lines, comb.floor_mw, comb.floor_uncertainty_mw);
                    least_squares(&data)
                })
            },
        );
        c.bench_function(&format!("{prefix}whole-trace fit {name}"), |b| {
            b.iter(|| case.fit())
        });
    }
}

fn bench(c: &mut Criterion) {
    let cases = cases();
    for case in &cases {
        let fitted = case.fit();
        println!(
            "whole-trace fit {}: beta {:.5}, {:?} shape (eta {:.3}), {} iterations, {} points under lines, {} in the floor block, reduced chi-squared {:.2}",
            case.name,
            fitted.modulation_index,
            fitted.line_shape,
            fitted.line_shape_eta,
            fitted.iterations,
            fitted.points_under_lines,
            fitted.points_in_floor_block,
            fitted.reduced_chi_squared
        );
    }
    // The old method's two parts, on the synthetic traces.
    for case in &cases[..3] {
        c.bench_function(&format!("locate and measure lines {}", case.name), |b| {
            b.iter(|| measure_comb(black_box(&case.trace), case.spacing, None, &case.options))
        });
        let data = FitData::new(
            &case.comb.lines,
            case.comb.floor_mw,
            case.comb.floor_uncertainty_mw,
        );
        c.bench_function(&format!("least-squares fit {}", case.name), |b| {
            b.iter(|| least_squares(black_box(&data)))
        });
    }
    register(c, "", &cases);
}

/// CPU time consumed by the calling thread.
struct ThreadCpuTime;

fn thread_cpu_nanoseconds() -> u64 {
    let mut now = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: `now` is a valid, writable timespec and CLOCK_THREAD_CPUTIME_ID is supported on
    // Linux; the call writes only into it.
    let status = unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut now) };
    assert_eq!(status, 0, "clock_gettime(CLOCK_THREAD_CPUTIME_ID) failed");
    now.tv_sec as u64 * 1_000_000_000 + now.tv_nsec as u64
}

impl Measurement for ThreadCpuTime {
    type Intermediate = u64;
    type Value = u64;

    fn start(&self) -> u64 {
        thread_cpu_nanoseconds()
    }
    fn end(&self, started: u64) -> u64 {
        thread_cpu_nanoseconds().saturating_sub(started)
    }
    fn add(&self, a: &u64, b: &u64) -> u64 {
        a + b
    }
    fn zero(&self) -> u64 {
        0
    }
    fn to_f64(&self, value: &u64) -> f64 {
        *value as f64
    }
    fn formatter(&self) -> &dyn ValueFormatter {
        &Microseconds
    }
}

/// Shows nanosecond values in microseconds.
struct Microseconds;

impl ValueFormatter for Microseconds {
    fn scale_values(&self, _typical: f64, values: &mut [f64]) -> &'static str {
        values.iter_mut().for_each(|v| *v /= 1e3);
        "us (thread CPU)"
    }
    fn scale_throughputs(
        &self,
        _typical: f64,
        _t: &Throughput,
        values: &mut [f64],
    ) -> &'static str {
        values.iter_mut().for_each(|v| *v /= 1e3);
        "us (thread CPU)"
    }
    fn scale_for_machines(&self, _values: &mut [f64]) -> &'static str {
        "ns"
    }
}

fn bench_cpu_time(c: &mut Criterion<ThreadCpuTime>) {
    register(c, "cpu-time/", &cases());
}

criterion_group!(benches, bench);
criterion_group! {
    name = cpu_benches;
    config = Criterion::default().with_measurement(ThreadCpuTime);
    targets = bench_cpu_time
}

/// One fit of `case`, not inlined, so that callgrind can count its instructions alone.
#[inline(never)]
fn counted_fit(case: &Case) -> halfwave::analysis::fit::WholeTraceFit {
    case.fit()
}

/// With `HALFWAVE_COUNT_FIT=NAME` set, fits the case named NAME (`all`: each case) once (after a fit
/// that sizes the thread's buffers) and exits, for an instruction count that does not depend on
/// what else the machine is doing:
/// `HALFWAVE_COUNT_FIT="beta 1" valgrind --tool=callgrind --collect-atstart=no
/// --toggle-collect='*counted_fit*' target/release/deps/analysis-HASH` (the total is the fit's).
fn count_fits(name: &str) {
    for case in cases().iter().filter(|c| name == "all" || c.name == name) {
        case.fit();
        let fitted = counted_fit(case);
        // Every digit, so that two builds can be checked to give the same fit to the bit.
        println!(
            "{}: beta {:?}, uncertainty {:?}, reduced chi-squared {:?} ({:?} shape, {} iterations, \
             {} points under the lines)",
            case.name,
            fitted.modulation_index,
            fitted.uncertainty_combined,
            fitted.reduced_chi_squared,
            fitted.line_shape,
            fitted.iterations,
            fitted.points_under_lines
        );
    }
}

fn main() {
    if let Ok(name) = std::env::var("HALFWAVE_COUNT_FIT") {
        count_fits(&name);
        return;
    }
    benches();
    cpu_benches();
    Criterion::default().configure_from_args().final_summary();
}
