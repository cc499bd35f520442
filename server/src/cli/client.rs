//! The HTTP client of the CLI: one small wrapper over `reqwest` that talks to a running daemon.
//!
//! Every client subcommand (submit, watch, runs, show, export, and the demo talking to its own
//! in-process daemon) goes through [`ApiClient`], so that failures read the same everywhere and
//! say what to do: an unreachable daemon names the URL and asks whether `halfwave serve` runs, a
//! refused token (401) says how to get a valid one, a refused plan (422) lists every field the
//! daemon named. Response bodies are decoded into the API's own types (`api::views::...`), so the
//! CLI and the daemon cannot drift apart silently. Plain HTTP only: the daemon listens on
//! loopback or the lab network; reach it from elsewhere through the reverse proxy or a tunnel.

use super::CliError;
use crate::api::problem::Problem;
use clap::Args;
use serde::de::DeserializeOwned;
use std::time::Duration;

/// The content type of the JSON bodies the clients send.
const JSON: &str = "application/json";
/// Where the daemon listens unless told otherwise (the configuration's default `bind`).
pub const DEFAULT_URL: &str = "http://127.0.0.1:8440";

/// The environment variable that holds the token when `--token` is not given.
pub const TOKEN_ENV: &str = "HALFWAVE_TOKEN";

/// The environment variable that holds the daemon's URL when `--url` is not given.
pub const URL_ENV: &str = "HALFWAVE_URL";

/// How long one request may take before the CLI gives up (the daemon's own limit is 30 s).
const REQUEST_TIMEOUT: Duration = Duration::from_secs(60);

/// How long connecting may take: the daemon is on loopback or the lab network.
const CONNECT_TIMEOUT: Duration = Duration::from_secs(5);

/// The options every command that talks to a daemon takes.
#[derive(Debug, Clone, Args)]
pub struct ClientArgs {
    /// The daemon's base URL; default: the HALFWAVE_URL environment variable, else
    /// http://127.0.0.1:8440.
    #[arg(long, value_name = "URL")]
    pub url: Option<String>,
    /// The API token (`hwt_...`, from `halfwave token create`); default: the HALFWAVE_TOKEN
    /// environment variable, which keeps the secret out of the shell history.
    #[arg(long, value_name = "TOKEN")]
    pub token: Option<String>,
    /// Print JSON on stdout for scripts instead of tables (progress bars still go to stderr).
    #[arg(long)]
    pub json: bool,
}

impl ClientArgs {
    /// The client these options describe.
    pub fn client(&self) -> Result<ApiClient, CliError> {
        let token = self
            .token
            .clone()
            .or_else(|| std::env::var(TOKEN_ENV).ok())
            .filter(|t| !t.trim().is_empty());
        let mut client = ApiClient::new(&self.resolved_url(), token)?;
        client.url_given = self.url.as_deref().is_some_and(|u| !u.trim().is_empty());
        Ok(client)
    }

    /// The daemon's URL: `--url`, else `HALFWAVE_URL`, else [`DEFAULT_URL`].
    pub fn resolved_url(&self) -> String {
        self.url
            .clone()
            .or_else(|| std::env::var(URL_ENV).ok())
            .map(|u| u.trim().to_string())
            .filter(|u| !u.is_empty())
            .unwrap_or_else(|| DEFAULT_URL.to_string())
    }
}

/// A client of one daemon, with the token it sends.
#[derive(Debug, Clone)]
pub struct ApiClient {
    base: String,
    token: Option<String>,
    http: reqwest::Client,
    /// A client without the overall timeout, for the event stream.
    streaming: reqwest::Client,
    /// True when the URL came from `--url` (so follow-up hints must repeat it).
    url_given: bool,
    /// The command's flag for each request field a refusal (422) may name, so that the person
    /// at the terminal reads the flag to change (see [`ApiClient::naming_flags`]).
    flags: &'static [(&'static str, &'static str)],
}

impl ApiClient {
    /// A client of the daemon at `url` (`http://host:port`, without a path).
    pub fn new(url: &str, token: Option<String>) -> Result<ApiClient, CliError> {
        let parsed = reqwest::Url::parse(url).map_err(|e| {
            CliError::new(format!(
                "--url {url:?} is not a URL ({e}); give the daemon's address such as {DEFAULT_URL}"
            ))
        })?;
        match parsed.scheme() {
            // https: through the TLS reverse proxy of deploy/, verified against the system's
            // trusted certificates (install a lab CA there).
            "http" => {}
            "https" if cfg!(feature = "tls") => {}
            "https" => {
                return Err(CliError::new(format!(
                    "--url {url:?}: this halfwave was built without TLS (cargo's --no-default-features \
                     drops the `tls` feature); give the daemon's plain http:// address on the lab \
                     network, or use a build with the default features"
                )))
            }
            other => {
                return Err(CliError::new(format!(
                    "--url {url:?}: unknown scheme {other:?}; give an http:// or https:// address such as {DEFAULT_URL}"
                )))
            }
        }
        let build = |timeout: Option<Duration>| {
            let builder = reqwest::Client::builder().connect_timeout(CONNECT_TIMEOUT);
            let builder = match timeout {
                Some(t) => builder.timeout(t),
                None => builder,
            };
            builder
                .build()
                .map_err(|e| CliError::caused("cannot set up the HTTP client", e))
        };
        Ok(ApiClient {
            base: url.trim_end_matches('/').to_string(),
            token,
            http: build(Some(REQUEST_TIMEOUT))?,
            streaming: build(None)?,
            url_given: false,
            flags: &[],
        })
    }

    /// This client with `(request field, command-line flag)` pairs: a refused request's field
    /// list then names the flag with the field, e.g. `--levels-dbm (levels_dbm): ...`.
    pub fn naming_flags(mut self, flags: &'static [(&'static str, &'static str)]) -> ApiClient {
        self.flags = flags;
        self
    }

    /// A follow-up command for the person at the terminal, e.g. `halfwave watch 2`, carrying the
    /// `--url` this command was given so that copying the hint reaches the same daemon (a URL
    /// from `HALFWAVE_URL` needs no repeating: the next command reads it too).
    pub fn hint(&self, command: &str) -> String {
        if self.url_given {
            format!("halfwave {command} --url {}", self.base)
        } else {
            format!("halfwave {command}")
        }
    }

    /// The daemon's base URL, without a trailing slash.
    pub fn base_url(&self) -> &str {
        &self.base
    }

    fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    fn authorize(&self, request: reqwest::RequestBuilder) -> reqwest::RequestBuilder {
        match &self.token {
            Some(token) => request.bearer_auth(token),
            None => request,
        }
    }

    /// GET `path` and decode the JSON answer.
    pub async fn get_json<T: DeserializeOwned>(&self, path: &str) -> Result<T, CliError> {
        let response = self.send(self.http.get(self.url(path)), path).await?;
        decode(response, path).await
    }

    /// GET `path` and return the body as text (SVG plots, CSV traces).
    pub async fn get_text(&self, path: &str) -> Result<String, CliError> {
        let response = self.send(self.http.get(self.url(path)), path).await?;
        response.text().await.map_err(|e| {
            CliError::new(format!(
                "the daemon's answer to {path} broke off: {e}; try again"
            ))
        })
    }

    /// POST a JSON body to `path` and decode the JSON answer.
    pub async fn post_json<T: DeserializeOwned>(
        &self,
        path: &str,
        body: &serde_json::Value,
    ) -> Result<T, CliError> {
        let response = self
            .send(self.post_request(path, JSON, body.to_string()), path)
            .await?;
        decode(response, path).await
    }

    /// POST a text body of `content_type` (a CSV file, say) to `path` and decode the JSON answer.
    pub async fn post_text<T: DeserializeOwned>(
        &self,
        path: &str,
        content_type: &str,
        body: String,
    ) -> Result<T, CliError> {
        let response = self
            .send(self.post_request(path, content_type, body), path)
            .await?;
        decode(response, path).await
    }

    /// POST a JSON body to `path` for an answer without content (204).
    pub async fn post_no_content(
        &self,
        path: &str,
        body: &serde_json::Value,
    ) -> Result<(), CliError> {
        self.send(self.post_request(path, JSON, body.to_string()), path)
            .await
            .map(|_| ())
    }

    fn post_request(
        &self,
        path: &str,
        content_type: &str,
        body: String,
    ) -> reqwest::RequestBuilder {
        self.http
            .post(self.url(path))
            .header(reqwest::header::CONTENT_TYPE, content_type)
            .body(body)
    }

    /// Opens the server-sent event stream (optionally of one run); the caller reads its chunks.
    pub async fn event_stream(&self, run_id: Option<i64>) -> Result<reqwest::Response, CliError> {
        let path = match run_id {
            Some(id) => format!("/api/v1/events?run_id={id}"),
            None => "/api/v1/events".to_string(),
        };
        self.send(self.streaming.get(self.url(&path)), &path).await
    }

    /// Sends a request; a transport failure or an error status becomes a message for the person
    /// at the terminal.
    async fn send(
        &self,
        request: reqwest::RequestBuilder,
        path: &str,
    ) -> Result<reqwest::Response, CliError> {
        let response = self
            .authorize(request)
            .send()
            .await
            .map_err(|e| self.transport_error(&e))?;
        let status = response.status();
        if status.is_success() {
            return Ok(response);
        }
        let text = response.text().await.unwrap_or_default();
        Err(self.status_error(status, &text, path))
    }

    fn transport_error(&self, error: &reqwest::Error) -> CliError {
        if error.is_timeout() {
            return CliError::new(format!(
                "the daemon at {} did not answer in time ({}); it may be overloaded, or the address may lead elsewhere",
                self.base,
                describe(error)
            ));
        }
        let described = describe(error);
        if described.contains("certificate") {
            // The TLS handshake refused the proxy's certificate: the daemon is reachable, so the
            // usual advice (is it running, is the address right) would mislead.
            return CliError::new(format!(
                "the daemon at {} answered with a TLS certificate this machine does not trust: {described} — \
                 install the certificate authority of the lab's TLS proxy in the system's trust store (or name \
                 its PEM file in SSL_CERT_FILE), and use the host name the certificate was issued for",
                self.base
            ));
        }
        CliError::new(format!(
            "cannot reach the daemon at {}: {described} — is `halfwave serve` running, and is --url right?",
            self.base,
        ))
    }

    fn status_error(&self, status: reqwest::StatusCode, body: &str, path: &str) -> CliError {
        let problem: Option<Problem> = serde_json::from_str(body).ok();
        let detail = problem
            .as_ref()
            .map(|p| p.detail.clone())
            .unwrap_or_else(|| body.chars().take(300).collect());
        match status.as_u16() {
            401 if self.token.is_none() => CliError::new(format!(
                "the daemon at {} wants a token and none was given: pass --token or set {TOKEN_ENV} (create one with `halfwave token create --role ROLE --name NAME --config FILE`: operator to submit, cancel and resume runs, admin for chain uploads and tokens)",
                self.base
            )),
            401 => CliError::new(format!(
                "the daemon refused the token ({detail}); check --token or {TOKEN_ENV}, or create a new one with `halfwave token create`"
            )),
            403 => CliError::new(format!(
                "the token's role is not allowed to do this ({detail}); use a token with the role it names (an admin creates one with `halfwave token create --role ROLE --name NAME`)"
            )),
            422 => {
                let fields: Vec<String> = problem
                    .map(|p| {
                        p.errors
                            .iter()
                            .map(|e| match self.flags.iter().find(|(f, _)| *f == e.field) {
                                Some((field, flag)) => format!("{flag} ({field}): {}", e.message),
                                None => format!("{}: {}", e.field, e.message),
                            })
                            .collect()
                    })
                    .unwrap_or_default();
                // One field whose text is already the summary is said once.
                if fields.is_empty() || fields == [detail.as_str()] {
                    CliError::new(format!("the daemon refused the request to {path}: {detail}"))
                } else {
                    CliError::new(format!(
                        "the daemon refused the request to {path}: {detail}\n  {}",
                        fields.join("\n  ")
                    ))
                }
            }
            _ => CliError::new(format!(
                "the daemon answered {status} to {path}: {detail}"
            )),
        }
    }
}

async fn decode<T: DeserializeOwned>(
    response: reqwest::Response,
    path: &str,
) -> Result<T, CliError> {
    let bytes = response.bytes().await.map_err(|e| {
        CliError::new(format!(
            "the daemon's answer to {path} broke off: {e}; try again"
        ))
    })?;
    serde_json::from_slice(&bytes).map_err(|e| {
        CliError::new(format!(
            "the daemon's answer to {path} is not what this CLI expects ({e}); are the CLI and the daemon the same version?"
        ))
    })
}

/// The error and its causes on one line (reqwest hides the useful part in the source chain).
fn describe(error: &reqwest::Error) -> String {
    with_causes(error.to_string(), error)
}

/// `head` followed by every cause in `error`'s source chain, each after `": "`, except a cause
/// whose text the line already holds: many errors (ours with a `source` field, sqlx's, io's)
/// write their cause into their own message as well, and saying it twice only hides the advice
/// after it.
pub fn with_causes(mut head: String, error: &dyn std::error::Error) -> String {
    let mut source = error.source();
    while let Some(cause) = source {
        let text = cause.to_string();
        if !text.is_empty() && !head.contains(&text) {
            head.push_str(": ");
            head.push_str(&text);
        }
        source = cause.source();
    }
    head
}

/// Terminal states of a run (it will not change any more unless resumed).
pub fn is_terminal(state: &str) -> bool {
    matches!(state, "completed" | "failed" | "cancelled" | "interrupted")
}

#[cfg(test)]
mod tests {
    use super::with_causes;

    #[derive(Debug, thiserror::Error)]
    #[error("the database at lab.db could not be read")]
    struct Root;

    /// Writes its cause into its own message (thiserror makes a field named `source` the cause).
    #[derive(Debug, thiserror::Error)]
    #[error("database error while storing a point: {source}; restore a backup")]
    struct Says {
        source: Root,
    }

    /// Keeps its cause out of its message.
    #[derive(Debug, thiserror::Error)]
    #[error("could not store the point")]
    struct Hides {
        #[source]
        cause: Root,
    }

    #[test]
    fn a_cause_the_message_already_says_is_not_said_again() {
        let said = Says { source: Root };
        assert_eq!(
            with_causes(said.to_string(), &said),
            "database error while storing a point: the database at lab.db could not be read; restore a backup"
        );
        let hidden = Hides { cause: Root };
        assert_eq!(
            with_causes(hidden.to_string(), &hidden),
            "could not store the point: the database at lab.db could not be read"
        );
    }
}
