//! Benchmark: one simulated 10,001-point analyzer sweep (target: well under 1 ms).
//!
//! Run with `cargo bench -p halfwave-drivers --bench sim_trace`. The sweep is taken through the
//! bench state exactly as the SCPI server and the in-process analyzer take it: laser drift,
//! Bessel comb with residual AM, pseudo-Voigt line shapes, noise floor and display noise.

use criterion::{criterion_group, criterion_main, Criterion};
use halfwave_drivers::sim::physics::comb_lines;
use halfwave_drivers::sim::physics::{render_trace, OpticalLine, Rendering};
use halfwave_drivers::sim::scenario::FilterShape;
use rand::SeedableRng;

fn sweep_10001_points(c: &mut Criterion) {
    let carrier = 193.4e12;
    let f_m = 1.5e9;
    let lines: Vec<OpticalLine> = comb_lines(2.2, 0.02, 1.0)
        .into_iter()
        .map(|l| OpticalLine {
            frequency_hz: carrier + f64::from(l.order) * f_m,
            power_mw: 2.0 * l.relative_power,
        })
        .collect();
    let rendering = Rendering {
        start_hz: carrier - 10e9,
        stop_hz: carrier + 10e9,
        points: 10_001,
        resolution_bandwidth_hz: 5e6,
        filter: FilterShape::Gaussian,
        laser_linewidth_hz: 50e3,
        noise_floor_dbm: -72.0,
        display_noise_db: 0.15,
    };
    let mut rng = rand::rngs::StdRng::seed_from_u64(1);
    c.bench_function(
        "render 10,001-point trace (gaussian RBW, 50 kHz linewidth)",
        |b| b.iter(|| render_trace(&lines, &rendering, &mut rng)),
    );
    let lorentzian = Rendering {
        filter: FilterShape::Lorentzian,
        ..rendering
    };
    c.bench_function("render 10,001-point trace (lorentzian RBW)", |b| {
        b.iter(|| render_trace(&lines, &lorentzian, &mut rng))
    });
    let no_noise = Rendering {
        display_noise_db: 0.0,
        ..rendering
    };
    c.bench_function("render 10,001-point trace (no display noise)", |b| {
        b.iter(|| render_trace(&lines, &no_noise, &mut rng))
    });
    let narrow = Rendering {
        laser_linewidth_hz: 0.0,
        ..no_noise
    };
    c.bench_function("render 10,001-point trace (no noise, no linewidth)", |b| {
        b.iter(|| render_trace(&lines, &narrow, &mut rng))
    });
    c.bench_function("comb lines at beta 2.2", |b| {
        b.iter(|| comb_lines(2.2, 0.02, 1.0))
    });
}

criterion_group!(benches, sweep_10001_points);
criterion_main!(benches);
