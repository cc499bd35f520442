//! Tracing set-up, done once at start-up.
//!
//! Logs go to stderr so that commands printing JSON on stdout stay machine-readable. The level is
//! taken from `HALFWAVE_LOG` (an `EnvFilter` directive such as `info` or `halfwave=debug`), and
//! defaults to `warn` for one-shot commands and `info` for the daemon.

use tracing_subscriber::EnvFilter;

/// Installs the global tracing subscriber. Calling it twice is harmless (the second call is ignored).
pub fn init(default_level: &str) {
    let filter =
        EnvFilter::try_from_env("HALFWAVE_LOG").unwrap_or_else(|_| EnvFilter::new(default_level));
    // Colours only on a terminal: a log redirected to a file or a journal gets plain text.
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .try_init();
}
