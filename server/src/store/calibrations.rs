//! Drive-chain calibrations: versioned, never edited in place.
//!
//! A run records the id of the exact calibration version it used, so a later re-calibration of the
//! cables and amplifier cannot silently change an old result. Uploading under an existing name adds
//! the next version in one statement (`INSERT ... SELECT MAX(version) + 1`), so two uploads racing
//! cannot get the same number: the UNIQUE (name, version) key refuses the loser.

use super::audit::audit_in;
use super::{
    now_unix_ms, ChainCalibration, ChainCalibrationHeader, ChainCalibrationPoint,
    ChainCalibrationSource, Store, StoreError,
};

impl Store {
    /// Stores a new version of the calibration called `name` (version 1 if the name is new) and
    /// returns it with its points sorted by frequency. Frequencies must be finite, not negative
    /// and distinct (a single point at 0 Hz is how a flat, frequency-independent gain is stored);
    /// gains finite; at least one point.
    pub async fn create_chain_calibration(
        &self,
        name: &str,
        created_by: &str,
        points: &[ChainCalibrationPoint],
    ) -> Result<ChainCalibration, StoreError> {
        self.create_chain_calibration_with_sources(name, created_by, points, &[])
            .await
    }

    /// [`Store::create_chain_calibration`] with the files the table was computed from, in
    /// cascade order (stored in the same transaction). Each needs a known role, a file name of 1
    /// to 255 characters and a SHA-256 of 64 lowercase hexadecimal digits; at most one is the
    /// load.
    pub async fn create_chain_calibration_with_sources(
        &self,
        name: &str,
        created_by: &str,
        points: &[ChainCalibrationPoint],
        sources: &[ChainCalibrationSource],
    ) -> Result<ChainCalibration, StoreError> {
        check_sources(sources)?;
        let name = name.trim();
        if name.is_empty() {
            return Err(StoreError::InvalidInput {
                what: "chain calibration name",
                reason: "it is empty; name the bench and chain, e.g. \"bench-2 amplifier A\""
                    .to_string(),
            });
        }
        let points = checked_points(points)?;
        let now = now_unix_ms();

        let header = on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("starting a calibration upload"))?;
        let header = sqlx::query_as::<_, ChainCalibrationHeader>(
            "INSERT INTO chain_calibrations (name, version, created_at_unix_ms, created_by) \
             SELECT $1, COALESCE(MAX(version), 0) + 1, $2, $3 FROM chain_calibrations WHERE name = $1 \
             RETURNING id, name, version, created_at_unix_ms, created_by",
        )
        .bind(name)
        .bind(now)
        .bind(created_by)
        .fetch_one(&mut *tx)
        .await
        .map_err(StoreError::database("storing a calibration version"))?;
        for point in &points {
            sqlx::query(
                "INSERT INTO chain_calibration_points \
                 (chain_calibration_id, frequency_hz, gain_db, gain_uncertainty_db) \
                 VALUES ($1, $2, $3, $4)",
            )
            .bind(header.id)
            .bind(point.frequency_hz)
            .bind(point.gain_db)
            .bind(point.gain_uncertainty_db)
            .execute(&mut *tx)
            .await
            .map_err(StoreError::database("storing a calibration point"))?;
        }
        for (position, source) in sources.iter().enumerate() {
            sqlx::query(
                "INSERT INTO chain_calibration_sources \
                 (chain_calibration_id, position, role, file_name, sha256) VALUES ($1, $2, $3, $4, $5)",
            )
            .bind(header.id)
            .bind(position as i64)
            .bind(&source.role)
            .bind(&source.file_name)
            .bind(&source.sha256)
            .execute(&mut *tx)
            .await
            .map_err(StoreError::database("storing a calibration source file"))?;
        }
        let detail = serde_json::json!({
            "id": header.id,
            "version": header.version,
            "points": points.len(),
            "sources": sources.len(),
        });
        audit_in!(tx,
            now,
            created_by,
            "chain_calibration.create",
            &format!("chain_calibration:{name}"),
            &detail.to_string(),
        )?;
        tx.commit()
            .await
            .map_err(StoreError::database("committing a calibration upload"))?;
        header
        });

        Ok(ChainCalibration {
            id: header.id,
            name: header.name,
            version: header.version,
            created_at_unix_ms: header.created_at_unix_ms,
            created_by: header.created_by,
            points,
            sources: sources.to_vec(),
        })
    }

    /// The calibration version with this id.
    pub async fn chain_calibration(&self, id: i64) -> Result<ChainCalibration, StoreError> {
        let header = on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainCalibrationHeader>(
            "SELECT id, name, version, created_at_unix_ms, created_by FROM chain_calibrations WHERE id = $1",
        )
        .bind(id)
        .fetch_optional(pool)
        .await)
        .map_err(StoreError::database("reading a chain calibration"))?
        .ok_or_else(|| StoreError::NotFound {
            what: "chain calibration with id",
            key: id.to_string(),
        })?;
        self.with_points(header).await
    }

    /// The newest version of the calibration called `name`.
    pub async fn latest_chain_calibration(
        &self,
        name: &str,
    ) -> Result<ChainCalibration, StoreError> {
        let header = on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainCalibrationHeader>(
            "SELECT id, name, version, created_at_unix_ms, created_by FROM chain_calibrations \
             WHERE name = $1 ORDER BY version DESC LIMIT 1",
        )
        .bind(name.trim())
        .fetch_optional(pool)
        .await)
        .map_err(StoreError::database("reading a chain calibration"))?
        .ok_or_else(|| StoreError::NotFound {
            what: "chain calibration named",
            key: format!("{name:?}"),
        })?;
        self.with_points(header).await
    }

    /// Version `version` of the calibration called `name`.
    pub async fn chain_calibration_version(
        &self,
        name: &str,
        version: i64,
    ) -> Result<ChainCalibration, StoreError> {
        let header = on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainCalibrationHeader>(
            "SELECT id, name, version, created_at_unix_ms, created_by FROM chain_calibrations \
             WHERE name = $1 AND version = $2",
        )
        .bind(name.trim())
        .bind(version)
        .fetch_optional(pool)
        .await)
        .map_err(StoreError::database("reading a chain calibration"))?
        .ok_or_else(|| StoreError::NotFound {
            what: "chain calibration",
            key: format!("{name:?} version {version}"),
        })?;
        self.with_points(header).await
    }

    /// Every calibration version (without points): by name, then version.
    pub async fn chain_calibrations(&self) -> Result<Vec<ChainCalibrationHeader>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainCalibrationHeader>(
            "SELECT id, name, version, created_at_unix_ms, created_by FROM chain_calibrations \
             ORDER BY name, version",
        )
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("listing chain calibrations"))
    }

    async fn with_points(
        &self,
        header: ChainCalibrationHeader,
    ) -> Result<ChainCalibration, StoreError> {
        let points = on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainCalibrationPoint>(
            "SELECT frequency_hz, gain_db, gain_uncertainty_db FROM chain_calibration_points \
             WHERE chain_calibration_id = $1 ORDER BY frequency_hz",
        )
        .bind(header.id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading calibration points"))?;
        let sources = on_pool!(&self.pool, pool => sqlx::query_as::<_, ChainCalibrationSource>(
            "SELECT role, file_name, sha256 FROM chain_calibration_sources \
             WHERE chain_calibration_id = $1 ORDER BY position",
        )
        .bind(header.id)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading calibration source files"))?;
        Ok(ChainCalibration {
            id: header.id,
            name: header.name,
            version: header.version,
            created_at_unix_ms: header.created_at_unix_ms,
            created_by: header.created_by,
            points,
            sources,
        })
    }

    /// The source files of every calibration version, by version id, each in cascade order.
    pub async fn chain_calibration_sources(
        &self,
    ) -> Result<std::collections::BTreeMap<i64, Vec<ChainCalibrationSource>>, StoreError> {
        #[derive(sqlx::FromRow)]
        struct Row {
            chain_calibration_id: i64,
            #[sqlx(flatten)]
            source: ChainCalibrationSource,
        }
        let rows = on_pool!(&self.pool, pool => sqlx::query_as::<_, Row>(
            "SELECT chain_calibration_id, role, file_name, sha256 FROM chain_calibration_sources \
             ORDER BY chain_calibration_id, position",
        )
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("listing calibration source files"))?;
        let mut by_id = std::collections::BTreeMap::<i64, Vec<ChainCalibrationSource>>::new();
        for row in rows {
            by_id
                .entry(row.chain_calibration_id)
                .or_default()
                .push(row.source);
        }
        Ok(by_id)
    }
}

/// Refuses source files with an unknown role, an empty or overlong name, a digest that is not
/// 64 lowercase hexadecimal digits, or more than one load.
fn check_sources(sources: &[ChainCalibrationSource]) -> Result<(), StoreError> {
    for source in sources {
        if !ChainCalibrationSource::ROLES.contains(&source.role.as_str()) {
            return Err(StoreError::InvalidInput {
                what: "calibration source role",
                reason: format!("{:?} is neither \"two_port\" nor \"load\"", source.role),
            });
        }
        let length = source.file_name.chars().count();
        let blank = source
            .file_name
            .chars()
            .all(|c| matches!(c, ' ' | '\t' | '\r' | '\n'));
        if blank || length > 255 {
            return Err(StoreError::InvalidInput {
                what: "calibration source file name",
                reason: format!(
                    "{:?} is not a name of 1 to 255 characters",
                    source.file_name
                ),
            });
        }
        if source.sha256.len() != 64
            || !source
                .sha256
                .bytes()
                .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
        {
            return Err(StoreError::InvalidInput {
                what: "calibration source SHA-256",
                reason: format!("{:?} is not 64 lowercase hexadecimal digits", source.sha256),
            });
        }
    }
    if sources.iter().filter(|s| s.role == "load").count() > 1 {
        return Err(StoreError::InvalidInput {
            what: "calibration sources",
            reason: "more than one load; a chain ends in one modulator".to_string(),
        });
    }
    Ok(())
}

/// Sorts the points by frequency and refuses empty tables, non-finite values, frequencies that are
/// not positive, and a frequency given twice.
fn checked_points(
    points: &[ChainCalibrationPoint],
) -> Result<Vec<ChainCalibrationPoint>, StoreError> {
    if points.is_empty() {
        return Err(StoreError::InvalidInput {
            what: "chain calibration",
            reason: "it has no points; give the chain's gain at one frequency at least".to_string(),
        });
    }
    for point in points {
        StoreError::require_finite("calibration frequency", point.frequency_hz)?;
        StoreError::require_finite("calibration gain", point.gain_db)?;
        if let Some(u) = point.gain_uncertainty_db {
            StoreError::require_finite("calibration gain uncertainty", u)?;
            if u < 0.0 {
                return Err(StoreError::InvalidInput {
                    what: "calibration gain uncertainty",
                    reason: format!("{u} dB is negative; a standard uncertainty is at least 0"),
                });
            }
        }
        if point.frequency_hz < 0.0 {
            return Err(StoreError::InvalidInput {
                what: "calibration frequency",
                reason: format!("{} Hz is negative", point.frequency_hz),
            });
        }
    }
    let mut sorted = points.to_vec();
    sorted.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    if let Some(pair) = sorted
        .windows(2)
        .find(|pair| pair[0].frequency_hz == pair[1].frequency_hz)
    {
        return Err(StoreError::InvalidInput {
            what: "chain calibration",
            reason: format!(
                "{} Hz is given more than once; give one gain per frequency",
                pair[0].frequency_hz
            ),
        });
    }
    Ok(sorted)
}
