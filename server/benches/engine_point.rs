//! Daemon overhead per point: a whole run through the engine on the simulated bench with every
//! instrument time set to zero, so what is measured is the engine's own work per point
//! (instrument calls through the traits, the simulator rendering each 10,001-point trace, the
//! analysis, the commit of the point with its compressed trace to a file database, progress
//! events). The simulator's rendering (about 0.1-0.2 ms per trace, see `sim_trace`) is included,
//! so the figure over-states the daemon's own cost.
//!
//! With `HALFWAVE_BENCH_POSTGRES_URL=postgres://USER@HOST/DB` (a server where USER may create
//! databases) the same run is measured with the store on PostgreSQL too, in a scratch database
//! dropped afterwards (`engine/..._postgres`), beside the SQLite file in the same process.
//!
//! The run's own work (laser search, reference trace, measuring its line shape, the V_pi fit,
//! the run's rows) is spread over only nine points in the first figure. The second runs the same
//! frequency with 33 levels (the same range in 0.5 dB steps): the difference between the two,
//! divided by the 24 points more, is what one more point costs (the marginal per-point overhead,
//! simulator rendering included).
//!
//! Run: `cargo bench -p halfwave-server --bench engine_point`

mod support;

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use halfwave::engine::plan::PlanRequest;
use halfwave::store::scratch_db::ScratchDatabase;

use halfwave::engine::plan::LevelSpec;
use halfwave_units::{Db, Dbm};
use support::LEVELS;

fn plan() -> PlanRequest {
    support::plan("BENCH-PM-1", &[2e9])
}

/// Levels of the second run: the same 3-19 dBm as [`plan`]'s in 0.5 dB steps.
const DENSE_LEVELS: usize = 33;

fn dense_plan() -> PlanRequest {
    let mut plan = plan();
    plan.levels = LevelSpec::Ramp {
        start_dbm: Dbm(3.0),
        stop_dbm: Dbm(19.0),
        step_db: Db(0.5),
    };
    plan
}

fn engine_point(c: &mut Criterion) {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let dir = tempfile::tempdir().unwrap();
    let (engine, _sim) =
        runtime.block_on(support::sim_engine(&dir.path().join("bench.db"), 1, 0.0));
    let mut group = c.benchmark_group("engine");
    group.sample_size(10);
    group.throughput(Throughput::Elements(LEVELS as u64));
    group.bench_function("run_of_9_points_10001_point_traces", |b| {
        b.iter(|| runtime.block_on(support::run_to_completion(&engine, plan())))
    });
    group.throughput(Throughput::Elements(DENSE_LEVELS as u64));
    group.bench_function("run_of_33_points_10001_point_traces", |b| {
        b.iter(|| runtime.block_on(support::run_to_completion(&engine, dense_plan())))
    });
    group.throughput(Throughput::Elements(LEVELS as u64));
    runtime.block_on(engine.shutdown());
    if let Ok(url) = std::env::var("HALFWAVE_BENCH_POSTGRES_URL") {
        let database = runtime
            .block_on(ScratchDatabase::create_on(&url, "bench_engine_point"))
            .expect("a scratch database on HALFWAVE_BENCH_POSTGRES_URL");
        let (engine, _sim) = runtime.block_on(support::sim_engine_on(database.url(), 1, 0.0));
        group.bench_function("run_of_9_points_10001_point_traces_postgres", |b| {
            b.iter(|| runtime.block_on(support::run_to_completion(&engine, plan())))
        });
        runtime.block_on(engine.shutdown());
    }
    group.finish();
}

criterion_group!(benches, engine_point);
criterion_main!(benches);
