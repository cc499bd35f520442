//! `halfwave db backup <dest>`: a consistent copy of the database, safe while the daemon runs.
//!
//! The copy is made with SQLite's `VACUUM INTO`, which writes a transactionally consistent
//! snapshot of the live database into a new file through an ordinary read transaction: the
//! daemon keeps committing points meanwhile (WAL mode lets readers and the writer proceed
//! together), and the copy is compact and self-contained (no `-wal` file to carry along). Copying
//! the file with `cp` while the daemon writes can give a torn copy; this cannot. The source is
//! opened read-only and never created or migrated, so a mistyped path is an error rather than a
//! new empty database; the copy is checked with `PRAGMA integrity_check` before success is
//! reported.

use super::runs::{runtime, to_json};
use super::token::DatabaseChoice;
use super::CliError;
use crate::config::Config;
use clap::{Args, Subcommand};
use sqlx::sqlite::SqliteConnectOptions;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::Duration;

/// Database maintenance.
#[derive(Debug, Args)]
pub struct DbCommand {
    #[command(subcommand)]
    pub action: DbAction,
}

#[derive(Debug, Subcommand)]
pub enum DbAction {
    /// Copy the database to a new file (SQLite VACUUM INTO: consistent, safe while the daemon runs).
    Backup {
        /// The new file; it must not exist yet.
        dest: PathBuf,
        #[command(flatten)]
        database: DatabaseChoice,
        /// Print the result as JSON.
        #[arg(long)]
        json: bool,
    },
}

/// What a backup produced.
#[derive(Debug, serde::Serialize)]
pub struct BackupReport {
    pub source: String,
    pub backup: String,
    pub bytes: u64,
    pub runs: i64,
    pub points: i64,
}

/// Runs `halfwave db ...`.
pub fn run(command: DbCommand) -> Result<(), CliError> {
    match command.action {
        DbAction::Backup {
            dest,
            database,
            json,
        } => {
            let (url, relative_note) = source_url(&database)?;
            refuse_postgres(&url)?;
            let report = runtime()?.block_on(backup(&url, &dest, &relative_note))?;
            if json {
                outln!("{}", to_json(&report)?);
            } else {
                outln!(
                    "backup of {} written to {} ({} bytes, {} runs, {} points; integrity check ok)",
                    report.source,
                    report.backup,
                    report.bytes,
                    report.runs,
                    report.points
                );
            }
            Ok(())
        }
    }
}

/// `db backup` is SQLite's `VACUUM INTO`; a PostgreSQL database is backed up with the server's
/// own tool, which copies a consistent snapshot while the daemons write.
pub fn refuse_postgres(url: &str) -> Result<(), CliError> {
    if crate::store::Backend::of_url(url) == crate::store::Backend::Postgres {
        return Err(CliError::new(format!(
            "`halfwave db backup` copies SQLite databases only; {} is PostgreSQL: back it up with `pg_dump --format=custom --file=halfwave-$(date +%F).dump '{}'` (a consistent snapshot, safe while the daemons run; restore with pg_restore), see README \"Several labs on one database\"",
            crate::store::redacted_url(url),
            crate::store::redacted_url(url)
        )));
    }
    Ok(())
}

/// The database to copy, and what to add when its file is missing
/// ([`Config::relative_data_dir_note`]). Unlike `token`, nothing is created: a backup of a
/// database that does not exist is an error.
fn source_url(choice: &DatabaseChoice) -> Result<(String, String), CliError> {
    if let Some(url) = &choice.database {
        return Ok((url.clone(), String::new()));
    }
    let path = crate::config::config_path(choice.config.as_deref())
        .map_err(|e| CliError::new(format!("{e}; or name the database with --database URL")))?;
    let config = Config::load(&path).map_err(|e| CliError::new(e.to_string()))?;
    let note = config.relative_data_dir_note(&path).unwrap_or_default();
    Ok((config.database_url(), note))
}

/// The connect options a `sqlite:` URL or a file path names, parsed as sqlx parses them.
pub fn url_options(url: &str) -> Result<SqliteConnectOptions, CliError> {
    if url.starts_with("sqlite:") {
        SqliteConnectOptions::from_str(url).map_err(|e| {
            CliError::new(format!(
                "{url:?} is not a usable SQLite URL ({e}); give sqlite://PATH or a file path"
            ))
        })
    } else {
        Ok(SqliteConnectOptions::new().filename(url))
    }
}

/// The source's connect options; a missing file is refused naming it, with `missing_note`.
fn source_options(url: &str, missing_note: &str) -> Result<SqliteConnectOptions, CliError> {
    let options = url_options(url)?;
    let file = options.get_filename().to_path_buf();
    if !file.is_file() {
        return Err(CliError::new(format!(
            "there is no database at {}{missing_note}; check --database, or data_dir / database_url in the configuration",
            file.display()
        )));
    }
    Ok(options
        .create_if_missing(false)
        .read_only(true)
        .busy_timeout(Duration::from_secs(30)))
}

/// Copies the database at `url` into the new file `dest` and checks the copy; a missing source
/// file is refused naming it, followed by `missing_note`.
pub async fn backup(url: &str, dest: &Path, missing_note: &str) -> Result<BackupReport, CliError> {
    let options = source_options(url, missing_note)?;
    let source = options.get_filename().display().to_string();
    if dest.exists() {
        return Err(CliError::new(format!(
            "{} already exists; give a new file name (a backup never overwrites)",
            dest.display()
        )));
    }
    if let Some(parent) = dest.parent().filter(|p| !p.as_os_str().is_empty()) {
        if !parent.is_dir() {
            return Err(CliError::new(format!(
                "the directory {} does not exist; create it first",
                parent.display()
            )));
        }
    }
    let dest_text = dest.to_str().ok_or_else(|| {
        CliError::new(format!(
            "{} is not valid UTF-8; choose a plain file name",
            dest.display()
        ))
    })?;
    use crate::store::maintenance::{backup_into, BackupStep};
    let contents = backup_into(options, dest, dest_text)
        .await
        .map_err(|(step, e)| {
            CliError::new(match step {
                BackupStep::OpenSource => format!("cannot open the database {source}: {e}"),
                BackupStep::Copy => format!(
                    "the backup of {source} into {} failed: {e}; check free space and permissions",
                    dest.display()
                ),
                BackupStep::OpenCopy => {
                    format!("cannot open the backup {}: {e}", dest.display())
                }
                BackupStep::IntegrityCheck => {
                    format!("cannot check the backup {}: {e}", dest.display())
                }
                BackupStep::CountRuns => {
                    format!("the backup has no run table ({e}); is {source} a Halfwave database?")
                }
                BackupStep::CountPoints => {
                    format!("the backup has no point table ({e}); is {source} a Halfwave database?")
                }
            })
        })?;
    if contents.integrity != "ok" {
        return Err(CliError::new(format!(
            "the backup {} fails SQLite's integrity check ({}); do not rely on it, and check the disk",
            dest.display(),
            contents.integrity
        )));
    }
    let (runs, points) = (contents.runs, contents.points);
    let bytes = std::fs::metadata(dest).map(|m| m.len()).unwrap_or(0);
    Ok(BackupReport {
        source,
        backup: dest.display().to_string(),
        bytes,
        runs,
        points,
    })
}
