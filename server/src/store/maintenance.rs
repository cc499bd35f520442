//! Database upkeep outside the daemon's running store: the SQL behind `halfwave db backup` (an
//! online copy with SQLite's `VACUUM INTO`, then an integrity check and a count of what the copy
//! holds) and the health check's ping. The CLI owns the messages; these return the database's
//! own errors, each tagged with the step that failed.

use sqlx::sqlite::SqliteConnectOptions;
use sqlx::{ConnectOptions, Connection};
use std::path::Path;

/// Which step of a backup failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BackupStep {
    OpenSource,
    Copy,
    OpenCopy,
    IntegrityCheck,
    CountRuns,
    CountPoints,
}

/// What the checked copy holds.
#[derive(Debug, Clone, PartialEq)]
pub struct BackupContents {
    /// SQLite's `PRAGMA integrity_check` answer (`ok` for a sound file).
    pub integrity: String,
    pub runs: i64,
    pub points: i64,
}

/// Copies the database opened with `source` into the new file `dest_text` (`VACUUM INTO`, a
/// consistent snapshot even while the daemon writes), then opens the copy read-only, checks it
/// and counts its runs and points.
pub async fn backup_into(
    source: SqliteConnectOptions,
    dest: &Path,
    dest_text: &str,
) -> Result<BackupContents, (BackupStep, sqlx::Error)> {
    let mut connection = source
        .connect()
        .await
        .map_err(|e| (BackupStep::OpenSource, e))?;
    sqlx::query("VACUUM INTO $1")
        .bind(dest_text)
        .execute(&mut connection)
        .await
        .map_err(|e| (BackupStep::Copy, e))?;
    let _ = connection.close().await;

    let mut copy = SqliteConnectOptions::new()
        .filename(dest)
        .read_only(true)
        .connect()
        .await
        .map_err(|e| (BackupStep::OpenCopy, e))?;
    let integrity: String = sqlx::query_scalar("PRAGMA integrity_check")
        .fetch_one(&mut copy)
        .await
        .map_err(|e| (BackupStep::IntegrityCheck, e))?;
    let runs: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM runs")
        .fetch_one(&mut copy)
        .await
        .map_err(|e| (BackupStep::CountRuns, e))?;
    let points: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM points")
        .fetch_one(&mut copy)
        .await
        .map_err(|e| (BackupStep::CountPoints, e))?;
    let _ = copy.close().await;
    Ok(BackupContents {
        integrity,
        runs,
        points,
    })
}

/// One trivial query: whether the database answers.
pub async fn ping(pool: &super::DbPool) -> Result<(), sqlx::Error> {
    on_pool!(pool, pool => sqlx::query("SELECT 1").execute(pool).await.map(|_| ()))
}
