//! The database: devices, instruments, drive-chain calibrations, runs, points with their traces,
//! per-frequency V_pi results and the audit log.
//!
//! Built on sqlx with SQLite (one file per bench PC, no server to run). The file is opened in WAL
//! mode, so readers (the API) never block the writer (the engine), with foreign keys enforced and
//! a busy timeout so that short write contention waits instead of failing. `synchronous = NORMAL`:
//! in WAL mode a committed transaction survives a killed daemon; only a power loss or OS crash can
//! lose the last few commits.
//!
//! The schema lives in `migrations/` at the top of the repository and is embedded in the binary;
//! [`Store::open`] brings any database up to date. Queries are plain `sqlx::query`/`query_as`
//! checked by the tests (no database is needed at build time), and the SQL is kept to what
//! PostgreSQL also accepts (see DEVELOPERS.md).
//!
//! The methods live in one file per table group: [`devices`](self::devices) (modulators and
//! instruments), [`calibrations`](self::calibrations), [`runs`](self::runs) (life cycle, listing,
//! recovery), [`points`](self::points) (points, traces, results), [`history`](self::history) (V_pi
//! history, the lookup and plot rules, interpolation, comparison), [`pins`](self::pins) (a
//! device's pinned reference calibration), [`webhooks`](self::webhooks) (the notifications'
//! outbox) and [`audit`](self::audit).

pub mod api_reads;
pub mod audit;
pub mod bench_safety;
pub mod calibrations;
pub mod chain_runs;
pub mod devices;
pub mod error;
pub mod history;
pub mod maintenance;
pub mod pins;
pub mod points;
pub mod records;
pub mod runs;
pub mod tokens;
pub mod trace_codec;
pub mod webhooks;

pub use api_reads::CompletedRunsFingerprint;
pub use bench_safety::{BenchFault, BenchSafetyRecord};
pub use chain_runs::ChainRunRecord;
pub use error::StoreError;
pub use records::*;
pub use trace_codec::TraceCodecError;
pub use webhooks::{NewWebhookDelivery, WebhookDelivery, WebhookDeliveryCounts};

use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use std::str::FromStr;
use std::time::Duration;

/// The embedded schema migrations.
static MIGRATOR: sqlx::migrate::Migrator = sqlx::migrate!("../migrations");

/// How long a statement waits for another connection's write lock before giving up.
pub const BUSY_TIMEOUT: Duration = Duration::from_secs(5);

/// Connections in the pool of a file database (SQLite has one writer; the rest serve readers).
const FILE_POOL_CONNECTIONS: u32 = 4;

/// The Halfwave database. Cheap to clone (it shares one connection pool).
#[derive(Debug, Clone)]
pub struct Store {
    pool: SqlitePool,
}

impl Store {
    /// Opens (creating it if missing) the database at `url_or_path`, either a `sqlite:` URL or a
    /// file path, and applies the migrations.
    pub async fn open(url_or_path: &str) -> Result<Store, StoreError> {
        let open_error = |source| StoreError::Open {
            location: url_or_path.to_string(),
            source,
        };
        let options = if url_or_path.starts_with("sqlite:") {
            SqliteConnectOptions::from_str(url_or_path).map_err(open_error)?
        } else {
            SqliteConnectOptions::new().filename(url_or_path)
        };
        let options = options
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Normal)
            .foreign_keys(true)
            .busy_timeout(BUSY_TIMEOUT);
        let pool = SqlitePoolOptions::new()
            .max_connections(FILE_POOL_CONNECTIONS)
            .connect_with(options)
            .await
            .map_err(open_error)?;
        Store::migrated(pool).await
    }

    /// A private database in memory, for tests. It lives as long as the `Store` (one connection).
    pub async fn open_in_memory() -> Result<Store, StoreError> {
        let options = SqliteConnectOptions::from_str("sqlite::memory:")
            .map_err(|source| StoreError::Open {
                location: "memory".to_string(),
                source,
            })?
            .foreign_keys(true);
        let pool = SqlitePoolOptions::new()
            .max_connections(1)
            .min_connections(1)
            .idle_timeout(None)
            .max_lifetime(None)
            .connect_with(options)
            .await
            .map_err(|source| StoreError::Open {
                location: "memory".to_string(),
                source,
            })?;
        Store::migrated(pool).await
    }

    async fn migrated(pool: SqlitePool) -> Result<Store, StoreError> {
        MIGRATOR
            .run(&pool)
            .await
            .map_err(|source| StoreError::Migrate { source })?;
        Ok(Store { pool })
    }

    /// The connection pool, for health checks and tests that inspect the database directly.
    pub fn pool(&self) -> &SqlitePool {
        &self.pool
    }

    /// Waits for every connection to finish and closes the database.
    pub async fn close(&self) {
        self.pool.close().await;
    }
}

/// The current time in milliseconds since the Unix epoch (UTC); 0 if the clock is before 1970.
pub fn now_unix_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
        .unwrap_or(0)
}

/// Converts a grid index read from the database.
pub(crate) fn index_from_db(what: &'static str, value: i64) -> Result<u32, StoreError> {
    u32::try_from(value).map_err(|_| StoreError::CorruptRow {
        what,
        detail: format!("index {value} is not a non-negative 32-bit number"),
    })
}

/// Serializes a JSON value for a TEXT column.
pub(crate) fn json_text(value: &serde_json::Value) -> String {
    value.to_string()
}
