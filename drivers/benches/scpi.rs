//! SCPI client speed: a query round trip over loopback TCP, and decoding a 1 MB binary trace.
//!
//! Targets (issue 3): round trip under 100 microseconds median; parsing a 1 MB definite-length
//! REAL,32 block at 1 GB/s or more. The round trip is measured twice on 127.0.0.1: against the
//! simulated bench's SCPI server (its own runtime thread, the real command parser and error
//! queue), and against a minimal line-echo server (a blocking thread that answers every line with
//! a fixed `*IDN?` reply), which isolates the driver's transport plus the loopback stack. The
//! simulator also serves a whole configuration step (set, error-queue check, read-back) and a
//! 10,001-point REAL,32 trace fetch.
//!
//! The trace fetch is measured twice: as the driver runs it (format and byte order sent again
//! before every fetch, `data.assert_each_fetch = true`), and with the format set at connect only;
//! the difference is the cost of asserting the format (issue 12).
//!
//! Run: `cargo bench -p halfwave-drivers --bench scpi`

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use halfwave_drivers::scpi::block::{decode_binary_reply_into, encode_values, reply_end};
use halfwave_drivers::scpi::response::parse_number_list_into;
use halfwave_drivers::scpi::{ByteOrder, DataFormat};
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use halfwave_drivers::units::Hz;
use halfwave_drivers::{
    AnalyzerProfile, Resource, RfSource, ScpiRfSource, ScpiSpectrumAnalyzer, ScpiTransport,
    SourceProfile, SpectrumAnalyzer, TransportConfig,
};
use std::hint::black_box;
use std::io::{BufRead, BufReader, Write};
use std::net::TcpListener;
use std::time::Instant;

/// Starts a blocking echo-style SCPI server and returns its port.
fn start_line_server() -> u16 {
    let listener = TcpListener::bind("127.0.0.1:0").expect("bind loopback");
    let port = listener.local_addr().expect("local address").port();
    std::thread::spawn(move || {
        for stream in listener.incoming() {
            let Ok(stream) = stream else { continue };
            std::thread::spawn(move || {
                let _ = stream.set_nodelay(true);
                let mut writer = stream.try_clone().expect("clone socket");
                let mut reader = BufReader::new(stream);
                let mut line = String::new();
                loop {
                    line.clear();
                    match reader.read_line(&mut line) {
                        Ok(0) | Err(_) => return,
                        Ok(_) => {}
                    }
                    if line.trim_end().ends_with('?')
                        && writer
                            .write_all(b"Halfwave Bench Fixtures,ECHO-1,BF0001,1.0\n")
                            .is_err()
                    {
                        return;
                    }
                }
            });
        }
    });
    port
}

fn query_round_trip(c: &mut Criterion) {
    let port = start_line_server();
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("tokio runtime");
    let resource = Resource::parse(&format!("TCPIP::127.0.0.1::{port}::SOCKET")).unwrap();
    let mut transport = runtime
        .block_on(ScpiTransport::connect(resource, TransportConfig::default()))
        .expect("connect to the echo server");
    let mut group = c.benchmark_group("scpi_round_trip");
    group.bench_function("query_idn_loopback_echo_server", |b| {
        b.iter_custom(|iterations| {
            runtime.block_on(async {
                let started = Instant::now();
                for _ in 0..iterations {
                    let reply = transport.query("*IDN?").await.expect("query");
                    black_box(reply);
                }
                started.elapsed()
            })
        })
    });
    group.finish();
}

fn simulator_exchanges(c: &mut Criterion) {
    // The simulator runs on its own runtime thread, like an instrument across the wire.
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
    let source_resource = server.resource(Role::RfSource);
    let analyzer_resource = server.resource(Role::Analyzer);
    let mut transport = runtime
        .block_on(ScpiTransport::connect(
            Resource::parse(&source_resource).unwrap(),
            TransportConfig::default(),
        ))
        .expect("connect to the simulated source");
    let mut source = runtime
        .block_on(ScpiRfSource::connect(
            &source_resource,
            SourceProfile::standard(),
        ))
        .expect("connect the source driver");
    let mut analyzer = runtime
        .block_on(ScpiSpectrumAnalyzer::connect(
            &analyzer_resource,
            AnalyzerProfile::standard(),
        ))
        .expect("connect the analyzer driver");
    let mut profile = AnalyzerProfile::standard();
    profile.data.assert_each_fetch = false;
    let mut analyzer_format_once = runtime
        .block_on(ScpiSpectrumAnalyzer::connect(&analyzer_resource, profile))
        .expect("connect the second analyzer driver");
    runtime.block_on(async {
        analyzer.set_points(10_001).await.expect("points");
        analyzer.sweep().await.expect("sweep");
    });

    let mut group = c.benchmark_group("scpi_round_trip");
    group.bench_function("query_idn_loopback_simulator", |b| {
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
    group.bench_function(
        "set_frequency_with_error_check_and_read_back_simulator",
        |b| {
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
        },
    );
    group.bench_function("fetch_trace_10001_points_real32_simulator", |b| {
        b.iter_custom(|iterations| {
            runtime.block_on(async {
                let started = Instant::now();
                for _ in 0..iterations {
                    black_box(analyzer.fetch_trace().await.expect("fetch trace"));
                }
                started.elapsed()
            })
        })
    });
    group.bench_function(
        "fetch_trace_10001_points_real32_simulator_format_set_once",
        |b| {
            b.iter_custom(|iterations| {
                runtime.block_on(async {
                    let started = Instant::now();
                    for _ in 0..iterations {
                        black_box(
                            analyzer_format_once
                                .fetch_trace()
                                .await
                                .expect("fetch trace"),
                        );
                    }
                    started.elapsed()
                })
            })
        },
    );
    group.finish();
    drop(server);
}

fn block_decoding(c: &mut Criterion) {
    const BLOCK_BYTES: usize = 1 << 20;
    let values: Vec<f64> = (0..BLOCK_BYTES / 4)
        .map(|i| -90.0 + (i % 4096) as f64 * 0.01)
        .collect();
    let mut group = c.benchmark_group("scpi_block_1MiB");
    for (format, order, label) in [
        (DataFormat::Real32, ByteOrder::Normal, "real32_normal"),
        (DataFormat::Real32, ByteOrder::Swapped, "real32_swapped"),
    ] {
        let mut block = encode_values(&values, format, order);
        block.push(b'\n');
        group.throughput(Throughput::Bytes(block.len() as u64));
        let mut out = Vec::with_capacity(values.len());
        group.bench_with_input(BenchmarkId::new("decode", label), &block, |b, block| {
            b.iter(|| {
                decode_binary_reply_into(black_box(block), format, order, &mut out).unwrap();
                black_box(out.len())
            })
        });
    }
    let values64: Vec<f64> = values.iter().take(BLOCK_BYTES / 8).copied().collect();
    let mut block = encode_values(&values64, DataFormat::Real64, ByteOrder::Normal);
    block.push(b'\n');
    group.throughput(Throughput::Bytes(block.len() as u64));
    let mut out = Vec::with_capacity(values64.len());
    group.bench_function(BenchmarkId::new("decode", "real64_normal"), |b| {
        b.iter(|| {
            decode_binary_reply_into(
                black_box(&block),
                DataFormat::Real64,
                ByteOrder::Normal,
                &mut out,
            )
            .unwrap();
            black_box(out.len())
        })
    });
    group.bench_function(BenchmarkId::new("frame", "reply_end"), |b| {
        b.iter(|| reply_end(black_box(&block), b"\n", 0).unwrap())
    });
    group.finish();

    // For comparison: the same trace size as ASCII (10,001 points, a typical analyzer trace).
    let ascii: String = values
        .iter()
        .take(10_001)
        .map(|v| format!("{v:.4E}"))
        .collect::<Vec<_>>()
        .join(",");
    let mut group = c.benchmark_group("scpi_ascii_10001_points");
    group.throughput(Throughput::Bytes(ascii.len() as u64));
    let mut out = Vec::with_capacity(10_001);
    group.bench_function("parse_number_list", |b| {
        b.iter(|| {
            parse_number_list_into(black_box(&ascii), &mut out).unwrap();
            black_box(out.len())
        })
    });
    group.finish();
}

criterion_group!(
    benches,
    query_round_trip,
    simulator_exchanges,
    block_decoding
);
criterion_main!(benches);
