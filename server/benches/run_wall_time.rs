//! A run's wall time against the instruments' busy time, with realistic simulated timings.
//!
//! The simulated bench keeps the scenario's instrument times (20 ms for the source to settle after
//! each frequency, level or output change; 0.4 s per analyzer sweep) and adds up every one of them
//! as it goes ([`SimBench::busy_time`]). A run cannot be faster than that sum, because a sweep needs
//! the settled RF and the next level needs the sweep done. Everything above it is the daemon's own
//! time (analysis, store, events, scheduling). The target is a wall time within 5 % of the sum.
//!
//! The plan's own settle time is a deliberate wait, not overhead, so it is set to zero here; a
//! plan's `settle_s` adds the same time to both sides.
//!
//! Each configuration runs on the in-process simulated bench and on the same bench served over
//! SCPI/TCP on loopback (the generic drivers with the standard profiles, which wait for every
//! source change and every sweep with `*OPC?`, as the simulator answers it only when idle).
//!
//! Run: `cargo bench -p halfwave-server --bench run_wall_time` (about two minutes). Exits with an
//! error if a run's wall time is more than 5 % above its busy time.

mod support;

use halfwave::config::Config;
use halfwave::engine::plan::PlanRequest;
use halfwave::engine::Engine;
use halfwave::store::Store;
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use std::time::{Duration, Instant};

/// How far above the busy time a run's wall time may be.
const TARGET_OVERHEAD: f64 = 0.05;
const REPEATS: usize = 2;

fn plan() -> PlanRequest {
    support::plan("BENCH-PM-2", &[1e9, 5e9, 15e9])
}

struct Measured {
    wall: Duration,
    busy: Duration,
    points: usize,
}

async fn one_run(engine: &Engine, sim: &SimBench) -> Measured {
    let busy_before = sim.busy_time(Role::RfSource) + sim.busy_time(Role::Analyzer);
    let started = Instant::now();
    let run_id = support::run_to_completion(engine, plan()).await;
    let wall = started.elapsed();
    let points = engine.store().points_of_run(run_id).await.unwrap().len();
    let busy = sim.busy_time(Role::RfSource) + sim.busy_time(Role::Analyzer) - busy_before;
    Measured { wall, busy, points }
}

fn report(name: &str, runs: &[Measured]) -> bool {
    let mut ok = true;
    for (i, m) in runs.iter().enumerate() {
        let overhead = m.wall.as_secs_f64() / m.busy.as_secs_f64() - 1.0;
        let per_point_ms = (m.wall.as_secs_f64() - m.busy.as_secs_f64()) / m.points as f64 * 1e3;
        println!(
            "{name} run {}: {} points, wall {:.3} s, instrument busy {:.3} s, overhead {:+.2} % ({:+.2} ms per point)",
            i + 1,
            m.points,
            m.wall.as_secs_f64(),
            m.busy.as_secs_f64(),
            overhead * 100.0,
            per_point_ms
        );
        ok &= overhead <= TARGET_OVERHEAD;
    }
    ok
}

async fn in_process(dir: &std::path::Path) -> Vec<Measured> {
    let (engine, sim) = support::sim_engine(&dir.join("in-process.db"), 1, 1.0).await;
    let mut runs = Vec::new();
    for _ in 0..REPEATS {
        runs.push(one_run(&engine, &sim).await);
    }
    engine.shutdown().await;
    runs
}

async fn over_scpi(dir: &std::path::Path) -> Vec<Measured> {
    let sim = SimBench::new(Scenario::builtin().unwrap(), 2).with_time_factor(1.0);
    let server = SimServer::start(sim.clone(), SimServerConfig::any_free_ports())
        .await
        .unwrap();
    let text = format!(
        "data_dir = \"{}\"\n\n[[bench]]\nname = \"sim\"\nsource = {{ kind = \"scpi\", resource = \"{}\" }}\nanalyzer = {{ kind = \"scpi\", resource = \"{}\" }}\n",
        dir.display(),
        server.resource(Role::RfSource),
        server.resource(Role::Analyzer),
    );
    let config = Config::from_toml(&text, &dir.join("halfwave.toml"), dir.to_path_buf()).unwrap();
    let store = Store::open(dir.join("scpi.db").to_str().unwrap())
        .await
        .unwrap();
    let engine = Engine::start(&config, store).await.unwrap();
    let mut runs = Vec::new();
    for _ in 0..REPEATS {
        runs.push(one_run(&engine, &sim).await);
    }
    engine.shutdown().await;
    server.shutdown().await;
    runs
}

fn main() {
    // `cargo bench` passes `--bench`; `cargo test --benches` would pass nothing and must not
    // spend two minutes here.
    if !std::env::args().any(|a| a == "--bench") {
        println!("run_wall_time: run with `cargo bench -p halfwave-server --bench run_wall_time`");
        return;
    }
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let dir = tempfile::tempdir().unwrap();
    let (local, remote) = runtime.block_on(async {
        let local = in_process(dir.path()).await;
        let remote = over_scpi(dir.path()).await;
        (local, remote)
    });
    let ok_local = report("in-process", &local);
    let ok_remote = report("scpi/tcp", &remote);
    if !(ok_local && ok_remote) {
        eprintln!(
            "a run's wall time is more than {:.0} % above its instrument busy time",
            TARGET_OVERHEAD * 100.0
        );
        std::process::exit(1);
    }
}
