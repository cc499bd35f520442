//! Throw-away PostgreSQL databases for tests and benchmarks: one fresh database per test on the
//! server that `HALFWAVE_TEST_POSTGRES_URL` names, so PostgreSQL tests stay independent and run
//! in parallel like the SQLite ones (each of which has its own file or memory database).
//!
//! `.ci/with-postgres COMMAND` starts a throwaway server and sets the variable. A PostgreSQL test
//! without it fails with [`MISSING_URL`] instead of passing silently.

use sqlx::postgres::PgConnectOptions;
use sqlx::{AssertSqlSafe, ConnectOptions, Connection};
use std::str::FromStr;
use std::sync::atomic::{AtomicU32, Ordering};

/// The variable naming the PostgreSQL server the tests use.
pub const URL_VARIABLE: &str = "HALFWAVE_TEST_POSTGRES_URL";

/// What a PostgreSQL test says when the server is not named.
pub const MISSING_URL: &str = "HALFWAVE_TEST_POSTGRES_URL is not set, so this PostgreSQL test cannot run: run the tests through `.ci/with-postgres` (e.g. `.ci/with-postgres cargo test --workspace`), which starts a throwaway server, or set HALFWAVE_TEST_POSTGRES_URL=postgres://USER@HOST:PORT/DB to a server where USER may create databases";

/// A database created for one test; dropped (with its connections) when this is dropped.
#[derive(Debug)]
pub struct ScratchDatabase {
    admin_url: String,
    name: String,
    url: String,
}

impl ScratchDatabase {
    /// Creates a fresh, empty database on the server `HALFWAVE_TEST_POSTGRES_URL` names; panics
    /// with [`MISSING_URL`] when the variable is unset (a test must not pass without its server).
    pub async fn create(label: &str) -> ScratchDatabase {
        let admin_url = std::env::var(URL_VARIABLE)
            .ok()
            .filter(|u| !u.trim().is_empty())
            .unwrap_or_else(|| panic!("{MISSING_URL}"));
        ScratchDatabase::create_on(&admin_url, label)
            .await
            .unwrap_or_else(|e| panic!("{e}"))
    }

    /// Creates a fresh database on the server of `admin_url` (whose user may create databases).
    pub async fn create_on(admin_url: &str, label: &str) -> Result<ScratchDatabase, String> {
        static COUNTER: AtomicU32 = AtomicU32::new(0);
        let label: String = label
            .chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() {
                    c.to_ascii_lowercase()
                } else {
                    '_'
                }
            })
            .take(24)
            .collect();
        let name = format!(
            "hw_{label}_{}_{}_{}",
            std::process::id(),
            COUNTER.fetch_add(1, Ordering::Relaxed),
            crate::store::now_unix_ms() % 1_000_000
        );
        let options = PgConnectOptions::from_str(admin_url)
            .map_err(|e| format!("{URL_VARIABLE}={admin_url:?} is not a PostgreSQL URL: {e}"))?;
        let mut admin = options.connect().await.map_err(|e| {
            format!("cannot connect to the test PostgreSQL server ({URL_VARIABLE}): {e}")
        })?;
        sqlx::query(AssertSqlSafe(format!("CREATE DATABASE {name}")))
            .execute(&mut admin)
            .await
            .map_err(|e| format!("cannot create the test database {name}: {e}"))?;
        let _ = admin.close().await;
        let url = with_database(admin_url, &name);
        Ok(ScratchDatabase {
            admin_url: admin_url.to_string(),
            name,
            url,
        })
    }

    /// The URL of the new database.
    pub fn url(&self) -> &str {
        &self.url
    }
}

impl Drop for ScratchDatabase {
    fn drop(&mut self) {
        // Drop runs outside any runtime's control: a thread with its own runtime ends the
        // database's connections and drops it. Failure only leaves an empty database behind.
        let admin_url = self.admin_url.clone();
        let name = self.name.clone();
        let _ = std::thread::spawn(move || {
            let Ok(runtime) = tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()
            else {
                return;
            };
            runtime.block_on(async {
                let Ok(options) = PgConnectOptions::from_str(&admin_url) else {
                    return;
                };
                if let Ok(mut admin) = options.connect().await {
                    let _ = sqlx::query(AssertSqlSafe(format!(
                        "DROP DATABASE IF EXISTS {name} WITH (FORCE)"
                    )))
                    .execute(&mut admin)
                    .await;
                    let _ = admin.close().await;
                }
            });
        })
        .join();
    }
}

/// `url` with its database path replaced by `name` (query parameters kept).
fn with_database(url: &str, name: &str) -> String {
    let (base, query) = match url.split_once('?') {
        Some((b, q)) => (b, Some(q)),
        None => (url, None),
    };
    let authority_start = base.find("://").map(|i| i + 3).unwrap_or(0);
    let base = match base[authority_start..].find('/') {
        Some(slash) => &base[..authority_start + slash],
        None => base,
    };
    match query {
        Some(q) => format!("{base}/{name}?{q}"),
        None => format!("{base}/{name}"),
    }
}

#[cfg(test)]
mod tests {
    use super::with_database;

    #[test]
    fn the_database_name_is_replaced_and_parameters_kept() {
        assert_eq!(
            with_database("postgres://u@127.0.0.1:5432/halfwave", "t1"),
            "postgres://u@127.0.0.1:5432/t1"
        );
        assert_eq!(
            with_database("postgres://u:p@h/db?sslmode=disable", "t2"),
            "postgres://u:p@h/t2?sslmode=disable"
        );
        assert_eq!(
            with_database("postgres://h:5432", "t3"),
            "postgres://h:5432/t3"
        );
    }
}
