//! Authentication, roles and error format of the API, over real HTTP on loopback.
//!
//! Checked against RFC 6750 (bearer tokens: 401 with a `WWW-Authenticate: Bearer` challenge for a
//! missing or invalid token), RFC 9110 section 15.5.4 (403 for valid credentials without the
//! right) and RFC 9457 (problem details).

mod api_support;

use api_support::{problem, spawn_app};
use halfwave::api::token_cache::TOKEN_CACHE_TTL;
use halfwave::api::tokens::{self, Role};
use std::time::Duration;

#[tokio::test]
async fn health_needs_no_token_but_everything_else_does() {
    let app = spawn_app().await;
    let health = app.get("/api/v1/health", None).await;
    assert_eq!(health.status(), 200);
    let body: serde_json::Value = health.json().await.unwrap();
    assert_eq!(body["status"], "ok");

    for path in ["/api/v1/metrics", "/api/v1/openapi.json", "/api/v1/tokens"] {
        let response = app.get(path, None).await;
        assert_eq!(response.status(), 401, "{path} without a token");
        assert!(response.headers()["www-authenticate"]
            .to_str()
            .unwrap()
            .starts_with("Bearer"));
        let body = problem(response).await;
        assert_eq!(body["status"], 401);
        assert_eq!(body["type"], "/problems/unauthorized");
    }
}

#[tokio::test]
async fn unknown_and_revoked_tokens_get_401() {
    let app = spawn_app().await;
    let made_up = app
        .get("/api/v1/metrics", Some("hwt_not-a-real-token"))
        .await;
    assert_eq!(made_up.status(), 401);

    let admin = app.token("root", Role::Admin).await;
    let viewer = app.token("lab-b", Role::Viewer).await;
    // Accepted, and now in the daemon's cache of verified tokens.
    assert_eq!(
        app.get("/api/v1/metrics", Some(&viewer)).await.status(),
        200
    );

    let revoke = app
        .client
        .delete(app.url("/api/v1/tokens/lab-b"))
        .bearer_auth(&admin)
        .send()
        .await
        .unwrap();
    assert_eq!(revoke.status(), 204);
    // Refused on the very next request: revoking through the API clears the cached verification.
    let after = app.get("/api/v1/metrics", Some(&viewer)).await;
    assert_eq!(after.status(), 401);
    assert!(problem(after).await["detail"]
        .as_str()
        .unwrap()
        .contains("revoked"));
}

#[tokio::test]
async fn a_token_revoked_by_the_cli_is_refused_once_its_cached_verification_expires() {
    let app = spawn_app().await;
    let viewer = app.token("lab-c", Role::Viewer).await;
    assert_eq!(
        app.get("/api/v1/metrics", Some(&viewer)).await.status(),
        200
    );
    // What `halfwave token revoke` does from another process: write the database directly.
    tokens::revoke(&app.pool, "lab-c").await.unwrap();
    tokio::time::sleep(TOKEN_CACHE_TTL + Duration::from_millis(100)).await;
    assert_eq!(
        app.get("/api/v1/metrics", Some(&viewer)).await.status(),
        401
    );
}

#[tokio::test]
async fn token_management_is_for_admins_only() {
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let operator = app.token("operator-1", Role::Operator).await;
    let admin = app.token("admin-1", Role::Admin).await;
    let new_token = serde_json::json!({"name": "ci-bot", "role": "viewer"});

    for (token, role) in [(&viewer, "viewer"), (&operator, "operator")] {
        let response = app
            .post_json("/api/v1/tokens", Some(token), &new_token)
            .await;
        assert_eq!(response.status(), 403, "{role} creating a token");
        assert_eq!(problem(response).await["type"], "/problems/forbidden");
        assert_eq!(app.get("/api/v1/tokens", Some(token)).await.status(), 403);
    }

    let created = app
        .post_json("/api/v1/tokens", Some(&admin), &new_token)
        .await;
    assert_eq!(created.status(), 201);
    let created: serde_json::Value = created.json().await.unwrap();
    let secret = created["token"].as_str().unwrap().to_string();
    assert!(secret.starts_with("hwt_"));
    assert_eq!(
        app.get("/api/v1/metrics", Some(&secret)).await.status(),
        200
    );

    // The same name again while active: a conflict with existing state (RFC 9110 15.5.10).
    let again = app
        .post_json("/api/v1/tokens", Some(&admin), &new_token)
        .await;
    assert_eq!(again.status(), 409);

    // The list never contains secrets, only their holders.
    let list = app.get("/api/v1/tokens", Some(&admin)).await;
    let text = list.text().await.unwrap();
    assert!(text.contains("ci-bot"));
    assert!(!text.contains(&secret));

    // The database holds the SHA-256 digest, never the token.
    let stored: Vec<(String,)> = sqlx::query_as("SELECT token_sha256 FROM api_tokens")
        .fetch_all(&app.pool)
        .await
        .unwrap();
    assert!(stored
        .iter()
        .all(|(d,)| d.len() == 64 && !d.contains("hwt_")));
    assert!(stored
        .iter()
        .any(|(d,)| *d == halfwave::api::tokens::digest_hex(&secret)));
}

#[tokio::test]
async fn bad_bodies_get_422_with_the_field_named_and_big_ones_413() {
    let app = spawn_app().await;
    let admin = app.token("admin-1", Role::Admin).await;

    let unknown = serde_json::json!({"name": "x", "role": "viewer", "colour": "red"});
    let response = app
        .post_json("/api/v1/tokens", Some(&admin), &unknown)
        .await;
    assert_eq!(response.status(), 422);
    let body = problem(response).await;
    assert_eq!(body["errors"][0]["field"], "colour");

    let bad_role = serde_json::json!({"name": "x", "role": "superuser"});
    let body = problem(
        app.post_json("/api/v1/tokens", Some(&admin), &bad_role)
            .await,
    )
    .await;
    assert_eq!(body["errors"][0]["field"], "role");

    let malformed = app
        .post_raw(
            "/api/v1/tokens",
            Some(&admin),
            "application/json",
            "{\"name\": ".into(),
        )
        .await;
    assert_eq!(malformed.status(), 422);
    assert_eq!(problem(malformed).await["errors"][0]["field"], "body");

    let huge = format!(
        "{{\"name\": \"{}\", \"role\": \"viewer\"}}",
        "x".repeat(halfwave::api::MAX_BODY_BYTES + 10)
    );
    let response = app
        .post_raw("/api/v1/tokens", Some(&admin), "application/json", huge)
        .await;
    assert_eq!(response.status(), 413);
    assert_eq!(problem(response).await["type"], "/problems/body-too-large");

    let unknown_route = app.get("/api/v1/nothing-here", Some(&admin)).await;
    assert_eq!(unknown_route.status(), 404);
    assert_eq!(problem(unknown_route).await["status"], 404);
}

#[tokio::test]
async fn every_route_is_in_the_openapi_document() {
    let app = spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let document: serde_json::Value = app
        .get("/api/v1/openapi.json", Some(&viewer))
        .await
        .json()
        .await
        .unwrap();
    assert!(document["openapi"].as_str().unwrap().starts_with("3.1"));
    let paths = document["paths"].as_object().unwrap();
    let table = halfwave::api::routes::route_table();
    for route in &table {
        let path = format!("{}{}", halfwave::api::routes::API_PREFIX, route.path);
        let method = route.method.as_str().to_ascii_lowercase();
        assert!(
            paths.get(&path).and_then(|p| p.get(&method)).is_some(),
            "{method} {path} is served but missing from the OpenAPI document"
        );
    }
    // And the other way: every documented operation is served.
    let documented: usize = paths.values().map(|p| p.as_object().unwrap().len()).sum();
    assert_eq!(
        documented,
        table.len(),
        "documented operations vs served routes"
    );
}
