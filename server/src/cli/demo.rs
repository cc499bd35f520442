//! `halfwave demo`: the whole job in one command, on the simulated bench, in about ten seconds.
//!
//! It starts the real daemon in this process (the same [`super::serve::start`], engine and HTTP
//! API as `halfwave serve`) on a free loopback port, with the built-in simulated bench (an
//! invented lab and modulator, `drivers/scenarios/default.toml`) and a SQLite file in the data
//! directory. Then it acts as a lab's client would, over HTTP only: an admin uploads the drive
//! chain's calibration, an operator submits an overnight-style calibration (log-spaced
//! frequencies from 0.2 to 20 GHz, a drive-level ramp at each), the progress bar follows the
//! run's events, and at the end the V_pi table, the 3 dB and 6 dB response frequencies (from
//! [`crate::analysis::response_curve`]) and the SVG plots fetched from the plot routes are shown.
//! The simulated instruments' sweep and settling times are scaled down ([`TIME_FACTOR`]) so the
//! night passes in well under two minutes; nothing else is shortened. `--stay` keeps the daemon up
//! for the dashboard until Ctrl-C.

use super::client::ApiClient;
use super::follow::EventStream;
use super::report::{response_lines, response_summary, vpi_table, ResponseSummary};
use super::runs::to_json;
use super::CliError;
use crate::api::tokens::{self, Role};
use crate::api::views::run_control::SubmittedRun;
use crate::api::views::runs::{FrequencyResultView, RunView};
use crate::api::{ApiSettings, AppState};
use crate::config::Config;
use clap::Args;
use halfwave_drivers::sim::Scenario;
use halfwave_units::Hz;
use serde::Serialize;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Scale of the simulated instrument times: a 0.4 s analyzer sweep takes 20 ms.
pub const TIME_FACTOR: f64 = 0.05;

/// The simulator's random seed (the same seed gives the same run).
pub const SEED: u64 = 7;

/// Lowest and highest drive frequency of the demo plan.
pub const START_HZ: f64 = 0.2e9;
pub const STOP_HZ: f64 = 20e9;

/// Frequencies, log-spaced from [`START_HZ`] to [`STOP_HZ`] (ten per decade).
pub const FREQUENCY_COUNT: usize = 21;

/// The generator level ramp at every frequency (dBm).
pub const RAMP_START_DBM: f64 = 0.0;
pub const RAMP_STOP_DBM: f64 = 20.0;
pub const RAMP_STEP_DB: f64 = 1.25;

/// The name under which the demo's chain calibration is stored.
const CHAIN_NAME: &str = "demo bench 7 drive chain";

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Where the database and the plots go (created if missing; a second demo adds to it).
    #[arg(long, default_value = "halfwave-demo")]
    pub data_dir: PathBuf,
    /// Keep the daemon running after the run, for the dashboard, until Ctrl-C.
    #[arg(long)]
    pub stay: bool,
    /// The loopback port to listen on (0: a free one).
    #[arg(long, default_value_t = 0)]
    pub port: u16,
    /// Print the result as JSON on stdout (the progress bar still goes to stderr).
    #[arg(long)]
    pub json: bool,
}

/// What the demo measured and wrote.
#[derive(Debug, Serialize)]
pub struct DemoReport {
    pub run_id: i64,
    pub state: String,
    pub device_serial: String,
    pub data_dir: String,
    pub database: String,
    /// The dashboard, present only with `--stay` (without it the daemon is gone when the JSON
    /// is read, and a dead link is worse than none).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dashboard_url: Option<String>,
    pub v_pi: Vec<FrequencyResultView>,
    pub response: Option<ResponseSummary>,
    pub plots: Vec<String>,
    pub wall_time_s: f64,
}

/// The demo's log-spaced frequencies (the plan asks the daemon for the same ones).
pub fn demo_frequencies_hz() -> Vec<f64> {
    let n = FREQUENCY_COUNT;
    (0..n)
        .map(|i| START_HZ * (STOP_HZ / START_HZ).powf(i as f64 / (n - 1) as f64))
        .collect()
}

/// The overnight-style plan the demo submits for the simulated modulator.
pub fn demo_plan(serial: &str, rf_input_limit_dbm: f64) -> serde_json::Value {
    serde_json::json!({
        "device": {
            "serial": serial,
            "model": "thin-film lithium niobate phase modulator (invented demo device)",
            "rf_input_limit_dbm": rf_input_limit_dbm,
            "wavelength_nm": 1550.12
        },
        "bench": "sim-bench",
        "chain": {"kind": "stored", "name": CHAIN_NAME},
        "frequencies": {"kind": "logarithmic", "start_hz": START_HZ, "stop_hz": STOP_HZ, "count": FREQUENCY_COUNT},
        "levels": {"kind": "ramp", "start_dbm": RAMP_START_DBM, "stop_dbm": RAMP_STOP_DBM, "step_db": RAMP_STEP_DB},
        "settle_s": 0.0,
        "note": "halfwave demo: overnight-style calibration on the simulated bench of an invented lab"
    })
}

/// The drive chain as the lab measured it end to end at the plan's frequencies (the simulated
/// bench's cable loss and generator level error), as a chain-calibration upload.
fn chain_upload(scenario: &Scenario) -> serde_json::Value {
    let points: Vec<serde_json::Value> = demo_frequencies_hz()
        .into_iter()
        .map(|f| {
            let f = Hz(f);
            serde_json::json!({
                "frequency_hz": f.0,
                "gain_db": scenario.level_error_at(f).0 - scenario.chain_loss_at(f).0,
            })
        })
        .collect();
    serde_json::json!({"name": CHAIN_NAME, "points": points})
}

/// Runs `halfwave demo`.
pub fn run(args: DemoArgs) -> Result<(), CliError> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| CliError::caused("cannot start the async runtime", e))?;
    runtime.block_on(demo(args))
}

async fn demo(args: DemoArgs) -> Result<(), CliError> {
    let started = Instant::now();
    let data_dir = absolute(&args.data_dir);
    let mut config = Config::simulated(data_dir.clone(), TIME_FACTOR, SEED);
    config.bind = SocketAddr::from(([127, 0, 0, 1], args.port));
    let scenario = Scenario::builtin()
        .map_err(|e| CliError::caused("the built-in simulated bench is broken", e))?;

    let (engine, listener, _claim) = super::serve::start(&config).await?;
    let address = listener
        .local_addr()
        .map_err(|e| CliError::caused("cannot read the bound address", e))?;
    let base = format!("http://{address}");
    let admin = fresh_token(&engine, "demo-admin", Role::Admin).await?;
    let operator = fresh_token(&engine, "demo-operator", Role::Operator).await?;

    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let state = AppState::with_engine(engine.clone(), ApiSettings::default());
    let server = tokio::spawn(crate::api::serve_on(listener, state, async {
        let _ = stopped.await;
    }));
    if !args.json {
        outln!(
            "halfwave demo: the daemon runs in this process at {base}/ on a simulated bench ({})",
            scenario.name
        );
        outln!("data directory: {}", data_dir.display());
    }

    let outcome = measure(&args, &base, &admin, &operator, &scenario, &data_dir).await;
    let outcome = outcome.map(|(run, plots)| {
        let response = response_summary(&run.results);
        DemoReport {
            run_id: run.summary.id,
            state: run.summary.state.clone(),
            device_serial: run.summary.device_serial.clone(),
            data_dir: data_dir.display().to_string(),
            database: config.database_url(),
            dashboard_url: args.stay.then(|| format!("{base}/dashboard/")),
            v_pi: run.results,
            response,
            plots,
            wall_time_s: started.elapsed().as_secs_f64(),
        }
    });
    if let Ok(report) = &outcome {
        print_report(report, &args, &operator, &base)?;
    }
    if outcome.is_ok() && args.stay {
        eprintln!("the daemon stays up for the dashboard; Ctrl-C stops it (RF outputs off)");
        crate::shutdown::signal().await;
    }
    let _ = stop.send(());
    // RF off first, as `serve` does: the HTTP connections drain meanwhile.
    engine.shutdown().await;
    let _ = server.await;
    let report = outcome?;
    if report.state != "completed" {
        return Err(CliError::new(format!(
            "the demo run ended {}; `halfwave show {}` against a daemon on {} has the details",
            report.state,
            report.run_id,
            data_dir.display()
        )));
    }
    Ok(())
}

/// Makes `path` absolute (relative to the working directory) so printed paths can be opened.
fn absolute(path: &Path) -> PathBuf {
    if path.is_absolute() {
        path.to_path_buf()
    } else {
        std::env::current_dir()
            .map(|d| d.join(path))
            .unwrap_or_else(|_| path.to_path_buf())
    }
}

/// A new token of this name and role, revoking an earlier demo's token of the same name.
async fn fresh_token(
    engine: &crate::engine::Engine,
    name: &str,
    role: Role,
) -> Result<String, CliError> {
    let pool = engine.store().pool();
    // A missing token is the normal case on a fresh data directory.
    let _ = tokens::revoke(pool, name).await;
    tokens::create(pool, name, role, "demo")
        .await
        .map(|created| created.token)
        .map_err(|e| CliError::caused(format!("cannot create the demo's {role} token"), e))
}

/// Uploads the chain, submits the plan, follows the run and fetches the plots.
async fn measure(
    args: &DemoArgs,
    base: &str,
    admin: &str,
    operator: &str,
    scenario: &Scenario,
    data_dir: &Path,
) -> Result<(RunView, Vec<String>), CliError> {
    let admin = ApiClient::new(base, Some(admin.to_string()))?;
    let client = ApiClient::new(base, Some(operator.to_string()))?;
    let _: serde_json::Value = admin
        .post_json("/api/v1/chain-calibrations", &chain_upload(scenario))
        .await?;
    let plan = demo_plan(
        &scenario.modulator.serial,
        scenario.modulator.max_rf_input_dbm,
    );
    let events = EventStream::open(&client, None).await.ok();
    let submitted: SubmittedRun = client.post_json("/api/v1/runs", &plan).await?;
    if !args.json {
        outln!(
            "run {} submitted: {} on {} frequencies from {} to {} GHz, levels {}..{} dBm in {} dB steps",
            submitted.run_id,
            scenario.modulator.serial,
            FREQUENCY_COUNT,
            START_HZ / 1e9,
            STOP_HZ / 1e9,
            RAMP_START_DBM,
            RAMP_STOP_DBM,
            RAMP_STEP_DB
        );
    }
    let run = super::follow::follow_run(&client, submitted.run_id, events).await?;
    let plots = if run.results.is_empty() {
        Vec::new()
    } else {
        save_plots(&client, &run, data_dir).await?
    };
    Ok((run, plots))
}

/// Fetches the run's plots from the API and writes them under `<data_dir>/plots/`.
async fn save_plots(
    client: &ApiClient,
    run: &RunView,
    data_dir: &Path,
) -> Result<Vec<String>, CliError> {
    let dir = data_dir.join("plots");
    std::fs::create_dir_all(&dir).map_err(|e| {
        CliError::new(format!(
            "cannot create the plot directory {}: {e}",
            dir.display()
        ))
    })?;
    let id = run.summary.id;
    let serial = super::runs::encode_query_value(&run.summary.device_serial);
    let middle = run.results.len() / 2;
    let mut wanted = vec![
        (
            format!("/api/v1/devices/{serial}/plots/v-pi.svg"),
            format!("run-{id}-v-pi.svg"),
        ),
        (
            format!("/api/v1/devices/{serial}/plots/response.svg"),
            format!("run-{id}-response.svg"),
        ),
        (
            format!("/api/v1/runs/{id}/spectrum.svg"),
            format!("run-{id}-last-spectrum.svg"),
        ),
    ];
    if let Some(r) = run
        .results
        .iter()
        .find(|r| r.frequency_index as usize == middle)
    {
        wanted.push((
            format!(
                "/api/v1/runs/{id}/plots/modulation-index.svg?frequency_index={}",
                r.frequency_index
            ),
            format!(
                "run-{id}-modulation-index-{:.2}GHz.svg",
                r.frequency_hz / 1e9
            ),
        ));
    }
    let mut written = Vec::new();
    for (route, file) in wanted {
        let svg = client.get_text(&route).await?;
        let path = dir.join(file);
        std::fs::write(&path, svg)
            .map_err(|e| CliError::new(format!("cannot write {}: {e}", path.display())))?;
        written.push(path.display().to_string());
    }
    Ok(written)
}

fn print_report(
    report: &DemoReport,
    args: &DemoArgs,
    operator: &str,
    base: &str,
) -> Result<(), CliError> {
    if args.json {
        outln!("{}", to_json(report)?);
        return Ok(());
    }
    outln!(
        "\nrun {} {} in {:.1} s — V_pi of {} versus drive frequency:",
        report.run_id,
        report.state,
        report.wall_time_s,
        report.device_serial
    );
    out!("{}", vpi_table(&report.v_pi));
    if let Some(summary) = &report.response {
        out!("{}", response_lines(summary));
    }
    outln!("plots (SVG):");
    for plot in &report.plots {
        outln!("  {plot}");
    }
    outln!("database: {}", report.database);
    match &report.dashboard_url {
        Some(url) => outln!("dashboard: {url} (paste the operator token {operator})"),
        None => outln!(
            "dashboard: {base}/dashboard/ — up only while the demo runs; `halfwave demo --stay` keeps it open"
        ),
    }
    Ok(())
}
