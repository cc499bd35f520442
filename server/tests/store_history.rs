//! A device's V_pi record: history, the latest V_pi at a frequency by interpolation, and two runs
//! compared. Expected values are worked by hand in the comments.

mod store_support;

use halfwave::store::{RunState, Store, StoreError};
use halfwave::units::Hz;
use store_support::{queued_run, result};

/// A run of `serial` taken to `end` with the given (frequency GHz, V_pi V, uncertainty V) results.
async fn finished_run(
    store: &Store,
    serial: &str,
    end: RunState,
    results: &[(f64, f64, f64)],
) -> i64 {
    let run = queued_run(store, serial).await;
    store
        .transition_run(run.id, RunState::Running, None)
        .await
        .unwrap();
    for (index, &(ghz, v_pi, u)) in results.iter().enumerate() {
        store
            .save_frequency_result(&result(run.id, index as u32, ghz, v_pi, u))
            .await
            .unwrap();
    }
    store.transition_run(run.id, end, None).await.unwrap();
    run.id
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() < 1e-12
}

#[tokio::test]
async fn latest_vpi_is_interpolated_from_the_newest_completed_run() {
    let store = Store::open_in_memory().await.unwrap();
    // An older completed run with other values: must not be used.
    finished_run(
        &store,
        "DEMO-0400",
        RunState::Completed,
        &[(10.0, 3.0, 0.03), (30.0, 6.0, 0.3)],
    )
    .await;
    let newest = finished_run(
        &store,
        "DEMO-0400",
        RunState::Completed,
        &[(30.0, 7.0, 0.20), (10.0, 4.0, 0.04), (20.0, 5.0, 0.10)],
    )
    .await;
    // A later failed run with results: not a calibration, must not be used either.
    finished_run(&store, "DEMO-0400", RunState::Failed, &[(10.0, 9.0, 0.1)]).await;

    // Hand-worked: 12.5 GHz lies between 10 GHz (4.00 V +- 0.04 V) and 20 GHz (5.00 V +- 0.10 V).
    // t = (12.5 - 10) / (20 - 10) = 0.25
    // V_pi = 4.00 + 0.25 * (5.00 - 4.00) = 4.25 V
    // u    = 0.04 + 0.25 * (0.10 - 0.04) = 0.04 + 0.015 = 0.055 V
    let at = store
        .latest_vpi_at("DEMO-0400", Hz::from_ghz(12.5))
        .await
        .unwrap();
    assert_eq!(at.run_id, newest);
    assert!(close(at.v_pi_volts.value(), 4.25), "{at:?}");
    assert!(close(at.v_pi_uncertainty_volts.value(), 0.055), "{at:?}");
    assert_eq!(at.lower_frequency_hz, Hz::from_ghz(10.0));
    assert_eq!(at.upper_frequency_hz, Hz::from_ghz(20.0));

    // Hand-worked: 26 GHz between 20 GHz (5.00 V +- 0.10 V) and 30 GHz (7.00 V +- 0.20 V).
    // t = 6 / 10 = 0.6; V_pi = 5.00 + 0.6 * 2.00 = 6.20 V; u = 0.10 + 0.6 * 0.10 = 0.16 V
    let at = store
        .latest_vpi_at("DEMO-0400", Hz::from_ghz(26.0))
        .await
        .unwrap();
    assert!(close(at.v_pi_volts.value(), 6.2), "{at:?}");
    assert!(close(at.v_pi_uncertainty_volts.value(), 0.16), "{at:?}");

    // At a measured frequency the measured value comes back as it is.
    let at = store
        .latest_vpi_at("DEMO-0400", Hz::from_ghz(20.0))
        .await
        .unwrap();
    assert_eq!(
        (at.v_pi_volts.value(), at.v_pi_uncertainty_volts.value()),
        (5.0, 0.1)
    );
    let edge = store
        .latest_vpi_at("DEMO-0400", Hz::from_ghz(30.0))
        .await
        .unwrap();
    assert_eq!(edge.v_pi_volts.value(), 7.0);

    for outside_ghz in [9.999, 30.001] {
        let err = store
            .latest_vpi_at("DEMO-0400", Hz::from_ghz(outside_ghz))
            .await
            .unwrap_err();
        match err {
            StoreError::OutsideMeasuredRange {
                run_id,
                min_hz,
                max_hz,
                ..
            } => {
                assert_eq!(run_id, newest);
                assert_eq!((min_hz, max_hz), (10e9, 30e9));
            }
            other => panic!("expected an out-of-range error, got {other}"),
        }
    }
}

#[tokio::test]
async fn latest_vpi_needs_a_completed_run() {
    let store = Store::open_in_memory().await.unwrap();
    finished_run(
        &store,
        "DEMO-0401",
        RunState::Cancelled,
        &[(10.0, 4.0, 0.1)],
    )
    .await;
    assert!(matches!(
        store.latest_vpi_at("DEMO-0401", Hz::from_ghz(10.0)).await,
        Err(StoreError::NoCompletedRun { .. })
    ));
    assert!(matches!(
        store.latest_vpi_at("DEMO-0499", Hz::from_ghz(10.0)).await,
        Err(StoreError::NotFound { .. })
    ));
}

#[tokio::test]
async fn history_lists_completed_runs_newest_first() {
    let store = Store::open_in_memory().await.unwrap();
    let older = finished_run(
        &store,
        "DEMO-0402",
        RunState::Completed,
        &[(20.0, 5.1, 0.1), (10.0, 4.1, 0.1)],
    )
    .await;
    finished_run(&store, "DEMO-0402", RunState::Failed, &[(10.0, 8.0, 0.1)]).await;
    let newer = finished_run(
        &store,
        "DEMO-0402",
        RunState::Completed,
        &[(10.0, 4.0, 0.1)],
    )
    .await;
    let history = store.vpi_history("DEMO-0402").await.unwrap();
    let rows: Vec<(i64, f64)> = history.iter().map(|h| (h.run_id, h.frequency_hz)).collect();
    assert_eq!(rows, vec![(newer, 10e9), (older, 10e9), (older, 20e9)]);
}

#[tokio::test]
async fn two_runs_compare_per_frequency() {
    let store = Store::open_in_memory().await.unwrap();
    let a = finished_run(
        &store,
        "DEMO-0403",
        RunState::Completed,
        &[(10.0, 4.0, 0.1), (20.0, 5.0, 0.1), (30.0, 7.0, 0.1)],
    )
    .await;
    let b = finished_run(
        &store,
        "DEMO-0403",
        RunState::Completed,
        &[(10.0, 4.2, 0.1), (20.0, 4.9, 0.1), (40.0, 8.0, 0.1)],
    )
    .await;
    let comparison = store.compare_runs(a, b).await.unwrap();
    assert_eq!((comparison.run_a, comparison.run_b), (a, b));
    let rows = &comparison.rows;
    assert_eq!(rows.len(), 4);
    // 10 GHz: 100 * (4.2 - 4.0) / 4.0 = +5 %
    assert_eq!(rows[0].frequency_hz, 10e9);
    assert!((rows[0].difference_percent.unwrap() - 5.0).abs() < 1e-9);
    // 20 GHz: 100 * (4.9 - 5.0) / 5.0 = -2 %
    assert!((rows[1].difference_percent.unwrap() + 2.0).abs() < 1e-9);
    // 30 GHz only in A, 40 GHz only in B: no difference.
    assert_eq!(rows[2].frequency_hz, 30e9);
    assert_eq!(
        (rows[2].v_pi_a_volts, rows[2].v_pi_b_volts),
        (Some(7.0), None)
    );
    assert_eq!(rows[2].difference_percent, None);
    assert_eq!(rows[3].frequency_hz, 40e9);
    assert_eq!(
        (rows[3].v_pi_a_volts, rows[3].v_pi_b_volts),
        (None, Some(8.0))
    );

    assert!(matches!(
        store.compare_runs(a, 9999).await,
        Err(StoreError::NotFound { .. })
    ));
}

#[tokio::test]
async fn run_detail_holds_points_and_results() {
    let store = Store::open_in_memory().await.unwrap();
    let run = store_support::running_run(&store, "DEMO-0404").await;
    let trace = store_support::small_trace();
    for (f, l) in [(1, 1), (0, 1), (0, 0)] {
        store
            .commit_point(&store_support::point(run.id, f, l, &trace))
            .await
            .unwrap();
    }
    store
        .save_frequency_result(&result(run.id, 0, 10.0, 4.0, 0.1))
        .await
        .unwrap();
    let detail = store.run_detail(run.id).await.unwrap();
    assert_eq!(detail.run.id, run.id);
    let order: Vec<(u32, u32)> = detail
        .points
        .iter()
        .map(|p| (p.frequency_index, p.level_index))
        .collect();
    assert_eq!(order, vec![(0, 0), (0, 1), (1, 1)]);
    assert_eq!(detail.results.len(), 1);
}
