//! The `api_tokens` table: the SQL behind `crate::api::tokens` (which owns the rules: token
//! format, digests, roles, names). Functions take the pool so that `halfwave token`, which opens
//! the database without starting the daemon, uses them too.

use super::DbPool;

/// A stored token row, without its digest: name, role, created, created by, revoked.
pub type TokenRow = (i64, String, String, i64, String, Option<i64>);

/// Inserts a token; a unique violation (an active token of that name) comes back as the
/// database's error for the caller to name.
pub async fn insert(
    pool: &DbPool,
    name: &str,
    role: &str,
    digest: &str,
    created_at_unix_ms: i64,
    created_by: &str,
) -> Result<(), sqlx::Error> {
    on_pool!(pool, pool => sqlx::query(
        "INSERT INTO api_tokens (name, role, token_sha256, created_at_unix_ms, created_by) \
         VALUES ($1, $2, $3, $4, $5)",
    )
    .bind(name)
    .bind(role)
    .bind(digest)
    .bind(created_at_unix_ms)
    .bind(created_by)
    .execute(pool)
    .await.map(|done| done.rows_affected()))?;
    Ok(())
}

/// Marks the active token of this name revoked at `at_unix_ms`; returns whether one was.
pub async fn revoke(pool: &DbPool, name: &str, at_unix_ms: i64) -> Result<bool, sqlx::Error> {
    let done = on_pool!(pool, pool => sqlx::query(
        "UPDATE api_tokens SET revoked_at_unix_ms = $1 WHERE name = $2 AND revoked_at_unix_ms IS NULL",
    )
    .bind(at_unix_ms)
    .bind(name)
    .execute(pool)
    .await.map(|done| done.rows_affected()))?;
    Ok(done > 0)
}

/// Every token, active and revoked, oldest first.
pub async fn list(pool: &DbPool) -> Result<Vec<TokenRow>, sqlx::Error> {
    on_pool!(pool, pool => sqlx::query_as(
        "SELECT id, name, role, created_at_unix_ms, created_by, revoked_at_unix_ms \
         FROM api_tokens ORDER BY id",
    )
    .fetch_all(pool)
    .await)
}

/// Id, name and role of the active token with this digest.
pub async fn active_by_digest(
    pool: &DbPool,
    digest: &str,
) -> Result<Option<(i64, String, String)>, sqlx::Error> {
    on_pool!(pool, pool => sqlx::query_as(
        "SELECT id, name, role FROM api_tokens WHERE token_sha256 = $1 AND revoked_at_unix_ms IS NULL",
    )
    .bind(digest)
    .fetch_optional(pool)
    .await)
}
