//! The daemon's exclusive claim on its data store: one `halfwave serve` per database.
//!
//! Two daemons on one database would each think they own the benches: the second one's start-up
//! interlock would switch the first one's source off mid-sweep and mark its running run
//! interrupted. So `serve` takes this claim before it opens the store or touches an instrument,
//! and a second daemon exits naming the holder. The claim is an advisory lock held on a small
//! file next to the database (`<database file>.claim`, or `halfwave.claim` in the data directory
//! for a database that is not a local file), by the operating system's file locking (`flock` on
//! Linux): it ends with the process however it ends, SIGKILL included, so a crashed daemon never
//! leaves a stale claim. The file's content (pid, host, start time, listen address) is only there
//! to name the holder. A shared database served to several machines (PostgreSQL) is claimed bench
//! by bench with leases in the database instead (`crate::bench_lease`); `serve::start` makes the
//! choice from the database URL.

use crate::config::Config;
use std::fs::{File, OpenOptions, TryLockError};
use std::io::{Read, Seek, Write};
use std::path::{Path, PathBuf};

/// The held claim; dropping it (or the process ending) releases it.
#[derive(Debug)]
pub struct DataClaim {
    path: PathBuf,
    _file: File,
}

/// Who holds a claim, as written in its file.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ClaimHolder {
    pub pid: u32,
    pub host: String,
    pub since_unix_ms: i64,
    pub listen: String,
}

impl DataClaim {
    /// Takes the claim on the configured database, or explains who holds it. Nothing else is
    /// touched on failure.
    pub fn acquire(config: &Config) -> Result<DataClaim, String> {
        let path = claim_path(config);
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(|e| {
                format!(
                    "cannot open the claim file {}: {e}; check the data directory's permissions",
                    path.display()
                )
            })?;
        match file.try_lock() {
            Ok(()) => {}
            Err(TryLockError::WouldBlock) => {
                let mut text = String::new();
                let _ = file.read_to_string(&mut text);
                let holder = match serde_json::from_str::<ClaimHolder>(&text) {
                    Ok(h) => format!(
                        "pid {} on host {}, listening on {}, since {}",
                        h.pid,
                        h.host,
                        h.listen,
                        crate::calendar::utc_time(h.since_unix_ms)
                    ),
                    Err(_) => "a process that has not written its name yet".to_string(),
                };
                return Err(format!(
                    "another halfwave daemon holds this data store ({}): {holder}. Stop it first, or give this daemon its own data directory (--config, HALFWAVE_DATA_DIR); nothing was changed",
                    path.display()
                ));
            }
            Err(TryLockError::Error(e)) => {
                return Err(format!(
                    "cannot lock the claim file {}: {e}; the file system may not support locks (use a local disk for the data directory)",
                    path.display()
                ))
            }
        }
        let holder = ClaimHolder {
            pid: std::process::id(),
            host: host_name(),
            since_unix_ms: crate::store::now_unix_ms(),
            listen: config.bind.to_string(),
        };
        let written = serde_json::to_vec(&holder)
            .map_err(std::io::Error::other)
            .and_then(|bytes| {
                file.set_len(0)?;
                file.rewind()?;
                file.write_all(&bytes)?;
                file.flush()
            });
        if let Err(e) = written {
            // The lock is what matters; the name is for the message of a second daemon.
            tracing::warn!(path = %path.display(), error = %e, "could not write the claim holder's name");
        }
        Ok(DataClaim { path, _file: file })
    }

    /// The claim file.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// `<database file>.claim` for a local SQLite file, else `halfwave.claim` in the data directory.
pub fn claim_path(config: &Config) -> PathBuf {
    let url = config.database_url();
    let file = url
        .strip_prefix("sqlite://")
        .or_else(|| url.strip_prefix("sqlite:"))
        .map(|rest| rest.split('?').next().unwrap_or(rest))
        .filter(|p| !p.is_empty() && !p.contains(":memory:"));
    match file {
        Some(p) => {
            let mut name = PathBuf::from(p).into_os_string();
            name.push(".claim");
            PathBuf::from(name)
        }
        None => config.data_dir.join("halfwave.claim"),
    }
}

pub(crate) fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .or_else(|_| std::fs::read_to_string("/etc/hostname"))
        .map(|s| s.trim().to_string())
        .ok()
        .filter(|s| !s.is_empty())
        .unwrap_or_else(|| "unknown".into())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn config_in(dir: &Path) -> Config {
        Config::simulated(dir.to_path_buf(), 0.0, 1)
    }

    #[test]
    fn a_second_claim_on_the_same_store_is_refused_naming_the_holder() {
        let dir = tempfile::tempdir().expect("temporary directory");
        let config = config_in(dir.path());
        let first = DataClaim::acquire(&config).expect("the first claim");
        assert!(first.path().ends_with("halfwave.db.claim"));
        let second = DataClaim::acquire(&config).expect_err("the second claim must fail");
        assert!(
            second.contains(&format!("pid {}", std::process::id())),
            "{second}"
        );
        assert!(second.contains("nothing was changed"), "{second}");
        drop(first);
        DataClaim::acquire(&config).expect("free again once the holder is gone");
    }

    #[test]
    fn the_claim_sits_next_to_the_database_file() {
        let dir = tempfile::tempdir().expect("temporary directory");
        let mut config = config_in(dir.path());
        config.database_url = Some(format!(
            "sqlite://{}/other.db?mode=rwc",
            dir.path().display()
        ));
        assert_eq!(claim_path(&config), dir.path().join("other.db.claim"));
        config.database_url = Some("sqlite::memory:".into());
        assert_eq!(claim_path(&config), dir.path().join("halfwave.claim"));
    }
}
