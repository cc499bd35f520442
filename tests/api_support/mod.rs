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
    pub pool: halfwave::store::DbPool,
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

    /// GET `path` and decode its JSON body (panics if it is not JSON).
    pub async fn get_json(&self, path: &str, token: Option<&str>) -> serde_json::Value {
        self.get(path, token)
            .await
            .json()
            .await
            .expect("a JSON body")
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
    spawn_app_with(ApiSettings::default()).await
}

/// [`spawn_app`] with the given HTTP settings (CORS origins, connection limits).
pub async fn spawn_app_with(settings: ApiSettings) -> TestApp {
    let dir = tempfile::tempdir().expect("temporary directory");
    let path = dir.path().join("halfwave.sqlite");
    let store = Store::open(path.to_str().expect("UTF-8 temporary path"))
        .await
        .expect("database opens");
    serve_state(AppState::new(store, settings), dir).await
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

/// A running application with an engine on one simulated bench named `sim-bench`.
pub struct EngineApp {
    pub app: TestApp,
    pub sim: halfwave_drivers::sim::SimBench,
}

/// Starts the whole daemon application: a fresh store in a temporary directory, the engine on a
/// simulated bench whose instrument times are scaled by `time_factor` (0 = instant), the router.
pub async fn spawn_app_with_engine(time_factor: f64) -> EngineApp {
    spawn_app_with_instruments(
        time_factor,
        halfwave::engine::bench::BenchInstruments::simulated,
    )
    .await
}

/// [`spawn_app_with_engine`] with the bench's instruments made from its simulation by
/// `instruments` (a test's wrapper around one of them, for a fault the simulation does not have).
pub async fn spawn_app_with_instruments(
    time_factor: f64,
    instruments: impl FnOnce(
        halfwave_drivers::sim::SimBench,
    ) -> halfwave::engine::bench::BenchInstruments,
) -> EngineApp {
    use halfwave::config::Limits;
    use halfwave::engine::Engine;
    use halfwave_drivers::sim::{Scenario, SimBench};

    let dir = tempfile::tempdir().expect("temporary directory");
    let path = dir.path().join("halfwave.sqlite");
    let store = Store::open(path.to_str().expect("UTF-8 temporary path"))
        .await
        .expect("database opens");
    let scenario = Scenario::builtin().expect("built-in scenario");
    let sim = SimBench::new(scenario, 11).with_time_factor(time_factor);
    let engine = Engine::start_with(
        Limits::default(),
        store,
        vec![("sim-bench".to_string(), instruments(sim.clone()))],
    )
    .await
    .expect("engine starts");
    let state = AppState::with_engine(engine, ApiSettings::default());
    EngineApp {
        app: serve_state(state, dir).await,
        sim,
    }
}

/// The drive chain of the built-in simulated bench as a lab would measure it end to end (cable
/// loss plus the generator's level error), as a chain-calibration upload.
pub fn true_chain_upload(
    sim: &halfwave_drivers::sim::SimBench,
    name: &str,
    frequencies_hz: &[f64],
) -> serde_json::Value {
    let scenario = sim.scenario();
    let points: Vec<serde_json::Value> = frequencies_hz
        .iter()
        .map(|&f| {
            let f = halfwave::units::Hz(f);
            serde_json::json!({
                "frequency_hz": f.0,
                "gain_db": scenario.level_error_at(f).0 - scenario.chain_loss_at(f).0,
            })
        })
        .collect();
    serde_json::json!({"name": name, "points": points})
}

/// Reads server-sent events from `response` until `stop` returns true for one of them or the
/// time runs out; returns every event's JSON.
pub async fn read_events(
    mut response: reqwest::Response,
    timeout: std::time::Duration,
    stop: impl Fn(&serde_json::Value) -> bool,
) -> Vec<serde_json::Value> {
    let deadline = tokio::time::Instant::now() + timeout;
    let mut buffer = String::new();
    let mut events = Vec::new();
    loop {
        let chunk = tokio::time::timeout_at(deadline, response.chunk())
            .await
            .expect("events arrive in time")
            .expect("the event stream stays readable")
            .expect("the event stream stays open");
        buffer.push_str(&String::from_utf8_lossy(&chunk));
        while let Some(end) = buffer.find("\n\n") {
            let message: String = buffer.drain(..end + 2).collect();
            for line in message.lines() {
                if let Some(data) = line.strip_prefix("data:") {
                    let event: serde_json::Value =
                        serde_json::from_str(data.trim()).expect("event JSON");
                    let done = stop(&event);
                    events.push(event);
                    if done {
                        return events;
                    }
                }
            }
        }
    }
}
