//! The `[[webhook]]` tables of the daemon's configuration, and resolving their secrets.
//!
//! A receiver is a URL, a shared secret and optionally the event types it wants. The secret never
//! sits in the configuration file: `secret_env` names an environment variable holding it, or
//! `secret_file` a file whose content (without its trailing line break) is the secret. Exactly one
//! of the two must be given. The file is checked when it is read (unknown keys and event types are
//! refused); the secret itself is read when the daemon starts ([`resolve`]), so that commands that
//! only read the configuration (`token`, `db backup`) do not need it.

use serde::{Deserialize, Serialize};
use std::path::PathBuf;
use std::time::Duration;

/// Shortest secret accepted, in bytes.
pub const MIN_SECRET_BYTES: usize = 16;

/// The kinds of event a receiver can be sent.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum EventKind {
    #[serde(rename = "run.completed")]
    RunCompleted,
    #[serde(rename = "run.failed")]
    RunFailed,
    #[serde(rename = "run.interrupted")]
    RunInterrupted,
    #[serde(rename = "run.cancelled")]
    RunCancelled,
    /// A bench entered (or moved within) a safety hold: `output_unconfirmed` or
    /// `awaiting_acknowledgement`.
    #[serde(rename = "bench.hold")]
    BenchHold,
    /// An operator acknowledged the hold; the bench takes runs again.
    #[serde(rename = "bench.hold_cleared")]
    BenchHoldCleared,
}

impl EventKind {
    /// Every kind, in the order the README lists them.
    pub const ALL: [EventKind; 6] = [
        EventKind::RunCompleted,
        EventKind::RunFailed,
        EventKind::RunInterrupted,
        EventKind::RunCancelled,
        EventKind::BenchHold,
        EventKind::BenchHoldCleared,
    ];

    /// The name in the configuration, the payload and the `Halfwave-Event` header.
    pub fn as_str(self) -> &'static str {
        match self {
            EventKind::RunCompleted => "run.completed",
            EventKind::RunFailed => "run.failed",
            EventKind::RunInterrupted => "run.interrupted",
            EventKind::RunCancelled => "run.cancelled",
            EventKind::BenchHold => "bench.hold",
            EventKind::BenchHoldCleared => "bench.hold_cleared",
        }
    }
}

/// One `[[webhook]]` table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WebhookConfig {
    /// Where to POST (`http://` or `https://`).
    pub url: String,
    /// The environment variable holding the shared secret.
    #[serde(default)]
    pub secret_env: Option<String>,
    /// A file holding the shared secret (relative to the configuration file).
    #[serde(default)]
    pub secret_file: Option<PathBuf>,
    /// The event types to send; every type when absent.
    #[serde(default)]
    pub events: Option<Vec<EventKind>>,
    /// Attempts before a delivery is given up as failed.
    #[serde(default = "default_max_attempts")]
    pub max_attempts: u32,
    /// Pause before the first retry; it doubles after each failed attempt.
    #[serde(default = "default_first_retry_s")]
    pub first_retry_s: f64,
    /// The longest pause between attempts.
    #[serde(default = "default_max_retry_s")]
    pub max_retry_s: f64,
    /// Time limit of one attempt (connect, send, answer).
    #[serde(default = "default_timeout_s")]
    pub timeout_s: f64,
}

fn default_max_attempts() -> u32 {
    10
}
fn default_first_retry_s() -> f64 {
    10.0
}
fn default_max_retry_s() -> f64 {
    3600.0
}
fn default_timeout_s() -> f64 {
    10.0
}

/// A field of `webhook[i]` and what is wrong with it.
pub type FieldError = (String, String);

impl WebhookConfig {
    /// Checks one table; the error names the field (`webhook[0].url`).
    pub fn check(&self, index: usize) -> Result<(), FieldError> {
        let field = |name: &str| format!("webhook[{index}].{name}");
        match reqwest::Url::parse(&self.url) {
            Ok(url) if matches!(url.scheme(), "http" | "https") && url.host().is_some() => {}
            Ok(url) => {
                return Err((
                    field("url"),
                    format!(
                        "{:?} is not an http:// or https:// URL with a host (scheme {:?})",
                        self.url,
                        url.scheme()
                    ),
                ))
            }
            Err(e) => return Err((field("url"), format!("{:?} is not a URL: {e}", self.url))),
        }
        match (&self.secret_env, &self.secret_file) {
            (Some(_), Some(_)) => {
                return Err((
                    field("secret_env"),
                    "give secret_env or secret_file, not both".into(),
                ))
            }
            (None, None) => {
                return Err((
                    field("secret_env"),
                    "a receiver needs a shared secret: set secret_env (an environment variable) or secret_file (a file holding it)".into(),
                ))
            }
            (Some(name), None) if name.trim().is_empty() => {
                return Err((
                    field("secret_env"),
                    "name an environment variable".into(),
                ))
            }
            _ => {}
        }
        if let Some(events) = &self.events {
            if events.is_empty() {
                return Err((
                    field("events"),
                    "an empty list sends nothing; leave the key out to send every event type, or remove the receiver".into(),
                ));
            }
        }
        if !(1..=100).contains(&self.max_attempts) {
            return Err((
                field("max_attempts"),
                format!("must be from 1 to 100, got {}", self.max_attempts),
            ));
        }
        for (name, value, low, high) in [
            ("first_retry_s", self.first_retry_s, 0.01, 86_400.0),
            ("max_retry_s", self.max_retry_s, 0.01, 86_400.0),
            ("timeout_s", self.timeout_s, 0.1, 300.0),
        ] {
            if !value.is_finite() || !(low..=high).contains(&value) {
                return Err((
                    field(name),
                    format!("must be a number of seconds from {low} to {high}, got {value}"),
                ));
            }
        }
        if self.max_retry_s < self.first_retry_s {
            return Err((
                field("max_retry_s"),
                format!(
                    "must be at least first_retry_s ({} s), got {} s",
                    self.first_retry_s, self.max_retry_s
                ),
            ));
        }
        Ok(())
    }

    /// Whether this receiver wants events of `kind`.
    pub fn wants(&self, kind: EventKind) -> bool {
        self.events.as_ref().is_none_or(|e| e.contains(&kind))
    }
}

/// A receiver ready to be sent to: its secret read.
#[derive(Clone)]
pub struct Receiver {
    pub config: WebhookConfig,
    pub secret: Vec<u8>,
}

impl std::fmt::Debug for Receiver {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Receiver")
            .field("url", &self.config.url)
            .field("secret", &"<hidden>")
            .finish()
    }
}

impl Receiver {
    /// The pause after `attempts` failed attempts: `first_retry_s` doubled per attempt after the
    /// first, capped at `max_retry_s`; `None` when the attempts are used up.
    pub fn retry_after(&self, attempts: u32) -> Option<Duration> {
        if attempts >= self.config.max_attempts {
            return None;
        }
        let doubling = 2f64.powi(i32::try_from(attempts.saturating_sub(1)).unwrap_or(i32::MAX));
        let pause = (self.config.first_retry_s * doubling).min(self.config.max_retry_s);
        Some(Duration::from_secs_f64(pause))
    }
}

/// Reads every receiver's secret: from the environment variable `secret_env` (looked up in
/// `env`) or the file `secret_file` (resolved with `resolve_path`). The error names the key.
pub fn resolve(
    webhooks: &[WebhookConfig],
    env: impl Fn(&str) -> Option<String>,
    resolve_path: impl Fn(&std::path::Path) -> PathBuf,
) -> Result<Vec<Receiver>, String> {
    let mut receivers = Vec::with_capacity(webhooks.len());
    for (i, hook) in webhooks.iter().enumerate() {
        let (key, secret) = match (&hook.secret_env, &hook.secret_file) {
            (Some(name), _) => (
                format!("webhook[{i}].secret_env"),
                env(name).ok_or_else(|| {
                    format!(
                        "configuration: webhook[{i}].secret_env: the environment variable {name} is not set; set it to the receiver's shared secret"
                    )
                })?,
            ),
            (None, Some(path)) => {
                let path = resolve_path(path);
                let text = std::fs::read_to_string(&path).map_err(|e| {
                    format!(
                        "configuration: webhook[{i}].secret_file: cannot read {}: {e}",
                        path.display()
                    )
                })?;
                if let Some(warning) = loose_secret_file(&path) {
                    tracing::warn!("configuration: webhook[{i}].secret_file: {warning}");
                }
                (
                    format!("webhook[{i}].secret_file"),
                    text.trim_end_matches(['\r', '\n']).to_string(),
                )
            }
            (None, None) => {
                return Err(format!(
                    "configuration: webhook[{i}].secret_env: no secret configured"
                ))
            }
        };
        if secret.len() < MIN_SECRET_BYTES {
            return Err(format!(
                "configuration: {key}: the secret is {} bytes long; use at least {MIN_SECRET_BYTES} (for example 32 random bytes as hex: `openssl rand -hex 32`)",
                secret.len()
            ));
        }
        receivers.push(Receiver {
            config: hook.clone(),
            secret: secret.into_bytes(),
        });
    }
    Ok(receivers)
}

/// What is wrong with a secret file that users other than its owner may read (README,
/// "Notifications": a file readable only by the daemon's user), for a warning at start; `None`
/// when only its owner may read or write it, and on systems without Unix permissions.
pub fn loose_secret_file(path: &std::path::Path) -> Option<String> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        let mode = std::fs::metadata(path).ok()?.permissions().mode() & 0o777;
        (mode & 0o077 != 0).then(|| {
            format!(
                "{} is readable or writable by other users (mode {mode:03o}): anyone who reads it can sign notifications; make it the daemon user's only (chmod 600)",
                path.display()
            )
        })
    }
    #[cfg(not(unix))]
    {
        let _ = path;
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[cfg(unix)]
    #[test]
    fn a_secret_file_others_may_read_is_named_for_a_warning() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("webhook.secret");
        std::fs::write(&path, "0123456789abcdef0123456789abcdef\n").unwrap();
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o644)).unwrap();
        let warning = loose_secret_file(&path).expect("a 644 file is named");
        assert!(
            warning.contains("mode 644") && warning.contains("chmod 600"),
            "{warning}"
        );
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o600)).unwrap();
        assert_eq!(loose_secret_file(&path), None);
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o640)).unwrap();
        assert!(loose_secret_file(&path).is_some());
    }

    fn hook(extra: &str) -> Result<WebhookConfig, String> {
        toml::from_str(&format!("url = \"http://192.0.2.7:9000/hook\"\n{extra}"))
            .map_err(|e| e.to_string())
    }

    #[test]
    fn exactly_one_secret_source_is_required() {
        let err = hook("").unwrap().check(0).unwrap_err();
        assert_eq!(err.0, "webhook[0].secret_env");
        let err = hook("secret_env = \"A\"\nsecret_file = \"b\"")
            .unwrap()
            .check(2)
            .unwrap_err();
        assert_eq!(err.0, "webhook[2].secret_env");
        assert!(err.1.contains("not both"), "{}", err.1);
        assert!(hook("secret_env = \"A\"").unwrap().check(0).is_ok());
    }

    #[test]
    fn a_bad_url_event_or_retry_setting_is_named() {
        let err = hook("secret_env = \"A\"").unwrap();
        let err = WebhookConfig {
            url: "ftp://192.0.2.7/x".into(),
            ..err
        }
        .check(1)
        .unwrap_err();
        assert_eq!(err.0, "webhook[1].url");
        let parse_err = hook("secret_env = \"A\"\nevents = [\"run.complete\"]").unwrap_err();
        assert!(parse_err.contains("run.complete"), "{parse_err}");
        assert!(parse_err.contains("run.completed"), "{parse_err}");
        let err = hook("secret_env = \"A\"\nevents = []")
            .unwrap()
            .check(0)
            .unwrap_err();
        assert_eq!(err.0, "webhook[0].events");
        let err = hook("secret_env = \"A\"\nfirst_retry_s = 60\nmax_retry_s = 30")
            .unwrap()
            .check(0)
            .unwrap_err();
        assert_eq!(err.0, "webhook[0].max_retry_s");
        let err = hook("secret_env = \"A\"\nmax_attempts = 0")
            .unwrap()
            .check(0)
            .unwrap_err();
        assert_eq!(err.0, "webhook[0].max_attempts");
    }

    #[test]
    fn the_event_filter_selects_kinds() {
        let all = hook("secret_env = \"A\"").unwrap();
        assert!(EventKind::ALL.iter().all(|k| all.wants(*k)));
        let some = hook("secret_env = \"A\"\nevents = [\"run.failed\", \"bench.hold\"]").unwrap();
        assert!(some.wants(EventKind::RunFailed) && some.wants(EventKind::BenchHold));
        assert!(!some.wants(EventKind::RunCompleted));
    }

    #[test]
    fn backoff_doubles_is_capped_and_stops_at_the_attempt_limit() {
        let config =
            hook("secret_env = \"A\"\nfirst_retry_s = 10\nmax_retry_s = 60\nmax_attempts = 6")
                .unwrap();
        let r = Receiver {
            config,
            secret: vec![],
        };
        let pauses: Vec<_> = (1..=6)
            .map(|a| r.retry_after(a).map(|d| d.as_secs()))
            .collect();
        assert_eq!(
            pauses,
            [Some(10), Some(20), Some(40), Some(60), Some(60), None]
        );
    }

    #[test]
    fn secrets_come_from_the_environment_or_a_file_and_must_be_long_enough() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("s"), "0123456789abcdef0123\n").unwrap();
        let from_file = hook("secret_file = \"s\"").unwrap();
        let from_env = hook("secret_env = \"HOOK_SECRET\"").unwrap();
        let base = dir.path().to_path_buf();
        let resolved = resolve(
            &[from_file.clone(), from_env.clone()],
            |name| (name == "HOOK_SECRET").then(|| "fedcba9876543210".to_string()),
            |p| base.join(p),
        )
        .unwrap();
        assert_eq!(resolved[0].secret, b"0123456789abcdef0123");
        assert_eq!(resolved[1].secret, b"fedcba9876543210");
        assert!(!format!("{:?}", resolved[0]).contains("0123456789"));

        let err = resolve(
            std::slice::from_ref(&from_env),
            |_| None,
            |p| p.to_path_buf(),
        )
        .unwrap_err();
        assert!(
            err.contains("webhook[0].secret_env") && err.contains("HOOK_SECRET"),
            "{err}"
        );
        let err = resolve(&[from_env], |_| Some("short".into()), |p| p.to_path_buf()).unwrap_err();
        assert!(err.contains("at least 16"), "{err}");
        let err = resolve(
            &[from_file],
            |_| None,
            |p| PathBuf::from("/nonexistent").join(p),
        )
        .unwrap_err();
        assert!(err.contains("webhook[0].secret_file"), "{err}");
    }
}
