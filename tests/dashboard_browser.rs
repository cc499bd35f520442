//! The dashboard in headless Chromium against the simulated bench: paste a token, submit a sweep
//! through the form, watch the progress bar move and the live spectrum appear, save a screenshot.
//!
//! Skips (loudly) only when `chromium` is not installed and CI is not set; under CI=true a
//! missing browser fails the test.

mod api_support;

use api_support::cdp::Browser;
use api_support::spawn_app_with_engine;
use base64::Engine as _;
use halfwave::api::tokens::Role;
use std::time::Duration;

fn chromium() -> Option<String> {
    std::env::var_os("PATH").and_then(|paths| {
        std::env::split_paths(&paths)
            .map(|dir| dir.join("chromium"))
            .find(|p| p.is_file())
            .map(|p| p.display().to_string())
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn dashboard_submits_a_run_and_shows_progress_and_spectrum() {
    let Some(executable) = chromium() else {
        if std::env::var("CI").is_ok_and(|v| v == "true" || v == "1") {
            panic!("chromium is not installed but CI is set: .ci/run installs it (apt-get install chromium)");
        }
        eprintln!("\n*** SKIPPED dashboard_browser: `chromium` is not on PATH (apt-get install chromium) ***\n");
        return;
    };
    // Slow enough that the page sees the run in progress (each sweep takes a fraction of its
    // simulated time), fast enough to finish in seconds.
    let bench = spawn_app_with_engine(0.02).await;
    let app = &bench.app;
    let operator = app.token("browser", Role::Operator).await;

    let mut browser = Browser::launch(&executable).await;
    browser.navigate(&app.url("/dashboard/")).await;
    wait_for(
        &mut browser,
        "document.readyState === 'complete' && !!document.getElementById('token-input')",
        30,
    )
    .await;
    browser
        .eval(&format!(
            "document.getElementById('token-input').value = '{operator}'; \
             document.getElementById('token-form').requestSubmit(); true"
        ))
        .await;
    wait_for(
        &mut browser,
        "document.getElementById('bench-select').options.length > 0",
        30,
    )
    .await;
    browser
        .eval(
            "const f = document.getElementById('run-form'); \
             f.elements['frequencies.start_hz'].value = '2'; f.elements['frequencies.stop_hz'].value = '10'; \
             f.elements['frequencies.count'].value = '3'; \
             f.elements['levels.start_dbm'].value = '2'; f.elements['levels.stop_dbm'].value = '14'; \
             f.elements['levels.step_db'].value = '3'; f.requestSubmit(); true",
        )
        .await;
    wait_for(
        &mut browser,
        "document.getElementById('submit-result').textContent.startsWith('Queued as run')",
        30,
    )
    .await;

    // The bar moves: a value strictly between 0 and 100 is seen, then 100 or a finished run.
    let mut seen = Vec::new();
    let deadline = tokio::time::Instant::now() + Duration::from_secs(120);
    loop {
        let percent = browser
            .eval("Number(document.getElementById('progress-bar').dataset.percent || '0')")
            .await
            .as_f64()
            .unwrap_or(0.0);
        if seen.last() != Some(&percent) {
            seen.push(percent);
        }
        if percent >= 100.0 {
            break;
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "progress stuck: {seen:?}"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(
        seen.iter().any(|p| *p > 0.0 && *p < 100.0),
        "the bar never showed a partial run: {seen:?}"
    );

    // The live spectrum arrived as an image with its markers.
    wait_for(&mut browser, "(() => { const i = document.getElementById('live-spectrum'); return !i.hidden && i.complete && i.naturalWidth > 0; })()", 30).await;
    wait_for(
        &mut browser,
        "document.getElementById('live-summary').textContent.includes('completed')",
        60,
    )
    .await;

    let png = base64::engine::general_purpose::STANDARD
        .decode(browser.screenshot_base64().await)
        .expect("screenshot is base64");
    assert!(
        png.starts_with(b"\x89PNG\r\n\x1a\n"),
        "PNG signature (ISO/IEC 15948)"
    );
    let out = std::path::Path::new(env!("CARGO_TARGET_TMPDIR")).join("dashboard.png");
    std::fs::write(&out, &png).expect("screenshot written");
    if std::env::var_os("HALFWAVE_UPDATE_SCREENSHOT").is_some() {
        std::fs::write(
            concat!(env!("CARGO_MANIFEST_DIR"), "/../docs/dashboard.png"),
            &png,
        )
        .expect("docs screenshot written");
    }
    browser.close().await;
}

async fn wait_for(browser: &mut Browser, condition: &str, seconds: u64) {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(seconds);
    loop {
        if browser.eval(condition).await == serde_json::Value::Bool(true) {
            return;
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "timed out waiting for: {condition}"
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}
