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
    let audit = app.store().audit_log(100, None).await.unwrap();
    assert!(
        audit
            .iter()
            .any(|e| e.action == "token.revoke" && e.subject == "lab-b" && e.actor == "root"),
        "{audit:?}"
    );
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

    // Creating a token through the API is audited with the admin's name (README: every mutating
    // call is written to the audit log).
    let audit = app.store().audit_log(100, None).await.unwrap();
    assert!(
        audit
            .iter()
            .any(|e| e.action == "token.create" && e.subject == "ci-bot" && e.actor == "admin-1"),
        "{audit:?}"
    );

    // The list never contains secrets, only their holders.
    let list = app.get("/api/v1/tokens", Some(&admin)).await;
    let text = list.text().await.unwrap();
    assert!(text.contains("ci-bot"));
    assert!(!text.contains(&secret));

    // The database holds the SHA-256 digest, never the token.
    let stored: Vec<(String,)> = sqlx::query_as("SELECT token_sha256 FROM api_tokens")
        .fetch_all(app.pool.as_sqlite().unwrap())
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

/// The OpenAPI document as the daemon serves it.
async fn served_document(app: &api_support::TestApp) -> serde_json::Value {
    let viewer = app.token("doc-reader", Role::Viewer).await;
    let response = app.get("/api/v1/openapi.json", Some(&viewer)).await;
    assert_eq!(response.status(), 200);
    let document: serde_json::Value = response.json().await.unwrap();
    assert!(document["openapi"].as_str().unwrap().starts_with("3.1"));
    document
}

/// Every (method, path template, operation) of the document.
fn operations(document: &serde_json::Value) -> Vec<(String, String, serde_json::Value)> {
    let mut found = Vec::new();
    for (path, item) in document["paths"].as_object().unwrap() {
        for (method, operation) in item.as_object().unwrap() {
            found.push((method.clone(), path.clone(), operation.clone()));
        }
    }
    found
}

/// A concrete URL for a path template: every `{parameter}` becomes 1.
fn concrete(template: &str) -> String {
    template
        .split('/')
        .map(|segment| {
            if segment.starts_with('{') && segment.ends_with('}') {
                "1"
            } else {
                segment
            }
        })
        .collect::<Vec<_>>()
        .join("/")
}

#[tokio::test]
async fn every_route_is_in_the_openapi_document() {
    // The route table registers handlers with utoipa-axum's `routes!`, so a handler cannot be
    // served without its operation in the document; checked here from the outside: every
    // documented operation is routed (no 404 from the fallback, no 405), and every other method
    // on a documented path is refused with 405 whose Allow header names exactly the documented
    // methods (so nothing undocumented is served on a documented path).
    let app = spawn_app().await;
    let document = served_document(&app).await;
    let operations = operations(&document);
    assert!(
        operations.len() >= 30,
        "the API's operations: {}",
        operations.len()
    );
    let client = &app.client;
    for (method, path, _) in &operations {
        let url = app.url(&concrete(path));
        let request = client.request(method.to_uppercase().parse().unwrap(), &url);
        let response = request.send().await.unwrap();
        let status = response.status().as_u16();
        // Without a token the bearer check answers first on every route but health.
        let expected = if path == "/api/v1/health" { 200 } else { 401 };
        assert_eq!(
            status, expected,
            "{method} {path} is documented but not served as such"
        );
    }
    let paths = document["paths"].as_object().unwrap();
    for (path, item) in paths {
        let documented: std::collections::BTreeSet<String> = item
            .as_object()
            .unwrap()
            .keys()
            .map(|m| m.to_uppercase())
            .collect();
        for method in ["GET", "POST", "PUT", "PATCH", "DELETE"] {
            if documented.contains(method) {
                continue;
            }
            let response = client
                .request(method.parse().unwrap(), app.url(&concrete(path)))
                .send()
                .await
                .unwrap();
            assert_eq!(
                response.status(),
                405,
                "{method} {path} is served but not documented"
            );
            let allowed: std::collections::BTreeSet<String> = response.headers()["allow"]
                .to_str()
                .unwrap()
                .split(',')
                .map(|m| m.trim().to_string())
                .filter(|m| m != "HEAD")
                .collect();
            assert_eq!(allowed, documented, "methods served on {path}");
        }
    }
}

#[tokio::test]
async fn every_error_response_is_documented_as_a_problem_document() {
    // RFC 9457 section 3: problem details are `application/problem+json`, which is what the
    // daemon sends for every error; the document must say so for every 4xx and 5xx.
    let app = spawn_app().await;
    let document = served_document(&app).await;
    for (method, path, operation) in operations(&document) {
        let responses = operation["responses"].as_object().unwrap();
        for (status, response) in responses {
            assert!(
                response["description"]
                    .as_str()
                    .is_some_and(|d| !d.is_empty()),
                "{method} {path} {status} has no description (OpenAPI requires one)"
            );
            if !(status.starts_with('4') || status.starts_with('5')) {
                continue;
            }
            let content = response["content"].as_object().unwrap();
            let types: Vec<&String> = content.keys().collect();
            assert_eq!(
                types,
                ["application/problem+json"],
                "{method} {path} {status}"
            );
            assert_eq!(
                content["application/problem+json"]["schema"]["$ref"],
                "#/components/schemas/Problem",
                "{method} {path} {status}"
            );
        }
        if operation.get("security").is_some() {
            assert!(
                responses.contains_key("401"),
                "{method} {path} needs a token: 401"
            );
        }
        if operation.get("requestBody").is_some() {
            for status in ["413", "415", "422"] {
                assert!(
                    responses.contains_key(status),
                    "{method} {path} takes a body: {status}"
                );
            }
        }
        let query = operation["parameters"]
            .as_array()
            .is_some_and(|ps| ps.iter().any(|p| p["in"] == "query"));
        if query {
            assert!(
                responses.contains_key("422"),
                "{method} {path} has query parameters: 422"
            );
        }
    }
}

#[tokio::test]
async fn the_statuses_the_daemon_sends_are_documented() {
    let app = spawn_app().await;
    let document = served_document(&app).await;
    let admin = app.token("root", Role::Admin).await;
    let responses = |method: &str, path: &str| document["paths"][path][method]["responses"].clone();

    // 415 for a body-taking operation called without a body.
    for path in ["/api/v1/runs", "/api/v1/tokens"] {
        let response = app
            .client
            .post(app.url(path))
            .bearer_auth(&admin)
            .send()
            .await
            .unwrap();
        assert_eq!(response.status(), 415, "POST {path} without a body");
        assert!(
            responses("post", path).get("415").is_some(),
            "415 documented on POST {path}"
        );
    }
    // 422 for a query parameter out of its type's range (above i64, below u32).
    for (path, query) in [
        ("/api/v1/events", "?run_id=9223372036854775808"),
        (
            "/api/v1/runs/{run_id}/plots/modulation-index.svg",
            "?frequency_index=-1",
        ),
        ("/api/v1/runs", "?page=4294967296"),
        ("/api/v1/runs", "?since=%2B5"),
    ] {
        let response = app
            .get(&format!("{}{query}", concrete(path)), Some(&admin))
            .await;
        assert_eq!(response.status(), 422, "{path}{query}");
        assert!(
            responses("get", path).get("422").is_some(),
            "422 documented on GET {path}"
        );
    }
}

/// The schema a component name refers to.
fn component<'a>(document: &'a serde_json::Value, name: &str) -> &'a serde_json::Value {
    let schema = &document["components"]["schemas"][name];
    assert!(schema.is_object(), "component {name} is in the document");
    schema
}

/// The `kind` values of an internally tagged enum's schema (`oneOf` of objects).
fn kinds(schema: &serde_json::Value) -> Vec<String> {
    schema["oneOf"]
        .as_array()
        .expect("oneOf")
        .iter()
        .flat_map(|variant| {
            variant["properties"]["kind"]["enum"]
                .as_array()
                .cloned()
                .unwrap_or_default()
        })
        .map(|k| k.as_str().unwrap().to_string())
        .collect()
}

#[tokio::test]
async fn the_document_describes_what_is_sent_and_accepted() {
    let app = spawn_app().await;
    let document = served_document(&app).await;

    // Responses: arrays where the daemon sends arrays.
    let lines = &component(&document, "PointView")["properties"]["lines"];
    assert_eq!(lines["type"], "array", "PointView.lines: {lines}");
    assert_eq!(lines["items"]["$ref"], "#/components/schemas/LineView");
    let excluded = &component(&document, "FrequencyResultView")["properties"]["excluded_points"];
    assert_eq!(excluded["type"], "array", "excluded_points: {excluded}");
    assert_eq!(
        excluded["items"]["$ref"],
        "#/components/schemas/ExcludedPointView"
    );

    // A run's plan is shown in the form POST /runs takes.
    let shown = component(&document, "RunView").to_string();
    assert!(
        shown.contains("#/components/schemas/PlanRequest"),
        "{shown}"
    );

    // The plan: the body of POST /runs is the derived schema with every form.
    let body = &document["paths"]["/api/v1/runs"]["post"]["requestBody"]["content"]
        ["application/json"]["schema"];
    assert_eq!(body["$ref"], "#/components/schemas/PlanRequest");
    let plan = component(&document, "PlanRequest");
    for field in ["device", "bench", "chain", "frequencies", "levels"] {
        assert!(
            plan["required"]
                .as_array()
                .unwrap()
                .iter()
                .any(|r| r == field),
            "{field} is required"
        );
    }
    assert_eq!(
        plan["additionalProperties"], false,
        "unknown plan fields are refused"
    );
    assert_eq!(
        kinds(component(&document, "LevelSpec")),
        ["list", "ramp", "adaptive"]
    );
    assert_eq!(
        kinds(component(&document, "FrequencySpec")),
        ["list", "linear", "logarithmic"]
    );
    assert_eq!(
        kinds(component(&document, "ChainSpec")),
        ["flat_loss", "stored"]
    );

    // Constraints the daemon enforces are in the schema.
    let parameter = |path: &str, name: &str| {
        document["paths"][path]["get"]["parameters"]
            .as_array()
            .unwrap()
            .iter()
            .find(|p| p["name"] == name)
            .unwrap_or_else(|| panic!("{name} on {path}"))["schema"]
            .clone()
    };
    for list in ["RunList", "PointList"] {
        let page = &component(&document, list)["properties"]["page"];
        assert_eq!(
            page["format"], "int64",
            "{list}.page echoes the accepted range"
        );
        assert_eq!(page["maximum"], u64::from(u32::MAX));
    }
    for path in ["/api/v1/runs", "/api/v1/runs/{run_id}/points"] {
        assert_eq!(parameter(path, "page")["minimum"], 1);
        assert_eq!(parameter(path, "page")["maximum"], u64::from(u32::MAX));
        assert_eq!(parameter(path, "page")["format"], "int64");
        assert_eq!(parameter(path, "per_page")["minimum"], 1);
        assert_eq!(parameter(path, "per_page")["maximum"], 1000);
    }
    let frequency = parameter("/api/v1/devices/{serial}/v-pi", "frequency_hz");
    assert_eq!(frequency["exclusiveMinimum"], 0.0);
    let token_name = &component(&document, "NewToken")["properties"]["name"];
    assert_eq!(token_name["minLength"], 1);
    assert_eq!(token_name["maxLength"], 64);

    // The event stream: its media type, its kinds, and a way to end it.
    let events = &document["paths"]["/api/v1/events"]["get"];
    let ok = &events["responses"]["200"];
    assert!(ok["content"].get("text/event-stream").is_some(), "{ok}");
    for kind in [
        "queued",
        "started",
        "point",
        "frequency",
        "finished",
        "lagged",
    ] {
        assert!(
            ok["description"]
                .as_str()
                .unwrap()
                .contains(&format!("`{kind}`")),
            "{kind}"
        );
    }
    assert_eq!(
        parameter("/api/v1/events", "timeout_s")["exclusiveMinimum"],
        0.0
    );
}

#[tokio::test]
async fn every_reference_in_the_document_resolves() {
    fn references<'a>(value: &'a serde_json::Value, found: &mut Vec<&'a str>) {
        match value {
            serde_json::Value::Object(members) => {
                if let Some(r) = members.get("$ref").and_then(|r| r.as_str()) {
                    found.push(r);
                }
                members.values().for_each(|v| references(v, found));
            }
            serde_json::Value::Array(items) => items.iter().for_each(|v| references(v, found)),
            _ => {}
        }
    }
    let app = spawn_app().await;
    let document = served_document(&app).await;
    let mut found = Vec::new();
    references(&document, &mut found);
    assert!(found.len() > 50);
    for reference in found {
        let name = reference
            .strip_prefix("#/components/schemas/")
            .unwrap_or_else(|| panic!("{reference} points into the components"));
        component(&document, name);
    }
}

#[tokio::test]
async fn every_problem_carries_the_request_id_of_its_header() {
    let app = spawn_app().await;
    let response = app.get("/api/v1/runs", None).await;
    assert_eq!(response.status(), 401);
    let id = response.headers()["x-request-id"]
        .to_str()
        .unwrap()
        .to_string();
    let problem: serde_json::Value = response.json().await.unwrap();
    assert_eq!(problem["request_id"], id.as_str());
    // A successful answer carries the header too.
    let health = app.get("/api/v1/health", None).await;
    assert!(health.headers().contains_key("x-request-id"));
}

/// CORS is off by default: a page served elsewhere gets no `Access-Control-Allow-Origin`, so a
/// browser keeps it from reading the API; with origins configured (`HALFWAVE_CORS_ORIGINS`,
/// read into `ApiSettings`), exactly those get one, on a preflight too (README, "HTTP API and
/// dashboard"; the CORS headers are those of the Fetch standard).
#[tokio::test]
async fn cors_is_off_unless_origins_are_configured() {
    use halfwave::api::ApiSettings;
    let cross_origin_get = |app: &api_support::TestApp, origin: &'static str| {
        let request = app
            .client
            .get(app.url("/api/v1/health"))
            .header("Origin", origin);
        async move { request.send().await.unwrap() }
    };
    let allowed = |response: &reqwest::Response| {
        response
            .headers()
            .get("access-control-allow-origin")
            .map(|v| v.to_str().unwrap().to_string())
    };

    let off = spawn_app().await;
    let response = cross_origin_get(&off, "https://other.example").await;
    assert_eq!(response.status(), 200);
    assert_eq!(allowed(&response), None);

    let on = api_support::spawn_app_with(ApiSettings {
        cors_allowed_origins: vec!["https://lab-b.example".into()],
        ..ApiSettings::default()
    })
    .await;
    let response = cross_origin_get(&on, "https://lab-b.example").await;
    assert_eq!(allowed(&response).as_deref(), Some("https://lab-b.example"));
    let response = cross_origin_get(&on, "https://other.example").await;
    assert_eq!(allowed(&response), None);
    let preflight = on
        .client
        .request(reqwest::Method::OPTIONS, on.url("/api/v1/runs"))
        .header("Origin", "https://lab-b.example")
        .header("Access-Control-Request-Method", "POST")
        .header(
            "Access-Control-Request-Headers",
            "authorization,content-type",
        )
        .send()
        .await
        .unwrap();
    assert_eq!(
        allowed(&preflight).as_deref(),
        Some("https://lab-b.example")
    );
    let methods = preflight
        .headers()
        .get("access-control-allow-methods")
        .map(|v| v.to_str().unwrap().to_ascii_uppercase())
        .unwrap_or_default();
    assert!(methods.contains("POST"), "{methods}");
}

/// A server without an engine (one that only reads the database) answers the run-changing
/// routes with 503 saying where runs are submitted, while reads still work (README, "HTTP API
/// and dashboard": 503 from a read-only server).
#[tokio::test]
async fn a_read_only_server_answers_run_control_with_503() {
    let app = spawn_app().await;
    let operator = app.token("lab-b", Role::Operator).await;
    let submit = app
        .post_json(
            "/api/v1/runs",
            Some(&operator),
            &serde_json::json!({
                "device": {"serial": "EG-PM-0042", "model": "simulated phase modulator",
                           "rf_input_limit_dbm": 27.0},
                "bench": "sim",
                "chain": {"kind": "flat_loss", "loss_db": 2.0},
                "frequencies": {"kind": "list", "values_hz": [1.5e9]},
                "levels": {"kind": "ramp", "start_dbm": 0.0, "stop_dbm": 10.0, "step_db": 2.5}
            }),
        )
        .await;
    assert_eq!(submit.status(), 503);
    let body = problem(submit).await;
    assert!(
        body["detail"]
            .as_str()
            .unwrap_or("")
            .contains("halfwave serve"),
        "{body}"
    );
    let cancel = app
        .post_json(
            "/api/v1/runs/1/cancel",
            Some(&operator),
            &serde_json::json!({}),
        )
        .await;
    assert_eq!(cancel.status(), 503);
    assert_eq!(app.get("/api/v1/runs", Some(&operator)).await.status(), 200);
}
