//! A minimal Chrome DevTools Protocol client for the dashboard's browser test.
//!
//! It starts headless Chromium with `--remote-debugging-port=0`, reads the browser's WebSocket
//! address from its stderr ("DevTools listening on ws://..."), opens one page target in flattened
//! session mode and sends commands as JSON messages `{id, method, params, sessionId}`, waiting for
//! the reply with the same id (events in between are skipped). Only the few commands the test
//! needs are used: Target.createTarget/attachToTarget, Page.navigate, Runtime.evaluate,
//! Page.captureScreenshot.

use futures_util::{SinkExt, StreamExt};
use serde_json::{json, Value};
use std::process::Stdio;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, BufReader};
use tokio::net::TcpStream;
use tokio::process::{Child, Command};
use tokio_tungstenite::tungstenite::Message;
use tokio_tungstenite::{MaybeTlsStream, WebSocketStream};

type Socket = WebSocketStream<MaybeTlsStream<TcpStream>>;

/// A running headless browser with one attached page.
pub struct Browser {
    child: Child,
    socket: Socket,
    session_id: String,
    next_id: u64,
    _profile: tempfile::TempDir,
}

impl Browser {
    /// Starts `chromium` headless and attaches to a new blank page.
    pub async fn launch(executable: &str) -> Browser {
        let profile = tempfile::tempdir().expect("temporary profile directory");
        let mut child = Command::new(executable)
            .args([
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-dev-shm-usage",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
                "--no-first-run",
                "--hide-scrollbars",
                "--window-size=1360,1500",
                "--remote-debugging-port=0",
            ])
            .arg(format!("--user-data-dir={}", profile.path().display()))
            .arg("about:blank")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .kill_on_drop(true)
            .spawn()
            .expect("chromium starts");
        let stderr = child.stderr.take().expect("chromium stderr is piped");
        let mut lines = BufReader::new(stderr).lines();
        let address = tokio::time::timeout(Duration::from_secs(30), async {
            while let Ok(Some(line)) = lines.next_line().await {
                if let Some(at) = line.find("ws://") {
                    return line[at..].trim().to_string();
                }
            }
            panic!("chromium exited without printing its DevTools address");
        })
        .await
        .expect("chromium prints its DevTools address within 30 s");
        // Keep draining stderr so the browser never blocks on a full pipe.
        tokio::spawn(async move { while let Ok(Some(_)) = lines.next_line().await {} });

        let (socket, _) = tokio_tungstenite::connect_async(address.as_str())
            .await
            .expect("connect to the DevTools WebSocket");
        let mut browser = Browser {
            child,
            socket,
            session_id: String::new(),
            next_id: 0,
            _profile: profile,
        };
        let target = browser
            .call(None, "Target.createTarget", json!({"url": "about:blank"}))
            .await;
        let target_id = target["targetId"]
            .as_str()
            .expect("a target id")
            .to_string();
        let attached = browser
            .call(
                None,
                "Target.attachToTarget",
                json!({"targetId": target_id, "flatten": true}),
            )
            .await;
        browser.session_id = attached["sessionId"]
            .as_str()
            .expect("a session id")
            .to_string();
        browser.page("Page.enable", json!({})).await;
        browser.page("Runtime.enable", json!({})).await;
        browser
            .page(
                "Emulation.setDeviceMetricsOverride",
                json!({"width": 1360, "height": 1500, "deviceScaleFactor": 1, "mobile": false}),
            )
            .await;
        browser
    }

    async fn call(&mut self, session: Option<&str>, method: &str, params: Value) -> Value {
        self.next_id += 1;
        let id = self.next_id;
        let mut message = json!({"id": id, "method": method, "params": params});
        if let Some(session) = session {
            message["sessionId"] = Value::String(session.to_string());
        }
        self.socket
            .send(Message::Text(message.to_string().into()))
            .await
            .expect("send a DevTools command");
        loop {
            let frame = tokio::time::timeout(Duration::from_secs(60), self.socket.next())
                .await
                .unwrap_or_else(|_| panic!("no reply to {method} within 60 s"))
                .unwrap_or_else(|| panic!("DevTools socket closed during {method}"))
                .expect("read a DevTools message");
            let Message::Text(text) = frame else { continue };
            let reply: Value = serde_json::from_str(text.as_str()).expect("DevTools sends JSON");
            if reply["id"].as_u64() != Some(id) {
                continue;
            }
            if let Some(error) = reply.get("error") {
                panic!("DevTools {method} failed: {error}");
            }
            return reply["result"].clone();
        }
    }

    /// Sends a command to the attached page.
    pub async fn page(&mut self, method: &str, params: Value) -> Value {
        let session = self.session_id.clone();
        self.call(Some(&session), method, params).await
    }

    /// Opens a URL in the page.
    pub async fn navigate(&mut self, url: &str) {
        self.page("Page.navigate", json!({"url": url})).await;
    }

    /// Evaluates a JavaScript expression in the page (awaiting a promise) and returns its value.
    pub async fn eval(&mut self, expression: &str) -> Value {
        let result = self
            .page(
                "Runtime.evaluate",
                json!({"expression": expression, "awaitPromise": true, "returnByValue": true}),
            )
            .await;
        if let Some(exception) = result.get("exceptionDetails") {
            panic!("page script failed: {expression}\n{exception}");
        }
        result["result"]["value"].clone()
    }

    /// A PNG screenshot of the page, as base64 text.
    pub async fn screenshot_base64(&mut self) -> String {
        let result = self
            .page(
                "Page.captureScreenshot",
                json!({"format": "png", "captureBeyondViewport": true}),
            )
            .await;
        result["data"]
            .as_str()
            .expect("screenshot data")
            .to_string()
    }

    /// Closes the browser.
    pub async fn close(mut self) {
        self.next_id += 1;
        let message = json!({"id": self.next_id, "method": "Browser.close", "params": {}});
        let _ = self
            .socket
            .send(Message::Text(message.to_string().into()))
            .await;
        if tokio::time::timeout(Duration::from_secs(5), self.child.wait())
            .await
            .is_err()
        {
            let _ = self.child.start_kill();
        }
    }
}
