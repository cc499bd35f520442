//! `halfwave token create|revoke|list`: manage API tokens directly in the database.
//!
//! This is how the first admin token comes to exist, and it works while the daemon is down. The
//! database is the one named by `--database URL` (a `sqlite:` URL or a file path) or by the
//! configuration file given with `--config FILE` (default: `$HALFWAVE_CONFIG`, else
//! `/etc/halfwave/halfwave.toml`). A created token is printed once, on stdout, and
//! only its SHA-256 digest is stored.

use super::text_table::{Align, TextTable};
use super::CliError;
use crate::api::tokens::{self, Role};
use crate::config::Config;
use crate::store::Store;
use clap::{Args, Subcommand};
use std::path::PathBuf;

/// Where the database is.
#[derive(Debug, Args)]
pub struct DatabaseChoice {
    /// The daemon's configuration file (its database is used); default: $HALFWAVE_CONFIG, else
    /// /etc/halfwave/halfwave.toml.
    #[arg(long, value_name = "FILE", conflicts_with = "database")]
    pub config: Option<PathBuf>,
    /// The database: a `sqlite:` URL or a file path.
    #[arg(long, value_name = "URL")]
    pub database: Option<String>,
}

/// Manage API tokens (roles: viewer reads, operator also runs sweeps, admin also manages tokens
/// and chain calibrations).
#[derive(Debug, Args)]
pub struct TokenCommand {
    #[command(subcommand)]
    pub action: TokenAction,
}

#[derive(Debug, Subcommand)]
pub enum TokenAction {
    /// Create a token and print it once.
    Create {
        /// viewer, operator or admin.
        #[arg(long)]
        role: String,
        /// Who holds it (appears in the audit log), e.g. "lab-b".
        #[arg(long)]
        name: String,
        #[command(flatten)]
        database: DatabaseChoice,
        /// Create the --database file when it does not exist yet (a database named in the
        /// configuration is created without it: that is the daemon's own, before its first start).
        #[arg(long)]
        create: bool,
    },
    /// Revoke the active token of this name.
    Revoke {
        #[arg(long)]
        name: String,
        #[command(flatten)]
        database: DatabaseChoice,
    },
    /// List tokens (never their secrets): a table, or JSON with --json.
    List {
        #[command(flatten)]
        database: DatabaseChoice,
        /// Print JSON for scripts instead of a table.
        #[arg(long)]
        json: bool,
    },
}

/// The database the choice names: its URL, and for a configuration file the configuration (whose
/// data directory `token create` may have to make before the daemon's first start).
fn chosen_database(
    choice: &DatabaseChoice,
) -> Result<(String, Option<(PathBuf, Config)>), CliError> {
    if let Some(url) = &choice.database {
        return Ok((url.clone(), None));
    }
    let path = crate::config::config_path(choice.config.as_deref())
        .map_err(|e| CliError::new(format!("{e}; or name the database with --database URL")))?;
    let config = Config::load(&path).map_err(|e| CliError::new(e.to_string()))?;
    Ok((config.database_url(), Some((path, config))))
}

/// What [`open`] does when the SQLite file does not exist.
#[derive(Clone, Copy, PartialEq)]
enum IfMissing {
    /// Make it (`token create` from a configuration file, or with `--create`).
    Create,
    /// Refuse, suggesting `--create` (`token create` with a `--database` file without it).
    RefuseSuggestingCreate,
    /// Refuse (`token list`, `token revoke`, which cannot make one).
    Refuse,
}

/// Opens the chosen database. A SQLite file that does not exist is made only by `token create`:
/// with `--database` only when `--create` is given (a typo must not make a new empty database and
/// a token the daemon will refuse), from a configuration file as the daemon would at its first
/// start, saying where. `token list` and `token revoke` refuse it, naming the path and, for a
/// relative `data_dir`, the working directory it was read against (run from another directory,
/// the same configuration names another file); only `token create` suggests --create.
async fn open(choice: &DatabaseChoice, if_missing: IfMissing) -> Result<Store, CliError> {
    let (url, config) = chosen_database(choice)?;
    if crate::store::Backend::of_url(&url) == crate::store::Backend::Sqlite {
        let options = super::db::url_options(&url)?;
        let file = options.get_filename();
        let in_memory = file.as_os_str().is_empty() || file.as_os_str() == ":memory:";
        if !in_memory && !file.exists() {
            let relative = config
                .as_ref()
                .and_then(|(path, c)| c.relative_data_dir_note(path))
                .unwrap_or_default();
            match (&config, if_missing == IfMissing::Create) {
                (None, false) => {
                    let or_create = if if_missing == IfMissing::RefuseSuggestingCreate {
                        ", or add --create to make a new one"
                    } else {
                        ""
                    };
                    return Err(CliError::new(format!(
                        "there is no database at {}; check --database (the daemon's is `data_dir`/halfwave.db of its configuration, or pass --config FILE){or_create}",
                        file.display()
                    )));
                }
                (Some(_), false) => {
                    return Err(CliError::new(format!(
                        "there is no database at {}{relative}",
                        file.display()
                    )))
                }
                (Some((_, c)), true) => {
                    c.create_data_dir().map_err(CliError::new)?;
                    eprintln!(
                        "note: no database at {} yet; creating it, as the daemon does at its first start{relative}",
                        file.display()
                    );
                }
                (None, true) => {}
            }
        }
    }
    Store::open(&url)
        .await
        .map_err(|e| CliError::new(e.to_string()))
}

/// Runs `halfwave token ...`.
pub fn run(command: TokenCommand) -> Result<(), CliError> {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| CliError::caused("could not start the async runtime", e))?;
    runtime.block_on(async move {
        match command.action {
            TokenAction::Create {
                role,
                name,
                database,
                create,
            } => {
                let role: Role = role.parse().map_err(CliError::new)?;
                // From a configuration file the database may be made here (before the daemon's first
                // start); a --database file only with --create.
                let if_missing = if create || database.database.is_none() {
                    IfMissing::Create
                } else {
                    IfMissing::RefuseSuggestingCreate
                };
                let store = open(&database, if_missing).await?;
                let created = tokens::create(store.pool(), &name, role, "cli")
                    .await
                    .map_err(|e| CliError::new(e.to_string()))?;
                let _ = store
                    .append_audit("cli", "token.create", &name, &format!("role {role}"))
                    .await;
                eprintln!(
                    "token {:?} ({}) created; it is shown once, store it now:",
                    created.name, created.role
                );
                outln!("{}", created.token);
                Ok(())
            }
            TokenAction::Revoke { name, database } => {
                let store = open(&database, IfMissing::Refuse).await?;
                tokens::revoke(store.pool(), &name)
                    .await
                    .map_err(|e| CliError::new(e.to_string()))?;
                let _ = store.append_audit("cli", "token.revoke", &name, "").await;
                eprintln!("token {name:?} revoked");
                Ok(())
            }
            TokenAction::List { database, json } => {
                let store = open(&database, IfMissing::Refuse).await?;
                let list = tokens::list(store.pool())
                    .await
                    .map_err(|e| CliError::new(e.to_string()))?;
                if json {
                    let json = serde_json::to_string_pretty(&list)
                        .map_err(|e| CliError::caused("could not encode the list", e))?;
                    outln!("{json}");
                    return Ok(());
                }
                if list.is_empty() {
                    outln!("no tokens yet; create one with `halfwave token create --role operator --name NAME`");
                    return Ok(());
                }
                let mut table = TextTable::new(&[
                    ("id", Align::Right),
                    ("name", Align::Left),
                    ("role", Align::Left),
                    ("created", Align::Left),
                    ("state", Align::Left),
                ]);
                for token in &list {
                    table.row(token_row(token));
                }
                out!("{}", table.render());
                Ok(())
            }
        }
    })
}

/// One token as a table row: id, name, role, creation date, and whether it is active.
fn token_row(token: &tokens::TokenInfo) -> Vec<String> {
    let state = match token.revoked_at_unix_ms {
        Some(at) => format!("revoked {}", super::report::utc_time(at)),
        None => "active".to_string(),
    };
    vec![
        token.id.to_string(),
        token.name.clone(),
        token.role.to_string(),
        super::report::utc_time(token.created_at_unix_ms),
        state,
    ]
}
