//! Bearer-token authentication and role checks, as axum extractors.
//!
//! A handler states the role it needs by the type of one argument: [`Viewer`], [`Operator`] or
//! [`Admin`]. The extractor reads `Authorization: Bearer <token>`, looks the token's digest up
//! (in [`super::token_cache`] first, then in the database, see [`super::tokens`]) and refuses
//! with 401 when the token is missing, unknown or revoked, and with 403 when its role is too low. The events route alone also accepts a
//! one-time `ticket` query parameter ([`ViewerFromHeaderOrTicket`], [`super::event_tickets`]),
//! because a browser's EventSource cannot set headers; a token itself in the URL
//! (`access_token`, RFC 6750 section 2.3) is refused, since proxies and servers log URLs.

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

/// The value of query parameter `name` (the first, if repeated; `None` when empty).
fn query_value(parts: &Parts, name: &str) -> Option<String> {
    let query = parts.uri.query()?;
    form_urlencoded::parse(query.as_bytes())
        .find(|(key, _)| key == name)
        .map(|(_, value)| value.into_owned())
        .filter(|value| !value.is_empty())
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

/// A reader authenticated by header or, for EventSource, by a one-time `ticket` query parameter
/// ([`super::event_tickets`]). A token in the URL (`access_token`) is refused: proxies log URLs.
#[derive(Debug, Clone)]
pub struct ViewerFromHeaderOrTicket(pub TokenHolder);

impl FromRequestParts<AppState> for ViewerFromHeaderOrTicket {
    type Rejection = Problem;

    async fn from_request_parts(
        parts: &mut Parts,
        state: &AppState,
    ) -> Result<Self, Self::Rejection> {
        if let Some(token) = bearer_from_header(parts)? {
            return authorize(state, Some(token), Role::Viewer)
                .await
                .map(ViewerFromHeaderOrTicket);
        }
        if let Some(ticket) = query_value(parts, "ticket") {
            let holder = state
                .event_tickets()
                .redeem(&ticket, std::time::Instant::now())
                .ok_or_else(|| {
                    Problem::unauthorized(
                        "the ticket is unknown, already used or expired (a ticket opens one stream within 30 s); ask `POST /api/v1/events/ticket` for a new one",
                    )
                })?;
            if !holder.role.allows(Role::Viewer) {
                return Err(Problem::forbidden("this ticket's role may not read events"));
            }
            return Ok(ViewerFromHeaderOrTicket(holder));
        }
        if query_value(parts, "access_token").is_some() {
            return Err(Problem::unauthorized(
                "a token in the URL is not accepted (proxies log URLs): send `Authorization: Bearer <token>`, or get a one-time ticket from `POST /api/v1/events/ticket` and pass `?ticket=`",
            ));
        }
        authorize(state, None, Role::Viewer)
            .await
            .map(ViewerFromHeaderOrTicket)
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
    fn query_values_are_found_among_other_parameters() {
        let p = parts("/api/v1/events?run_id=3&ticket=hwe_x%2By", None);
        // Percent-decoded as a query string (WHATWG URL, application/x-www-form-urlencoded).
        assert_eq!(query_value(&p, "ticket").as_deref(), Some("hwe_x+y"));
        let p = parts("/api/v1/events?run_id=3&ticket=", None);
        assert_eq!(query_value(&p, "ticket"), None);
        assert_eq!(query_value(&p, "access_token"), None);
    }
}
