//! A device's V_pi record: history, V_pi at a frequency by interpolation (the lookup rule: the
//! pinned reference calibration, else the newest completed run covering the frequency), pinning
//! and unpinning, the run a device plot shows, and two runs compared. Expected values are worked
//! by hand in the comments.

#[macro_use]
mod store_support;

use halfwave::store::{RunSelection, RunState, Store, StoreError};
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

async fn vpi_is_interpolated_from_the_newest_completed_run_covering_it(store: Store) {
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
        .vpi_at("DEMO-0400", Hz::from_ghz(12.5), None)
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
        .vpi_at("DEMO-0400", Hz::from_ghz(26.0), None)
        .await
        .unwrap();
    assert!(close(at.v_pi_volts.value(), 6.2), "{at:?}");
    assert!(close(at.v_pi_uncertainty_volts.value(), 0.16), "{at:?}");

    // At a measured frequency the measured value comes back as it is.
    let at = store
        .vpi_at("DEMO-0400", Hz::from_ghz(20.0), None)
        .await
        .unwrap();
    assert_eq!(
        (at.v_pi_volts.value(), at.v_pi_uncertainty_volts.value()),
        (5.0, 0.1)
    );
    let edge = store
        .vpi_at("DEMO-0400", Hz::from_ghz(30.0), None)
        .await
        .unwrap();
    assert_eq!(edge.v_pi_volts.value(), 7.0);

    // Outside every completed run: refused, with each run's measured range named.
    for outside_ghz in [9.999, 30.001] {
        let err = store
            .vpi_at("DEMO-0400", Hz::from_ghz(outside_ghz), None)
            .await
            .unwrap_err();
        match &err {
            StoreError::NotCovered { ranges, .. } => {
                assert!(
                    ranges.contains(&format!("run {newest}: 10000000000 Hz to 30000000000 Hz")),
                    "{err}"
                );
            }
            other => panic!("expected an out-of-range error, got {other}"),
        }
    }
}

async fn latest_vpi_needs_a_completed_run(store: Store) {
    finished_run(
        &store,
        "DEMO-0401",
        RunState::Cancelled,
        &[(10.0, 4.0, 0.1)],
    )
    .await;
    assert!(matches!(
        store.vpi_at("DEMO-0401", Hz::from_ghz(10.0), None).await,
        Err(StoreError::NoCompletedRun { .. })
    ));
    assert!(matches!(
        store.vpi_at("DEMO-0499", Hz::from_ghz(10.0), None).await,
        Err(StoreError::NotFound { .. })
    ));
}

async fn a_quick_narrow_run_does_not_hide_an_older_wide_calibration(store: Store) {
    // The case from the issue: a 0.2-20 GHz calibration, then a quick 1-5 GHz check.
    let wide = finished_run(
        &store,
        "DEMO-0410",
        RunState::Completed,
        &[
            (0.2, 3.0, 0.01),
            (5.0, 4.0, 0.02),
            (10.0, 5.0, 0.03),
            (20.0, 6.0, 0.04),
        ],
    )
    .await;
    let quick = finished_run(
        &store,
        "DEMO-0410",
        RunState::Completed,
        &[(1.0, 3.5, 0.01), (5.0, 4.1, 0.02)],
    )
    .await;
    // 7.5 GHz is outside the quick check: the wide run answers, halfway between 5 GHz (4.0 V)
    // and 10 GHz (5.0 V): 4.5 V (worked by hand).
    let at = store
        .vpi_at("DEMO-0410", Hz::from_ghz(7.5), None)
        .await
        .unwrap();
    assert_eq!(at.run_id, wide);
    assert_eq!(at.selection, RunSelection::NewestCovering);
    assert!(!at.pinned);
    assert!(close(at.v_pi_volts.value(), 4.5), "{at:?}");
    // Inside it, the newest covering run is the quick check.
    let at = store
        .vpi_at("DEMO-0410", Hz::from_ghz(3.0), None)
        .await
        .unwrap();
    assert_eq!(at.run_id, quick);
    // A run named explicitly answers whatever the rule says, and only within its range.
    let at = store
        .vpi_at("DEMO-0410", Hz::from_ghz(3.0), Some(wide))
        .await
        .unwrap();
    assert_eq!((at.run_id, at.selection), (wide, RunSelection::Requested));
    let err = store
        .vpi_at("DEMO-0410", Hz::from_ghz(7.5), Some(quick))
        .await
        .unwrap_err();
    assert!(
        matches!(err, StoreError::OutsideMeasuredRange { run_id, .. } if run_id == quick),
        "{err}"
    );
    assert!(
        err.to_string().contains(&format!("run {wide} covers it")),
        "{err}"
    );
    assert!(matches!(
        store
            .vpi_at("DEMO-0410", Hz::from_ghz(3.0), Some(9999))
            .await,
        Err(StoreError::NotACalibration { run_id: 9999, .. })
    ));
}

async fn a_pinned_run_answers_until_it_is_unpinned(store: Store) {
    let reference = finished_run(
        &store,
        "DEMO-0411",
        RunState::Completed,
        &[(1.0, 3.0, 0.01), (10.0, 5.0, 0.05)],
    )
    .await;
    let newer = finished_run(
        &store,
        "DEMO-0411",
        RunState::Completed,
        &[(1.0, 3.2, 0.01), (20.0, 6.0, 0.05)],
    )
    .await;
    let failed = finished_run(&store, "DEMO-0411", RunState::Failed, &[(1.0, 3.0, 0.1)]).await;
    let foreign = finished_run(&store, "DEMO-0412", RunState::Completed, &[(1.0, 3.0, 0.1)]).await;
    // A completed run without results: nothing to refer to.
    let empty = finished_run(&store, "DEMO-0411", RunState::Completed, &[]).await;
    let before = store.completed_runs_fingerprint("DEMO-0411").await.unwrap();
    assert_eq!(before.pinned_run_id, 0);
    assert!(store.device_pin("DEMO-0411").await.unwrap().is_none());

    // Without a pin the newer run covers 5.5 GHz.
    let at = store
        .vpi_at("DEMO-0411", Hz::from_ghz(5.5), None)
        .await
        .unwrap();
    assert_eq!(at.run_id, newer);

    let change = store
        .pin_run("DEMO-0411", reference, "lab-b", "accredited calibration")
        .await
        .unwrap();
    assert_eq!(change.previous_run_id, None);
    assert_eq!(change.pinned.as_ref().unwrap().run_id, reference);
    assert_eq!(
        store
            .completed_runs_fingerprint("DEMO-0411")
            .await
            .unwrap()
            .pinned_run_id,
        reference
    );
    // Pinned: the reference answers although the newer run covers the frequency too.
    // 5.5 GHz is halfway between 1 GHz (3.0 V) and 10 GHz (5.0 V): 4.0 V (worked by hand).
    let at = store
        .vpi_at("DEMO-0411", Hz::from_ghz(5.5), None)
        .await
        .unwrap();
    assert_eq!(
        (at.run_id, at.selection, at.pinned),
        (reference, RunSelection::Pinned, true)
    );
    assert!(close(at.v_pi_volts.value(), 4.0), "{at:?}");
    // Outside the pinned run's range: refused, naming the run that would cover it.
    let err = store
        .vpi_at("DEMO-0411", Hz::from_ghz(15.0), None)
        .await
        .unwrap_err();
    let text = err.to_string();
    assert!(
        matches!(err, StoreError::OutsideMeasuredRange { run_id, .. } if run_id == reference),
        "{text}"
    );
    assert!(text.contains("pinned reference calibration"), "{text}");
    assert!(text.contains(&format!("run_id={newer}")), "{text}");
    // Asking for the newer run by id still works, and says it is not the pinned one.
    let at = store
        .vpi_at("DEMO-0411", Hz::from_ghz(15.0), Some(newer))
        .await
        .unwrap();
    assert_eq!((at.run_id, at.pinned), (newer, false));

    // Refused pins change nothing.
    for (run, expected) in [(failed, "failed"), (empty, "no V_pi results")] {
        let err = store
            .pin_run("DEMO-0411", run, "lab-b", "")
            .await
            .unwrap_err();
        assert!(matches!(err, StoreError::NotPinnable { .. }), "{err}");
        assert!(err.to_string().contains(expected), "{err}");
    }
    let err = store
        .pin_run("DEMO-0411", foreign, "lab-b", "")
        .await
        .unwrap_err();
    assert!(
        matches!(&err, StoreError::RunOfAnotherDevice { run_serial, .. } if run_serial == "DEMO-0412"),
        "{err}"
    );
    assert!(matches!(
        store.pin_run("DEMO-0411", 9999, "lab-b", "").await,
        Err(StoreError::NotFound { .. })
    ));
    assert!(matches!(
        store.pin_run("DEMO-0499", reference, "lab-b", "").await,
        Err(StoreError::NotFound { .. })
    ));
    assert_eq!(
        store.device_pin("DEMO-0411").await.unwrap().unwrap().run_id,
        reference
    );

    // Pinning another run replaces the pin; unpinning restores the newest-covering rule.
    let change = store
        .pin_run("DEMO-0411", newer, "lab-c", "")
        .await
        .unwrap();
    assert_eq!(change.previous_run_id, Some(reference));
    let change = store
        .unpin_device("DEMO-0411", "lab-c", "back to the rule")
        .await
        .unwrap();
    assert_eq!((change.previous_run_id, change.pinned), (Some(newer), None));
    assert!(matches!(
        store.unpin_device("DEMO-0411", "lab-c", "").await,
        Err(StoreError::NothingPinned { .. })
    ));
    let at = store
        .vpi_at("DEMO-0411", Hz::from_ghz(5.5), None)
        .await
        .unwrap();
    assert_eq!(
        (at.run_id, at.selection),
        (newer, RunSelection::NewestCovering)
    );

    // One audit entry per pin and unpin, with the actor, the device and the runs; none for the
    // refusals.
    let entries: Vec<_> = store
        .audit_log(100, None)
        .await
        .unwrap()
        .into_iter()
        .filter(|e| e.action.starts_with("device."))
        .collect();
    let summary: Vec<(&str, &str, &str)> = entries
        .iter()
        .rev()
        .map(|e| (e.action.as_str(), e.actor.as_str(), e.subject.as_str()))
        .collect();
    assert_eq!(
        summary,
        [
            ("device.pin", "lab-b", "device:DEMO-0411"),
            ("device.pin", "lab-c", "device:DEMO-0411"),
            ("device.unpin", "lab-c", "device:DEMO-0411"),
        ]
    );
    let first: serde_json::Value = serde_json::from_str(&entries[2].detail).unwrap();
    assert_eq!(first["run_id"], reference);
    assert_eq!(first["note"], "accredited calibration");
    let second: serde_json::Value = serde_json::from_str(&entries[1].detail).unwrap();
    assert_eq!(second["previous_run_id"], reference);
    let last: serde_json::Value = serde_json::from_str(&entries[0].detail).unwrap();
    assert_eq!(
        (last["run_id"].as_i64(), last["note"].as_str()),
        (Some(newer), Some("back to the rule"))
    );
}

async fn a_device_plot_shows_the_pinned_run_else_the_newest_covering_everything(store: Store) {
    let wide = finished_run(
        &store,
        "DEMO-0413",
        RunState::Completed,
        &[(0.2, 3.0, 0.01), (20.0, 6.0, 0.04)],
    )
    .await;
    let quick = finished_run(
        &store,
        "DEMO-0413",
        RunState::Completed,
        &[(1.0, 3.5, 0.01), (5.0, 4.1, 0.02)],
    )
    .await;
    let set = store.device_calibrations("DEMO-0413").await.unwrap();
    assert_eq!(set.calibrated_range_hz(), Some((0.2e9, 20e9)));
    let (run, how) = set.plotted_run(None).unwrap();
    assert_eq!((run.run_id, how), (wide, RunSelection::NewestCovering));
    let (run, how) = set.plotted_run(Some(quick)).unwrap();
    assert_eq!((run.run_id, how), (quick, RunSelection::Requested));
    // A newer run that reaches higher: none covers 0.2-40 GHz, so the newest is shown.
    let higher = finished_run(
        &store,
        "DEMO-0413",
        RunState::Completed,
        &[(10.0, 5.0, 0.03), (40.0, 7.0, 0.05)],
    )
    .await;
    let set = store.device_calibrations("DEMO-0413").await.unwrap();
    let (run, how) = set.plotted_run(None).unwrap();
    assert_eq!((run.run_id, how), (higher, RunSelection::Newest));
    store
        .pin_run("DEMO-0413", quick, "lab-b", "")
        .await
        .unwrap();
    let set = store.device_calibrations("DEMO-0413").await.unwrap();
    let (run, how) = set.plotted_run(None).unwrap();
    assert_eq!((run.run_id, how), (quick, RunSelection::Pinned));
}

async fn history_lists_completed_runs_newest_first(store: Store) {
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

async fn two_runs_compare_per_frequency(store: Store) {
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

async fn run_detail_holds_points_and_results(store: Store) {
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

async fn a_drive_plan_extrapolates_only_when_asked_and_then_widens_the_uncertainty(store: Store) {
    let run = finished_run(
        &store,
        "DEMO-0500",
        RunState::Completed,
        &[(10.0, 4.0, 0.04), (20.0, 5.0, 0.10), (30.0, 7.0, 0.20)],
    )
    .await;
    let set = store.device_calibrations("DEMO-0500").await.unwrap();
    // Inside the range it is the lookup rule's interpolation, not flagged.
    let (inside, extrapolated) = set.vpi_for_drive(Hz(25e9), None, true).unwrap();
    assert!(!extrapolated);
    assert!(close(inside.v_pi_volts.value(), 6.0));
    // Outside, refused unless asked.
    assert!(matches!(
        set.vpi_for_drive(Hz(35e9), None, false),
        Err(StoreError::NotCovered { .. })
    ));
    // Hand-worked: the line through 20 GHz (5.0 V) and 30 GHz (7.0 V) has 0.2 V/GHz; at 35 GHz
    // it gives 8.0 V, 1.0 V past the end value, so u = sqrt(0.20^2 + 1.0^2) = 1.0198 V.
    let (above, extrapolated) = set.vpi_for_drive(Hz(35e9), None, true).unwrap();
    assert!(extrapolated);
    assert_eq!(above.run_id, run);
    assert!(close(above.v_pi_volts.value(), 8.0), "{above:?}");
    assert!(close(above.v_pi_uncertainty_volts.value(), 1.04f64.sqrt()));
    assert_eq!(
        (above.lower_frequency_hz, above.upper_frequency_hz),
        (Hz(20e9), Hz(30e9))
    );
    // Below: 0.1 V/GHz through 10 and 20 GHz; at 6 GHz 4.0 - 0.4 = 3.6 V, u = sqrt(0.04^2 + 0.4^2).
    let (below, _) = set.vpi_for_drive(Hz(6e9), None, true).unwrap();
    assert!(close(below.v_pi_volts.value(), 3.6), "{below:?}");
    assert!(close(
        below.v_pi_uncertainty_volts.value(),
        (0.04f64.powi(2) + 0.16).sqrt()
    ));
    // The pure extrapolation (a line reaching zero volts) is checked in `analysis::vpi_lookup`.
}

on_both_backends!(
    vpi_is_interpolated_from_the_newest_completed_run_covering_it,
    latest_vpi_needs_a_completed_run,
    a_quick_narrow_run_does_not_hide_an_older_wide_calibration,
    a_pinned_run_answers_until_it_is_unpinned,
    a_device_plot_shows_the_pinned_run_else_the_newest_covering_everything,
    history_lists_completed_runs_newest_first,
    two_runs_compare_per_frequency,
    run_detail_holds_points_and_results,
    a_drive_plan_extrapolates_only_when_asked_and_then_widens_the_uncertainty,
);
