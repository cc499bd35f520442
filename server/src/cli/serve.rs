//! `halfwave serve`: the daemon. Configuration in, engine and HTTP API up, RF off on the way out.
//!
//! Start-up order matters for safety: the configuration is checked first (nothing starts
//! half-configured), then a SQLite daemon claims its data store (`data_claim`: a second daemon on
//! the same database exits here, naming the first, having changed nothing), then it binds its
//! port (a taken port also stops it before any instrument is touched), then the store is opened
//! and migrated; on a shared PostgreSQL database the daemon now takes the leases of its benches
//! (`bench_lease`: a bench a live daemon holds stops it here, naming the holder), and only then
//! does the engine switch every configured source off and mark runs left running (on its own
//! benches) as interrupted, before the HTTP listener accepts requests. A lease lost while running
//! (another daemon took a bench over) shuts the daemon down like a signal. On SIGINT or SIGTERM the
//! listener stops taking requests and, at once rather than after the HTTP connections have
//! drained, the engine cancels the active runs (they become interrupted, so they can be resumed)
//! and switches every source off before the process exits; then the webhook notifier
//! (`crate::notify`, started after the engine, its secrets read before anything else) records
//! the interruptions and makes its last delivery pass.

use super::CliError;
use crate::bench_lease::{BenchLeases, Claim};
use crate::config::Config;
use crate::data_claim::DataClaim;
use crate::engine::Engine;
use crate::store::{Backend, Store};
use clap::Args;
use std::path::{Path, PathBuf};

#[derive(Debug, Args)]
pub struct ServeArgs {
    /// The configuration file (see deploy/halfwave.toml for a commented example); default:
    /// $HALFWAVE_CONFIG, else /etc/halfwave/halfwave.toml.
    #[arg(long, short)]
    pub config: Option<PathBuf>,
}

/// Runs the daemon until a shutdown signal.
pub fn run(args: ServeArgs) -> Result<(), CliError> {
    let path = crate::config::config_path(args.config.as_deref()).map_err(CliError::new)?;
    let config = Config::load(&path).map_err(|e| CliError::new(e.to_string()))?;
    // The blocking threads analyse a run's points (two at once, `engine::runner`); each keeps its
    // fit's buffers, so they end a second after their last point rather than tokio's ten, and an
    // idle daemon does not hold them.
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .thread_keep_alive(std::time::Duration::from_secs(1))
        .enable_all()
        .build()
        .map_err(|e| CliError::caused("cannot start the async runtime", e))?;
    runtime.block_on(serve(config, Some(path)))
}

/// What to do first when the database holds no active token: every API call but the health
/// check needs one, so the dashboard would stay empty.
async fn token_hint(store: &Store, config_path: Option<&Path>) -> Option<String> {
    let tokens = crate::api::tokens::list(store.pool()).await.ok()?;
    if tokens.iter().any(|t| t.revoked_at_unix_ms.is_none()) {
        return None;
    }
    let config = config_path
        .map(|p| format!(" --config {}", p.display()))
        .unwrap_or_default();
    Some(format!(
        "no API token exists yet: create one in another terminal with `halfwave token create{config} --role operator --name NAME` and paste it into the dashboard (or set HALFWAVE_TOKEN for the CLI)"
    ))
}

/// What to do when the database holds no drive chain a lab stored: a plan then has only the flat
/// loss, which gives a wrong V_pi wherever the real chain is not flat.
async fn chain_hint(store: &Store) -> Option<String> {
    let chains = store.chain_calibrations().await.ok()?;
    if chains
        .iter()
        .any(|c| !crate::engine::is_flat_loss_name(&c.name))
    {
        return None;
    }
    Some(
        "no drive chain is stored yet: upload the bench's with `halfwave chain upload NAME FILE.csv` (admin token; `import` takes Touchstone files) and name it in plans; a flat loss gives a wrong V_pi wherever the real chain is not flat".to_string(),
    )
}

/// Opens the store, starts the engine and serves the API until SIGINT/SIGTERM. `config_path`
/// (the file the configuration came from) is only used in hints.
pub async fn serve(config: Config, config_path: Option<PathBuf>) -> Result<(), CliError> {
    // Webhook secrets are read before anything starts: a missing one stops the daemon here.
    let receivers = crate::notify::settings::resolve(
        &config.webhooks,
        |name| std::env::var(name).ok(),
        |path| config.resolve(path),
    )
    .map_err(CliError::new)?;
    let (engine, listener, claim) = start(&config).await?;
    let notifier = crate::notify::Notifier::start(&engine, receivers);
    let address = listener
        .local_addr()
        .map_err(|e| CliError::caused("cannot read the bound address", e))?;
    // Before the announcement: a supervisor may send SIGTERM as soon as it reads it.
    let stop_signals = crate::shutdown::StopSignals::install();
    tracing::info!(%address, "halfwave daemon listening");
    outln!("halfwave listening on http://{address}/ (dashboard: http://{address}/dashboard/)");
    if let Some(hint) = token_hint(engine.store(), config_path.as_deref()).await {
        outln!("{hint}");
    }
    if let Some(hint) = chain_hint(engine.store()).await {
        outln!("{hint}");
    }
    let state =
        crate::api::AppState::with_engine(engine.clone(), crate::api::ApiSettings::from_env());
    let lost = claim.lost();
    // The RF goes off as soon as the stop comes, not after the HTTP server has drained: a client
    // that is slow to read a response or sends half a request holds its connection for up to the
    // shutdown grace (`api::connections`), and the outputs must not wait for it.
    let stop_http = tokio_util::sync::CancellationToken::new();
    let http = crate::api::serve_on(listener, state, stop_http.clone().cancelled_owned());
    let stop_engine = async {
        tokio::select! {
            name = stop_signals.wait() => tracing::info!(
                signal = name,
                "shutting down: stopping runs and switching RF off"
            ),
            () = lost => tracing::error!(
                "shutting down: this daemon no longer holds its bench leases; stopping runs and switching RF off"
            ),
        }
        stop_http.cancel();
        engine.shutdown().await;
    };
    let (stopped, ()) = tokio::join!(http, stop_engine);
    // After the engine has switched the sources off: another daemon may take the benches now.
    claim.release().await;
    // After the engine: the runs it interrupted are notified (or kept pending for next time).
    if let Some(notifier) = notifier {
        notifier.shutdown().await;
    }
    stopped.map_err(|e| CliError::caused("the HTTP server failed", e))?;
    outln!("halfwave stopped: runs interrupted where they were, RF outputs off");
    Ok(())
}

/// Claims the data store (SQLite) or binds the listener, opens the store and takes the bench
/// leases (PostgreSQL), then starts the engine (RF off everywhere, recovery), in that order: a
/// daemon that cannot claim its store or benches or bind its port stops before it changes
/// anything. The claim must be kept for as long as the daemon runs.
pub async fn start(config: &Config) -> Result<(Engine, tokio::net::TcpListener, Claim), CliError> {
    config.create_data_dir().map_err(CliError::new)?;
    let url = config.database_url();
    let local = match Backend::of_url(&url) {
        Backend::Sqlite => Some(DataClaim::acquire(config).map_err(CliError::new)?),
        Backend::Postgres => None,
    };
    let listener = tokio::net::TcpListener::bind(config.bind)
        .await
        .map_err(|e| {
            CliError::new(format!(
                "cannot listen on {}: {e}; is another daemon running, or is the port taken?",
                config.bind
            ))
        })?;
    let store = Store::open(&url)
        .await
        .map_err(|e| CliError::new(e.to_string()))?;
    let claim = match local {
        Some(local) => Claim::Local(local),
        None => {
            let listen = listener
                .local_addr()
                .map(|a| a.to_string())
                .unwrap_or_else(|_| config.bind.to_string());
            Claim::Leases(
                BenchLeases::take(&store, config, &listen)
                    .await
                    .map_err(CliError::new)?,
            )
        }
    };
    let engine = Engine::start(config, store)
        .await
        .map_err(|e| CliError::new(e.to_string()))?;
    Ok((engine, listener, claim))
}

#[cfg(test)]
mod tests {
    use super::chain_hint;
    use crate::store::{ChainCalibrationPoint, Store};
    use halfwave_units::{Db, Hz};

    #[tokio::test]
    async fn the_chain_hint_is_given_until_a_lab_stores_a_chain() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("hint.db");
        let store = Store::open(path.to_str().unwrap()).await.unwrap();
        let point = [ChainCalibrationPoint::new(Hz(1e9), Db(-2.0))];
        assert!(chain_hint(&store).await.is_some(), "an empty database");
        // The engine's own row for a plan with a flat loss is not a lab's chain.
        let flat = format!("{}2.00dB", crate::engine::FLAT_LOSS_PREFIX);
        store
            .create_chain_calibration(&flat, "engine", &point)
            .await
            .unwrap();
        assert!(chain_hint(&store).await.is_some(), "only a flat loss");
        store
            .create_chain_calibration("bench-7 chain", "admin", &point)
            .await
            .unwrap();
        assert_eq!(chain_hint(&store).await, None, "a lab's chain is stored");
    }
}
