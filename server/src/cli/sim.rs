//! `halfwave sim`: the simulated bench served as SCPI instruments over TCP (a source, an analyzer
//! and, with `--sensor-port`, a power sensor), for trying the
//! daemon, the drivers or a client script without a lab.
//!
//! It reads a scenario (the built-in one unless `--scenario` names a TOML file), binds the two
//! ports on 127.0.0.1, prints one line per instrument with its VISA-style resource string once
//! both accept connections, and runs until Ctrl-C. Printing only after binding means a script or
//! test can start it with port 0 and read the ports it got from stdout.
//!
//! `--drill FILE` runs a fault drill ([`super::drill`]): link losses, silence, garbled replies
//! and errors at scheduled times, to rehearse the daemon's interlocks. Every change of the
//! simulated RF output is printed on stderr, drill or not.

use super::drill::{self, Drill};
use super::CliError;
use halfwave_drivers::sim::bench::MAX_TIME_FACTOR;
use halfwave_drivers::sim::{Role, Scenario, SimBench, SimServer, SimServerConfig};
use std::io::Write;
use std::path::PathBuf;

/// Serve a simulated RF source, optical spectrum analyzer and (with --sensor-port) RF power
/// sensor as SCPI instruments over TCP.
#[derive(Debug, clap::Args)]
pub struct SimArgs {
    /// Scenario file (TOML) describing laser, modulator, drive chain, source and analyzer;
    /// the built-in demo scenario when left out.
    #[arg(long, value_name = "FILE")]
    pub scenario: Option<PathBuf>,
    /// TCP port of the simulated RF source on 127.0.0.1 (0 picks a free one).
    #[arg(long, default_value_t = 5025)]
    pub source_port: u16,
    /// TCP port of the simulated analyzer on 127.0.0.1 (0 picks a free one).
    #[arg(long, default_value_t = 5026)]
    pub analyzer_port: u16,
    /// TCP port of the simulated RF power sensor on 127.0.0.1 (0 picks a free one); without
    /// it no sensor is served.
    #[arg(long)]
    pub sensor_port: Option<u16>,
    /// Seed of the noise and laser drift: the same seed and commands give the same traces.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Multiplies sweep and settling times (0 makes them instant, 1 is real time).
    #[arg(long, default_value_t = 1.0)]
    pub time_factor: f64,
    /// Fault drill (TOML): faults to inject at scheduled times, e.g. the source's link down for
    /// 3 s, 20 s after the RF output first goes on. Keys: `start` ("ready" or "rf_on") and
    /// [[fault]] tables with `at_s`, `instrument` ("rf_source" or "analyzer"), `kind`
    /// (link_down / silent with `for_s`; slow_replies with `for_s` and `delay_ms`;
    /// garble_replies with `count`; push_error with `code` and `message`). README.md,
    /// "Rehearse the interlocks", has an example.
    #[arg(long, value_name = "FILE")]
    pub drill: Option<PathBuf>,
}

/// Runs `halfwave sim` until Ctrl-C.
pub fn run(args: SimArgs) -> Result<(), CliError> {
    let scenario = match &args.scenario {
        Some(path) => Scenario::from_file(path),
        None => Scenario::builtin(),
    }
    .map_err(|e| {
        CliError::new(format!(
            "{e}; fix the scenario file or leave out --scenario to use the built-in one"
        ))
    })?;
    if !(args.time_factor.is_finite() && (0.0..=MAX_TIME_FACTOR).contains(&args.time_factor)) {
        return Err(CliError::new(format!(
            "--time-factor {} is not allowed; give 0 (instant), 1 (real time) or another number from 0 to {MAX_TIME_FACTOR}",
            args.time_factor
        )));
    }
    let drill = args
        .drill
        .as_deref()
        .map(Drill::from_file)
        .transpose()
        .map_err(CliError::new)?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| CliError::caused("cannot start the async runtime", e))?;
    runtime.block_on(serve(scenario, drill, args))
}

async fn serve(scenario: Scenario, drill: Option<Drill>, args: SimArgs) -> Result<(), CliError> {
    let bench = SimBench::new(scenario, args.seed).with_time_factor(args.time_factor);
    let config = SimServerConfig {
        source_port: args.source_port,
        analyzer_port: args.analyzer_port,
        sensor_port: args.sensor_port,
    };
    let server = SimServer::start(bench, config)
        .await
        .map_err(|e| CliError::new(e.to_string()))?;
    {
        let mut out = std::io::stdout().lock();
        let printed = writeln!(out, "rf-source {}", server.resource(Role::RfSource))
            .and_then(|_| writeln!(out, "analyzer {}", server.resource(Role::Analyzer)))
            .and_then(|_| match server.sensor_address() {
                Some(address) => writeln!(
                    out,
                    "power-sensor {}",
                    halfwave_drivers::sim::server::resource_string(address)
                ),
                None => Ok(()),
            })
            .and_then(|_| out.flush());
        printed.map_err(|e| CliError::caused("cannot write to stdout", e))?;
    }
    eprintln!(
        "simulated bench \"{}\" ready (seed {}); press Ctrl-C to stop",
        server.bench().scenario().name,
        args.seed
    );
    let ready = tokio::time::Instant::now();
    let watcher = tokio::spawn(drill::watch_rf_output(server.bench().clone(), ready));
    let drill_task = drill.map(|drill| {
        let source = server.faults(Role::RfSource);
        let analyzer = server.faults(Role::Analyzer);
        let sensor = server.faults(Role::PowerSensor);
        tokio::spawn(drill::run(
            drill,
            server.bench().clone(),
            move |role| match role {
                Role::RfSource => source.clone(),
                Role::Analyzer => analyzer.clone(),
                Role::PowerSensor => sensor.clone(),
            },
            ready,
        ))
    });
    tokio::signal::ctrl_c()
        .await
        .map_err(|e| CliError::caused("cannot wait for Ctrl-C", e))?;
    if let Some(task) = drill_task {
        task.abort();
    }
    watcher.abort();
    let bench = server.bench().clone();
    server.shutdown().await;
    if bench.overdriven() {
        eprintln!(
            "warning: the simulated modulator was overdriven {} time(s) during this session",
            bench.overdrive_events().len()
        );
    }
    Ok(())
}
