//! Shared set-up for the store tests: a throw-away database file, a registered device, a
//! calibration and a running run, and a small analyzer-like trace. The serial numbers, bench and
//! lab names are invented for the tests.

#![allow(dead_code)]

use halfwave::store::{
    ChainCalibrationPoint, NewDevice, NewFrequencyResult, NewPoint, NewRun, RunRecord, RunState,
    Store,
};
use halfwave::units::{Db, Dbm, Hz, Nanometers, Trace, VoltsPeak};
use std::path::PathBuf;
use std::sync::atomic::{AtomicU32, Ordering};

/// A directory under the system temp dir, removed on drop.
pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(label: &str) -> TempDir {
        static COUNTER: AtomicU32 = AtomicU32::new(0);
        let dir = std::env::temp_dir().join(format!(
            "halfwave-{label}-{}-{}",
            std::process::id(),
            COUNTER.fetch_add(1, Ordering::Relaxed)
        ));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("create temp dir");
        TempDir(dir)
    }

    pub fn file(&self, name: &str) -> String {
        self.0.join(name).to_string_lossy().into_owned()
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

pub fn demo_device(serial: &str) -> NewDevice {
    NewDevice {
        serial: serial.to_string(),
        model: "PM-40 thin-film phase modulator (demo lab)".to_string(),
        rf_input_limit: Dbm(27.0),
        wavelength: Nanometers(1550.0),
    }
}

/// Registers the device, uploads a flat 20 dB chain and queues a run on it.
pub async fn queued_run(store: &Store, serial: &str) -> RunRecord {
    let device = store.upsert_device(&demo_device(serial)).await.unwrap();
    let calibration = store
        .create_chain_calibration(
            "bench-north amplifier chain",
            "test",
            &[
                ChainCalibrationPoint::new(Hz::from_ghz(1.0), Db(20.0)),
                ChainCalibrationPoint::new(Hz::from_ghz(40.0), Db(18.5)),
            ],
        )
        .await
        .unwrap();
    store
        .create_run(&NewRun {
            plan: serde_json::json!({ "frequencies_hz": [1e10, 2e10], "levels_dbm": [0.0, 3.0] }),
            device_id: device.id,
            bench_name: "bench-north".to_string(),
            chain_calibration_id: calibration.id,
            submitted_by: "operator-a".to_string(),
            provenance: Default::default(),
        })
        .await
        .unwrap()
}

pub async fn running_run(store: &Store, serial: &str) -> RunRecord {
    let run = queued_run(store, serial).await;
    store
        .transition_run(run.id, RunState::Running, None)
        .await
        .unwrap()
}

/// A uniform 401-point trace with a single line (shape only; invented).
pub fn small_trace() -> Trace {
    let frequency_hz: Vec<f64> = (0..401).map(|i| 193.4e12 + i as f64 * 25e6).collect();
    let power_dbm: Vec<f64> = (0..401)
        .map(|i| {
            if i == 200 {
                -3.0
            } else {
                -65.0 - (i % 7) as f64 * 0.25
            }
        })
        .collect();
    Trace::new(frequency_hz, power_dbm, Some(Hz(5e6))).unwrap()
}

pub fn point<'a>(
    run_id: i64,
    frequency_index: u32,
    level_index: u32,
    trace: &'a Trace,
) -> NewPoint<'a> {
    NewPoint {
        run_id,
        frequency_index,
        level_index,
        frequency: Hz::from_ghz(10.0 * (frequency_index + 1) as f64),
        generator_level: Dbm(level_index as f64 * 3.0),
        level_at_modulator: Dbm(level_index as f64 * 3.0 + 20.0),
        v_peak: VoltsPeak(3.162),
        modulation_index: Some(1.2),
        modulation_index_uncertainty: Some(0.01),
        asymmetry: Some(Db(0.1)),
        line_table: serde_json::json!([{ "order": 0, "power_dbm": -3.0 }]),
        analysis: serde_json::json!({ "method": "ratio" }),
        trace,
        analyzer_sweeps: 3,
    }
}

pub fn result(
    run_id: i64,
    frequency_index: u32,
    frequency_ghz: f64,
    v_pi_volts: f64,
    u_volts: f64,
) -> NewFrequencyResult {
    NewFrequencyResult {
        run_id,
        frequency_index,
        frequency: Hz::from_ghz(frequency_ghz),
        v_pi: VoltsPeak(v_pi_volts),
        v_pi_uncertainty: VoltsPeak(u_volts),
        excluded_points: serde_json::json!([]),
        fit: serde_json::json!({ "points_used": 4 }),
    }
}

/// A store on PostgreSQL in a database of its own (dropped with this), on the server
/// `HALFWAVE_TEST_POSTGRES_URL` names; without it the test fails saying how to run it.
pub struct PgStore {
    pub store: Store,
    pub database: halfwave::store::scratch_db::ScratchDatabase,
}

pub async fn postgres_store(label: &str) -> PgStore {
    let database = halfwave::store::scratch_db::ScratchDatabase::create(label).await;
    let store = Store::open(database.url())
        .await
        .unwrap_or_else(|e| panic!("opening the PostgreSQL test database: {e}"));
    PgStore { store, database }
}

/// Runs each named test body (an `async fn NAME(store: Store)`) twice: on SQLite in memory
/// (`NAME::sqlite`) and on PostgreSQL in a fresh database (`NAME::postgres`, which needs
/// `HALFWAVE_TEST_POSTGRES_URL`: run through `.ci/with-postgres`).
#[macro_export]
macro_rules! on_both_backends {
    ($($name:ident),* $(,)?) => {
        $(
            mod $name {
                #[tokio::test]
                async fn sqlite() {
                    let store = halfwave::store::Store::open_in_memory().await.unwrap();
                    super::$name(store).await;
                }

                #[tokio::test]
                async fn postgres() {
                    let pg = super::store_support::postgres_store(stringify!($name)).await;
                    super::$name(pg.store.clone()).await;
                    pg.store.close().await;
                }
            }
        )*
    };
}
