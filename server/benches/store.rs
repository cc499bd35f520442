//! Store speed: committing one point with its 10,001-point trace to a file database (the engine's
//! per-point write; its whole per-point overhead budget is 2 ms), and the trace encoding alone.
//!
//! With `HALFWAVE_BENCH_POSTGRES_URL=postgres://USER@HOST/DB` (a server where USER may create
//! databases) the commit is measured on PostgreSQL too, in a scratch database dropped afterwards.
//!
//! Run: `cargo bench -p halfwave-server --bench store`

use criterion::{criterion_group, criterion_main, Criterion};
use halfwave::store::scratch_db::ScratchDatabase;
use halfwave::store::{
    trace_codec, ChainCalibrationPoint, NewDevice, NewPoint, NewRun, RunState, Store,
};
use halfwave::units::{Db, Dbm, Hz, Nanometers, Trace, VoltsPeak};
use std::hint::black_box;

/// A 10,001-point sweep around 193.4 THz: comb lines every 1 GHz on a floor with deterministic
/// pseudo-random noise (invented data; only its size and texture matter).
fn analyzer_like_trace() -> Trace {
    let points = 10_001;
    let start = 193.4e12 - 5e9;
    let step = 10e9 / (points - 1) as f64;
    let mut state: u64 = 0x9E37_79B9_7F4A_7C15;
    let frequency_hz: Vec<f64> = (0..points).map(|i| start + i as f64 * step).collect();
    let power_dbm: Vec<f64> = frequency_hz
        .iter()
        .map(|f| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            let noise = (state >> 11) as f64 / (1u64 << 53) as f64 * 3.0 - 1.5;
            let offset = (f - 193.4e12) / 1e9;
            let distance = offset - offset.round();
            (-10.0 - 16_000.0 * distance * distance).max(-70.0 + noise)
        })
        .collect();
    Trace::new(frequency_hz, power_dbm, Some(Hz(5e6))).expect("valid bench trace")
}

fn bench_store(c: &mut Criterion) {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .enable_all()
        .build()
        .expect("tokio runtime");
    let dir = std::env::temp_dir().join(format!("halfwave-bench-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("bench directory");
    let path = dir.join("bench.db").to_string_lossy().into_owned();
    let trace = analyzer_like_trace();

    let store = runtime
        .block_on(Store::open(&path))
        .expect("open bench database");
    let run_id = runtime.block_on(running_run(&store));

    let line_table = serde_json::json!([
        { "order": -1, "frequency_hz": 1.934e14, "power_dbm": -12.1 },
        { "order": 0, "frequency_hz": 1.934e14, "power_dbm": -6.3 },
        { "order": 1, "frequency_hz": 1.934e14, "power_dbm": -12.0 }
    ]);
    let analysis = serde_json::json!({ "method": "least_squares", "residual_db": 0.12 });
    let mut level_index = 0u32;
    let mut commit = |c: &mut Criterion, name: &str, store: &Store, run_id: i64| {
        c.bench_function(name, |b| {
            b.iter(|| {
                level_index += 1;
                let point = NewPoint {
                    run_id,
                    frequency_index: 0,
                    level_index,
                    frequency: Hz::from_ghz(10.0),
                    generator_level: Dbm(0.0),
                    level_at_modulator: Dbm(20.0),
                    v_peak: VoltsPeak(3.162),
                    modulation_index: Some(1.2),
                    modulation_index_uncertainty: Some(0.01),
                    asymmetry: Some(Db(0.1)),
                    line_table: line_table.clone(),
                    analysis: analysis.clone(),
                    trace: &trace,
                    analyzer_sweeps: 1,
                };
                runtime
                    .block_on(store.commit_point(black_box(&point)))
                    .expect("commit point")
            })
        });
    };
    commit(
        c,
        "store/commit_point_with_10001_point_trace_file_db",
        &store,
        run_id,
    );
    if let Ok(url) = std::env::var("HALFWAVE_BENCH_POSTGRES_URL") {
        let database = runtime
            .block_on(ScratchDatabase::create_on(&url, "bench_store"))
            .expect("a scratch database on HALFWAVE_BENCH_POSTGRES_URL");
        let pg = runtime
            .block_on(Store::open(database.url()))
            .expect("open the PostgreSQL bench database");
        let pg_run = runtime.block_on(running_run(&pg));
        commit(
            c,
            "store/commit_point_with_10001_point_trace_postgres",
            &pg,
            pg_run,
        );
        runtime.block_on(pg.close());
    }
    c.bench_function("store/encode_10001_point_trace", |b| {
        b.iter(|| trace_codec::encode(black_box(&trace)).expect("encode"))
    });
    let encoded = trace_codec::encode(&trace).expect("encode");
    println!(
        "encoded 10,001-point trace: {} bytes (raw f64 columns: {} bytes)",
        encoded.len(),
        10_001 * 16
    );
    c.bench_function("store/decode_10001_point_trace", |b| {
        b.iter(|| trace_codec::decode(black_box(&encoded)).expect("decode"))
    });

    runtime.block_on(store.close());
    let _ = std::fs::remove_dir_all(&dir);
}

/// A device, a calibration and a run in the running state, to commit points to.
async fn running_run(store: &Store) -> i64 {
    let device = store
        .upsert_device(&NewDevice {
            serial: "BENCH-0001".into(),
            model: "demo modulator".into(),
            rf_input_limit: Dbm(27.0),
            wavelength: Nanometers(1550.0),
        })
        .await
        .expect("device");
    let calibration = store
        .create_chain_calibration(
            "bench chain",
            "bench",
            &[ChainCalibrationPoint::new(Hz::from_ghz(1.0), Db(20.0))],
        )
        .await
        .expect("calibration");
    let run = store
        .create_run(&NewRun {
            plan: serde_json::json!({}),
            device_id: device.id,
            bench_name: "bench".into(),
            chain_calibration_id: calibration.id,
            submitted_by: "bench".into(),
            provenance: Default::default(),
        })
        .await
        .expect("run");
    store
        .transition_run(run.id, RunState::Running, None)
        .await
        .expect("start run");
    run.id
}

criterion_group!(benches, bench_store);
criterion_main!(benches);
