//! Devices, instruments, versioned chain calibrations, run listing, reference traces and
//! per-frequency results.

#[macro_use]
mod store_support;

use halfwave::store::{ChainCalibrationPoint, RunFilter, RunState, Store, StoreError};
use halfwave::units::{Db, Dbm, Hz};
use halfwave_drivers::Identity;
use store_support::{demo_device, queued_run, result, small_trace};

async fn device_upsert_keeps_one_row_per_serial(store: Store) {
    let first = store
        .upsert_device(&demo_device("DEMO-0100"))
        .await
        .unwrap();
    let mut changed = demo_device("DEMO-0100");
    changed.rf_input_limit = Dbm(24.0);
    let second = store.upsert_device(&changed).await.unwrap();
    assert_eq!(first.id, second.id);
    assert_eq!(second.rf_input_limit(), Dbm(24.0));
    assert_eq!(store.devices().await.unwrap().len(), 1);
    assert!(matches!(
        store.device_by_serial("DEMO-9999").await,
        Err(StoreError::NotFound { .. })
    ));
    let mut blank = demo_device("  ");
    blank.model = "x".into();
    assert!(matches!(
        store.upsert_device(&blank).await,
        Err(StoreError::InvalidInput { .. })
    ));
}

async fn instruments_are_recorded_per_identity_and_resource(store: Store) {
    let identity = Identity {
        manufacturer: "Demo Instruments Lab".into(),
        model: "OSA-1".into(),
        serial: "SN-000123".into(),
        firmware: "1.0.4".into(),
    };
    let first = store
        .record_instrument_seen(&identity, "TCPIP::10.0.0.7::5025::SOCKET")
        .await
        .unwrap();
    let again = store
        .record_instrument_seen(&identity, "TCPIP::10.0.0.7::5025::SOCKET")
        .await
        .unwrap();
    assert_eq!(first.id, again.id);
    assert_eq!(again.first_seen_unix_ms, first.first_seen_unix_ms);
    assert!(again.last_seen_unix_ms >= first.last_seen_unix_ms);
    let upgraded = Identity {
        firmware: "1.1.0".into(),
        ..identity
    };
    let new_row = store
        .record_instrument_seen(&upgraded, "TCPIP::10.0.0.7::5025::SOCKET")
        .await
        .unwrap();
    assert_ne!(new_row.id, first.id);
    assert_eq!(store.instruments().await.unwrap().len(), 2);
}

async fn chain_calibrations_are_versioned_and_never_edited(store: Store) {
    let v1_points = [
        ChainCalibrationPoint::new(Hz::from_ghz(20.0), Db(17.0)),
        ChainCalibrationPoint::new(Hz::from_ghz(1.0), Db(21.0)),
    ];
    let v1 = store
        .create_chain_calibration("bench-south chain", "operator-b", &v1_points)
        .await
        .unwrap();
    assert_eq!(v1.version, 1);
    // Stored sorted by frequency.
    assert_eq!(v1.points[0].frequency(), Hz::from_ghz(1.0));

    let v2 = store
        .create_chain_calibration(
            "bench-south chain",
            "operator-c",
            &[ChainCalibrationPoint::new(Hz::from_ghz(1.0), Db(19.5))],
        )
        .await
        .unwrap();
    assert_eq!(v2.version, 2);
    assert_ne!(v2.id, v1.id);

    let by_version = store
        .chain_calibration_version("bench-south chain", 1)
        .await
        .unwrap();
    assert_eq!(by_version.id, v1.id);
    assert!(matches!(
        store
            .chain_calibration_version("bench-south chain", 3)
            .await,
        Err(StoreError::NotFound { .. })
    ));
    let v1_again = store.chain_calibration(v1.id).await.unwrap();
    assert_eq!(v1_again, v1, "version 1 must be unchanged");
    let latest = store
        .latest_chain_calibration("bench-south chain")
        .await
        .unwrap();
    assert_eq!(latest.version, 2);
    assert_eq!(latest.points[0].gain(), Db(19.5));

    let other = store
        .create_chain_calibration(
            "bench-west chain",
            "operator-b",
            &[ChainCalibrationPoint::new(Hz::from_ghz(1.0), Db(0.0))],
        )
        .await
        .unwrap();
    assert_eq!(other.version, 1);
    assert_eq!(store.chain_calibrations().await.unwrap().len(), 3);

    // The table cannot be changed in place through the key either.
    let clash = halfwave::on_pool!(store.pool(), pool => sqlx::query("INSERT INTO chain_calibrations (name, version, created_at_unix_ms, created_by) VALUES ('bench-south chain', 1, 0, 'x')")
        .execute(pool)
        .await
        .map(|_| ()));
    assert!(clash.is_err());

    for bad in [
        vec![],
        vec![ChainCalibrationPoint::new(Hz(f64::NAN), Db(1.0))],
        vec![ChainCalibrationPoint::new(Hz(-1.0), Db(1.0))],
        vec![
            ChainCalibrationPoint::new(Hz(1e9), Db(1.0)),
            ChainCalibrationPoint::new(Hz(1e9), Db(2.0)),
        ],
    ] {
        assert!(matches!(
            store.create_chain_calibration("bad", "x", &bad).await,
            Err(StoreError::InvalidInput { .. })
        ));
    }
    // A flat gain is one point at 0 Hz.
    let flat = store
        .create_chain_calibration(
            "flat-loss-6.00dB",
            "halfwave",
            &[ChainCalibrationPoint::new(Hz(0.0), Db(-6.0))],
        )
        .await
        .unwrap();
    assert_eq!(flat.points.len(), 1);
    let uploads = store.audit_log(100, None).await.unwrap();
    assert_eq!(
        uploads
            .iter()
            .filter(|e| e.action == "chain_calibration.create")
            .count(),
        4
    );
}

async fn runs_list_newest_first_with_filters_and_pages(store: Store) {
    let mut ids = Vec::new();
    for serial in ["DEMO-0200", "DEMO-0201", "DEMO-0200", "DEMO-0200"] {
        ids.push(queued_run(&store, serial).await.id);
    }
    store
        .transition_run(ids[2], RunState::Running, None)
        .await
        .unwrap();

    let all = store.list_runs(&RunFilter::default()).await.unwrap();
    assert_eq!(all.total, 4);
    let listed: Vec<i64> = all.runs.iter().map(|r| r.id).collect();
    assert_eq!(listed, vec![ids[3], ids[2], ids[1], ids[0]]);

    let device_page = store
        .list_runs(&RunFilter {
            device_serial: Some("DEMO-0200".into()),
            limit: 2,
            offset: 0,
            ..RunFilter::default()
        })
        .await
        .unwrap();
    assert_eq!(device_page.total, 3);
    assert_eq!(
        device_page.runs.iter().map(|r| r.id).collect::<Vec<_>>(),
        vec![ids[3], ids[2]]
    );
    let next_page = store
        .list_runs(&RunFilter {
            device_serial: Some("DEMO-0200".into()),
            limit: 2,
            offset: 2,
            ..RunFilter::default()
        })
        .await
        .unwrap();
    assert_eq!(
        next_page.runs.iter().map(|r| r.id).collect::<Vec<_>>(),
        vec![ids[0]]
    );

    let running = store
        .list_runs(&RunFilter {
            state: Some(RunState::Running),
            ..RunFilter::default()
        })
        .await
        .unwrap();
    assert_eq!(running.runs.len(), 1);
    assert_eq!(running.runs[0].id, ids[2]);
    assert_eq!(running.runs[0].device_serial, "DEMO-0200");

    let created = store.run(ids[1]).await.unwrap().created_at_unix_ms;
    let by_device_id = store
        .list_runs(&RunFilter {
            device_id: Some(store.device_by_serial("DEMO-0201").await.unwrap().id),
            created_from_unix_ms: Some(created),
            created_before_unix_ms: Some(created + 1),
            ..RunFilter::default()
        })
        .await
        .unwrap();
    assert_eq!(by_device_id.runs.len(), 1);
    let empty = store
        .list_runs(&RunFilter {
            created_before_unix_ms: Some(0),
            ..RunFilter::default()
        })
        .await
        .unwrap();
    assert_eq!(empty.total, 0);
    assert!(matches!(
        store
            .list_runs(&RunFilter {
                limit: 0,
                ..RunFilter::default()
            })
            .await,
        Err(StoreError::InvalidInput { .. })
    ));

    let plan = store.run(ids[0]).await.unwrap().plan().unwrap();
    assert_eq!(plan["levels_dbm"][1], 3.0);
}

async fn reference_traces_and_results_replace_on_retake(store: Store) {
    let run = queued_run(&store, "DEMO-0300").await;
    let trace = small_trace();
    store
        .store_reference_trace(run.id, 0, Hz::from_ghz(10.0), &trace)
        .await
        .unwrap();
    store
        .store_reference_trace(run.id, 0, Hz::from_ghz(10.0), &trace)
        .await
        .unwrap();
    store
        .store_reference_trace(run.id, 1, Hz::from_ghz(20.0), &trace)
        .await
        .unwrap();
    let references = store.reference_traces(run.id).await.unwrap();
    assert_eq!(references.len(), 2);
    assert_eq!(references[1].frequency_index, 1);
    assert_eq!(references[0].trace.len(), trace.len());
    // One frequency's reference alone (the point trace route's `kind=reference`).
    let one = store.reference_trace(run.id, 1).await.unwrap();
    assert_eq!(one.as_ref(), Some(&references[1].trace));
    assert!(store.reference_trace(run.id, 2).await.unwrap().is_none());

    store
        .save_frequency_result(&result(run.id, 0, 10.0, 4.0, 0.05))
        .await
        .unwrap();
    let refit = store
        .save_frequency_result(&result(run.id, 0, 10.0, 4.1, 0.04))
        .await
        .unwrap();
    let results = store.frequency_results(run.id).await.unwrap();
    assert_eq!(results.len(), 1);
    assert_eq!(results[0], refit);
    assert_eq!(results[0].v_pi_volts, 4.1);
    assert!(matches!(
        store
            .save_frequency_result(&result(run.id, 1, 20.0, -1.0, 0.1))
            .await,
        Err(StoreError::InvalidInput { .. })
    ));
    assert!(matches!(
        store
            .save_frequency_result(&result(777, 0, 10.0, 4.0, 0.1))
            .await,
        Err(StoreError::NotFound { .. })
    ));
}

async fn a_runs_software_versions_are_kept_in_the_order_they_executed_it(store: Store) {
    let run = queued_run(&store, "DEMO-0300").await;
    // Queued without a record (as runs before migration 0011 were): nothing is claimed.
    assert_eq!(run.software_version, None);
    assert_eq!(run.analysis_method, None);
    assert_eq!(run.submitted_by_token_id, None);
    // First start: set. Restarted by the same version: unchanged.
    for _ in 0..2 {
        store
            .record_run_software(run.id, "halfwave 0.1.0", "fit v1")
            .await
            .unwrap();
    }
    let started = store.run(run.id).await.unwrap();
    assert_eq!(started.software_version.as_deref(), Some("halfwave 0.1.0"));
    assert_eq!(started.analysis_method.as_deref(), Some("fit v1"));
    // Resumed by a newer daemon with the same method, then by one with a new method.
    store
        .record_run_software(run.id, "halfwave 0.2.0", "fit v1")
        .await
        .unwrap();
    store
        .record_run_software(run.id, "halfwave 0.2.0", "fit v2")
        .await
        .unwrap();
    let resumed = store.run(run.id).await.unwrap();
    assert_eq!(
        resumed.software_version.as_deref(),
        Some("halfwave 0.1.0 then halfwave 0.2.0")
    );
    assert_eq!(
        resumed.analysis_method.as_deref(),
        Some("fit v1 then fit v2")
    );
    assert!(matches!(
        store.record_run_software(9999, "x", "y").await,
        Err(StoreError::NotFound { .. })
    ));
}

on_both_backends!(
    device_upsert_keeps_one_row_per_serial,
    instruments_are_recorded_per_identity_and_resource,
    chain_calibrations_are_versioned_and_never_edited,
    runs_list_newest_first_with_filters_and_pages,
    reference_traces_and_results_replace_on_retake,
    a_runs_software_versions_are_kept_in_the_order_they_executed_it,
);
