//! `halfwave token create|list|revoke` against a database file, through the real binary.

use std::process::Command;

fn halfwave(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_halfwave"))
        .args(args)
        .output()
        .expect("the halfwave binary runs")
}

#[tokio::test]
async fn create_prints_once_list_hides_secrets_revoke_disables() {
    let dir = tempfile::tempdir().unwrap();
    let database = dir.path().join("tokens.sqlite");
    let database = database.to_str().unwrap();

    // A mistyped database path is refused, not made into a new empty database whose token the
    // daemon would refuse.
    let typo = dir.path().join("tokns.sqlite");
    let refused = halfwave(&[
        "token",
        "create",
        "--role",
        "operator",
        "--name",
        "lab-b",
        "--database",
        typo.to_str().unwrap(),
    ]);
    assert!(!refused.status.success());
    let said = String::from_utf8_lossy(&refused.stderr);
    assert!(
        said.contains("there is no database") && said.contains("--create"),
        "{said}"
    );
    assert!(!typo.exists(), "nothing is created");
    let listed_typo = halfwave(&["token", "list", "--database", typo.to_str().unwrap()]);
    assert!(!listed_typo.status.success());
    assert!(!typo.exists());

    let created = halfwave(&[
        "token",
        "create",
        "--role",
        "operator",
        "--name",
        "lab-b",
        "--database",
        database,
        "--create",
    ]);
    assert!(
        created.status.success(),
        "{}",
        String::from_utf8_lossy(&created.stderr)
    );
    let token = String::from_utf8(created.stdout)
        .unwrap()
        .trim()
        .to_string();
    assert!(token.starts_with("hwt_"));

    let store = halfwave::store::Store::open(database).await.unwrap();
    let holder = halfwave::api::tokens::authenticate(store.pool(), &token)
        .await
        .unwrap()
        .unwrap();
    assert_eq!(holder.name, "lab-b");
    assert_eq!(holder.role, halfwave::api::tokens::Role::Operator);

    let listed = halfwave(&["token", "list", "--database", database]);
    assert!(listed.status.success());
    let listed = String::from_utf8(listed.stdout).unwrap();
    assert!(listed.contains("lab-b") && !listed.contains(&token));
    assert!(
        listed.contains("operator") && listed.contains("active"),
        "a table: {listed}"
    );
    let listed_json = halfwave(&["token", "list", "--json", "--database", database]);
    assert!(listed_json.status.success());
    let rows: serde_json::Value = serde_json::from_slice(&listed_json.stdout).expect("JSON");
    assert_eq!(rows[0]["name"], "lab-b");
    assert_eq!(rows[0]["role"], "operator");

    let again = halfwave(&[
        "token",
        "create",
        "--role",
        "viewer",
        "--name",
        "lab-b",
        "--database",
        database,
    ]);
    assert!(!again.status.success());
    assert!(String::from_utf8_lossy(&again.stderr).contains("already exists"));

    let bad_role = halfwave(&[
        "token",
        "create",
        "--role",
        "root",
        "--name",
        "x",
        "--database",
        database,
    ]);
    assert!(!bad_role.status.success());
    assert!(String::from_utf8_lossy(&bad_role.stderr).contains("viewer, operator or admin"));

    let revoked = halfwave(&["token", "revoke", "--name", "lab-b", "--database", database]);
    assert!(revoked.status.success());
    assert!(halfwave::api::tokens::authenticate(store.pool(), &token)
        .await
        .unwrap()
        .is_none());

    let no_database = halfwave(&["token", "list"]);
    assert!(!no_database.status.success());
    assert!(String::from_utf8_lossy(&no_database.stderr).contains("--database"));

    // A mistyped --database: `token create` may be told --create, `token list` (which has no
    // such option) is not.
    let missing = format!("{database}-typo");
    let listed = halfwave(&["token", "list", "--database", &missing]);
    let said = String::from_utf8_lossy(&listed.stderr);
    assert!(
        !listed.status.success() && said.contains("there is no database at"),
        "{said}"
    );
    assert!(!said.contains("--create"), "{said}");
    let created = halfwave(&[
        "token",
        "create",
        "--role",
        "viewer",
        "--name",
        "x",
        "--database",
        &missing,
    ]);
    let said = String::from_utf8_lossy(&created.stderr);
    assert!(
        !created.status.success() && said.contains("add --create"),
        "{said}"
    );
}

/// A configuration whose `data_dir` is relative names another file from another working
/// directory: `token list` there refuses, naming the path and the directory it was read against,
/// and creates nothing (it used to create an empty database there, which a backup then copied
/// as if it were the daemon's); `token create` makes the database, as at the daemon's first start,
/// and says where.
#[test]
fn a_relative_data_dir_read_from_another_directory_makes_no_database_unasked() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("lab.toml");
    std::fs::write(
        &config,
        "data_dir = \"lab-data\"\n\n[[bench]]\nname = \"sim-bench\"\nsource = { kind = \"simulated\" }\nanalyzer = { kind = \"simulated\" }\n[bench.simulation]\n",
    )
    .unwrap();
    let elsewhere = dir.path().join("elsewhere");
    std::fs::create_dir(&elsewhere).unwrap();
    let run = |args: &[&str]| {
        Command::new(env!("CARGO_BIN_EXE_halfwave"))
            .args(args)
            .current_dir(&elsewhere)
            .output()
            .expect("the halfwave binary runs")
    };
    let config = config.to_str().unwrap();
    // Refused, naming the missing file and the directory a relative data_dir was read from.
    let refused_naming_the_directory = |output: std::process::Output| {
        assert!(!output.status.success());
        let said = String::from_utf8_lossy(&output.stderr);
        assert!(
            said.contains("there is no database at")
                && said.contains("lab-data")
                && said.contains("relative to the working directory")
                && said.contains("elsewhere"),
            "{said}"
        );
    };
    refused_naming_the_directory(run(&["token", "list", "--config", config]));
    assert!(!elsewhere.join("lab-data").exists(), "nothing is created");
    // `db backup` with the same configuration says the same of the database it would copy.
    refused_naming_the_directory(run(&["db", "backup", "copy.db", "--config", config]));
    assert!(!elsewhere.join("copy.db").exists(), "no copy is made");

    let created = run(&[
        "token", "create", "--role", "admin", "--name", "first", "--config", config,
    ]);
    assert!(
        created.status.success(),
        "{}",
        String::from_utf8_lossy(&created.stderr)
    );
    let said = String::from_utf8_lossy(&created.stderr);
    assert!(
        said.contains("creating it") && said.contains("lab-data"),
        "{said}"
    );
    assert!(elsewhere.join("lab-data").join("halfwave.db").is_file());
    let listed = run(&["token", "list", "--config", config]);
    assert!(listed.status.success());
    assert!(String::from_utf8_lossy(&listed.stdout).contains("first"));
}
