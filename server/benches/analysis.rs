//! Speed of the trace analysis: comb location, line measurement and the least-squares fit on a
//! 10,001-point trace, the work done for every spectrum a sweep records.
//!
//! Run with `cargo bench -p halfwave-server --bench analysis`. Targets on a 2-core machine: the
//! whole-trace fit (`fit::fit_trace`, started from the line-by-line estimate) under 1 ms median,
//! timed in the same run as the line-by-line method it starts from (`measure_comb` +
//! `least_squares`), so that the two can be compared; the whole `analyze_trace` (both, plus the
//! spacing check and the cross-checks) is timed as well.
//!
//! Two clocks: criterion's usual wall clock, and the CPU time of the benchmark thread
//! (`CLOCK_THREAD_CPUTIME_ID`, the `cpu-time` group). On a machine shared with other builds the wall
//! clock also counts the time the thread waited for a core; the thread CPU time does not, so it
//! is what the analysis itself costs.

use criterion::measurement::{Measurement, ValueFormatter};
use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use halfwave::analysis::comb::measure_comb;
use halfwave::analysis::fit::{fit_trace, FitStart, LineShape};
use halfwave::analysis::index::{least_squares, FitData};
use halfwave::analysis::synthetic::SyntheticComb;
use halfwave::analysis::{analyze_trace, AnalysisOptions};
use halfwave::units::{Hz, Trace};
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

fn bench(c: &mut Criterion) {
    let options = AnalysisOptions::default();
    for beta in [1.0, 2.5, 6.0] {
        let trace = trace(beta);
        assert_eq!(trace.len(), 10_001);
        // Build the Bessel table before timing (it is built once per process).
        analyze_trace(&trace, SPACING, None, &options).expect("the synthetic trace analyses");
        c.bench_function(&format!("analyze_trace 10001 points beta {beta}"), |b| {
            b.iter(|| analyze_trace(black_box(&trace), SPACING, None, &options))
        });
        let comb = measure_comb(&trace, SPACING, None, &options).expect("comb found");
        c.bench_function(&format!("locate and measure lines beta {beta}"), |b| {
            b.iter(|| measure_comb(black_box(&trace), SPACING, None, &options))
        });
        let data = FitData::new(&comb.lines, comb.floor_mw, comb.floor_uncertainty_mw);
        c.bench_function(&format!("least-squares fit beta {beta}"), |b| {
            b.iter(|| least_squares(black_box(&data)))
        });
        c.bench_function(
            &format!("old method (lines + least squares) beta {beta}"),
            |b| {
                b.iter(|| {
                    let comb = measure_comb(black_box(&trace), SPACING, None, &options).unwrap();
                    let data = FitData::new(&comb.lines, comb.floor_mw, comb.floor_uncertainty_mw);
                    least_squares(&data)
                })
            },
        );
        let start = FitStart {
            beta: least_squares(&data).unwrap().value,
            carrier_hz: comb.carrier_frequency_hz,
            floor_mw: comb.floor_mw,
            strongest_line_peak_mw: comb.lines.iter().map(|l| l.power_mw).fold(0.0, f64::max),
            asymmetry: true,
        };
        let shape = LineShape::pseudo_voigt(
            comb.resolution_bandwidth_hz,
            comb.resolution_bandwidth_hz,
            0.0,
        );
        let (fitted, _) = fit_trace(&trace, SPACING, &shape, &start, comb.noise_sigma_db)
            .expect("the synthetic trace fits");
        println!(
            "whole-trace fit beta {beta}: {} iterations, {} points under lines, {} in the floor block, reduced chi-squared {:.2}",
            fitted.iterations,
            fitted.points_under_lines,
            fitted.points_in_floor_block,
            fitted.reduced_chi_squared
        );
        c.bench_function(&format!("whole-trace fit beta {beta}"), |b| {
            b.iter(|| {
                fit_trace(
                    black_box(&trace),
                    SPACING,
                    &shape,
                    &start,
                    comb.noise_sigma_db,
                )
            })
        });
    }
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
    let options = AnalysisOptions::default();
    let mut group = c.benchmark_group("cpu-time");
    for beta in [1.0, 2.5, 6.0] {
        let trace = trace(beta);
        analyze_trace(&trace, SPACING, None, &options).expect("the synthetic trace analyses");
        group.bench_function(format!("analyze_trace 10001 points beta {beta}"), |b| {
            b.iter(|| analyze_trace(black_box(&trace), SPACING, None, &options))
        });
        let comb = measure_comb(&trace, SPACING, None, &options).expect("comb found");
        let data = FitData::new(&comb.lines, comb.floor_mw, comb.floor_uncertainty_mw);
        group.bench_function(
            format!("old method (lines + least squares) beta {beta}"),
            |b| {
                b.iter(|| {
                    let comb = measure_comb(black_box(&trace), SPACING, None, &options).unwrap();
                    let data = FitData::new(&comb.lines, comb.floor_mw, comb.floor_uncertainty_mw);
                    least_squares(&data)
                })
            },
        );
        let start = FitStart {
            beta: least_squares(&data).unwrap().value,
            carrier_hz: comb.carrier_frequency_hz,
            floor_mw: comb.floor_mw,
            strongest_line_peak_mw: comb.lines.iter().map(|l| l.power_mw).fold(0.0, f64::max),
            asymmetry: true,
        };
        let shape = LineShape::pseudo_voigt(
            comb.resolution_bandwidth_hz,
            comb.resolution_bandwidth_hz,
            0.0,
        );
        group.bench_function(format!("whole-trace fit beta {beta}"), |b| {
            b.iter(|| {
                fit_trace(
                    black_box(&trace),
                    SPACING,
                    &shape,
                    &start,
                    comb.noise_sigma_db,
                )
            })
        });
    }
    group.finish();
}

criterion_group!(benches, bench);
criterion_group! {
    name = cpu_benches;
    config = Criterion::default().with_measurement(ThreadCpuTime);
    targets = bench_cpu_time
}
criterion_main!(benches, cpu_benches);
