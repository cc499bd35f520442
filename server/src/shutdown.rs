//! Waiting for the signal to stop: Ctrl-C (SIGINT) or SIGTERM (systemd, container runtimes).
//!
//! One small module so that the daemon and the demo stop the same way: the caller awaits
//! [`signal`], then asks the engine to shut down, which leaves every RF output off.

/// Resolves when the process receives SIGINT or SIGTERM; returns the signal's name.
pub async fn signal() -> &'static str {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        match signal(SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = tokio::signal::ctrl_c() => "SIGINT",
                    _ = term.recv() => "SIGTERM",
                }
            }
            Err(e) => {
                tracing::warn!(error = %e, "cannot listen for SIGTERM; only Ctrl-C stops the daemon cleanly");
                let _ = tokio::signal::ctrl_c().await;
                "SIGINT"
            }
        }
    }
    #[cfg(not(unix))]
    {
        let _ = tokio::signal::ctrl_c().await;
        "Ctrl-C"
    }
}
