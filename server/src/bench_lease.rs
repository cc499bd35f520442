//! The daemon's claim on its benches when the database is shared (PostgreSQL): the bench leases
//! of `store::leases`, taken before any instrument is touched, renewed by a heartbeat task, and
//! released on a clean shutdown.
//!
//! A SQLite daemon claims its whole data store with the local lock of [`crate::data_claim`]
//! instead; [`Claim`] is either. The heartbeat renews the leases every third of the expiry; when a
//! renewal finds a lease gone (another daemon took it over because this one stalled past the
//! expiry) or no renewal has succeeded for a whole expiry (the database unreachable), the lease
//! is no longer trusted and [`BenchLeases::lost`] fires: `serve` then shuts the daemon down,
//! which stops its runs and switches its sources off, rather than drive a bench another daemon
//! may now drive.

use crate::config::Config;
use crate::data_claim::DataClaim;
use crate::store::leases::{LeaseHolder, LeaseTaken};
use crate::store::Store;
use std::time::{Duration, Instant};
use tokio_util::sync::CancellationToken;

/// What keeps other daemons off this daemon's data: the local lock (SQLite) or the bench leases
/// (PostgreSQL). Keep it for as long as the daemon runs.
#[derive(Debug)]
pub enum Claim {
    Local(DataClaim),
    Leases(BenchLeases),
}

impl Claim {
    /// A future that completes when the claim can no longer be trusted (a lease lost); never
    /// for a local lock.
    pub fn lost(&self) -> impl std::future::Future<Output = ()> + Send + 'static {
        let token = match self {
            Claim::Local(_) => None,
            Claim::Leases(leases) => Some(leases.lost.clone()),
        };
        async move {
            match token {
                Some(token) => token.cancelled_owned().await,
                None => std::future::pending().await,
            }
        }
    }

    /// Gives the claim up at a clean shutdown (the leases are deleted, the lock released).
    pub async fn release(self) {
        match self {
            Claim::Local(claim) => drop(claim),
            Claim::Leases(leases) => leases.release().await,
        }
    }
}

/// This daemon's bench leases, with their heartbeat.
#[derive(Debug)]
pub struct BenchLeases {
    store: Store,
    holder: LeaseHolder,
    lost: CancellationToken,
    heartbeat: tokio::task::JoinHandle<()>,
}

impl BenchLeases {
    /// Takes the leases of every configured bench for this process (listening on `listen`), all
    /// or none; on refusal the message names each holder. Benches taken over from a daemon that
    /// died are logged; the engine's start-up interlock (run next) switches their sources off and
    /// marks their running runs interrupted.
    pub async fn take(store: &Store, config: &Config, listen: &str) -> Result<BenchLeases, String> {
        let holder = LeaseHolder::this_process(listen);
        let benches: Vec<String> = config.benches.iter().map(|b| b.name.clone()).collect();
        let expiry = Duration::from_secs_f64(config.bench_lease_expiry_s);
        let expiry_ms = expiry.as_millis() as i64;
        let taken = store
            .take_bench_leases(&holder, &benches, expiry_ms)
            .await
            .map_err(|e| format!("cannot take the benches' leases: {e}"))?;
        for taken in &taken {
            match taken {
                LeaseTaken::Fresh { bench_name } => {
                    tracing::info!(bench = %bench_name, holder = %holder.holder, "bench lease taken");
                }
                LeaseTaken::TakenOver { previous } => {
                    tracing::warn!(
                        bench = %previous.bench_name,
                        previous = %previous.holder.describe(),
                        "bench lease taken over from a daemon whose lease expired; its source is switched off and its running runs marked interrupted next"
                    );
                }
            }
        }
        let lost = CancellationToken::new();
        let heartbeat = tokio::spawn(heartbeat(
            store.clone(),
            holder.holder.clone(),
            benches.len() as u64,
            expiry,
            lost.clone(),
        ));
        Ok(BenchLeases {
            store: store.clone(),
            holder,
            lost,
            heartbeat,
        })
    }

    /// This daemon as the leases name it.
    pub fn holder(&self) -> &LeaseHolder {
        &self.holder
    }

    /// Stops the heartbeat and deletes the leases (a clean shutdown: the next daemon need not
    /// wait for them to expire).
    pub async fn release(self) {
        self.heartbeat.abort();
        match self.store.release_bench_leases(&self.holder.holder).await {
            Ok(n) => tracing::info!(leases = n, "bench leases released"),
            Err(e) => {
                tracing::warn!(error = %e, "could not release the bench leases; they expire by themselves")
            }
        }
    }
}

impl Drop for BenchLeases {
    fn drop(&mut self) {
        self.heartbeat.abort();
    }
}

/// Renews the leases every third of `expiry` until they are lost.
async fn heartbeat(
    store: Store,
    holder: String,
    count: u64,
    expiry: Duration,
    lost: CancellationToken,
) {
    let period = expiry / 3;
    let expiry_ms = expiry.as_millis() as i64;
    let mut last_renewed = Instant::now();
    loop {
        tokio::time::sleep(period).await;
        match store.renew_bench_leases(&holder, expiry_ms).await {
            Ok(renewed) if renewed >= count => last_renewed = Instant::now(),
            Ok(renewed) => {
                tracing::error!(
                    held = renewed,
                    taken = count,
                    "a bench lease was taken over by another daemon (this one stalled past the lease expiry); stopping"
                );
                lost.cancel();
                return;
            }
            Err(e) => {
                tracing::warn!(error = %e, "could not renew the bench leases; retrying");
                if last_renewed.elapsed() >= expiry {
                    tracing::error!(
                        "no bench lease renewal succeeded for a whole expiry; another daemon may take the benches over; stopping"
                    );
                    lost.cancel();
                    return;
                }
            }
        }
    }
}
