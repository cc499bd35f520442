//! Build script: rebuilds when a migration file is added, and records the git commit the binary was built from, for the record every run keeps
//! (`halfwave::version::software_version`). `HALFWAVE_GIT_COMMIT` in the environment wins (a
//! packager building from a tarball sets it); otherwise `git rev-parse` is asked, and a build
//! outside a git checkout (or without git) simply has no commit. Never fails the build.

use std::path::PathBuf;
use std::process::Command;

fn git(args: &[&str]) -> Option<String> {
    let out = Command::new("git").args(args).output().ok()?;
    if !out.status.success() {
        return None;
    }
    let text = String::from_utf8(out.stdout).ok()?.trim().to_string();
    (!text.is_empty()).then_some(text)
}

fn main() {
    // The migration sets are embedded by `sqlx::migrate!`, which stable Rust cannot tell cargo
    // about: a new migration file must rebuild the crate.
    println!("cargo:rerun-if-changed=../migrations");
    println!("cargo:rerun-if-changed=../migrations-postgres");
    println!("cargo:rerun-if-env-changed=HALFWAVE_GIT_COMMIT");
    let commit = std::env::var("HALFWAVE_GIT_COMMIT")
        .ok()
        .filter(|c| !c.trim().is_empty())
        .or_else(|| {
            // Rebuild when HEAD moves: the worktree's HEAD file and the ref it points at.
            // A missing file would make cargo run this script on every build, so only
            // existing files are named (a packed ref is watched through `packed-refs`).
            let watch = |path: PathBuf| {
                if path.is_file() {
                    println!("cargo:rerun-if-changed={}", path.display());
                }
            };
            if let Some(git_dir) = git(&["rev-parse", "--absolute-git-dir"]) {
                watch(PathBuf::from(&git_dir).join("HEAD"));
                if let (Some(reference), Some(common)) = (
                    git(&["symbolic-ref", "-q", "HEAD"]),
                    git(&["rev-parse", "--path-format=absolute", "--git-common-dir"]),
                ) {
                    watch(PathBuf::from(&common).join(reference));
                    watch(PathBuf::from(&common).join("packed-refs"));
                }
            }
            git(&["rev-parse", "--short=12", "HEAD"])
        });
    if let Some(commit) = commit {
        // Only hexadecimal digits and the usual separators reach the binary.
        let clean: String = commit
            .chars()
            .filter(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '.' | '_'))
            .take(64)
            .collect();
        println!("cargo:rustc-env=HALFWAVE_GIT_COMMIT={clean}");
    }
}
