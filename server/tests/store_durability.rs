//! The store on a real file: schema, pragmas, what survives a crash, start-up recovery and the
//! guarantees a resumed run relies on.

#[macro_use]
mod store_support;

use halfwave::store::{RunState, Store, StoreError};
use store_support::{point, running_run, small_trace, TempDir};

#[tokio::test]
async fn migrations_apply_to_a_fresh_file_and_pragmas_are_set() {
    let dir = TempDir::new("fresh");
    let path = dir.file("halfwave.db");
    assert!(!std::path::Path::new(&path).exists());
    let store = Store::open(&path).await.unwrap();
    assert!(std::path::Path::new(&path).exists());

    let tables: Vec<String> =
        sqlx::query_scalar("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")
            .fetch_all(store.pool().as_sqlite().unwrap())
            .await
            .unwrap();
    for expected in [
        "audit_log",
        "chain_calibration_points",
        "chain_calibrations",
        "devices",
        "frequency_results",
        "instruments",
        "points",
        "reference_traces",
        "runs",
    ] {
        assert!(
            tables.iter().any(|t| t == expected),
            "{expected} missing from {tables:?}"
        );
    }

    let journal_mode: String = sqlx::query_scalar("PRAGMA journal_mode")
        .fetch_one(store.pool().as_sqlite().unwrap())
        .await
        .unwrap();
    assert_eq!(journal_mode.to_lowercase(), "wal");
    let foreign_keys: i64 = sqlx::query_scalar("PRAGMA foreign_keys")
        .fetch_one(store.pool().as_sqlite().unwrap())
        .await
        .unwrap();
    assert_eq!(foreign_keys, 1);
    let busy_timeout_ms: i64 = sqlx::query_scalar("PRAGMA busy_timeout")
        .fetch_one(store.pool().as_sqlite().unwrap())
        .await
        .unwrap();
    assert_eq!(busy_timeout_ms, 5_000);

    // Opening again applies nothing twice.
    store.close().await;
    let again = Store::open(&format!("sqlite://{path}")).await.unwrap();
    let applied: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM _sqlx_migrations")
        .fetch_one(again.pool().as_sqlite().unwrap())
        .await
        .unwrap();
    // One row per migration file (the API's token table is 0002), each applied once.
    let migration_files = std::fs::read_dir(concat!(env!("CARGO_MANIFEST_DIR"), "/../migrations"))
        .unwrap()
        .filter(|e| {
            e.as_ref()
                .is_ok_and(|e| e.path().extension().is_some_and(|x| x == "sql"))
        })
        .count();
    assert_eq!(applied, i64::try_from(migration_files).unwrap());
    // Migration 0003 moved the point trace into the point row.
    assert!(!tables.iter().any(|t| t == "point_traces"));
}

async fn foreign_keys_are_enforced(store: Store) {
    let trace = small_trace();
    let err = store
        .commit_point(&point(999, 0, 0, &trace))
        .await
        .unwrap_err();
    assert!(matches!(err, StoreError::NotFound { .. }), "{err}");
    let raw = halfwave::on_pool!(store.pool(), pool => sqlx::query("INSERT INTO points (run_id, frequency_index, level_index, frequency_hz, generator_level_dbm, level_at_modulator_dbm, v_peak_volts, line_table_json, analysis_json, measured_at_unix_ms) VALUES (42, 0, 0, 1, 0, 0, 1, '[]', '{}', 0)")
        .execute(pool)
        .await
        .map(|_| ()));
    assert!(raw.is_err(), "a point of a missing run must be refused");
}

#[tokio::test]
async fn committed_point_survives_dropping_the_pool_and_reopening() {
    let dir = TempDir::new("crash");
    let path = dir.file("halfwave.db");
    let trace = small_trace();
    let (run_id, point_id) = {
        let store = Store::open(&path).await.unwrap();
        let run = running_run(&store, "DEMO-0001").await;
        let point_id = store
            .commit_point(&point(run.id, 0, 0, &trace))
            .await
            .unwrap();
        // No close(): the pool is dropped as a killed daemon would leave it.
        (run.id, point_id)
    };

    let store = Store::open(&path).await.unwrap();
    let points = store.points_of_run(run_id).await.unwrap();
    assert_eq!(points.len(), 1);
    assert_eq!(points[0].id, point_id);
    assert_eq!(points[0].v_peak_volts, 3.162);
    let stored_trace = store.point_trace(point_id).await.unwrap();
    assert_eq!(stored_trace.len(), trace.len());
    assert_eq!(stored_trace.power_dbm()[200], -3.0);
}

#[tokio::test]
async fn start_up_recovery_interrupts_running_runs_and_keeps_their_points() {
    let dir = TempDir::new("recovery");
    let path = dir.file("halfwave.db");
    let trace = small_trace();
    let (running_id, queued_id) = {
        let store = Store::open(&path).await.unwrap();
        let running = running_run(&store, "DEMO-0002").await;
        for (f, l) in [(0, 0), (0, 1), (1, 0)] {
            store
                .commit_point(&point(running.id, f, l, &trace))
                .await
                .unwrap();
        }
        let queued = store_support::queued_run(&store, "DEMO-0003").await;
        (running.id, queued.id)
    };

    let store = Store::open(&path).await.unwrap();
    let interrupted = store.mark_running_as_interrupted().await.unwrap();
    assert_eq!(interrupted, vec![running_id]);
    let run = store.run(running_id).await.unwrap();
    assert_eq!(run.state, RunState::Interrupted);
    assert!(run.cause.as_deref().unwrap_or("").contains("resume"));
    assert_eq!(store.run(queued_id).await.unwrap().state, RunState::Queued);
    assert_eq!(store.points_of_run(running_id).await.unwrap().len(), 3);
    let done = store.stored_point_indices(running_id).await.unwrap();
    assert_eq!(done.len(), 3);
    assert!(done.contains(&(0, 0)) && done.contains(&(0, 1)) && done.contains(&(1, 0)));
    assert!(!done.contains(&(1, 1)));
    // A second start-up finds nothing left running.
    assert!(store
        .mark_running_as_interrupted()
        .await
        .unwrap()
        .is_empty());

    let log = store.audit_log(10, None).await.unwrap();
    assert!(log
        .iter()
        .any(|e| e.action == "run.interrupted" && e.subject == format!("run:{running_id}")));

    // The resume: interrupted -> running keeps the start time and clears the cause.
    let resumed = store
        .transition_run(running_id, RunState::Running, None)
        .await
        .unwrap();
    assert_eq!(resumed.started_at_unix_ms, run.started_at_unix_ms);
    assert_eq!(resumed.cause, None);
}

async fn a_point_cannot_be_stored_twice(store: Store) {
    let trace = small_trace();
    let run = running_run(&store, "DEMO-0004").await;
    store
        .commit_point(&point(run.id, 2, 3, &trace))
        .await
        .unwrap();
    let err = store
        .commit_point(&point(run.id, 2, 3, &trace))
        .await
        .unwrap_err();
    assert!(
        matches!(
            err,
            StoreError::DuplicatePoint {
                frequency_index: 2,
                level_index: 3,
                ..
            }
        ),
        "{err}"
    );
    // The failed commit left no second point (and so no second trace).
    assert_eq!(store.points_of_run(run.id).await.unwrap().len(), 1);
    let traces: i64 = halfwave::on_pool!(store.pool(), pool => sqlx::query_scalar(
        "SELECT COUNT(*) FROM points WHERE trace_encoded IS NOT NULL",
    )
    .fetch_one(pool)
    .await)
    .unwrap();
    assert_eq!(traces, 1);
}

async fn run_states_follow_the_allowed_edges(store: Store) {
    let run = store_support::queued_run(&store, "DEMO-0005").await;
    let err = store
        .transition_run(run.id, RunState::Completed, None)
        .await
        .unwrap_err();
    assert!(matches!(
        err,
        StoreError::InvalidTransition {
            from: RunState::Queued,
            to: RunState::Completed,
            ..
        }
    ));
    let running = store
        .transition_run(run.id, RunState::Running, None)
        .await
        .unwrap();
    assert!(running.started_at_unix_ms.is_some());
    assert!(running.finished_at_unix_ms.is_none());
    let failed = store
        .transition_run(run.id, RunState::Failed, Some("analyzer stopped answering"))
        .await
        .unwrap();
    assert!(failed.finished_at_unix_ms.is_some());
    assert_eq!(failed.cause.as_deref(), Some("analyzer stopped answering"));
    assert!(store
        .transition_run(run.id, RunState::Running, None)
        .await
        .is_err());
    assert!(matches!(
        store.transition_run(12345, RunState::Running, None).await,
        Err(StoreError::NotFound { .. })
    ));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn engine_writes_and_api_writes_interleave_without_lock_errors() {
    // The engine commits points while the API queues runs, moves their states and lists them, all
    // on one file database through the pool: none of it may fail with "database is locked".
    let dir = TempDir::new("concurrent");
    let store = Store::open(&dir.file("halfwave.db")).await.unwrap();
    let run = running_run(&store, "DEMO-0600").await;
    let trace = small_trace();

    let engine = {
        let store = store.clone();
        let trace = trace.clone();
        tokio::spawn(async move {
            for level in 0..150u32 {
                store
                    .commit_point(&point(run.id, level % 3, level, &trace))
                    .await
                    .unwrap();
            }
        })
    };
    let api = {
        let store = store.clone();
        tokio::spawn(async move {
            for _ in 0..30 {
                let queued = store_support::queued_run(&store, "DEMO-0601").await;
                store
                    .transition_run(queued.id, RunState::Cancelled, Some("operator cancelled"))
                    .await
                    .unwrap();
                store
                    .list_runs(&halfwave::store::RunFilter::default())
                    .await
                    .unwrap();
            }
        })
    };
    engine.await.unwrap();
    api.await.unwrap();
    assert_eq!(store.points_of_run(run.id).await.unwrap().len(), 150);
    let cancelled = store
        .list_runs(&halfwave::store::RunFilter {
            state: Some(RunState::Cancelled),
            ..Default::default()
        })
        .await
        .unwrap();
    assert_eq!(cancelled.total, 30);
}

#[tokio::test]
async fn migration_0003_moves_existing_point_traces_into_the_point_rows() {
    // A database made by the first schema alone, holding one point with its trace in the old
    // `point_traces` table, must open with the trace intact.
    let dir = TempDir::new("migrate-0003");
    let first_only = dir.0.join("first-migration-only");
    std::fs::create_dir_all(&first_only).unwrap();
    let migrations = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../migrations");
    std::fs::copy(
        migrations.join("0001_initial_schema.sql"),
        first_only.join("0001_initial_schema.sql"),
    )
    .unwrap();
    let path = dir.file("old.db");
    let trace = small_trace();
    {
        let options = sqlx::sqlite::SqliteConnectOptions::new()
            .filename(&path)
            .create_if_missing(true)
            .foreign_keys(true);
        let pool = sqlx::sqlite::SqlitePoolOptions::new()
            .max_connections(1)
            .connect_with(options)
            .await
            .unwrap();
        sqlx::migrate::Migrator::new(first_only.as_path())
            .await
            .unwrap()
            .run(&pool)
            .await
            .unwrap();
        for statement in [
            "INSERT INTO devices (id, serial, model, rf_input_limit_dbm, wavelength_nm, created_at_unix_ms, updated_at_unix_ms) VALUES (1, 'DEMO-0700', 'demo', 27, 1550, 0, 0)",
            "INSERT INTO chain_calibrations (id, name, version, created_at_unix_ms, created_by) VALUES (1, 'c', 1, 0, 't')",
            "INSERT INTO runs (id, plan_json, device_id, bench_name, chain_calibration_id, state, submitted_by, created_at_unix_ms) VALUES (1, '{}', 1, 'b', 1, 'running', 't', 0)",
            "INSERT INTO points (id, run_id, frequency_index, level_index, frequency_hz, generator_level_dbm, level_at_modulator_dbm, v_peak_volts, line_table_json, analysis_json, measured_at_unix_ms) VALUES (7, 1, 0, 0, 1e10, 0, 20, 3.162, '[]', '{}', 0)",
        ] {
            sqlx::query(statement).execute(&pool).await.unwrap();
        }
        sqlx::query("INSERT INTO point_traces (point_id, point_count, encoded) VALUES (7, $1, $2)")
            .bind(trace.len() as i64)
            .bind(halfwave::store::trace_codec::encode(&trace).unwrap())
            .execute(&pool)
            .await
            .unwrap();
        pool.close().await;
    }

    let store = Store::open(&path).await.unwrap();
    let moved = store.point_trace(7).await.unwrap();
    assert_eq!(moved.len(), trace.len());
    assert_eq!(moved.power_dbm()[200], -3.0);
    assert_eq!(moved.frequency_hz()[0], trace.frequency_hz()[0]);
}

async fn bench_leases_are_taken_refused_and_taken_over(store: Store) {
    use halfwave::store::leases::{LeaseHolder, LeaseTaken};
    let holder = |name: &str, pid: i64| LeaseHolder {
        holder: format!("{name}-holder"),
        host: format!("{name}-pc"),
        pid,
        listen: "127.0.0.1:8440".to_string(),
    };
    let (a, b) = (holder("lab-a", 101), holder("lab-b", 202));
    let benches = ["north-bench".to_string(), "south-bench".to_string()];
    // A long expiry while the refusal is checked (a slow write on a busy machine must not let
    // the lease lapse first); the heartbeat below shortens it for the take-over.
    let taken = store.take_bench_leases(&a, &benches, 60_000).await.unwrap();
    assert!(
        taken.iter().all(|t| matches!(t, LeaseTaken::Fresh { .. })),
        "{taken:?}"
    );
    // All or none: B asking for one held bench and one free bench gets neither.
    let refused = store
        .take_bench_leases(
            &b,
            &["south-bench".to_string(), "east-bench".to_string()],
            60_000,
        )
        .await
        .unwrap_err();
    let text = refused.to_string();
    assert!(
        text.contains("\"south-bench\" is held by") && text.contains("pid 101 on host lab-a-pc"),
        "{text}"
    );
    assert!(store.bench_lease("east-bench").await.unwrap().is_none());
    // A heartbeat renews both; past the expiry without one, B takes them over.
    assert_eq!(store.renew_bench_leases(&a.holder, 300).await.unwrap(), 2);
    tokio::time::sleep(std::time::Duration::from_millis(450)).await;
    let lease = store.bench_lease("north-bench").await.unwrap().unwrap();
    assert!(!lease.is_live(), "{lease:?}");
    let taken = store.take_bench_leases(&b, &benches, 300).await.unwrap();
    assert!(
        taken
            .iter()
            .all(|t| matches!(t, LeaseTaken::TakenOver { previous } if previous.holder.pid == 101)),
        "{taken:?}"
    );
    // The old holder's heartbeat now finds nothing (it must stop); B releases on shutdown.
    assert_eq!(store.renew_bench_leases(&a.holder, 300).await.unwrap(), 0);
    assert_eq!(store.release_bench_leases(&b.holder).await.unwrap(), 2);
    assert!(store.bench_lease("north-bench").await.unwrap().is_none());
    let audit = store.audit_log(10, None).await.unwrap();
    assert_eq!(
        audit
            .iter()
            .filter(|e| e.action == "bench.lease_taken_over")
            .count(),
        2
    );
}

async fn webhook_deliveries_claimed_by_two_senders_at_once_go_to_one_each(store: Store) {
    use halfwave::store::{now_unix_ms, NewWebhookDelivery};
    let url = "http://127.0.0.1:9/receiver".to_string();
    let ids: Vec<String> = (0..24).map(|i| format!("event-{i:02}")).collect();
    let rows: Vec<NewWebhookDelivery> = ids
        .iter()
        .map(|id| NewWebhookDelivery {
            event_id: id,
            event_type: "run.completed",
            url: &url,
            body: "{}",
        })
        .collect();
    store.add_webhook_deliveries(&rows).await.unwrap();
    // Two senders (two daemons' stores on one database behave alike: the claim is one
    // conditional UPDATE) read and claim the same due rows at the same time, in small batches.
    let urls = vec![url.clone()];
    let sender = |store: Store, urls: Vec<String>| async move {
        let mut got = Vec::new();
        loop {
            let now = now_unix_ms();
            let due = store.due_webhook_deliveries(now, &urls, 5).await.unwrap();
            if due.is_empty() {
                return got;
            }
            for row in due {
                let until = now + 60_000;
                if store
                    .claim_webhook_delivery(row.id, row.next_attempt_at_unix_ms, until)
                    .await
                    .unwrap()
                {
                    got.push(row.event_id);
                }
            }
            tokio::task::yield_now().await;
        }
    };
    let (first, second) = tokio::join!(
        tokio::spawn(sender(store.clone(), urls.clone())),
        tokio::spawn(sender(store.clone(), urls.clone()))
    );
    let (first, second) = (first.unwrap(), second.unwrap());
    let mut all: Vec<String> = first.iter().chain(&second).cloned().collect();
    all.sort();
    assert_eq!(
        all, ids,
        "each row claimed exactly once: {first:?} / {second:?}"
    );
}

async fn recovery_limited_to_named_benches_leaves_other_benches_running(store: Store) {
    let run = running_run(&store, "EG-PM-0303").await;
    // The run is on "bench-north" (store_support); another daemon's recovery leaves it alone.
    let none = store
        .mark_running_as_interrupted_on(Some(&["bench-south".to_string()]))
        .await
        .unwrap();
    assert!(none.is_empty());
    assert_eq!(store.run(run.id).await.unwrap().state, RunState::Running);
    let mine = store
        .mark_running_as_interrupted_on(Some(&["bench-north".to_string()]))
        .await
        .unwrap();
    assert_eq!(mine, vec![run.id]);
    assert_eq!(
        store.run(run.id).await.unwrap().state,
        RunState::Interrupted
    );
}

on_both_backends!(
    webhook_deliveries_claimed_by_two_senders_at_once_go_to_one_each,
    bench_leases_are_taken_refused_and_taken_over,
    recovery_limited_to_named_benches_leaves_other_benches_running,
    foreign_keys_are_enforced,
    a_point_cannot_be_stored_twice,
    run_states_follow_the_allowed_edges,
);
