//! Token management for admins: list, create (the secret is in the response once), revoke.
//!
//! The same operations are on the command line (`halfwave token ...`) for the first admin token
//! and for when the daemon is down.

use crate::api::audit;
use crate::api::auth::Admin;
use crate::api::json_body::JsonBody;
use crate::api::params::ApiPath;
use crate::api::problem::Problem;
use crate::api::tokens::{self, CreatedToken, Role, TokenError, TokenInfo};
use crate::api::AppState;
use axum::extract::State;
use axum::http::StatusCode;
use axum::Json;
use serde::Deserialize;
use utoipa::ToSchema;

/// A token to create.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct NewToken {
    /// A name that says who holds it (`lab-b`, `ci-bot`); appears in the audit log. 1 to 64
    /// letters, digits, `-`, `_`, `.` or `@`.
    #[schema(min_length = 1, max_length = 64, pattern = "^[A-Za-z0-9._@-]+$")]
    pub name: String,
    pub role: Role,
}

impl From<TokenError> for Problem {
    fn from(e: TokenError) -> Problem {
        match e {
            TokenError::BadName(_) => Problem::invalid_field("name", e.to_string()),
            TokenError::NameTaken(_) => Problem::conflict(e.to_string()),
            TokenError::NoSuchToken(_) => Problem::not_found(e.to_string()),
            TokenError::Random(_) | TokenError::Database { .. } => Problem::internal(e.to_string()),
        }
    }
}

/// Every token (never the secrets).
#[utoipa::path(get, path = "/api/v1/tokens", tag = "tokens", security(("bearer" = [])),
    responses((status = 200, body = [TokenInfo]),
              (status = 401, body = Problem), (status = 403, body = Problem)))]
pub async fn list_tokens(
    _caller: Admin,
    State(state): State<AppState>,
) -> Result<Json<Vec<TokenInfo>>, Problem> {
    Ok(Json(tokens::list(state.pool()).await?))
}

/// Creates a token; the response holds the secret, which is not stored and not shown again.
#[utoipa::path(post, path = "/api/v1/tokens", tag = "tokens", security(("bearer" = [])),
    request_body = NewToken,
    responses((status = 201, body = CreatedToken),
              (status = 401, body = Problem), (status = 403, body = Problem),
              (status = 409, description = "An active token has this name", body = Problem),
              (status = 422, body = Problem)))]
pub async fn create_token(
    Admin(caller): Admin,
    State(state): State<AppState>,
    JsonBody(request): JsonBody<NewToken>,
) -> Result<(StatusCode, Json<CreatedToken>), Problem> {
    let created = tokens::create(state.pool(), &request.name, request.role, &caller.name).await?;
    audit::record(
        &state,
        &caller.name,
        "token.create",
        &created.name,
        &format!("role {}", created.role),
    )
    .await;
    Ok((StatusCode::CREATED, Json(created)))
}

/// Revokes the active token of this name.
#[utoipa::path(delete, path = "/api/v1/tokens/{name}", tag = "tokens", security(("bearer" = [])),
    params(("name" = String, Path, description = "The token's name")),
    responses((status = 204, description = "Revoked"),
              (status = 401, body = Problem), (status = 403, body = Problem),
              (status = 404, body = Problem)))]
pub async fn revoke_token(
    Admin(caller): Admin,
    State(state): State<AppState>,
    ApiPath(name): ApiPath<String>,
) -> Result<StatusCode, Problem> {
    tokens::revoke(state.pool(), &name).await?;
    // Refused from the next request on, not only when the cached verification expires.
    state.token_cache().forget_name(&name);
    audit::record(&state, &caller.name, "token.revoke", &name, "").await;
    Ok(StatusCode::NO_CONTENT)
}
