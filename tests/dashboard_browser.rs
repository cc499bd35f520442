//! The dashboard in headless Chromium against the simulated bench: paste a token, submit a sweep
//! through the form, watch the progress bar move (from 0 % when idle) and the live spectrum
//! appear, save a screenshot; then, on stored runs in every state: resume offered only where the
//! engine would resume, cancel only after a confirmation, the form's number checks in the unit
//! typed, pinning from the device history and from a run's own view (V_pi table, plots, export,
//! compare). And the printable calibration report: rendered (tables, inline plots, stored markup
//! shown as text) and printed to PDF with `chromium --print-to-pdf`.
//!
//! Skips (loudly) only when `chromium` is not installed and CI is not set; under CI=true a
//! missing browser fails the test.

mod api_support;

use api_support::cdp::Browser;
use api_support::seed::{seed_completed_run, seed_device};
use api_support::{spawn_app_with_engine, spawn_app_with_instruments, true_chain_upload};
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

/// The browser to drive; `None` (the test then returns, said loudly) when `chromium` is not
/// installed and CI is not set. Under CI a missing browser fails the test.
fn chromium_or_skip() -> Option<String> {
    let found = chromium();
    if found.is_none() {
        if std::env::var("CI").is_ok_and(|v| v == "true" || v == "1") {
            panic!("chromium is not installed but CI is set: .ci/run installs it (apt-get install chromium)");
        }
        eprintln!("\n*** SKIPPED dashboard_browser: `chromium` is not on PATH (apt-get install chromium) ***\n");
    }
    found
}

/// Chromium on the app's dashboard, once the page has loaded.
async fn open_dashboard(executable: &str, app: &api_support::TestApp) -> Browser {
    let mut browser = Browser::launch(executable).await;
    browser.navigate(&app.url("/dashboard/")).await;
    wait_for(
        &mut browser,
        "document.readyState === 'complete' && !!document.getElementById('token-input')",
        30,
    )
    .await;
    browser
}

/// Pastes `token` into the page's token field and submits it, as a user would.
async fn paste_token(browser: &mut Browser, token: &str) {
    browser
        .eval(&format!(
            "document.getElementById('token-input').value = '{token}'; \
             document.getElementById('token-form').requestSubmit(); true"
        ))
        .await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn dashboard_submits_a_run_and_shows_progress_and_spectrum() {
    let Some(executable) = chromium_or_skip() else {
        return;
    };
    // Slow enough that the page sees the run in progress (each sweep takes a fraction of its
    // simulated time), fast enough to finish in seconds.
    let bench = spawn_app_with_engine(0.02).await;
    let app = &bench.app;
    let operator = app.token("browser", Role::Operator).await;
    // The bench's stored chain, which the form offers beside the flat loss.
    let admin = app.token("admin", Role::Admin).await;
    let uploaded = app
        .post_json(
            "/api/v1/chain-calibrations",
            Some(&admin),
            &true_chain_upload(&bench.sim, "sim-bench chain", &[1e9, 2e9, 6e9, 10e9, 12e9]),
        )
        .await;
    assert_eq!(uploaded.status(), 201);

    let mut browser = open_dashboard(&executable, app).await;
    // Full simulated instrument time until the page has shown the run in progress (below).
    bench.sim.set_time_factor(1.0);
    // Before a token: the page says why it is empty, and the idle bar shows nothing done.
    assert_eq!(
        browser
            .eval("!document.getElementById('token-notice').hidden && document.getElementById('token-notice').textContent.includes('token create')")
            .await,
        serde_json::Value::Bool(true),
        "the page says that a token is needed and how to get one"
    );
    assert_eq!(bar_fraction(&mut browser).await, 0.0, "idle bar at 0 %");
    paste_token(&mut browser, &operator).await;
    wait_for(
        &mut browser,
        "document.getElementById('bench-select').options.length > 0 \
         && document.getElementById('chain-select').options.length > 1",
        30,
    )
    .await;
    assert_eq!(
        browser
            .eval("document.getElementById('token-notice').hidden")
            .await,
        serde_json::Value::Bool(true)
    );
    // The token is kept in the tab's sessionStorage only (README, "Dashboard"): nothing of it in
    // localStorage or a cookie, where it would outlive the tab.
    assert_eq!(
        browser
            .eval(&format!(
                "Object.values(sessionStorage).includes('{operator}')                  && !Object.values(localStorage).some(v => v.includes('{operator}'))                  && !document.cookie.includes('{operator}')"
            ))
            .await,
        serde_json::Value::Bool(true),
        "the token in sessionStorage only"
    );
    assert_eq!(
        bar_fraction(&mut browser).await,
        0.0,
        "idle bar at 0 % with a token"
    );
    browser
        .eval(
            "const f = document.getElementById('run-form'); \
             f.elements['frequencies.start_hz'].value = '2'; f.elements['frequencies.stop_hz'].value = '10'; \
             f.elements['frequencies.count'].value = '3'; \
             f.elements['levels.start_dbm'].value = '2'; f.elements['levels.stop_dbm'].value = '14'; \
             f.elements['levels.step_db'].value = '3'; \
             f.elements['chain'].value = 'sim-bench chain'; \
             f.elements['chain'].dispatchEvent(new Event('change')); f.requestSubmit(); true",
        )
        .await;
    wait_for(
        &mut browser,
        "document.getElementById('submit-result').textContent.startsWith('Queued as run')",
        30,
    )
    .await;
    // The run measures through the stored chain chosen in the form, and the flat loss was set
    // aside while it was chosen.
    assert_eq!(
        browser
            .eval("document.getElementById('run-form').elements['chain.loss_db'].disabled")
            .await,
        serde_json::Value::Bool(true)
    );
    let queued = browser
        .eval("document.getElementById('submit-result').textContent")
        .await;
    let run_id: i64 = queued
        .as_str()
        .and_then(|t| {
            t.trim_start_matches("Queued as run ")
                .trim_end_matches('.')
                .parse()
                .ok()
        })
        .unwrap_or_else(|| panic!("no run id in {queued}"));
    let run = app
        .get_json(&format!("/api/v1/runs/{run_id}"), Some(&operator))
        .await;
    assert_eq!(run["chain_name"], "sim-bench chain", "{run}");

    // The bar moves: a value strictly between 0 and 100 is seen, then 100 or a finished run.
    // Until the page shows a partial run the instruments take their full simulated time, so
    // that a slow browser on a loaded machine cannot miss the run in progress.
    let mut seen = Vec::new();
    let mut sped_up = false;
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
        if !sped_up && percent > 0.0 && percent < 100.0 {
            bench.sim.set_time_factor(0.02);
            sped_up = true;
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

/// A generator whose link is gone: every command and query fails as unanswered, so no stop path
/// can read its output back as off.
struct UnreachableSource(halfwave_drivers::sim::SimRfSource);

impl UnreachableSource {
    fn fail<T>(&self, operation: &str) -> Result<T, halfwave_drivers::InstrumentError> {
        Err(halfwave_drivers::InstrumentError::Timeout {
            resource: halfwave_drivers::RfSource::resource(&self.0).to_string(),
            operation: operation.to_string(),
            after: Duration::from_millis(100),
        })
    }
}

#[async_trait::async_trait]
impl halfwave_drivers::RfSource for UnreachableSource {
    fn resource(&self) -> &str {
        halfwave_drivers::RfSource::resource(&self.0)
    }
    async fn identify(
        &mut self,
    ) -> Result<halfwave_drivers::Identity, halfwave_drivers::InstrumentError> {
        self.fail("*IDN?")
    }
    fn limits(&self) -> halfwave_drivers::SourceLimits {
        halfwave_drivers::RfSource::limits(&self.0)
    }
    async fn set_frequency(
        &mut self,
        _: halfwave_units::Hz,
    ) -> Result<halfwave_units::Hz, halfwave_drivers::InstrumentError> {
        self.fail("FREQuency")
    }
    async fn set_level(
        &mut self,
        _: halfwave_units::Dbm,
    ) -> Result<halfwave_units::Dbm, halfwave_drivers::InstrumentError> {
        self.fail("POWer")
    }
    async fn set_output(&mut self, _: bool) -> Result<bool, halfwave_drivers::InstrumentError> {
        self.fail("OUTPut")
    }
    async fn output_enabled(&mut self) -> Result<bool, halfwave_drivers::InstrumentError> {
        self.fail("OUTPut?")
    }
    async fn safe_off(&mut self) -> Result<(), halfwave_drivers::InstrumentError> {
        self.fail("OUTPut OFF")
    }
}

/// README, "Safety under faults": a bench whose RF output cannot be read back off is shown on the
/// dashboard as a red banner above everything, naming the bench, what to do and the cause, and
/// as "RF OUTPUT NOT CONFIRMED OFF" in the bench table.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_unconfirmed_rf_output_is_a_red_banner_above_everything() {
    let Some(executable) = chromium_or_skip() else {
        return;
    };
    let bench = spawn_app_with_instruments(0.0, |sim| halfwave::engine::bench::BenchInstruments {
        source: Box::new(UnreachableSource(sim.rf_source())),
        ..halfwave::engine::bench::BenchInstruments::simulated(sim)
    })
    .await;
    let app = &bench.app;
    let viewer = app.token("viewer", Role::Viewer).await;
    let mut browser = open_dashboard(&executable, app).await;
    // No token yet: nothing is read, so no banner.
    assert_eq!(
        browser
            .eval("document.getElementById('safety-banner').hidden")
            .await,
        serde_json::Value::Bool(true)
    );
    paste_token(&mut browser, &viewer).await;
    wait_for(
        &mut browser,
        "!document.getElementById('safety-banner').hidden \
         && document.querySelectorAll('#safety-banner .safety-item').length === 1",
        30,
    )
    .await;
    let banner = text_of(&mut browser, "#safety-banner .safety-output_unconfirmed").await;
    assert!(
        banner.contains("Bench sim-bench: the RF output could not be read back off")
            && banner.contains("switch it off by hand")
            && banner.contains("OUTPut"),
        "{banner}"
    );
    // Red: the item's border and text in the page's "bad" colour, and the banner above every
    // other section of the page (its top edge over theirs, and first among them in the page).
    let looks = browser
        .eval(
            "(() => { const item = document.querySelector('#safety-banner .safety-item'); \
               const style = getComputedStyle(item); \
               const bad = getComputedStyle(document.documentElement).getPropertyValue('--bad').trim(); \
               const probe = document.createElement('span'); probe.style.color = bad; \
               document.body.append(probe); const red = getComputedStyle(probe).color; probe.remove(); \
               const top = document.getElementById('safety-banner').getBoundingClientRect().top; \
               const others = [...document.querySelectorAll('main > section:not(#safety-banner):not([hidden])')]; \
               return { border: style.borderTopColor, text: getComputedStyle(item.querySelector('p')).color, red, \
                 above: others.length > 0 && others.every(s => s.getBoundingClientRect().top >= top), \
                 first: document.querySelector('main > section:not([hidden])').id }; })()",
        )
        .await;
    let red = looks["red"].as_str().unwrap().to_string();
    let (r, g, b) = parse_rgb(&red);
    assert!(
        r > 150 && g < 100 && b < 100,
        "the page's --bad colour is red: {looks}"
    );
    assert_eq!(looks["border"], red.as_str(), "{looks}");
    assert_eq!(looks["text"], red.as_str(), "{looks}");
    assert_eq!(looks["above"], true, "{looks}");
    assert_eq!(looks["first"], "safety-banner", "{looks}");
    wait_for(
        &mut browser,
        "[...document.querySelectorAll('#bench-table td.safety-output_unconfirmed')] \
           .some(td => td.textContent === 'RF OUTPUT NOT CONFIRMED OFF')",
        30,
    )
    .await;
    // Nothing to acknowledge while the output is not read back off.
    assert_eq!(
        browser
            .eval("document.querySelectorAll('#safety-banner button').length")
            .await,
        serde_json::json!(0)
    );
    browser.close().await;
}

/// The red, green and blue of a CSS `rgb(r, g, b)` colour.
fn parse_rgb(colour: &str) -> (u32, u32, u32) {
    let inner = colour
        .trim_start_matches("rgba(")
        .trim_start_matches("rgb(")
        .trim_end_matches(')');
    let parts: Vec<u32> = inner
        .split(',')
        .take(3)
        .map(|p| {
            p.trim()
                .parse()
                .unwrap_or_else(|_| panic!("a colour: {colour}"))
        })
        .collect();
    (parts[0], parts[1], parts[2])
}

/// The fraction of the progress bar drawn as done, as the page renders it: a `<progress>`'s
/// position, or for any other element its rendered width against its container's.
async fn bar_fraction(browser: &mut Browser) -> f64 {
    browser
        .eval(
            "(() => { const b = document.getElementById('progress-bar'); \
               if (b.tagName === 'PROGRESS') return Math.max(0, b.position); \
               return b.getBoundingClientRect().width / b.parentElement.getBoundingClientRect().width; })()",
        )
        .await
        .as_f64()
        .expect("a number")
}

async fn click(browser: &mut Browser, selector: &str) {
    let clicked = browser
        .eval(&format!(
            "(() => {{ const e = document.querySelector({selector:?}); if (!e) return false; e.click(); return true; }})()"
        ))
        .await;
    assert_eq!(
        clicked,
        serde_json::Value::Bool(true),
        "nothing to click at {selector}"
    );
}

async fn text_of(browser: &mut Browser, selector: &str) -> String {
    browser
        .eval(&format!(
            "(() => {{ const e = document.querySelector({selector:?}); return e ? e.textContent : ''; }})()"
        ))
        .await
        .as_str()
        .unwrap_or_default()
        .to_string()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn dashboard_resumes_only_resumable_runs_confirms_cancel_and_pins_from_a_run_view() {
    let Some(executable) = chromium_or_skip() else {
        return;
    };
    let bench = spawn_app_with_engine(0.0).await;
    let app = &bench.app;
    let operator = app.token("browser", Role::Operator).await;
    let store = app.store();
    let (device_id, chain_id) = seed_device(store, "PM-0042").await;
    // Two calibrations of the device: a wide one, then a quick narrow check.
    let v_pi = |f: f64| 3.0 + 0.25 * (f / 1e9).sqrt();
    let wide = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[0.5e9, 2e9, 8e9, 16e9],
        &[0.0, 6.0],
        v_pi,
        51,
    )
    .await;
    let quick = seed_completed_run(
        store,
        device_id,
        chain_id,
        &[1e9, 5e9],
        &[0.0, 6.0],
        |f| 1.01 * v_pi(f),
        51,
    )
    .await;
    // Runs in the other states, as the engine leaves them.
    let new_run = || async {
        store
            .create_run(&halfwave::store::NewRun {
                plan: serde_json::json!({"seeded": true}),
                device_id,
                bench_name: "sim-bench".into(),
                chain_calibration_id: chain_id,
                submitted_by: "seed".into(),
                provenance: Default::default(),
            })
            .await
            .unwrap()
            .id
    };
    use halfwave::store::RunState::{Cancelled, Failed, Interrupted, Running};
    let cancelled = new_run().await;
    store
        .transition_run(cancelled, Cancelled, Some("cancelled by seed"))
        .await
        .unwrap();
    let failed = new_run().await;
    store
        .transition_run(failed, Failed, Some("a limit"))
        .await
        .unwrap();
    let failed_on_link = new_run().await;
    store
        .transition_run(failed_on_link, Running, None)
        .await
        .unwrap();
    store
        .fail_run_resumably(failed_on_link, "the source's link dropped")
        .await
        .unwrap();
    let interrupted = new_run().await;
    store
        .transition_run(interrupted, Running, None)
        .await
        .unwrap();
    store
        .transition_run(interrupted, Interrupted, Some("daemon stopped"))
        .await
        .unwrap();
    // Queued in the store only (the engine's queue does not hold it): cancel works on it.
    let queued = new_run().await;

    let mut browser = open_dashboard(&executable, app).await;
    paste_token(&mut browser, &operator).await;
    wait_for(
        &mut browser,
        &format!("!!document.querySelector('#run-table tr[data-run-id=\"{queued}\"]')"),
        30,
    )
    .await;

    // Resume only where the engine resumes: interrupted, and failed on a link fault.
    for (run, resumable) in [
        (wide.run_id, false),
        (cancelled, false),
        (failed, false),
        (failed_on_link, true),
        (interrupted, true),
        (queued, false),
    ] {
        let offered = browser
            .eval(&format!(
                "!!document.querySelector('#run-table tr[data-run-id=\"{run}\"] button[data-action=\"resume\"]')"
            ))
            .await;
        assert_eq!(
            offered,
            serde_json::Value::Bool(resumable),
            "resume offered on run {run}?"
        );
    }

    // Cancel asks first; "no" keeps the run, "yes" cancels it.
    let row = format!("#run-table tr[data-run-id=\"{queued}\"]");
    click(
        &mut browser,
        &format!("{row} button[data-action=\"cancel\"]"),
    )
    .await;
    assert!(text_of(&mut browser, &format!("{row} .confirm"))
        .await
        .contains(&format!("Cancel run {queued}?")));
    assert_eq!(
        store.run(queued).await.unwrap().state,
        halfwave::store::RunState::Queued
    );
    click(&mut browser, &format!("{row} button[data-action=\"keep\"]")).await;
    assert_eq!(
        store.run(queued).await.unwrap().state,
        halfwave::store::RunState::Queued
    );
    click(
        &mut browser,
        &format!("{row} button[data-action=\"cancel\"]"),
    )
    .await;
    click(
        &mut browser,
        &format!("{row} button[data-action=\"confirm-cancel\"]"),
    )
    .await;
    let deadline = tokio::time::Instant::now() + Duration::from_secs(10);
    while store.run(queued).await.unwrap().state != halfwave::store::RunState::Cancelled {
        assert!(
            tokio::time::Instant::now() < deadline,
            "the confirmed cancel did not arrive"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }

    // The form checks numbers itself, each message in the unit typed; the daemon's hertz come
    // back in GHz.
    browser
        .eval(
            "(() => { const f = document.getElementById('run-form'); \
             f.elements['frequencies.count'].value = ''; f.elements['frequencies.start_hz'].value = '-1'; \
             f.requestSubmit(); return true; })()",
        )
        .await;
    wait_for(
        &mut browser,
        "document.getElementById('submit-result').textContent.startsWith('Not sent')",
        10,
    )
    .await;
    let errors = text_of(&mut browser, "#run-form").await;
    assert!(errors.contains("Count: enter a value"), "{errors}");
    assert!(
        errors.contains("Start must be above 0 GHz (not -1 GHz)"),
        "{errors}"
    );
    browser
        .eval(
            "(() => { const f = document.getElementById('run-form'); \
             f.elements['frequencies.count'].value = '3'; f.elements['frequencies.start_hz'].value = '1'; \
             f.elements['frequencies.stop_hz'].value = '50'; f.requestSubmit(); return true; })()",
        )
        .await;
    wait_for(&mut browser, "document.getElementById('submit-result').className === 'error' && !document.getElementById('submit-result').textContent.startsWith('Not sent') && !document.getElementById('submit-result').textContent.startsWith('Submitting')", 20).await;
    // The simulated source stops at 40 GHz; the daemon says "50000000000 Hz is outside ...".
    let stop_error = text_of(
        &mut browser,
        "#run-form input[name=\"frequencies.stop_hz\"] + .field-error",
    )
    .await;
    assert!(stop_error.contains("50 GHz is outside"), "{stop_error}");
    assert!(!stop_error.contains("50000000000"), "{stop_error}");

    // Device history: pin the wide calibration; the table marks it and the plots say so.
    wait_for(
        &mut browser,
        "!!document.querySelector('#device-select option[value=\"PM-0042\"]')",
        20,
    )
    .await;
    browser
        .eval("(() => { const s = document.getElementById('device-select'); s.value = 'PM-0042'; s.dispatchEvent(new Event('change')); return true; })()")
        .await;
    let wide_row = format!("#calibration-table tr[data-run-id=\"{}\"]", wide.run_id);
    wait_for(
        &mut browser,
        &format!("!!document.querySelector('{wide_row} button[data-action=\"pin\"]')"),
        20,
    )
    .await;
    wait_for(
        &mut browser,
        &format!(
            "document.getElementById('device-plot-note').textContent.includes('run {}')",
            wide.run_id
        ),
        20,
    )
    .await;
    click(
        &mut browser,
        &format!("{wide_row} button[data-action=\"pin\"]"),
    )
    .await;
    wait_for(
        &mut browser,
        &format!("document.querySelector('{wide_row}').classList.contains('pinned')"),
        20,
    )
    .await;
    wait_for(&mut browser, "document.getElementById('device-plot-note').textContent.includes('pinned reference calibration')", 20).await;
    assert_eq!(
        store.device_pin("PM-0042").await.unwrap().unwrap().run_id,
        wide.run_id
    );

    // A run's own view: V_pi table, plots, export links, pin state and button, compare.
    browser
        .eval(&format!("location.hash = '#run/{}'; true", quick.run_id))
        .await;
    wait_for(&mut browser, &format!("!document.getElementById('run-panel').hidden && document.getElementById('run-title').textContent.startsWith('Run {}')", quick.run_id), 20).await;
    wait_for(
        &mut browser,
        "document.querySelectorAll('#run-vpi-table tbody tr').length === 2",
        20,
    )
    .await;
    wait_for(&mut browser, "(() => { const i = document.getElementById('run-vpi-plot'); return !i.hidden && i.complete && i.naturalWidth > 0; })()", 20).await;
    wait_for(&mut browser, "(() => { const i = document.getElementById('run-response-plot'); return !i.hidden && i.complete && i.naturalWidth > 0; })()", 20).await;
    for link in ["export-vpi-csv", "export-run-json", "export-points-json"] {
        assert_eq!(
            browser
                .eval(&format!("!!document.getElementById('{link}')"))
                .await,
            serde_json::Value::Bool(true)
        );
    }
    wait_for(&mut browser, &format!("document.getElementById('run-pin-state').textContent.includes('Run {} is the pinned reference calibration')", wide.run_id), 20).await;
    assert_eq!(
        browser
            .eval("document.getElementById('run-pin').hidden")
            .await,
        serde_json::Value::Bool(false)
    );
    click(&mut browser, "#run-pin").await;
    wait_for(
        &mut browser,
        "document.getElementById('run-pin-state').textContent.startsWith('Pinned')",
        20,
    )
    .await;
    assert_eq!(
        store.device_pin("PM-0042").await.unwrap().unwrap().run_id,
        quick.run_id
    );
    wait_for(
        &mut browser,
        &format!(
            "!!document.querySelector('#compare-select option[value=\"{}\"]')",
            wide.run_id
        ),
        20,
    )
    .await;
    browser
        .eval(&format!(
            "document.getElementById('compare-select').value = '{}'; document.getElementById('compare-form').requestSubmit(); true",
            wide.run_id
        ))
        .await;
    // 0.5, 1, 2, 5, 8 and 16 GHz: the union of the two runs' frequencies.
    wait_for(&mut browser, "!document.getElementById('compare-table').hidden && document.querySelectorAll('#compare-table tbody tr').length === 6", 20).await;
    let png = base64::engine::general_purpose::STANDARD
        .decode(browser.screenshot_base64().await)
        .expect("screenshot is base64");
    std::fs::write(
        std::path::Path::new(env!("CARGO_TARGET_TMPDIR")).join("dashboard-run-view.png"),
        &png,
    )
    .expect("screenshot written");
    // A run that cannot be pinned says so and offers no button.
    browser
        .eval(&format!("location.hash = '#run/{failed}'; true"))
        .await;
    wait_for(&mut browser, &format!("document.getElementById('run-title').textContent.startsWith('Run {failed}') && document.getElementById('run-pin-state').textContent.includes('Only a completed run')"), 20).await;
    assert_eq!(
        browser
            .eval("document.getElementById('run-pin').hidden")
            .await,
        serde_json::Value::Bool(true)
    );
    browser.close().await;
}

/// Waits until `condition` (a JavaScript expression) is true. An exception counts as "not yet"
/// (a table being re-rendered has no rows for a moment); the last one is reported on timeout.
async fn wait_for(browser: &mut Browser, condition: &str, seconds: u64) {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(seconds);
    let guarded = format!(
        "(() => {{ try {{ return ({condition}) === true; }} catch (e) {{ return String(e); }} }})()"
    );
    loop {
        let value = browser.eval(&guarded).await;
        if value == serde_json::Value::Bool(true) {
            return;
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "timed out waiting for: {condition} (last value: {value})"
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// The printable calibration report in headless Chromium: the document served by
/// `GET /runs/{id}/report.html`, saved as a file, renders its tables and both inline plots with
/// the markup in stored strings shown as text (no element made from it), and prints to PDF.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_calibration_report_renders_and_prints_to_pdf() {
    let Some(executable) = chromium_or_skip() else {
        return;
    };
    let app = api_support::spawn_app().await;
    let viewer = app.token("viewer-1", Role::Viewer).await;
    let hostile = "<b id=\"injected\">bold</b>";
    let seeded = api_support::seed::seed_recorded_run(app.store(), hostile, 1).await;
    let html = app
        .get(
            &format!("/api/v1/runs/{}/report.html", seeded.run_id),
            Some(&viewer),
        )
        .await
        .text()
        .await
        .unwrap();
    let dir = tempfile::tempdir().unwrap();
    let page = dir.path().join("report.html");
    std::fs::write(&page, &html).unwrap();
    let url = format!("file://{}", page.display());

    let mut browser = Browser::launch(&executable).await;
    browser.navigate(&url).await;
    wait_for(&mut browser, "document.readyState === 'complete'", 30).await;
    let rendered = browser
        .eval(
            "JSON.stringify({svgs: document.querySelectorAll('figure svg').length, \
             width: Math.round(document.querySelector('figure svg').getBoundingClientRect().width), \
             tables: document.querySelectorAll('table').length, \
             rows: document.querySelectorAll('table')[1].querySelectorAll('tr').length, \
             injected: document.getElementById('injected') !== null, \
             scripts: document.scripts.length, \
             serial: document.querySelector('dd').textContent})",
        )
        .await;
    let rendered: serde_json::Value =
        serde_json::from_str(rendered.as_str().expect("a JSON string")).unwrap();
    assert_eq!(rendered["svgs"], 2, "{rendered}");
    assert!(rendered["width"].as_i64().unwrap() > 300, "{rendered}");
    // Instruments, V_pi (header + 3 frequencies), excluded points.
    assert_eq!(rendered["tables"], 3, "{rendered}");
    assert_eq!(rendered["rows"], 4, "{rendered}");
    assert_eq!(rendered["injected"], false, "{rendered}");
    assert_eq!(rendered["scripts"], 0, "{rendered}");
    assert_eq!(
        rendered["serial"],
        format!("PM-9{hostile}"),
        "the serial reads as typed"
    );
    browser.close().await;

    // Printing: Chromium's own --print-to-pdf, as a user would from the browser.
    let pdf = dir.path().join("report.pdf");
    let profile = tempfile::tempdir().unwrap();
    let printed = tokio::process::Command::new(&executable)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-dev-shm-usage",
            "--no-first-run",
            "--no-pdf-header-footer",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .arg(format!("--print-to-pdf={}", pdf.display()))
        .arg(&url)
        .kill_on_drop(true)
        .output();
    let printed = tokio::time::timeout(Duration::from_secs(120), printed)
        .await
        .expect("chromium printed within 120 s")
        .expect("chromium runs");
    assert!(
        printed.status.success(),
        "chromium --print-to-pdf failed: {}",
        String::from_utf8_lossy(&printed.stderr)
    );
    let bytes = std::fs::read(&pdf).expect("the PDF exists");
    // ISO 32000-1, 7.5.2 and 7.5.5: a PDF file starts with the header %PDF-1.n and ends with
    // the end-of-file marker %%EOF.
    assert!(bytes.starts_with(b"%PDF-"), "not a PDF header");
    let tail = String::from_utf8_lossy(&bytes[bytes.len().saturating_sub(64)..]).into_owned();
    assert!(tail.contains("%%EOF"), "no end-of-file marker: {tail:?}");
    assert!(
        bytes.len() > 10_000,
        "{} bytes: too small for two plots and tables",
        bytes.len()
    );
}
