//! Modulators (devices, keyed by serial number) and the instruments seen on the bench.
//!
//! A device row is updated in place when its datasheet values change (they are configuration, not
//! measurements); instruments are recorded per identity and resource with first and last sighting,
//! so a firmware change shows up as a new row and old runs stay traceable.

use super::{
    now_unix_ms, ConnectionNoteRecord, DeviceRecord, InstrumentRecord, NewDevice, RunInstrument,
    Store, StoreError,
};
use halfwave_units::Identity;

impl Store {
    /// Registers a modulator, or updates model, RF limit and wavelength of the one with this serial
    /// number. Returns the stored row.
    pub async fn upsert_device(&self, device: &NewDevice) -> Result<DeviceRecord, StoreError> {
        if device.serial.trim().is_empty() {
            return Err(StoreError::InvalidInput {
                what: "device serial number",
                reason: "it is empty; give the serial printed on the modulator".to_string(),
            });
        }
        let limit = StoreError::require_finite("RF input limit", device.rf_input_limit.value())?;
        let wavelength = StoreError::require_finite("wavelength", device.wavelength.value())?;
        if wavelength <= 0.0 {
            return Err(StoreError::InvalidInput {
                what: "wavelength",
                reason: format!("{wavelength} nm is not positive"),
            });
        }
        let now = now_unix_ms();
        on_pool!(&self.pool, pool => sqlx::query_as::<_, DeviceRecord>(
            "INSERT INTO devices (serial, model, rf_input_limit_dbm, wavelength_nm, created_at_unix_ms, updated_at_unix_ms) \
             VALUES ($1, $2, $3, $4, $5, $5) \
             ON CONFLICT (serial) DO UPDATE SET model = excluded.model, \
                 rf_input_limit_dbm = excluded.rf_input_limit_dbm, \
                 wavelength_nm = excluded.wavelength_nm, \
                 updated_at_unix_ms = excluded.updated_at_unix_ms \
             RETURNING id, serial, model, rf_input_limit_dbm, wavelength_nm, created_at_unix_ms, updated_at_unix_ms",
        )
        .bind(device.serial.trim())
        .bind(&device.model)
        .bind(limit)
        .bind(wavelength)
        .bind(now)
        .fetch_one(pool)
        .await)
        .map_err(StoreError::database("saving a device"))
    }

    /// The device with this id.
    pub async fn device(&self, id: i64) -> Result<DeviceRecord, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, DeviceRecord>("SELECT * FROM devices WHERE id = $1")
            .bind(id)
            .fetch_optional(pool)
            .await)
            .map_err(StoreError::database("reading a device"))?
            .ok_or_else(|| StoreError::NotFound {
                what: "device with id",
                key: id.to_string(),
            })
    }

    /// The device with this serial number.
    pub async fn device_by_serial(&self, serial: &str) -> Result<DeviceRecord, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, DeviceRecord>("SELECT * FROM devices WHERE serial = $1")
            .bind(serial)
            .fetch_optional(pool)
            .await)
            .map_err(StoreError::database("reading a device"))?
            .ok_or_else(|| StoreError::NotFound {
                what: "device with serial",
                key: serial.to_string(),
            })
    }

    /// All devices, by serial number.
    pub async fn devices(&self) -> Result<Vec<DeviceRecord>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, DeviceRecord>("SELECT * FROM devices ORDER BY serial")
            .fetch_all(pool)
            .await)
            .map_err(StoreError::database("listing devices"))
    }

    /// Records that an instrument with this identity answered at `resource` now: a new row the
    /// first time, otherwise the last-seen time moves.
    pub async fn record_instrument_seen(
        &self,
        identity: &Identity,
        resource: &str,
    ) -> Result<InstrumentRecord, StoreError> {
        let now = now_unix_ms();
        on_pool!(&self.pool, pool => sqlx::query_as::<_, InstrumentRecord>(
            "INSERT INTO instruments (manufacturer, model, serial, firmware, resource, first_seen_unix_ms, last_seen_unix_ms) \
             VALUES ($1, $2, $3, $4, $5, $6, $6) \
             ON CONFLICT (manufacturer, model, serial, firmware, resource) \
                 DO UPDATE SET last_seen_unix_ms = excluded.last_seen_unix_ms \
             RETURNING id, manufacturer, model, serial, firmware, resource, first_seen_unix_ms, last_seen_unix_ms",
        )
        .bind(&identity.manufacturer)
        .bind(&identity.model)
        .bind(&identity.serial)
        .bind(&identity.firmware)
        .bind(resource)
        .bind(now)
        .fetch_one(pool)
        .await)
        .map_err(StoreError::database("recording an instrument"))
    }

    /// Records that the instrument `instrument_id` measured run `run_id` in `role` (`source` or
    /// `analyzer`), with the driver's connection notes (`connection_json`, a JSON array of
    /// `{item, value}`); recording it again keeps one row and the latest notes.
    pub async fn link_run_instrument(
        &self,
        run_id: i64,
        role: &str,
        instrument_id: i64,
        connection_json: &str,
    ) -> Result<(), StoreError> {
        on_pool!(&self.pool, pool => sqlx::query(
            "INSERT INTO run_instruments (run_id, role, instrument_id, connection) VALUES ($1, $2, $3, $4) \
             ON CONFLICT (run_id, role, instrument_id) DO UPDATE SET connection = excluded.connection",
        )
        .bind(run_id)
        .bind(role)
        .bind(instrument_id)
        .bind(connection_json)
        .execute(pool)
        .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("recording a run's instrument"))?;
        Ok(())
    }

    /// The instruments that measured a run, source first, each role in the order first seen,
    /// with the connection notes recorded for the run. Notes that do not read as JSON are
    /// returned as one note holding the stored text, so nothing stored is hidden.
    pub async fn run_instruments(&self, run_id: i64) -> Result<Vec<RunInstrument>, StoreError> {
        let mut rows = on_pool!(&self.pool, pool => sqlx::query_as::<_, RunInstrument>(
            "SELECT ri.role, i.manufacturer, i.model, i.serial, i.firmware, i.resource, \
                    ri.connection AS connection_json \
             FROM run_instruments ri JOIN instruments i ON i.id = ri.instrument_id \
             WHERE ri.run_id = $1 ORDER BY ri.role DESC, i.first_seen_unix_ms, i.id",
        )
        .bind(run_id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading a run's instruments"))?;
        for row in &mut rows {
            row.connection = serde_json::from_str(&row.connection_json).unwrap_or_else(|_| {
                vec![ConnectionNoteRecord {
                    item: "connection notes (stored text)".into(),
                    value: row.connection_json.clone(),
                }]
            });
        }
        Ok(rows)
    }

    /// Every instrument identity seen, most recently seen first.
    pub async fn instruments(&self) -> Result<Vec<InstrumentRecord>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, InstrumentRecord>(
            "SELECT * FROM instruments ORDER BY last_seen_unix_ms DESC, id DESC",
        )
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("listing instruments"))
    }
}
