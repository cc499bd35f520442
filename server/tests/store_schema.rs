//! The two migration sets (`migrations/` for SQLite, `migrations-postgres/` for PostgreSQL) give
//! the same schema: the same migration numbers applied, the same tables, the same columns with
//! the same nullability and broad type (integer, real, text, bytes, boolean), the same primary
//! keys and the same other indexes (columns and uniqueness). Each is read from the database's own
//! catalogue (SQLite's `pragma_table_info` / `pragma_index_list`, PostgreSQL's
//! `information_schema` and `pg_index`), not from the migration files. Needs a PostgreSQL server
//! (`.ci/with-postgres`).

mod store_support;

use halfwave::store::{DbPool, Store};
use std::collections::BTreeMap;

/// A table's columns (name -> (broad type, not null)), primary key, and other indexes as
/// (columns, unique), sorted.
#[derive(Debug, PartialEq, Eq)]
struct Table {
    columns: BTreeMap<String, (String, bool)>,
    primary_key: Vec<String>,
    indexes: Vec<(Vec<String>, bool)>,
}

#[derive(Debug, PartialEq, Eq)]
struct Schema {
    migrations: Vec<i64>,
    tables: BTreeMap<String, Table>,
}

fn broad_type(declared: &str) -> String {
    match declared.to_ascii_lowercase().as_str() {
        "integer" | "bigint" => "integer",
        "double precision" => "real",
        "text" => "text",
        "bytea" => "bytes",
        "boolean" => "boolean",
        other => panic!("column type {other:?} has no broad type in this test; add it"),
    }
    .to_string()
}

async fn sqlite_schema(pool: &sqlx::SqlitePool) -> Schema {
    let migrations: Vec<i64> =
        sqlx::query_scalar("SELECT version FROM _sqlx_migrations ORDER BY version")
            .fetch_all(pool)
            .await
            .unwrap();
    let names: Vec<String> = sqlx::query_scalar(
        "SELECT name FROM sqlite_master WHERE type = 'table' \
         AND name NOT LIKE 'sqlite_%' AND name NOT LIKE '_sqlx%' ORDER BY name",
    )
    .fetch_all(pool)
    .await
    .unwrap();
    let mut tables = BTreeMap::new();
    for name in names {
        let rows: Vec<(String, String, i64, i64)> = sqlx::query_as(
            "SELECT name, type, \"notnull\", pk FROM pragma_table_info($1) ORDER BY cid",
        )
        .bind(&name)
        .fetch_all(pool)
        .await
        .unwrap();
        let mut primary: Vec<(i64, String)> = rows
            .iter()
            .filter(|r| r.3 > 0)
            .map(|r| (r.3, r.0.clone()))
            .collect();
        primary.sort();
        let columns = rows
            .iter()
            .map(|(column, declared, not_null, pk)| {
                (
                    column.clone(),
                    (broad_type(declared), *not_null != 0 || *pk > 0),
                )
            })
            .collect();
        let index_rows: Vec<(String, i64, String)> =
            sqlx::query_as("SELECT name, \"unique\", origin FROM pragma_index_list($1)")
                .bind(&name)
                .fetch_all(pool)
                .await
                .unwrap();
        let mut indexes = Vec::new();
        for (index, unique, origin) in index_rows {
            if origin == "pk" {
                continue;
            }
            let columns: Vec<String> =
                sqlx::query_scalar("SELECT name FROM pragma_index_info($1) ORDER BY seqno")
                    .bind(&index)
                    .fetch_all(pool)
                    .await
                    .unwrap();
            indexes.push((columns, unique != 0));
        }
        indexes.sort();
        tables.insert(
            name,
            Table {
                columns,
                primary_key: primary.into_iter().map(|p| p.1).collect(),
                indexes,
            },
        );
    }
    Schema { migrations, tables }
}

async fn postgres_schema(pool: &sqlx::PgPool) -> Schema {
    let migrations: Vec<i64> =
        sqlx::query_scalar("SELECT version FROM _sqlx_migrations ORDER BY version")
            .fetch_all(pool)
            .await
            .unwrap();
    let names: Vec<String> = sqlx::query_scalar(
        "SELECT table_name::text FROM information_schema.tables WHERE table_schema = 'public' \
         AND table_type = 'BASE TABLE' AND table_name NOT LIKE '\\_sqlx%' ORDER BY 1",
    )
    .fetch_all(pool)
    .await
    .unwrap();
    let mut tables = BTreeMap::new();
    for name in names {
        let rows: Vec<(String, String, String)> = sqlx::query_as(
            "SELECT column_name::text, data_type::text, is_nullable::text \
             FROM information_schema.columns WHERE table_schema = 'public' AND table_name = $1",
        )
        .bind(&name)
        .fetch_all(pool)
        .await
        .unwrap();
        let columns = rows
            .iter()
            .map(|(column, declared, nullable)| {
                (column.clone(), (broad_type(declared), nullable == "NO"))
            })
            .collect();
        let index_rows: Vec<(bool, bool, String)> = sqlx::query_as(
            "SELECT ix.indisprimary, ix.indisunique, \
                 array_to_string(ARRAY(SELECT a.attname::text FROM unnest(ix.indkey) WITH ORDINALITY AS k(attnum, ord) \
                     JOIN pg_attribute a ON a.attrelid = t.oid AND a.attnum = k.attnum ORDER BY k.ord), ',') \
             FROM pg_index ix JOIN pg_class t ON t.oid = ix.indrelid \
             JOIN pg_namespace n ON n.oid = t.relnamespace \
             WHERE n.nspname = 'public' AND t.relname = $1",
        )
        .bind(&name)
        .fetch_all(pool)
        .await
        .unwrap();
        let mut primary_key = Vec::new();
        let mut indexes = Vec::new();
        for (primary, unique, columns) in index_rows {
            let columns: Vec<String> = columns.split(',').map(str::to_string).collect();
            if primary {
                primary_key = columns;
            } else {
                indexes.push((columns, unique));
            }
        }
        indexes.sort();
        tables.insert(
            name,
            Table {
                columns,
                primary_key,
                indexes,
            },
        );
    }
    Schema { migrations, tables }
}

#[tokio::test]
async fn both_migration_sets_give_the_same_schema() {
    let sqlite = Store::open_in_memory().await.unwrap();
    let DbPool::Sqlite(sqlite_pool) = sqlite.pool() else {
        panic!("open_in_memory is SQLite")
    };
    let sqlite_schema = sqlite_schema(sqlite_pool).await;

    let pg = store_support::postgres_store("schema").await;
    let DbPool::Postgres(pg_pool) = pg.store.pool() else {
        panic!("a postgres:// URL opens PostgreSQL")
    };
    let postgres_schema = postgres_schema(pg_pool).await;
    pg.store.close().await;

    // The comparison is only worth something if the catalogue reads found the schema.
    assert_eq!(sqlite_schema.migrations, (1..=14).collect::<Vec<i64>>());
    assert!(sqlite_schema.tables.contains_key("chain_calibration_runs"));
    assert!(sqlite_schema.tables.contains_key("bench_leases"));
    assert!(sqlite_schema.tables["points"].columns.len() >= 16);
    assert_eq!(sqlite_schema.tables["devices"].primary_key, vec!["id"]);
    assert!(sqlite_schema.tables["runs"]
        .indexes
        .contains(&(vec!["state".to_string()], false)));

    for (name, table) in &sqlite_schema.tables {
        let other = postgres_schema
            .tables
            .get(name)
            .unwrap_or_else(|| panic!("table {name} is missing from PostgreSQL"));
        assert_eq!(
            table, other,
            "table {name} differs (left SQLite, right PostgreSQL)"
        );
    }
    assert_eq!(sqlite_schema, postgres_schema);
}
