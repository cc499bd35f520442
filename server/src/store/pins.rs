//! A device's reference calibration: the completed run a lab pins so that V_pi lookups and the
//! device's plots use it whatever runs come later (table `device_pins`, migration 0005).
//!
//! Only a completed run of the same device with V_pi results can be pinned; completed is a final
//! state, so a pinned run never changes afterwards. Pinning replaces an earlier pin. Every pin and
//! unpin writes one audit entry (`device.pin` / `device.unpin`, subject `device:<serial>`, the run
//! ids and the note as JSON) in the same transaction as the change. How the pin is used:
//! [`super::history`].

use super::audit::audit_in;
use super::{now_unix_ms, PinChange, PinRecord, RunState, Store, StoreError};

/// A device with its pin, if any (a LEFT JOIN: the pin's columns are NULL without one).
#[derive(sqlx::FromRow)]
struct DeviceWithPin {
    device_id: i64,
    run_id: Option<i64>,
    pinned_by: Option<String>,
    pinned_at_unix_ms: Option<i64>,
    note: Option<String>,
}

impl Store {
    /// The device's pinned run, if any. [`StoreError::NotFound`] when no device has this serial
    /// number.
    pub async fn device_pin(&self, serial: &str) -> Result<Option<PinRecord>, StoreError> {
        let row = on_pool!(&self.pool, pool => sqlx::query_as::<_, DeviceWithPin>(
            "SELECT d.id AS device_id, p.run_id, p.pinned_by, p.pinned_at_unix_ms, p.note \
             FROM devices d LEFT JOIN device_pins p ON p.device_id = d.id WHERE d.serial = $1",
        )
        .bind(serial)
        .fetch_optional(pool)
        .await)
        .map_err(StoreError::database("reading a device's pinned run"))?
        .ok_or_else(|| StoreError::NotFound {
            what: "device with serial",
            key: serial.to_string(),
        })?;
        Ok(
            match (row.run_id, row.pinned_by, row.pinned_at_unix_ms, row.note) {
                (Some(run_id), Some(pinned_by), Some(pinned_at_unix_ms), Some(note)) => {
                    Some(PinRecord {
                        device_id: row.device_id,
                        run_id,
                        pinned_by,
                        pinned_at_unix_ms,
                        note,
                    })
                }
                _ => None,
            },
        )
    }

    /// Pins `run_id` as the reference calibration of device `serial`, replacing any earlier pin.
    /// Refused unless the run is a completed run of that device with V_pi results
    /// ([`StoreError::RunOfAnotherDevice`], [`StoreError::NotPinnable`]).
    pub async fn pin_run(
        &self,
        serial: &str,
        run_id: i64,
        by: &str,
        note: &str,
    ) -> Result<PinChange, StoreError> {
        let device = self.device_by_serial(serial).await?;
        let run = self.run(run_id).await?;
        if run.device_id != device.id {
            return Err(StoreError::RunOfAnotherDevice {
                serial: device.serial,
                run_id,
                run_serial: run.device_serial,
            });
        }
        if run.state != RunState::Completed {
            return Err(StoreError::NotPinnable {
                serial: device.serial,
                run_id,
                reason: format!("it is {}", run.state),
            });
        }
        let has_results: bool =
            on_pool!(&self.pool, pool => sqlx::query_scalar("SELECT EXISTS (SELECT 1 FROM frequency_results WHERE run_id = $1)")
                .bind(run_id)
                .fetch_one(pool)
                .await)
                .map_err(StoreError::database("checking a run's V_pi results"))?;
        if !has_results {
            return Err(StoreError::NotPinnable {
                serial: device.serial,
                run_id,
                reason: "it has no V_pi results".to_string(),
            });
        }
        // The checks above read outside the transaction (a completed run never changes), so the
        // transaction opens with a write (see `create_run` for why that matters in WAL mode).
        let now = now_unix_ms();
        let (pinned, previous_run_id) = on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting to pin a run"))?;
        let previous_run_id: Option<i64> =
            sqlx::query_scalar("DELETE FROM device_pins WHERE device_id = $1 RETURNING run_id")
                .bind(device.id)
                .fetch_optional(&mut *tx)
                .await
                .map_err(StoreError::database("replacing a device's pin"))?;
        let pinned = sqlx::query_as::<_, PinRecord>(
            "INSERT INTO device_pins (device_id, run_id, pinned_by, pinned_at_unix_ms, note) \
             VALUES ($1, $2, $3, $4, $5) \
             RETURNING device_id, run_id, pinned_by, pinned_at_unix_ms, note",
        )
        .bind(device.id)
        .bind(run_id)
        .bind(by)
        .bind(now)
        .bind(note)
        .fetch_one(&mut *tx)
        .await
        .map_err(StoreError::database("pinning a run"))?;
        let detail = serde_json::json!({
            "run_id": run_id,
            "previous_run_id": previous_run_id,
            "note": note,
        });
        audit_in!(tx,
            now,
            by,
            "device.pin",
            &format!("device:{}", device.serial),
            &detail.to_string(),
        )?;
        tx.commit()
            .await
            .map_err(StoreError::database("committing a pin"))?;
        (pinned, previous_run_id)
        });
        Ok(PinChange {
            serial: device.serial,
            pinned: Some(pinned),
            previous_run_id,
        })
    }

    /// Removes the device's pin: lookups go back to the newest completed run covering each
    /// frequency. [`StoreError::NothingPinned`] (and no audit entry) when none is pinned.
    pub async fn unpin_device(
        &self,
        serial: &str,
        by: &str,
        note: &str,
    ) -> Result<PinChange, StoreError> {
        let device = self.device_by_serial(serial).await?;
        let now = now_unix_ms();
        let previous_run_id = on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting to unpin a run"))?;
        let previous_run_id: Option<i64> =
            sqlx::query_scalar("DELETE FROM device_pins WHERE device_id = $1 RETURNING run_id")
                .bind(device.id)
                .fetch_optional(&mut *tx)
                .await
                .map_err(StoreError::database("removing a device's pin"))?;
        let Some(previous) = previous_run_id else {
            drop(tx);
            return Err(StoreError::NothingPinned {
                serial: device.serial,
            });
        };
        let detail = serde_json::json!({ "run_id": previous, "note": note });
        audit_in!(tx,
            now,
            by,
            "device.unpin",
            &format!("device:{}", device.serial),
            &detail.to_string(),
        )?;
        tx.commit()
            .await
            .map_err(StoreError::database("committing an unpin"))?;
        previous_run_id
        });
        Ok(PinChange {
            serial: device.serial,
            pinned: None,
            previous_run_id,
        })
    }
}
