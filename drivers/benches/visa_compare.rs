//! Halfwave's SCPI client beside pyvisa with the pyvisa-py backend, against the same simulated
//! instrument in the same run (issue 12's comparison; target: ours at least 2x faster).
//!
//! The simulated bench's SCPI server runs on its own runtime thread, like an instrument across
//! the wire; both clients reach its RF source over loopback TCP (`TCPIP::127.0.0.1::PORT::SOCKET`).
//! Two operations:
//! - an `*IDN?` round trip (our `ScpiTransport::query`, pyvisa's `query`);
//! - one configuration step as the source driver performs it (`ScpiRfSource::set_frequency`:
//!   `FREQuency <f>`, read back `FREQuency?`, `SYSTem:ERRor?`, `*OPC?`, `SYSTem:ERRor?`), which
//!   `benches/python/visa_compare.py` repeats command for command.
//!
//! Ours is measured by criterion, and then both sides by the same method (median over 30
//! batches of the mean of 50 operations), alternating ours, theirs, ours, theirs so that load
//! from other processes falls on both; the ratio is printed.
//!
//! Run: `pip install pyvisa pyvisa-py` once, then
//! `cargo bench -p halfwave-drivers --bench visa_compare`. Without Python or pyvisa-py the
//! Python side is reported as not measured, with the reason, and only our figures are printed.
//! `HALFWAVE_PYTHON` names another interpreter.

use criterion::Criterion;
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use halfwave_drivers::units::Hz;
use halfwave_drivers::{
    Resource, RfSource, ScpiRfSource, ScpiTransport, SourceProfile, TransportConfig,
};
use std::hint::black_box;
use std::time::{Duration, Instant};

const BATCHES: usize = 30;
const PER_BATCH: usize = 50;

/// Median over batches of the mean time per operation, in microseconds.
fn median_per_operation(mut batch: impl FnMut(usize) -> Duration) -> f64 {
    batch(0);
    let mut means: Vec<f64> = (0..BATCHES)
        .map(|b| batch(b * PER_BATCH).as_secs_f64() / PER_BATCH as f64 * 1e6)
        .collect();
    means.sort_by(f64::total_cmp);
    (means[BATCHES / 2 - 1] + means[BATCHES / 2]) / 2.0
}

/// What the Python side measured, in microseconds.
struct Theirs {
    idn_us: f64,
    config_step_us: f64,
    /// The configuration step with pyvisa-py's default socket options (Nagle on).
    config_step_default_us: f64,
    version: String,
}

/// Runs the Python side; its figures, or why it could not run.
fn python_side(resource: &str) -> Result<Theirs, String> {
    let python = std::env::var("HALFWAVE_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/benches/python/visa_compare.py"
    );
    let out = std::process::Command::new(&python)
        .args([
            script,
            resource,
            &BATCHES.to_string(),
            &PER_BATCH.to_string(),
        ])
        .output()
        .map_err(|e| format!("could not start {python}: {e}"))?;
    if !out.status.success() {
        return Err(format!(
            "{python} {script} failed (is pyvisa-py installed? pip install pyvisa pyvisa-py): {}",
            String::from_utf8_lossy(&out.stderr).trim()
        ));
    }
    let value: serde_json::Value = serde_json::from_slice(&out.stdout)
        .map_err(|e| format!("the script's output is not JSON: {e}"))?;
    let field = |k: &str| {
        value[k]
            .as_f64()
            .ok_or_else(|| format!("the script's output lacks {k}"))
    };
    Ok(Theirs {
        idn_us: field("idn_us")?,
        config_step_us: field("config_step_us")?,
        config_step_default_us: field("config_step_default_us")?,
        version: format!(
            "pyvisa {} with pyvisa-py {}",
            value["pyvisa"].as_str().unwrap_or("?"),
            value["pyvisa_py"].as_str().unwrap_or("?")
        ),
    })
}

fn main() {
    let server_runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .enable_all()
        .build()
        .expect("server runtime");
    let server = server_runtime.block_on(async {
        let scenario = Scenario::builtin().expect("built-in scenario");
        let bench = SimBench::new(scenario, 11).with_time_factor(0.0);
        SimServer::start(bench, SimServerConfig::any_free_ports())
            .await
            .expect("start the simulated bench")
    });
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("client runtime");
    let resource = server.resource(Role::RfSource);
    let mut transport = runtime
        .block_on(ScpiTransport::connect(
            Resource::parse(&resource).expect("resource"),
            TransportConfig::default(),
        ))
        .expect("connect to the simulated source");
    let mut source = runtime
        .block_on(ScpiRfSource::connect(&resource, SourceProfile::standard()))
        .expect("connect the source driver");

    let mut criterion = Criterion::default().configure_from_args();
    {
        let mut group = criterion.benchmark_group("visa_compare_ours");
        group.bench_function("idn_round_trip", |b| {
            b.iter_custom(|iterations| {
                runtime.block_on(async {
                    let started = Instant::now();
                    for _ in 0..iterations {
                        black_box(transport.query("*IDN?").await.expect("query"));
                    }
                    started.elapsed()
                })
            })
        });
        group.bench_function("configuration_step", |b| {
            b.iter_custom(|iterations| {
                runtime.block_on(async {
                    let started = Instant::now();
                    for i in 0..iterations {
                        let f = Hz(1e9 + (i % 1000) as f64 * 1e3);
                        black_box(source.set_frequency(f).await.expect("set frequency"));
                    }
                    started.elapsed()
                })
            })
        });
        group.finish();
    }
    criterion.final_summary();

    // Side by side, same method, alternating; only under `cargo bench` (not `cargo test
    // --benches`, which runs each criterion function once as a smoke test).
    if !std::env::args().any(|a| a == "--bench") {
        return;
    }
    let mut ours_idn = Vec::new();
    let mut ours_step = Vec::new();
    let mut theirs_idn = Vec::new();
    let mut theirs_step = Vec::new();
    let mut theirs_default = Vec::new();
    let mut theirs_version = String::new();
    let mut theirs_missing = None;
    for _round in 0..2 {
        ours_idn.push(median_per_operation(|first| {
            runtime.block_on(async {
                let started = Instant::now();
                for _ in first..first + PER_BATCH {
                    black_box(transport.query("*IDN?").await.expect("query"));
                }
                started.elapsed()
            })
        }));
        ours_step.push(median_per_operation(|first| {
            runtime.block_on(async {
                let started = Instant::now();
                for i in first..first + PER_BATCH {
                    let f = Hz(1e9 + (i % 1000) as f64 * 1e3);
                    black_box(source.set_frequency(f).await.expect("set frequency"));
                }
                started.elapsed()
            })
        }));
        match python_side(&resource) {
            Ok(theirs) => {
                theirs_idn.push(theirs.idn_us);
                theirs_step.push(theirs.config_step_us);
                theirs_default.push(theirs.config_step_default_us);
                theirs_version = theirs.version;
            }
            Err(why) => {
                theirs_missing = Some(why);
                break;
            }
        }
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    println!(
        "\nside by side ({BATCHES} batches x {PER_BATCH}, median of batch means, mean of the rounds):"
    );
    println!("  *IDN? round trip:    ours {:8.1} us", mean(&ours_idn));
    println!("  configuration step:  ours {:8.1} us", mean(&ours_step));
    match theirs_missing {
        Some(why) => println!("  pyvisa-py side not measured: {why}"),
        None => {
            println!("  {theirs_version}:");
            println!(
                "  *IDN? round trip:    theirs {:8.1} us, ours {:.2}x faster",
                mean(&theirs_idn),
                mean(&theirs_idn) / mean(&ours_idn)
            );
            println!(
                "  configuration step:  theirs {:8.1} us, ours {:.2}x faster (TCP_NODELAY set on theirs)",
                mean(&theirs_step),
                mean(&theirs_step) / mean(&ours_step)
            );
            println!(
                "  configuration step:  theirs {:8.1} us with pyvisa-py's default socket options",
                mean(&theirs_default)
            );
        }
    }
    drop(server);
}
