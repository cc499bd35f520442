//! Bench leases (table `bench_leases`, migration 0013): which daemon drives each bench when
//! several daemons share one database (PostgreSQL, one daemon per bench PC).
//!
//! A daemon takes the leases of all its benches at start-up, all or none, before it touches an
//! instrument ([`Store::take_bench_leases`]); a bench whose lease is live (its expiry not yet
//! passed) is refused naming the holder; a lease past its expiry belonged to a daemon that died
//! and is taken over (the caller then runs its start-up interlock on that bench). The holder
//! renews its leases ([`Store::renew_bench_leases`]) well within the expiry and deletes them on a
//! clean shutdown ([`Store::release_bench_leases`]). Every time is the database server's clock,
//! so bench PCs with skewed clocks still agree on what has expired. The statements also run on
//! SQLite (the tests use that), but a SQLite daemon claims its store with the local lock of
//! `crate::data_claim` instead.

use super::{Backend, Store, StoreError};
use sqlx::AssertSqlSafe;

/// Who holds, or asks for, bench leases: one running daemon.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LeaseHolder {
    /// Unique per daemon process: host, pid and start time.
    pub holder: String,
    pub host: String,
    pub pid: i64,
    /// The daemon's HTTP listen address, where its benches' runs are submitted.
    pub listen: String,
}

impl LeaseHolder {
    /// This process, listening on `listen`.
    pub fn this_process(listen: &str) -> LeaseHolder {
        let host = crate::data_claim::host_name();
        let pid = std::process::id();
        LeaseHolder {
            holder: format!("{host}:{pid}:{}", super::now_unix_ms()),
            host,
            pid: i64::from(pid),
            listen: listen.to_string(),
        }
    }

    /// "pid P on host H (listening on L)".
    pub fn describe(&self) -> String {
        format!(
            "pid {} on host {} (listening on {})",
            self.pid, self.host, self.listen
        )
    }
}

/// A stored lease, with the database's clock when it was read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BenchLease {
    pub bench_name: String,
    pub holder: LeaseHolder,
    pub acquired_at_unix_ms: i64,
    pub heartbeat_at_unix_ms: i64,
    pub expires_at_unix_ms: i64,
    /// The database's time of the read.
    pub read_at_unix_ms: i64,
}

impl BenchLease {
    /// Whether the holder is still alive as far as the lease says (its expiry not passed).
    pub fn is_live(&self) -> bool {
        self.expires_at_unix_ms >= self.read_at_unix_ms
    }

    /// The holder and the lease's age, for messages.
    pub fn describe(&self) -> String {
        format!(
            "the halfwave daemon {}, last heartbeat {:.1} s ago, lease expiring in {:.1} s",
            self.holder.describe(),
            (self.read_at_unix_ms - self.heartbeat_at_unix_ms) as f64 / 1000.0,
            (self.expires_at_unix_ms - self.read_at_unix_ms) as f64 / 1000.0
        )
    }
}

/// What taking the leases found, per bench.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum LeaseTaken {
    /// No lease existed (or it was already ours).
    Fresh { bench_name: String },
    /// The previous holder's lease had expired: it is ours now, and the bench needs the start-up
    /// interlock (source off, its running runs interrupted).
    TakenOver { previous: BenchLease },
}

/// The database's clock in Unix milliseconds, as an SQL expression of each backend.
fn db_now(backend: Backend) -> &'static str {
    match backend {
        Backend::Postgres => "CAST(EXTRACT(EPOCH FROM clock_timestamp()) * 1000 AS BIGINT)",
        Backend::Sqlite => "CAST((julianday('now') - 2440587.5) * 86400000 AS BIGINT)",
    }
}

type LeaseRow = (String, String, String, i64, String, i64, i64, i64, i64);

fn lease_from_row(row: LeaseRow) -> BenchLease {
    let (bench_name, holder, host, pid, listen, acquired, heartbeat, expires, now) = row;
    BenchLease {
        bench_name,
        holder: LeaseHolder {
            holder,
            host,
            pid,
            listen,
        },
        acquired_at_unix_ms: acquired,
        heartbeat_at_unix_ms: heartbeat,
        expires_at_unix_ms: expires,
        read_at_unix_ms: now,
    }
}

impl Store {
    /// Takes the leases of `benches` for `me`, valid for `expiry_ms` from now, in one
    /// transaction: all of them, or none and [`StoreError::BenchHeld`] naming every live holder.
    pub async fn take_bench_leases(
        &self,
        me: &LeaseHolder,
        benches: &[String],
        expiry_ms: i64,
    ) -> Result<Vec<LeaseTaken>, StoreError> {
        let now = db_now(self.backend());
        let lock = match self.backend() {
            Backend::Postgres => " FOR UPDATE",
            Backend::Sqlite => "",
        };
        let insert = format!(
            "INSERT INTO bench_leases (bench_name, holder, host, pid, listen, acquired_at_unix_ms, \
             heartbeat_at_unix_ms, expires_at_unix_ms) \
             VALUES ($1, $2, $3, $4, $5, {now}, {now}, {now} + $6) ON CONFLICT (bench_name) DO NOTHING"
        );
        let select = format!(
            "SELECT bench_name, holder, host, pid, listen, acquired_at_unix_ms, heartbeat_at_unix_ms, \
             expires_at_unix_ms, {now} FROM bench_leases WHERE bench_name = $1{lock}"
        );
        let take_over = format!(
            "UPDATE bench_leases SET holder = $2, host = $3, pid = $4, listen = $5, \
             acquired_at_unix_ms = {now}, heartbeat_at_unix_ms = {now}, expires_at_unix_ms = {now} + $6 \
             WHERE bench_name = $1"
        );
        // One order for every daemon, so two taking overlapping sets cannot deadlock.
        let mut sorted: Vec<&String> = benches.iter().collect();
        sorted.sort();
        sorted.dedup();
        on_pool!(&self.pool, pool => {
            let mut tx = pool
                .begin()
                .await
                .map_err(StoreError::database("starting to take bench leases"))?;
            let mut taken = Vec::new();
            let mut held = Vec::new();
            for bench in sorted {
                sqlx::query(AssertSqlSafe(insert.clone()))
                    .bind(bench.as_str())
                    .bind(&me.holder)
                    .bind(&me.host)
                    .bind(me.pid)
                    .bind(&me.listen)
                    .bind(expiry_ms)
                    .execute(&mut *tx)
                    .await
                    .map_err(StoreError::database("taking a bench lease"))?;
                let row: LeaseRow = sqlx::query_as(AssertSqlSafe(select.clone()))
                    .bind(bench.as_str())
                    .fetch_one(&mut *tx)
                    .await
                    .map_err(StoreError::database("reading a bench lease"))?;
                let lease = lease_from_row(row);
                if lease.holder.holder == me.holder {
                    taken.push(LeaseTaken::Fresh { bench_name: bench.clone() });
                } else if lease.is_live() {
                    held.push(lease);
                } else {
                    sqlx::query(AssertSqlSafe(take_over.clone()))
                        .bind(bench.as_str())
                        .bind(&me.holder)
                        .bind(&me.host)
                        .bind(me.pid)
                        .bind(&me.listen)
                        .bind(expiry_ms)
                        .execute(&mut *tx)
                        .await
                        .map_err(StoreError::database("taking over an expired bench lease"))?;
                    let detail = serde_json::json!({
                        "holder": me.holder,
                        "previous_holder": lease.holder.holder,
                        "previous_host": lease.holder.host,
                        "previous_pid": lease.holder.pid,
                        "previous_heartbeat_at_unix_ms": lease.heartbeat_at_unix_ms,
                    });
                    super::audit::audit_in!(
                        tx,
                        super::now_unix_ms(),
                        super::runs::DAEMON_ACTOR,
                        "bench.lease_taken_over",
                        &format!("bench:{bench}"),
                        &detail.to_string(),
                    )?;
                    taken.push(LeaseTaken::TakenOver { previous: lease });
                }
            }
            if !held.is_empty() {
                drop(tx);
                let detail: Vec<String> = held
                    .iter()
                    .map(|l| format!("bench {:?} is held by {}", l.bench_name, l.describe()))
                    .collect();
                return Err(StoreError::BenchHeld {
                    detail: detail.join("; "),
                });
            }
            tx.commit()
                .await
                .map_err(StoreError::database("committing bench leases"))?;
            Ok(taken)
        })
    }

    /// Renews every lease `holder` holds for `expiry_ms` from now; returns how many it still
    /// holds (fewer than it took means another daemon took one over: this one stalled past its
    /// expiry).
    pub async fn renew_bench_leases(
        &self,
        holder: &str,
        expiry_ms: i64,
    ) -> Result<u64, StoreError> {
        let now = db_now(self.backend());
        let sql = format!(
            "UPDATE bench_leases SET heartbeat_at_unix_ms = {now}, expires_at_unix_ms = {now} + $2 \
             WHERE holder = $1"
        );
        on_pool!(&self.pool, pool => sqlx::query(AssertSqlSafe(sql))
            .bind(holder)
            .bind(expiry_ms)
            .execute(pool)
            .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("renewing bench leases"))
    }

    /// Deletes every lease `holder` holds (a clean shutdown); returns how many.
    pub async fn release_bench_leases(&self, holder: &str) -> Result<u64, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query("DELETE FROM bench_leases WHERE holder = $1")
            .bind(holder)
            .execute(pool)
            .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("releasing bench leases"))
    }

    /// The lease of a bench, live or expired, if one is stored.
    pub async fn bench_lease(&self, bench_name: &str) -> Result<Option<BenchLease>, StoreError> {
        let now = db_now(self.backend());
        let sql = format!(
            "SELECT bench_name, holder, host, pid, listen, acquired_at_unix_ms, heartbeat_at_unix_ms, \
             expires_at_unix_ms, {now} FROM bench_leases WHERE bench_name = $1"
        );
        let row: Option<LeaseRow> = on_pool!(&self.pool, pool => sqlx::query_as(AssertSqlSafe(sql))
            .bind(bench_name)
            .fetch_optional(pool)
            .await)
        .map_err(StoreError::database("reading a bench lease"))?;
        Ok(row.map(lease_from_row))
    }
}
