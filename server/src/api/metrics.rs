//! Request counters and latency histograms, exposed in the Prometheus text format.
//!
//! A middleware records each request under its route template (`/api/v1/runs/{run_id}`, never
//! the raw path; `unmatched` for paths no route serves), its method (standard methods by name,
//! any other as `other`) and status, so the label set stays small whatever clients send. Counting takes one short
//! mutex section per request; with a handful of routes this costs far less than the request
//! itself. Uptime, run and queue gauges are exported beside them (`routes/system.rs`,
//! `run_gauges.rs`).

use axum::extract::{MatchedPath, Request};
use axum::middleware::Next;
use axum::response::Response;
use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::sync::Mutex;
use std::time::Instant;

/// Upper bounds of the latency histogram buckets, seconds.
const LATENCY_BUCKETS_S: [f64; 10] = [
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.5, 2.5,
];

#[derive(Debug, Default, Clone)]
struct RouteStats {
    /// Requests by status code.
    by_status: BTreeMap<u16, u64>,
    /// Cumulative bucket counts (Prometheus `le` semantics are applied when rendering).
    buckets: [u64; LATENCY_BUCKETS_S.len()],
    count: u64,
    sum_s: f64,
}

/// The daemon's HTTP metrics.
#[derive(Debug, Default)]
pub struct HttpMetrics {
    routes: Mutex<BTreeMap<(String, String), RouteStats>>,
}

impl HttpMetrics {
    /// Records one finished request.
    pub fn record(&self, route: &str, method: &str, status: u16, elapsed_s: f64) {
        let Ok(mut routes) = self.routes.lock() else {
            return;
        };
        let stats = routes
            .entry((route.to_string(), method.to_string()))
            .or_default();
        *stats.by_status.entry(status).or_default() += 1;
        if let Some(bucket) = LATENCY_BUCKETS_S.iter().position(|&le| elapsed_s <= le) {
            stats.buckets[bucket] += 1;
        }
        stats.count += 1;
        stats.sum_s += elapsed_s;
    }

    /// Appends the HTTP metrics in the Prometheus text exposition format (version 0.0.4).
    pub fn render(&self, out: &mut String) {
        let routes = match self.routes.lock() {
            Ok(routes) => routes.clone(),
            Err(_) => return,
        };
        out.push_str(
            "# HELP halfwave_http_requests_total HTTP requests by route, method and status.\n",
        );
        out.push_str("# TYPE halfwave_http_requests_total counter\n");
        for ((route, method), stats) in &routes {
            for (status, n) in &stats.by_status {
                let _ = writeln!(
                    out,
                    "halfwave_http_requests_total{{route=\"{}\",method=\"{}\",status=\"{status}\"}} {n}",
                    escape_label(route),
                    escape_label(method)
                );
            }
        }
        out.push_str(
            "# HELP halfwave_http_request_duration_seconds Time to produce the response.\n",
        );
        out.push_str("# TYPE halfwave_http_request_duration_seconds histogram\n");
        for ((route, method), stats) in &routes {
            let labels = format!(
                "route=\"{}\",method=\"{}\"",
                escape_label(route),
                escape_label(method)
            );
            let mut cumulative = 0;
            for (le, n) in LATENCY_BUCKETS_S.iter().zip(stats.buckets.iter()) {
                cumulative += n;
                let _ = writeln!(
                    out,
                    "halfwave_http_request_duration_seconds_bucket{{{labels},le=\"{le}\"}} {cumulative}"
                );
            }
            let _ = writeln!(
                out,
                "halfwave_http_request_duration_seconds_bucket{{{labels},le=\"+Inf\"}} {}",
                stats.count
            );
            let _ = writeln!(
                out,
                "halfwave_http_request_duration_seconds_sum{{{labels}}} {}",
                stats.sum_s
            );
            let _ = writeln!(
                out,
                "halfwave_http_request_duration_seconds_count{{{labels}}} {}",
                stats.count
            );
        }
    }
}

/// Escapes a label value: backslash, double quote and newline (Prometheus exposition format).
pub fn escape_label(value: &str) -> String {
    value
        .replace('\\', "\\\\")
        .replace('"', "\\\"")
        .replace('\n', "\\n")
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

    #[test]
    fn histogram_is_cumulative_and_counts_match() {
        let metrics = HttpMetrics::default();
        metrics.record("/api/v1/runs", "GET", 200, 0.0007);
        metrics.record("/api/v1/runs", "GET", 200, 0.02);
        metrics.record("/api/v1/runs", "GET", 404, 3.0);
        let mut out = String::new();
        metrics.render(&mut out);
        assert!(out.contains(
            "halfwave_http_requests_total{route=\"/api/v1/runs\",method=\"GET\",status=\"200\"} 2"
        ));
        // Prometheus histograms: buckets are cumulative and +Inf equals _count (exposition format).
        assert!(out.contains("le=\"0.001\"} 1\n"));
        assert!(out.contains("le=\"0.025\"} 2\n"));
        assert!(out.contains("le=\"2.5\"} 2\n"));
        assert!(out.contains("le=\"+Inf\"} 3\n"));
        assert!(out.contains("_count{route=\"/api/v1/runs\",method=\"GET\"} 3\n"));
    }

    #[test]
    fn label_values_are_escaped() {
        assert_eq!(escape_label("a\"b\\c\nd"), "a\\\"b\\\\c\\nd");
    }
}
