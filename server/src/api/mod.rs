//! The HTTP API and the dashboard: routes under `/api/v1`, auth, errors, plots, static pages.
//!
//! [`router`] builds the whole application from an [`AppState`]; [`serve`] binds it and runs it
//! until shutdown. Every route is declared once in [`routes`] (utoipa-axum's `routes!`), together
//! with its OpenAPI description (utoipa), so the document at `/api/v1/openapi.json` is generated
//! from the same entries that serve; tests check that the two agree. Layers, from the outside in: problem details
//! for bare errors, tracing, request metrics, timeout (not on the event stream), body size limit.
//! A request's bearer token is checked against a short-lived cache of verified tokens
//! ([`token_cache`]) before the database, and the most read views that cannot change (final runs,
//! device histories) are served from [`read_cache`]; both exist because the load benchmark
//! (`server/benches/api_load.rs`) showed database round trips, not handlers, limiting the rate.
//! Connections are accepted by [`connections`] (a cap, hyper's header read timeout, graceful
//! shutdown), not `axum::serve`, so half-open and slow clients cannot starve `/health`.

pub mod audit;
pub mod auth;
pub mod calibration_report;
pub mod connections;
pub mod engine_problems;
pub mod event_tickets;
pub mod json_body;
pub mod metrics;
pub mod openapi;
pub mod params;
pub mod plots;
pub mod problem;
pub mod read_cache;
pub mod request_id;
pub mod routes;
pub mod run_gauges;
pub mod store_problems;
pub mod time_bound;
pub mod token_cache;
pub mod tokens;
pub mod views;

use crate::engine::Engine;
use crate::store::DbPool;
use crate::store::Store;
use axum::extract::DefaultBodyLimit;
use axum::http::StatusCode;
use axum::Router;
use metrics::HttpMetrics;
use read_cache::ReadCache;
use run_gauges::RunGauges;
use std::sync::Arc;
use std::time::Duration;
use token_cache::TokenCache;
use tower_http::limit::RequestBodyLimitLayer;
use tower_http::timeout::TimeoutLayer;
use tower_http::trace::TraceLayer;

/// The largest request body accepted (plans and chain calibrations are far smaller).
pub const MAX_BODY_BYTES: usize = 1024 * 1024;

/// The longest a request may take to produce its response (the event stream is exempt).
pub const REQUEST_TIMEOUT: Duration = Duration::from_secs(30);

/// Settings of the HTTP layer that do not come from the engine.
#[derive(Debug, Clone, Default)]
pub struct ApiSettings {
    /// Origins allowed to call the API from a browser page served elsewhere. Empty (the default)
    /// sends no CORS headers at all, so only the daemon's own dashboard can call it.
    pub cors_allowed_origins: Vec<String>,
    /// Connection cap, header read timeout and buffer size (see [`connections`]).
    pub connections: connections::ConnectionLimits,
}

struct StateInner {
    store: Store,
    /// The engine; absent in a read-only server (the run-changing routes then answer 503).
    engine: Option<Engine>,
    http_metrics: HttpMetrics,
    /// Progress of the engine's runs, followed from its events (absent without an engine).
    run_gauges: Option<Arc<RunGauges>>,
    /// Tokens the database confirmed recently.
    token_cache: TokenCache,
    /// One-time tickets for the event stream.
    event_tickets: event_tickets::EventTickets,
    /// Read results that cannot change (final runs, device histories by fingerprint).
    read_cache: ReadCache,
    settings: ApiSettings,
    started: std::time::Instant,
    /// Becomes true when the daemon shuts down; long-lived responses (event streams) end then.
    shutdown: tokio::sync::watch::Sender<bool>,
}

/// What every handler can reach. Cheap to clone.
#[derive(Clone)]
pub struct AppState {
    inner: Arc<StateInner>,
}

impl AppState {
    /// A read-only state: every read route works; submitting and controlling runs answers 503.
    pub fn new(store: Store, settings: ApiSettings) -> AppState {
        AppState::build(store, None, settings)
    }

    /// The full state of the daemon: the engine and its store.
    pub fn with_engine(engine: Engine, settings: ApiSettings) -> AppState {
        AppState::build(engine.store().clone(), Some(engine), settings)
    }

    fn build(store: Store, engine: Option<Engine>, settings: ApiSettings) -> AppState {
        let run_gauges = engine.as_ref().map(RunGauges::follow);
        AppState {
            inner: Arc::new(StateInner {
                store,
                engine,
                http_metrics: HttpMetrics::default(),
                run_gauges,
                token_cache: TokenCache::default(),
                event_tickets: event_tickets::EventTickets::default(),
                read_cache: ReadCache::default(),
                settings,
                started: std::time::Instant::now(),
                shutdown: tokio::sync::watch::channel(false).0,
            }),
        }
    }

    pub fn store(&self) -> &Store {
        &self.inner.store
    }

    /// The engine, or 503 when this server was started without one.
    pub fn engine(&self) -> Result<&Engine, problem::Problem> {
        self.inner.engine.as_ref().ok_or_else(|| {
            problem::Problem::new(
                StatusCode::SERVICE_UNAVAILABLE,
                "no-engine",
                "No engine in this server",
                "this server only reads the database; submit and control runs on the daemon started with `halfwave serve`",
            )
        })
    }

    pub fn pool(&self) -> &DbPool {
        self.inner.store.pool()
    }

    /// A receiver that turns true when [`AppState::begin_shutdown`] is called.
    pub fn shutdown_signal(&self) -> tokio::sync::watch::Receiver<bool> {
        self.inner.shutdown.subscribe()
    }

    /// Tells long-lived responses to end (called when the daemon stops).
    pub fn begin_shutdown(&self) {
        self.inner.shutdown.send_replace(true);
    }

    /// The event stream's one-time tickets.
    pub fn event_tickets(&self) -> &event_tickets::EventTickets {
        &self.inner.event_tickets
    }

    pub fn http_metrics(&self) -> &HttpMetrics {
        &self.inner.http_metrics
    }

    /// The run and queue gauges; absent in a read-only server.
    pub fn run_gauges(&self) -> Option<&RunGauges> {
        self.inner.run_gauges.as_deref()
    }

    /// Recently verified tokens (see [`token_cache`]).
    pub fn token_cache(&self) -> &TokenCache {
        &self.inner.token_cache
    }

    /// Read results that cannot change (see [`read_cache`]).
    pub fn read_cache(&self) -> &ReadCache {
        &self.inner.read_cache
    }

    pub fn settings(&self) -> &ApiSettings {
        &self.inner.settings
    }

    /// Seconds since the state was built (the daemon's uptime).
    pub fn uptime_s(&self) -> f64 {
        self.inner.started.elapsed().as_secs_f64()
    }
}

/// Builds the whole application: `/api/v1/...` and the dashboard.
pub fn router(state: AppState) -> Router {
    let timed = routes::timed_routes()
        .layer(TimeoutLayer::with_status_code(
            StatusCode::REQUEST_TIMEOUT,
            REQUEST_TIMEOUT,
        ))
        .layer(DefaultBodyLimit::max(MAX_BODY_BYTES))
        .layer(RequestBodyLimitLayer::new(MAX_BODY_BYTES));
    // The document is built from the same entries by `openapi::document`; only the router is
    // kept here.
    let (api, _document) = timed.merge(routes::streaming_routes()).split_for_parts();
    let app = Router::new()
        .merge(api)
        .merge(routes::dashboard::dashboard_routes())
        .layer(axum::middleware::from_fn_with_state(
            state.clone(),
            metrics::record_requests,
        ))
        .fallback(routes::unknown_route)
        .layer(TraceLayer::new_for_http())
        .layer(axum::middleware::from_fn(problem::problems_for_bare_errors))
        .layer(axum::middleware::from_fn(request_id::assign));
    let app = match routes::cors_layer(state.settings()) {
        Some(cors) => app.layer(cors),
        None => app,
    };
    app.with_state(state)
}

/// Why the HTTP server stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    #[error("cannot listen on {address}: {source}; is another daemon running there, or is the address wrong? (`bind` in the configuration, or HALFWAVE_BIND)")]
    Bind {
        address: std::net::SocketAddr,
        #[source]
        source: std::io::Error,
    },
    #[error("the HTTP server failed: {0}")]
    Io(#[source] std::io::Error),
}

impl ApiSettings {
    /// Settings from the environment: `HALFWAVE_CORS_ORIGINS`, a comma-separated list of origins
    /// allowed to call the API from pages served elsewhere (unset: CORS off).
    pub fn from_env() -> ApiSettings {
        let cors_allowed_origins = std::env::var("HALFWAVE_CORS_ORIGINS")
            .map(|v| {
                v.split(',')
                    .map(|o| o.trim().to_string())
                    .filter(|o| !o.is_empty())
                    .collect()
            })
            .unwrap_or_default();
        ApiSettings {
            cors_allowed_origins,
            connections: connections::ConnectionLimits::default(),
        }
    }
}

/// Serves the API and the dashboard on `config.bind` (loopback unless configured otherwise)
/// until `shutdown` completes; event streams end then so the server can stop.
pub async fn serve(
    config: &crate::config::Config,
    engine: Engine,
    shutdown: impl std::future::Future<Output = ()> + Send + 'static,
) -> Result<(), ServeError> {
    let listener = tokio::net::TcpListener::bind(config.bind)
        .await
        .map_err(|source| ServeError::Bind {
            address: config.bind,
            source,
        })?;
    tracing::info!(address = %config.bind, "HTTP API and dashboard listening");
    serve_on(
        listener,
        AppState::with_engine(engine, ApiSettings::from_env()),
        shutdown,
    )
    .await
}

/// Serves `state` on an already bound listener until `shutdown` completes, within the
/// state's [`connections::ConnectionLimits`]; then event streams end, the other responses
/// finish, and it returns when every connection has closed.
pub async fn serve_on(
    listener: tokio::net::TcpListener,
    state: AppState,
    shutdown: impl std::future::Future<Output = ()> + Send + 'static,
) -> Result<(), ServeError> {
    let on_shutdown = state.clone();
    let limits = state.settings().connections;
    connections::serve_connections(listener, router(state), limits, async move {
        shutdown.await;
        on_shutdown.begin_shutdown();
    })
    .await;
    Ok(())
}
