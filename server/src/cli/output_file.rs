//! Where a command writes its result: stdout, or a file that is never overwritten by surprise.
//!
//! `--output FILE` refuses a file that already exists unless `--force` is given (a stored run's
//! export written over last month's by a slip of the shell history is a lost record), and writes
//! through a temporary file in the same directory renamed into place, so a failure half way never
//! leaves a cut file under the wanted name.

use super::CliError;
use clap::Args;
use std::io::Write;
use std::path::{Path, PathBuf};

/// `--output FILE [--force]`, for commands that write a result.
#[derive(Debug, Clone, Args)]
pub struct OutputArgs {
    /// Write to this file instead of stdout.
    #[arg(long, short)]
    pub output: Option<PathBuf>,
    /// Replace the --output file if it exists.
    #[arg(long)]
    pub force: bool,
}

impl OutputArgs {
    /// Refuses now an `--output` file that exists (without `--force`), before a command asks the
    /// daemon for anything: the operator hears of the clash first, not after the warnings of a
    /// long export. [`OutputArgs::write`] checks again (the file may appear meanwhile).
    pub fn check_free(&self) -> Result<(), CliError> {
        match &self.output {
            Some(path) if !self.force && path.exists() => Err(already_exists(path)),
            _ => Ok(()),
        }
    }

    /// Writes `text` where these options say.
    pub fn write(&self, text: &str) -> Result<(), CliError> {
        write_result(text, self.output.as_deref(), self.force)
    }
}

/// Writes `text` to stdout, or to `output` (refusing an existing file unless `force`).
pub fn write_result(text: &str, output: Option<&Path>, force: bool) -> Result<(), CliError> {
    let Some(path) = output else {
        out!("{text}");
        return Ok(());
    };
    if !force && path.exists() {
        return Err(already_exists(path));
    }
    let directory = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let cannot = |e: std::io::Error| {
        CliError::new(format!(
            "cannot write {}: {e}; check that the directory exists and is writable",
            path.display()
        ))
    };
    let mut file = tempfile::NamedTempFile::new_in(directory).map_err(cannot)?;
    file.write_all(text.as_bytes()).map_err(cannot)?;
    file.as_file().sync_all().map_err(cannot)?;
    file.persist(path).map_err(|e| cannot(e.error))?;
    Ok(())
}

fn already_exists(path: &Path) -> CliError {
    CliError::new(format!(
        "{} already exists; choose another --output or add --force to replace it",
        path.display()
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_existing_file_is_kept_unless_forced() {
        let dir = tempfile::tempdir().expect("a temporary directory");
        let path = dir.path().join("run2.csv");
        std::fs::write(&path, "last month's export").expect("written");
        let refused = write_result("new", Some(&path), false).expect_err("refused");
        assert!(refused.to_string().contains("--force"), "{refused}");
        assert_eq!(
            std::fs::read_to_string(&path).unwrap(),
            "last month's export"
        );
        write_result("new", Some(&path), true).expect("forced");
        assert_eq!(std::fs::read_to_string(&path).unwrap(), "new");
        let fresh = dir.path().join("fresh.csv");
        write_result("first", Some(&fresh), false).expect("a new file");
        assert_eq!(std::fs::read_to_string(&fresh).unwrap(), "first");
    }
}
