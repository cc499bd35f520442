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
}
