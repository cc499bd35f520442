//! The generic SCPI drivers against the simulated bench served over loopback TCP (the simulator's
//! own SCPI parser and fault injection): identify, set and read back, sweep, traces in ASCII and
//! both binary byte orders, a dropped connection, a silent instrument, a garbled reply and an
//! injected error. The simulator was written independently from the drivers, so agreement here
//! checks the drivers against another reading of SCPI 1999 and IEEE 488.2.

use halfwave_drivers::profile::AnalyzerProfile;
use halfwave_drivers::scpi::{ByteOrder, DataFormat};
use halfwave_drivers::sim::server::{SimServer, SimServerConfig};
use halfwave_drivers::sim::{Role, Scenario, SimBench};
use halfwave_drivers::units::{Dbm, Hz, Trace};
use halfwave_drivers::{
    AnalyzerSettings, InstrumentError, RfSource, ScpiRfSource, ScpiSpectrumAnalyzer, SourceProfile,
    SpectrumAnalyzer,
};
use std::time::{Duration, Instant};

async fn start_bench(time_factor: f64) -> SimServer {
    let mut scenario = Scenario::builtin().expect("built-in scenario");
    scenario.analyzer.sweep_time_s = 0.2;
    scenario.rf_source.settling_time_s = 0.0;
    let bench = SimBench::new(scenario, 7).with_time_factor(time_factor);
    SimServer::start(bench, SimServerConfig::any_free_ports())
        .await
        .expect("start the simulated bench")
}

fn source_profile(retries: u32) -> SourceProfile {
    let mut p = SourceProfile::standard();
    p.connection.timeout_ms = 400;
    p.connection.connect_timeout_ms = 400;
    p.connection.reconnect_backoff_ms = 10;
    p.connection.retries = retries;
    p
}

fn analyzer_profile(format: DataFormat, byte_order: ByteOrder) -> AnalyzerProfile {
    let mut p = AnalyzerProfile::standard();
    p.connection.timeout_ms = 1000;
    p.connection.reconnect_backoff_ms = 10;
    p.data.format = format;
    p.data.byte_order = byte_order;
    p
}

#[tokio::test]
async fn source_identifies_sets_and_reads_back_against_the_simulator() {
    let server = start_bench(0.0).await;
    let mut source = ScpiRfSource::connect(&server.resource(Role::RfSource), source_profile(1))
        .await
        .unwrap();
    // IEEE 488.2 §10.14: four fields; the simulator's identity comes from its scenario.
    let id = source.identify().await.unwrap();
    let truth = server.bench().scenario().source_identity();
    assert_eq!(id, truth);

    assert_eq!(source.set_frequency(Hz(2.5e9)).await.unwrap(), Hz(2.5e9));
    assert_eq!(source.set_level(Dbm(-5.5)).await.unwrap(), Dbm(-5.5));
    assert_eq!(server.bench().rf_setting(), (Hz(2.5e9), Dbm(-5.5)));
    assert!(source.set_output(true).await.unwrap());
    assert!(server.bench().rf_output_on());
    source.safe_off().await.unwrap();
    assert!(!server.bench().rf_output_on());
}

#[tokio::test]
async fn simulator_errors_surface_with_their_codes() {
    let server = start_bench(0.0).await;
    // The source states its range (FREQuency? MAXimum), which the driver then enforces itself.
    let limits = ScpiRfSource::connect(&server.resource(Role::RfSource), source_profile(1))
        .await
        .unwrap()
        .limits();
    assert_eq!(limits, server.bench().scenario().source_limits());
    // Without the range query, 60 GHz passes the profile's limits but not the simulated 40 GHz
    // source: the instrument answers -222 "Data out of range" (SCPI-1999 Vol 2 error list;
    // from memory).
    let mut profile = source_profile(1);
    profile.commands.query_max_frequency = String::new();
    profile.limits.max_frequency_hz = Some(100e9);
    let mut source = ScpiRfSource::connect(&server.resource(Role::RfSource), profile)
        .await
        .unwrap();
    match source.set_frequency(Hz(60e9)).await.unwrap_err() {
        InstrumentError::Scpi { code, message, .. } => {
            assert_eq!(code, -222);
            assert!(message.contains("Data out of range"), "{message}");
        }
        other => panic!("expected a SCPI error, got {other:?}"),
    }
    server
        .faults(Role::RfSource)
        .push_error(-224, "injected by the test");
    match source.set_level(Dbm(0.0)).await.unwrap_err() {
        InstrumentError::Scpi { code, message, .. } => {
            assert_eq!(code, -224);
            assert!(message.contains("injected by the test"), "{message}");
        }
        other => panic!("expected a SCPI error, got {other:?}"),
    }
    assert_eq!(source.set_level(Dbm(0.0)).await.unwrap(), Dbm(0.0));
}

#[tokio::test]
async fn link_faults_of_the_simulator_are_survived() {
    let server = start_bench(0.0).await;
    let faults = server.faults(Role::RfSource);
    let mut source = ScpiRfSource::connect(&server.resource(Role::RfSource), source_profile(1))
        .await
        .unwrap();
    // As the engine does at start-up: the output is now known to be off.
    source.safe_off().await.unwrap();

    // Dropped connection with the output off: the step is repeated on a new connection.
    faults.drop_after_commands(0);
    assert_eq!(source.set_frequency(Hz(3e9)).await.unwrap(), Hz(3e9));

    // Slow replies within the timeout are fine.
    faults.delay_replies(Duration::from_millis(50));
    assert_eq!(source.set_level(Dbm(-1.0)).await.unwrap(), Dbm(-1.0));
    faults.delay_replies(Duration::ZERO);

    // A silent instrument: a clean timeout, then recovery once it answers again.
    let mut strict = ScpiRfSource::connect(&server.resource(Role::RfSource), source_profile(0))
        .await
        .unwrap();
    strict.safe_off().await.unwrap();
    faults.stop_answering();
    let started = Instant::now();
    let err = strict.output_enabled().await.unwrap_err();
    // The error queue is asked on a fresh connection, so the interlock then tries to confirm
    // the output off, which a silent instrument cannot: interrupted, carrying both failures.
    assert!(
        matches!(err, InstrumentError::LinkInterrupted { .. }),
        "{err:?}"
    );
    assert!(err.to_string().contains("did not answer OUTPut?"), "{err}");
    assert!(started.elapsed() >= Duration::from_millis(400));
    faults.resume();
    assert!(!strict.output_enabled().await.unwrap());

    // A garbled reply: a parse error, then recovery.
    faults.garble_replies(1);
    let err = strict.output_enabled().await.unwrap_err();
    assert!(matches!(err, InstrumentError::Parse { .. }), "{err:?}");
    assert!(!strict.output_enabled().await.unwrap());

    // safe_off gets through a drop as well.
    source.set_output(true).await.unwrap();
    faults.drop_after_commands(0);
    source.safe_off().await.unwrap();
    assert!(!server.bench().rf_output_on());
}

/// The interlock on a lost link (common practice: an instrument keeps its output state when the
/// remote link drops, so the client must assume the worst): a step that needed a new connection
/// while the output was on fails, and the output is off afterwards.
#[tokio::test]
async fn a_link_lost_with_the_output_on_switches_it_off_and_fails_the_step() {
    let server = start_bench(0.0).await;
    let faults = server.faults(Role::RfSource);
    let mut source = ScpiRfSource::connect(&server.resource(Role::RfSource), source_profile(2))
        .await
        .unwrap();
    source.safe_off().await.unwrap();
    source.set_level(Dbm(-10.0)).await.unwrap();
    source.set_output(true).await.unwrap();
    assert!(server.bench().rf_output_on());

    faults.drop_after_commands(0);
    let err = source.set_level(Dbm(-8.0)).await.unwrap_err();
    assert!(
        matches!(err, InstrumentError::LinkInterrupted { .. }),
        "{err:?}"
    );
    let message = err.to_string();
    assert!(message.contains("switched off"), "{message}");
    assert!(!server.bench().rf_output_on(), "the interlock left RF on");
    let log = server.bench().command_log(Role::RfSource);
    assert!(
        log.iter()
            .rev()
            .take(4)
            .any(|c| c.starts_with("OUTP") && c.contains("OFF")),
        "no output-off command after the reconnect: {log:?}"
    );

    // With the output known off, the next steps go on normally.
    assert_eq!(source.set_level(Dbm(-8.0)).await.unwrap(), Dbm(-8.0));
}

async fn sweep_and_fetch(server: &SimServer, format: DataFormat, order: ByteOrder) -> Trace {
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &server.resource(Role::Analyzer),
        analyzer_profile(format, order),
    )
    .await
    .unwrap();
    analyzer.fetch_trace().await.unwrap()
}

#[tokio::test]
async fn analyzer_sweeps_and_fetches_in_every_format_against_the_simulator() {
    let server = start_bench(1.0).await;
    let laser = server.bench().laser_frequency();
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &server.resource(Role::Analyzer),
        analyzer_profile(DataFormat::Ascii, ByteOrder::Normal),
    )
    .await
    .unwrap();
    assert_eq!(
        analyzer.identify().await.unwrap(),
        server.bench().scenario().analyzer_identity()
    );
    let settings = AnalyzerSettings {
        center: laser,
        span: Hz(20e9),
        resolution_bandwidth: Hz(4e6),
        points: 2001,
    };
    let applied = analyzer.configure(&settings).await.unwrap();
    // The simulated analyzer offers 1-2-5 bandwidths: 4 MHz becomes the nearest, 5 MHz.
    assert_eq!(applied.resolution_bandwidth, Hz(5e6));
    assert_eq!(applied.points, 2001);
    assert!((applied.center.0 - laser.0).abs() <= 1e6);

    // *OPC? waits for the sweep (0.2 s in this scenario, real time).
    let started = Instant::now();
    analyzer.sweep().await.unwrap();
    assert!(
        started.elapsed() >= Duration::from_millis(190),
        "{:?}",
        started.elapsed()
    );

    let ascii = analyzer.fetch_trace().await.unwrap();
    assert_eq!(ascii.len(), 2001);
    let (first, last) = ascii.span();
    assert!((first.0 - (laser.0 - 10e9)).abs() < 1e6, "{first}");
    assert!((last.0 - (laser.0 + 10e9)).abs() < 1e6, "{last}");
    assert_eq!(ascii.resolution_bandwidth(), Some(Hz(5e6)));
    // With the RF off the spectrum is the bare carrier: the strongest point sits at the laser
    // frequency plus the analyzer's frequency offset from the scenario, within two points.
    let peak = ascii
        .power_dbm()
        .iter()
        .enumerate()
        .max_by(|a, b| a.1.total_cmp(b.1))
        .map(|(i, _)| ascii.frequency_hz()[i])
        .unwrap();
    let shown_at = laser.0 + server.bench().scenario().analyzer.frequency_offset_hz;
    assert!(
        (peak - shown_at).abs() <= 2.0 * 10e6,
        "peak at {peak}, expected {shown_at}"
    );

    // The same sweep fetched as binary, in both byte orders and both widths, agrees with the
    // ASCII values (7 significant digits) to within f32 rounding.
    for (format, order) in [
        (DataFormat::Real32, ByteOrder::Normal),
        (DataFormat::Real32, ByteOrder::Swapped),
        (DataFormat::Real64, ByteOrder::Normal),
        (DataFormat::Real64, ByteOrder::Swapped),
    ] {
        let binary = sweep_and_fetch(&server, format, order).await;
        assert_eq!(binary.frequency_hz(), ascii.frequency_hz());
        for (b, a) in binary.power_dbm().iter().zip(ascii.power_dbm()) {
            assert!(
                (b - a).abs() <= 1e-5 * a.abs() + 1e-4,
                "{format:?} {order:?}: {b} vs {a}"
            );
        }
    }
}

#[tokio::test]
async fn analyzer_survives_a_drop_during_a_sweep() {
    let server = start_bench(0.0).await;
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &server.resource(Role::Analyzer),
        analyzer_profile(DataFormat::Real32, ByteOrder::Normal),
    )
    .await
    .unwrap();
    analyzer.set_points(501).await.unwrap();
    server.faults(Role::Analyzer).drop_after_commands(0);
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    assert_eq!(trace.len(), 501);
}
