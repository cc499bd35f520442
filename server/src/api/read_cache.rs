//! In-memory copies of read results that cannot change, so that the routes read most often answer
//! without a database round trip.
//!
//! Two kinds of entries, both safe whatever process writes the database:
//! - A run in a final state (completed, failed, cancelled) never changes again: its JSON view is
//!   kept by id and served as stored bytes. Runs still queued, running or interrupted are read
//!   from the database every time.
//! - A device's calibrations (its completed runs' V_pi per frequency and its pinned run, from
//!   which V_pi queries and plots choose) are kept with the fingerprint they were built from
//!   ([`crate::store::CompletedRunsFingerprint`]: the completed runs and the pin): a request reads
//!   the fingerprint (one row) and rebuilds the entry only when it differs.
//!
//! Each map holds a bounded number of entries and starts over when full (a lab's runs and devices
//! number in the thousands; the bound only protects memory).

use crate::api::views::devices::Calibration;
use crate::store::{CompletedRunsFingerprint, DeviceCalibrationSet};
use axum::body::Bytes;
use std::collections::HashMap;
use std::sync::{Arc, Mutex};

/// The most final runs kept (a few kB each).
pub const FINAL_RUN_CAPACITY: usize = 4096;

/// The most devices kept (a few kB to a few tens of kB each).
pub const DEVICE_CAPACITY: usize = 1024;

/// A device's completed calibrations as the API serves them.
#[derive(Debug)]
pub struct DeviceCalibrations {
    pub fingerprint: CompletedRunsFingerprint,
    /// Newest first, each ascending in frequency.
    pub history: Vec<Calibration>,
    /// `history` as the JSON the history route returns.
    pub history_json: Bytes,
    /// The same runs as the store gives them, with the pin: what V_pi queries and plots choose
    /// from.
    pub set: DeviceCalibrationSet,
}

/// The cache; one per server.
#[derive(Debug, Default)]
pub struct ReadCache {
    final_runs: Mutex<HashMap<i64, Bytes>>,
    devices: Mutex<HashMap<String, Arc<DeviceCalibrations>>>,
}

fn insert_bounded<K: std::hash::Hash + Eq, V>(
    map: &Mutex<HashMap<K, V>>,
    capacity: usize,
    key: K,
    value: V,
) {
    if let Ok(mut map) = map.lock() {
        if map.len() >= capacity && !map.contains_key(&key) {
            map.clear();
        }
        map.insert(key, value);
    }
}

impl ReadCache {
    /// The JSON view of a run known to be final, if kept.
    pub fn final_run(&self, run_id: i64) -> Option<Bytes> {
        self.final_runs.lock().ok()?.get(&run_id).cloned()
    }

    /// Keeps the JSON view of a run read in a final state.
    pub fn keep_final_run(&self, run_id: i64, view_json: Bytes) {
        insert_bounded(&self.final_runs, FINAL_RUN_CAPACITY, run_id, view_json);
    }

    /// The device's calibrations if they were built from exactly these completed runs.
    pub fn device(
        &self,
        serial: &str,
        fingerprint: CompletedRunsFingerprint,
    ) -> Option<Arc<DeviceCalibrations>> {
        let devices = self.devices.lock().ok()?;
        devices
            .get(serial)
            .filter(|c| c.fingerprint == fingerprint)
            .cloned()
    }

    /// Keeps a device's calibrations.
    pub fn keep_device(&self, serial: &str, calibrations: Arc<DeviceCalibrations>) {
        insert_bounded(
            &self.devices,
            DEVICE_CAPACITY,
            serial.to_string(),
            calibrations,
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fingerprint(completed_runs: i64, newest_run_id: i64) -> CompletedRunsFingerprint {
        CompletedRunsFingerprint {
            device_id: 1,
            completed_runs,
            newest_run_id,
            pinned_run_id: 0,
        }
    }

    fn calibrations(fp: CompletedRunsFingerprint) -> Arc<DeviceCalibrations> {
        Arc::new(DeviceCalibrations {
            fingerprint: fp,
            history: Vec::new(),
            history_json: Bytes::from_static(b"[]"),
            set: DeviceCalibrationSet {
                serial: "PM-1".into(),
                pinned: None,
                runs: Vec::new(),
            },
        })
    }

    #[test]
    fn a_device_entry_serves_only_its_own_fingerprint() {
        let cache = ReadCache::default();
        cache.keep_device("PM-1", calibrations(fingerprint(2, 9)));
        assert!(cache.device("PM-1", fingerprint(2, 9)).is_some());
        // One more completed run, or a pin: the entry is stale.
        assert!(cache.device("PM-1", fingerprint(3, 12)).is_none());
        let pinned = CompletedRunsFingerprint {
            pinned_run_id: 9,
            ..fingerprint(2, 9)
        };
        assert!(cache.device("PM-1", pinned).is_none());
        assert!(cache.device("PM-2", fingerprint(2, 9)).is_none());
    }

    #[test]
    fn final_runs_are_kept_by_id_and_bounded() {
        let cache = ReadCache::default();
        for id in 0..FINAL_RUN_CAPACITY as i64 {
            cache.keep_final_run(id, Bytes::from_static(b"{}"));
        }
        assert!(cache.final_run(7).is_some());
        cache.keep_final_run(-1, Bytes::from_static(b"{\"id\":-1}"));
        assert_eq!(cache.final_run(-1).as_deref(), Some(&b"{\"id\":-1}"[..]));
        assert!(cache.final_runs.lock().unwrap().len() <= FINAL_RUN_CAPACITY);
    }
}
