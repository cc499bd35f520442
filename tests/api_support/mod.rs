//! Shared helpers of the API tests: start the whole application on a random loopback port with a
//! fresh database in a temporary directory, and make authenticated requests.

#![allow(dead_code)]

pub mod cdp;
pub mod seed;

use halfwave::api::tokens::{self, Role};
use halfwave::api::{router, ApiSettings, AppState};
use halfwave::store::Store;
use std::net::SocketAddr;

/// A running application.
pub struct TestApp {
    pub address: SocketAddr,
    pub base: String,
    pub pool: sqlx::SqlitePool,
    pub state: AppState,
    pub client: reqwest::Client,
    _dir: tempfile::TempDir,
}

impl TestApp {
    pub fn store(&self) -> &Store {
        self.state.store()
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    /// Creates a token of this role and returns its secret.
    pub async fn token(&self, name: &str, role: Role) -> String {
        tokens::create(&self.pool, name, role, "test")
            .await
            .expect("token created")
            .token
    }

    pub async fn get(&self, path: &str, token: Option<&str>) -> reqwest::Response {
        let mut request = self.client.get(self.url(path));
        if let Some(token) = token {
            request = request.bearer_auth(token);
        }
        request.send().await.expect("request sent")
    }

    pub async fn post_json(
        &self,
        path: &str,
        token: Option<&str>,
        body: &serde_json::Value,
    ) -> reqwest::Response {
        self.post_raw(path, token, "application/json", body.to_string())
            .await
    }

    pub async fn post_raw(
        &self,
        path: &str,
        token: Option<&str>,
        content_type: &str,
        body: String,
    ) -> reqwest::Response {
        let mut request = self
            .client
            .post(self.url(path))
            .header("content-type", content_type)
            .body(body);
        if let Some(token) = token {
            request = request.bearer_auth(token);
        }
        request.send().await.expect("request sent")
    }
}

/// Starts the application (store only, no engine) with a fresh SQLite database in a temporary
/// directory.
pub async fn spawn_app() -> TestApp {
    let dir = tempfile::tempdir().expect("temporary directory");
    let path = dir.path().join("halfwave.sqlite");
    let store = Store::open(path.to_str().expect("UTF-8 temporary path"))
        .await
        .expect("database opens");
    let state = AppState::new(store, ApiSettings::default());
    serve_state(state, dir).await
}

/// Serves `state` on a random loopback port.
pub async fn serve_state(state: AppState, dir: tempfile::TempDir) -> TestApp {
    let pool = state.pool().clone();
    let served = state.clone();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind a loopback port");
    let address = listener.local_addr().expect("local address");
    tokio::spawn(async move {
        let _ = axum::serve(listener, router(served)).await;
    });
    TestApp {
        address,
        base: format!("http://{address}"),
        pool,
        state,
        client: reqwest::Client::new(),
        _dir: dir,
    }
}

/// Reads a problem-details response, checking its media type (RFC 9457 section 3).
pub async fn problem(response: reqwest::Response) -> serde_json::Value {
    let content_type = response
        .headers()
        .get("content-type")
        .and_then(|v| v.to_str().ok())
        .unwrap_or_default()
        .to_string();
    assert!(
        content_type.starts_with("application/problem+json"),
        "expected a problem document, got {content_type}"
    );
    response.json().await.expect("problem JSON")
}
