//! Speed of the trace analysis: comb location, line measurement and the least-squares fit on a
//! 10,001-point trace, the work done for every spectrum a sweep records.
//!
//! Run with `cargo bench -p halfwave-server --bench analysis`. The target is a median under
//! 100 microseconds for the whole `analyze_trace` on a 2-core machine.

use criterion::{criterion_group, criterion_main, Criterion};
use halfwave::analysis::comb::measure_comb;
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
    }
}

criterion_group!(benches, bench);
criterion_main!(benches);
