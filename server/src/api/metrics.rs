//! Request counters and latency histograms, and the Prometheus text exposition of every metric.
//!
//! A middleware records each request under its route template (`/api/v1/runs/{run_id}`, never
//! the raw path; `unmatched` for paths no route serves), its method (standard methods by name,
//! any other as `other`) and status, so the label set stays small whatever clients send. The
//! counters and histograms are `prometheus-client` metric families (atomic updates behind a
//! read lock per request). Uptime, run and queue gauges are collected at each scrape into an
//! [`Exposition`] beside them (`routes/system.rs`, `run_gauges.rs`), which writes the Prometheus
//! text format 0.0.4 through `prometheus-client`'s encoder (label escaping, `le` buckets,
//! `_total` on counters).

use axum::extract::{MatchedPath, Request};
use axum::middleware::Next;
use axum::response::Response;
use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::Histogram;
use prometheus_client::registry::Registry;
use std::fmt::Debug;
use std::hash::Hash;
use std::sync::atomic::AtomicU64;
use std::time::Instant;

/// The content type of the exposition (Prometheus text format 0.0.4).
pub const CONTENT_TYPE: &str = prometheus_client::encoding::prometheus_text::CONTENT_TYPE;

/// Upper bounds of the latency histogram buckets, seconds.
const LATENCY_BUCKETS_S: [f64; 10] = [
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.5, 2.5,
];

/// Labels of the request counter.
#[derive(Debug, Clone, PartialEq, Eq, Hash, EncodeLabelSet)]
struct RequestLabels {
    route: String,
    method: String,
    status: u16,
}

/// Labels of the latency histogram.
#[derive(Debug, Clone, PartialEq, Eq, Hash, EncodeLabelSet)]
struct RouteLabels {
    route: String,
    method: String,
}

fn latency_histogram() -> Histogram {
    Histogram::new(LATENCY_BUCKETS_S)
}

/// The daemon's HTTP metrics.
#[derive(Debug)]
pub struct HttpMetrics {
    requests: Family<RequestLabels, Counter>,
    durations: Family<RouteLabels, Histogram, fn() -> Histogram>,
}

impl Default for HttpMetrics {
    fn default() -> Self {
        HttpMetrics {
            requests: Family::default(),
            durations: Family::new_with_constructor(latency_histogram),
        }
    }
}

impl HttpMetrics {
    /// Records one finished request.
    pub fn record(&self, route: &str, method: &str, status: u16, elapsed_s: f64) {
        let route = route.to_string();
        let method = method.to_string();
        self.durations
            .get_or_create(&RouteLabels {
                route: route.clone(),
                method: method.clone(),
            })
            .observe(elapsed_s);
        self.requests
            .get_or_create(&RequestLabels {
                route,
                method,
                status,
            })
            .inc();
    }

    /// Adds the HTTP metric families to a scrape (the families are shared, not copied).
    pub fn expose(&self, exposition: &mut Exposition) {
        exposition.registry.register(
            "halfwave_http_requests",
            "HTTP requests by route, method and status",
            self.requests.clone(),
        );
        exposition.registry.register(
            "halfwave_http_request_duration_seconds",
            "Time to produce the response",
            self.durations.clone(),
        );
    }
}

/// One scrape: the metric families in the order they are added, rendered in the Prometheus text
/// format 0.0.4. Help texts are given as sentences; the encoder adds the full stop.
#[derive(Debug, Default)]
pub struct Exposition {
    registry: Registry,
}

fn help_text(help: &str) -> &str {
    help.strip_suffix('.').unwrap_or(help)
}

impl Exposition {
    /// A gauge without labels.
    pub fn gauge(&mut self, name: &str, help: &str, value: f64) {
        let gauge = Gauge::<f64, AtomicU64>::default();
        gauge.set(value);
        self.registry.register(name, help_text(help), gauge);
    }

    /// A counter without labels; `name` without `_total`, which the encoder appends.
    pub fn counter(&mut self, name: &str, help: &str, value: u64) {
        let counter = Counter::<u64>::default();
        counter.inc_by(value);
        self.registry.register(name, help_text(help), counter);
    }

    /// A gauge family: one sample per label set.
    pub fn gauges<L>(&mut self, name: &str, help: &str, samples: impl IntoIterator<Item = (L, i64)>)
    where
        L: EncodeLabelSet + Clone + Eq + Hash + Debug + Send + Sync + 'static,
    {
        let family = Family::<L, Gauge>::default();
        for (labels, value) in samples {
            family.get_or_create(&labels).set(value);
        }
        self.registry.register(name, help_text(help), family);
    }

    /// The text exposition.
    pub fn render(&self) -> String {
        let mut out = String::with_capacity(4096);
        // Writing into a String cannot fail; an encoder error would leave a partial text.
        if let Err(e) =
            prometheus_client::encoding::prometheus_text::encode(&mut out, &self.registry)
        {
            tracing::error!("encoding the metrics failed: {e}");
        }
        out
    }
}

/// The method as a label: the standard methods by name (RFC 9110 section 9, and PATCH), any
/// other as `other`. HTTP allows any token as a method, and a label value per method sent
/// would let anyone, even without a token, add series to the daemon's memory for good.
pub fn method_label(method: &axum::http::Method) -> &'static str {
    use axum::http::Method;
    match *method {
        Method::GET => "GET",
        Method::HEAD => "HEAD",
        Method::POST => "POST",
        Method::PUT => "PUT",
        Method::DELETE => "DELETE",
        Method::CONNECT => "CONNECT",
        Method::OPTIONS => "OPTIONS",
        Method::TRACE => "TRACE",
        Method::PATCH => "PATCH",
        _ => "other",
    }
}

/// Middleware recording every request into the state's [`HttpMetrics`]. Labels come from a
/// bounded set: the matched route template (`unmatched` for any path no route serves), the
/// method through [`method_label`], and the status.
pub async fn record_requests(
    axum::extract::State(state): axum::extract::State<super::AppState>,
    request: Request,
    next: Next,
) -> Response {
    let route = request
        .extensions()
        .get::<MatchedPath>()
        .map(|p| p.as_str().to_string())
        .unwrap_or_else(|| "unmatched".to_string());
    let method = method_label(request.method()).to_string();
    let started = Instant::now();
    let response = next.run(request).await;
    state.http_metrics().record(
        &route,
        &method,
        response.status().as_u16(),
        started.elapsed().as_secs_f64(),
    );
    response
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rendered(metrics: &HttpMetrics) -> String {
        let mut exposition = Exposition::default();
        metrics.expose(&mut exposition);
        exposition.render()
    }

    #[test]
    fn histogram_is_cumulative_and_counts_match() {
        let metrics = HttpMetrics::default();
        metrics.record("/api/v1/runs", "GET", 200, 0.0007);
        metrics.record("/api/v1/runs", "GET", 200, 0.02);
        metrics.record("/api/v1/runs", "GET", 404, 3.0);
        let out = rendered(&metrics);
        assert!(
            out.contains(
                "halfwave_http_requests_total{route=\"/api/v1/runs\",method=\"GET\",status=\"200\"} 2"
            ),
            "{out}"
        );
        // Prometheus histograms: buckets are cumulative and +Inf equals _count (exposition format).
        assert!(out.contains("le=\"0.001\"} 1\n"), "{out}");
        assert!(out.contains("le=\"0.025\"} 2\n"), "{out}");
        assert!(out.contains("le=\"2.5\"} 2\n"), "{out}");
        assert!(out.contains("le=\"+Inf\"} 3\n"), "{out}");
        assert!(out.contains("_count{route=\"/api/v1/runs\",method=\"GET\"} 3\n"));
    }

    /// The series names and label names the hand-written exposition had before
    /// `prometheus-client` (taken from its rendering of the same three requests), so dashboards
    /// and alerts that scrape them keep working.
    #[test]
    fn series_names_and_labels_are_those_scrapers_know() {
        let metrics = HttpMetrics::default();
        metrics.record("/api/v1/runs", "GET", 200, 0.0007);
        let out = rendered(&metrics);
        let mut signatures: Vec<String> = out
            .lines()
            .filter(|l| !l.starts_with('#'))
            .map(|l| {
                let (name, rest) = l.split_once('{').unwrap();
                let keys: Vec<&str> = rest
                    .split(',')
                    .filter_map(|kv| kv.split_once('=').map(|(k, _)| k))
                    .collect();
                format!("{name}{{{}}}", keys.join(","))
            })
            .collect();
        signatures.sort();
        signatures.dedup();
        assert_eq!(
            signatures,
            [
                "halfwave_http_request_duration_seconds_bucket{route,method,le}",
                "halfwave_http_request_duration_seconds_count{route,method}",
                "halfwave_http_request_duration_seconds_sum{route,method}",
                "halfwave_http_requests_total{route,method,status}",
            ]
        );
        assert!(out.contains("# TYPE halfwave_http_requests_total counter\n"));
        assert!(out.contains("# TYPE halfwave_http_request_duration_seconds histogram\n"));
    }

    #[test]
    fn label_values_are_escaped() {
        // Backslash, double quote and newline are escaped in label values (Prometheus text
        // exposition format 0.0.4).
        let metrics = HttpMetrics::default();
        metrics.record("a\"b\\c\nd", "GET", 200, 0.001);
        let out = rendered(&metrics);
        assert!(out.contains("route=\"a\\\"b\\\\c\\nd\""), "{out}");
    }
}
