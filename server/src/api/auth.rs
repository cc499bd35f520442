//! Bearer-token authentication and role checks, as axum extractors.
//!
//! A handler states the role it needs by the type of one argument: [`Viewer`], [`Operator`] or
//! [`Admin`]. The extractor reads `Authorization: Bearer <token>`, looks the token's digest up
//! (in [`super::token_cache`] first, then in the database, see [`super::tokens`]) and refuses
//! with 401 when the token is missing, unknown or revoked, and with 403 when its role is too low. The events route alone also accepts the token as the
//! `access_token` query parameter ([`ViewerFromHeaderOrQuery`]), because a browser's EventSource
//! cannot set headers (RFC 6750 section 2.3 describes this form).

use super::problem::Problem;
use super::tokens::{self, Role, TokenHolder};
use super::AppState;
use axum::extract::FromRequestParts;
use axum::http::header::AUTHORIZATION;
use axum::http::request::Parts;

fn bearer_from_header(parts: &Parts) -> Result<Option<String>, Problem> {
    let Some(value) = parts.headers.get(AUTHORIZATION) else {
        return Ok(None);
    };
    let value = value.to_str().map_err(|_| {
        Problem::unauthorized(
            "the Authorization header is not readable text; send `Authorization: Bearer <token>`",
        )
    })?;
    let mut words = value.splitn(2, ' ');
    let scheme = words.next().unwrap_or_default();
    let token = words.next().unwrap_or_default().trim();
    if !scheme.eq_ignore_ascii_case("bearer") || token.is_empty() {
        return Err(Problem::unauthorized(
            "the Authorization header must be `Bearer <token>`",
        ));
    }
    Ok(Some(token.to_string()))
}

fn token_from_query(parts: &Parts) -> Option<String> {
    let query = parts.uri.query()?;
    query.split('&').find_map(|pair| {
        let (key, value) = pair.split_once('=')?;
        (key == "access_token" && !value.is_empty()).then(|| value.to_string())
    })
}

async fn authorize(
    state: &AppState,
    token: Option<String>,
    required: Role,
) -> Result<TokenHolder, Problem> {
    let Some(token) = token else {
        return Err(Problem::unauthorized(
            "this call needs a bearer token: send `Authorization: Bearer <token>`; an admin creates one with `halfwave token create`",
        ));
    };
    let digest = tokens::digest_hex(&token);
    let holder = match state.token_cache().get(&digest) {
        Some(holder) => holder,
        None => {
            let generation = state.token_cache().lookup_generation();
            let holder = tokens::authenticate_digest(state.pool(), &digest)
                .await
                .map_err(|e| Problem::internal(e.to_string()))?
                .ok_or_else(|| {
                    Problem::unauthorized(
                        "the token is unknown or revoked; ask an admin for a new one",
                    )
                })?;
            state
                .token_cache()
                .insert(digest, holder.clone(), generation);
            holder
        }
    };
    if !holder.role.allows(required) {
        return Err(Problem::forbidden(format!(
            "token {:?} has role {}, and this call needs {required} or higher",
            holder.name, holder.role
        )));
    }
    Ok(holder)
}

macro_rules! role_extractor {
    ($(#[$doc:meta])* $name:ident, $role:expr) => {
        $(#[$doc])*
        #[derive(Debug, Clone)]
        pub struct $name(pub TokenHolder);

        impl FromRequestParts<AppState> for $name {
            type Rejection = Problem;

            async fn from_request_parts(
                parts: &mut Parts,
                state: &AppState,
            ) -> Result<Self, Self::Rejection> {
                let token = bearer_from_header(parts)?;
                authorize(state, token, $role).await.map($name)
            }
        }
    };
}

role_extractor!(
    /// A caller allowed to read.
    Viewer,
    Role::Viewer
);
role_extractor!(
    /// A caller allowed to submit, cancel and resume runs.
    Operator,
    Role::Operator
);
role_extractor!(
    /// A caller allowed to manage tokens and chain calibrations.
    Admin,
    Role::Admin
);

/// A reader authenticated by header or, for EventSource, by the `access_token` query parameter.
#[derive(Debug, Clone)]
pub struct ViewerFromHeaderOrQuery(pub TokenHolder);

impl FromRequestParts<AppState> for ViewerFromHeaderOrQuery {
    type Rejection = Problem;

    async fn from_request_parts(
        parts: &mut Parts,
        state: &AppState,
    ) -> Result<Self, Self::Rejection> {
        let token = match bearer_from_header(parts)? {
            Some(token) => Some(token),
            None => token_from_query(parts),
        };
        authorize(state, token, Role::Viewer)
            .await
            .map(ViewerFromHeaderOrQuery)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::http::Request;

    fn parts(uri: &str, auth: Option<&str>) -> Parts {
        let mut builder = Request::builder().uri(uri);
        if let Some(auth) = auth {
            builder = builder.header(AUTHORIZATION, auth);
        }
        builder.body(()).unwrap().into_parts().0
    }

    #[test]
    fn bearer_scheme_is_case_insensitive_and_required() {
        // RFC 7235 section 2.1: the auth-scheme is case-insensitive.
        let p = parts("/", Some("bearer abc"));
        assert_eq!(bearer_from_header(&p).unwrap().as_deref(), Some("abc"));
        let p = parts("/", Some("Basic abc"));
        assert_eq!(bearer_from_header(&p).unwrap_err().status, 401);
        let p = parts("/", None);
        assert_eq!(bearer_from_header(&p).unwrap(), None);
    }

    #[test]
    fn query_token_is_found_among_other_parameters() {
        let p = parts("/api/v1/events?run_id=3&access_token=hwt_x", None);
        assert_eq!(token_from_query(&p).as_deref(), Some("hwt_x"));
        let p = parts("/api/v1/events?run_id=3", None);
        assert_eq!(token_from_query(&p), None);
    }
}
