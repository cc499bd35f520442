//! The software version every run records (`runs.software_version`, migration 0011): the crate
//! version, and the git commit the binary was built from when the build knew it (`build.rs`:
//! `HALFWAVE_GIT_COMMIT` or `git rev-parse`), so a record read months later names the code that
//! measured it.

/// The crate version (`Cargo.toml`, workspace package version).
pub const CRATE_VERSION: &str = env!("CARGO_PKG_VERSION");

/// The git commit the binary was built from (12 hex digits), when the build knew it.
pub const GIT_COMMIT: Option<&str> = option_env!("HALFWAVE_GIT_COMMIT");

/// `halfwave 0.1.0 (git 1a2b3c4d5e6f)`, or `halfwave 0.1.0` without a known commit.
pub fn software_version() -> String {
    match GIT_COMMIT {
        Some(commit) => format!("halfwave {CRATE_VERSION} (git {commit})"),
        None => format!("halfwave {CRATE_VERSION}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_version_names_the_crate_version_and_a_clean_commit() {
        let version = software_version();
        assert!(
            version.starts_with(&format!("halfwave {CRATE_VERSION}")),
            "{version}"
        );
        if let Some(commit) = GIT_COMMIT {
            assert!(!commit.is_empty() && commit.len() <= 64, "{commit}");
            assert!(version.ends_with(&format!("(git {commit})")), "{version}");
        }
    }
}
