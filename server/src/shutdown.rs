//! Waiting for the signal to stop: Ctrl-C (SIGINT) or SIGTERM (systemd, container runtimes).
//!
//! One small module so that the daemon and the demo stop the same way: the caller installs
//! [`StopSignals`] before it announces that it is up (a SIGTERM sent the moment after the
//! announcement must find a handler, not the default action that kills the process with RF on),
//! awaits [`StopSignals::wait`], then asks the engine to shut down, which leaves every RF output
//! off.

#[cfg(unix)]
use tokio::signal::unix::{Signal, SignalKind};

/// The stop signals' handlers, installed when this is made.
pub struct StopSignals {
    #[cfg(unix)]
    interrupt: Option<Signal>,
    #[cfg(unix)]
    terminate: Option<Signal>,
}

impl StopSignals {
    /// Installs the handlers for SIGINT and SIGTERM now; from here on neither signal kills the
    /// process, they make [`StopSignals::wait`] resolve.
    pub fn install() -> StopSignals {
        #[cfg(unix)]
        {
            let install = |kind: SignalKind, name: &str| match tokio::signal::unix::signal(kind) {
                Ok(handler) => Some(handler),
                Err(e) => {
                    tracing::warn!(error = %e, signal = name, "cannot listen for this signal; it will not stop the daemon cleanly");
                    None
                }
            };
            StopSignals {
                interrupt: install(SignalKind::interrupt(), "SIGINT"),
                terminate: install(SignalKind::terminate(), "SIGTERM"),
            }
        }
        #[cfg(not(unix))]
        {
            StopSignals {}
        }
    }

    /// Resolves when the process receives SIGINT or SIGTERM; returns the signal's name.
    pub async fn wait(self) -> &'static str {
        #[cfg(unix)]
        {
            async fn next(handler: Option<Signal>) {
                match handler {
                    Some(mut handler) => {
                        handler.recv().await;
                    }
                    None => std::future::pending::<()>().await,
                }
            }
            tokio::select! {
                () = next(self.interrupt) => "SIGINT",
                () = next(self.terminate) => "SIGTERM",
            }
        }
        #[cfg(not(unix))]
        {
            let _ = tokio::signal::ctrl_c().await;
            "Ctrl-C"
        }
    }
}

/// Installs the handlers and waits: for callers that announce nothing before waiting.
pub async fn signal() -> &'static str {
    StopSignals::install().wait().await
}
