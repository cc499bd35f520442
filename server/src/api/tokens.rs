//! API tokens: random bearer secrets, shown once, stored as SHA-256 digests, each with a role.
//!
//! A token is `hwt_` followed by 64 hex digits (32 bytes from the operating system's random
//! source). The database keeps only the SHA-256 digest, so reading the database does not give
//! access; a presented token is hashed and looked up by digest. Revoking keeps the row (audit
//! trail) and frees the name. The same functions serve the `halfwave token` command, which acts on
//! the database directly, and the admin routes of the API. The SQL is in `crate::store::tokens`.

use crate::store::tokens as store_tokens;
use crate::store::DbPool;
use rand::rngs::OsRng;
use rand::TryRngCore;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use utoipa::ToSchema;

/// What a token may do. Each role includes the rights of the roles before it.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize, ToSchema,
)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    /// Read everything: runs, points, traces, devices, calibrations, plots, events, metrics.
    Viewer,
    /// Also submit, cancel and resume runs.
    Operator,
    /// Also manage tokens and upload chain calibrations.
    Admin,
}

impl Role {
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Viewer => "viewer",
            Role::Operator => "operator",
            Role::Admin => "admin",
        }
    }

    /// True when a token of this role may make a call that needs `required`.
    pub fn allows(self, required: Role) -> bool {
        self >= required
    }
}

impl std::fmt::Display for Role {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

impl std::str::FromStr for Role {
    type Err = String;
    fn from_str(s: &str) -> Result<Role, String> {
        match s {
            "viewer" => Ok(Role::Viewer),
            "operator" => Ok(Role::Operator),
            "admin" => Ok(Role::Admin),
            other => Err(format!(
                "unknown role {other:?}; use viewer, operator or admin"
            )),
        }
    }
}

/// The prefix of every token, so a leaked one is recognisable in logs and secret scanners.
pub const TOKEN_PREFIX: &str = "hwt_";

/// A token as listed: everything but the secret.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct TokenInfo {
    /// The token's id: runs record it beside the name (`provenance.submitted_by_token_id`),
    /// because the name of a revoked token can be given to a new one.
    pub id: i64,
    pub name: String,
    pub role: Role,
    pub created_at_unix_ms: i64,
    pub created_by: String,
    /// When it was revoked; absent while the token is active.
    pub revoked_at_unix_ms: Option<i64>,
}

/// A token just created: the secret is in here once and nowhere else.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, ToSchema)]
pub struct CreatedToken {
    pub name: String,
    pub role: Role,
    /// The bearer token. It is not stored and cannot be shown again.
    pub token: String,
}

/// The identity behind a presented token.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TokenHolder {
    /// `api_tokens.id`: unlike the name, never reused after a revocation.
    pub id: i64,
    pub name: String,
    pub role: Role,
}

/// Why a token operation failed.
#[derive(Debug, thiserror::Error)]
pub enum TokenError {
    #[error("token name {0:?} is not valid: use 1 to 64 characters of letters, digits, '-', '_', '.' or '@'")]
    BadName(String),
    #[error("an active token named {0:?} already exists; revoke it first or choose another name")]
    NameTaken(String),
    #[error("no active token named {0:?}; `halfwave token list` shows the names")]
    NoSuchToken(String),
    #[error("the operating system's random source failed: {0}")]
    Random(String),
    #[error("database error while {operation}: {source}")]
    Database {
        operation: &'static str,
        #[source]
        source: sqlx::Error,
    },
}

fn db(operation: &'static str) -> impl FnOnce(sqlx::Error) -> TokenError {
    move |source| TokenError::Database { operation, source }
}

/// Lower-case hex SHA-256 of a token, as stored.
pub fn digest_hex(token: &str) -> String {
    sha256_hex(token.as_bytes())
}

/// Lower-case hex SHA-256 of any bytes (tokens, and the Touchstone files a chain calibration is
/// computed from).
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

/// Lower-case hex of any bytes.
pub fn hex(bytes: &[u8]) -> String {
    const DIGITS: &[u8; 16] = b"0123456789abcdef";
    let mut out = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        out.push(char::from(DIGITS[usize::from(b >> 4)]));
        out.push(char::from(DIGITS[usize::from(b & 0x0f)]));
    }
    out
}

/// A fresh random token.
pub fn generate_token() -> Result<String, TokenError> {
    let mut bytes = [0u8; 32];
    OsRng
        .try_fill_bytes(&mut bytes)
        .map_err(|e| TokenError::Random(e.to_string()))?;
    Ok(format!("{TOKEN_PREFIX}{}", hex(&bytes)))
}

fn valid_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.' | '@'))
}

fn now_unix_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
        .unwrap_or(0)
}

/// Creates a token and returns it (the only time the secret exists outside the caller's hands).
pub async fn create(
    pool: &DbPool,
    name: &str,
    role: Role,
    created_by: &str,
) -> Result<CreatedToken, TokenError> {
    if !valid_name(name) {
        return Err(TokenError::BadName(name.to_string()));
    }
    let token = generate_token()?;
    let result = store_tokens::insert(
        pool,
        name,
        role.as_str(),
        &digest_hex(&token),
        now_unix_ms(),
        created_by,
    )
    .await;
    match result {
        Ok(_) => Ok(CreatedToken {
            name: name.to_string(),
            role,
            token,
        }),
        Err(sqlx::Error::Database(e)) if e.is_unique_violation() => {
            Err(TokenError::NameTaken(name.to_string()))
        }
        Err(e) => Err(db("creating a token")(e)),
    }
}

/// Revokes the active token of this name.
pub async fn revoke(pool: &DbPool, name: &str) -> Result<(), TokenError> {
    let revoked = store_tokens::revoke(pool, name, now_unix_ms())
        .await
        .map_err(db("revoking a token"))?;
    if !revoked {
        return Err(TokenError::NoSuchToken(name.to_string()));
    }
    Ok(())
}

/// Every token, active and revoked, oldest first.
pub async fn list(pool: &DbPool) -> Result<Vec<TokenInfo>, TokenError> {
    let rows = store_tokens::list(pool)
        .await
        .map_err(db("listing tokens"))?;
    Ok(rows
        .into_iter()
        .filter_map(|(id, name, role, created, by, revoked)| {
            Some(TokenInfo {
                id,
                name,
                role: role.parse().ok()?,
                created_at_unix_ms: created,
                created_by: by,
                revoked_at_unix_ms: revoked,
            })
        })
        .collect())
}

/// Who holds this token, if it is known and not revoked.
pub async fn authenticate(pool: &DbPool, token: &str) -> Result<Option<TokenHolder>, TokenError> {
    authenticate_digest(pool, &digest_hex(token)).await
}

/// Who holds the token with this digest ([`digest_hex`]), if it is known and not revoked.
pub async fn authenticate_digest(
    pool: &DbPool,
    digest: &str,
) -> Result<Option<TokenHolder>, TokenError> {
    let row = store_tokens::active_by_digest(pool, digest)
        .await
        .map_err(db("checking a token"))?;
    Ok(row.and_then(|(id, name, role)| {
        Some(TokenHolder {
            id,
            name,
            role: role.parse().ok()?,
        })
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn digest_matches_the_fips_180_example() {
        // FIPS 180-2, Appendix B.1: SHA-256("abc").
        assert_eq!(
            digest_hex("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn tokens_are_prefixed_random_and_distinct() {
        let a = generate_token().unwrap();
        let b = generate_token().unwrap();
        assert!(a.starts_with(TOKEN_PREFIX));
        assert_eq!(a.len(), TOKEN_PREFIX.len() + 64);
        assert_ne!(a, b);
    }

    #[test]
    fn roles_are_ordered_by_rights() {
        assert!(Role::Admin.allows(Role::Operator));
        assert!(Role::Operator.allows(Role::Viewer));
        assert!(!Role::Viewer.allows(Role::Operator));
        assert!(!Role::Operator.allows(Role::Admin));
        assert_eq!("operator".parse::<Role>(), Ok(Role::Operator));
        assert!("root".parse::<Role>().is_err());
    }

    #[test]
    fn names_are_checked() {
        assert!(valid_name("lab-b"));
        assert!(valid_name("ci.bot@site"));
        assert!(!valid_name(""));
        assert!(!valid_name("has space"));
        assert!(!valid_name(&"x".repeat(65)));
    }
}
