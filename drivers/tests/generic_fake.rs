//! The generic SCPI drivers against the scripted fake instrument over loopback TCP: identify,
//! set and read back, sweep, traces in every data format, link failures and error-queue entries.

mod common;

use common::{fake_trace_dbm, FakeInstrument, State};
use halfwave_drivers::profile::AnalyzerProfile;
use halfwave_drivers::scpi::{ByteOrder, DataFormat};
use halfwave_drivers::units::{Dbm, Hz};
use halfwave_drivers::{
    AnalyzerSettings, InstrumentError, RfSource, ScpiRfSource, ScpiSpectrumAnalyzer, SourceProfile,
    SpectrumAnalyzer,
};
use std::path::Path;
use std::time::{Duration, Instant};

fn quick_source_profile() -> SourceProfile {
    let mut p = SourceProfile::standard();
    p.connection.timeout_ms = 300;
    p.connection.connect_timeout_ms = 300;
    p.connection.reconnect_backoff_ms = 10;
    p
}

fn quick_analyzer_profile(format: DataFormat, byte_order: ByteOrder) -> AnalyzerProfile {
    let mut p = AnalyzerProfile::standard();
    p.connection.timeout_ms = 300;
    p.connection.connect_timeout_ms = 300;
    p.connection.reconnect_backoff_ms = 10;
    p.data.format = format;
    p.data.byte_order = byte_order;
    p
}

fn example_profile(name: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("profiles")
        .join(name)
}

#[tokio::test]
async fn source_identifies_sets_and_reads_back() {
    let fake = FakeInstrument::start().await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    let id = source.identify().await.unwrap();
    assert_eq!(id.manufacturer, "Halfwave Test Fixtures");
    assert_eq!(id.model, "FAKE-1");
    assert_eq!(id.serial, "TF000123");
    assert_eq!(id.firmware, "0.1");

    assert_eq!(source.set_frequency(Hz(2.5e9)).await.unwrap(), Hz(2.5e9));
    // The fake sets levels in 0.01 dB steps: the read-back is the rounded level, within the
    // default 0.05 dB tolerance.
    let level = source.set_level(Dbm(-3.456)).await.unwrap();
    assert!((level.0 - -3.46).abs() < 1e-12, "{level}");
    assert!(source.set_output(true).await.unwrap());
    assert!(source.output_enabled().await.unwrap());
    assert!(fake.state().output_on);
    source.safe_off().await.unwrap();
    assert!(!fake.state().output_on);
    assert!(!source.output_enabled().await.unwrap());
    // Each setting step drained the error queue before reading back.
    let commands = fake.state().commands.clone();
    let set = commands
        .iter()
        .position(|c| c == "FREQuency 2500000000")
        .unwrap();
    assert_eq!(commands[set + 1], "SYSTem:ERRor?");
    assert_eq!(commands[set + 2], "FREQuency?");
}

#[tokio::test]
async fn requests_outside_the_limits_are_refused_before_sending() {
    let fake = FakeInstrument::start().await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    let sent_before = fake.state().commands.len();
    let err = source.set_frequency(Hz(500e9)).await.unwrap_err();
    assert!(matches!(err, InstrumentError::OutOfRange { .. }), "{err:?}");
    let err = source.set_level(Dbm(f64::NAN)).await.unwrap_err();
    assert!(matches!(err, InstrumentError::OutOfRange { .. }), "{err:?}");
    assert_eq!(fake.state().commands.len(), sent_before, "nothing was sent");
}

#[tokio::test]
async fn an_error_from_the_instrument_surfaces_with_its_code() {
    let fake = FakeInstrument::start().await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    // 60 GHz is inside the profile's limits but beyond the fake's 40 GHz: it answers -222.
    // SCPI-1999 Vol 2 error list: -222 "Data out of range" (from memory).
    match source.set_frequency(Hz(60e9)).await.unwrap_err() {
        InstrumentError::Scpi {
            code,
            message,
            operation,
            ..
        } => {
            assert_eq!(code, -222);
            assert_eq!(message, "Data out of range");
            assert_eq!(operation, "FREQuency 60000000000");
        }
        other => panic!("expected a SCPI error, got {other:?}"),
    }
    // An error pushed by the instrument on its own is reported by the next step, with every
    // entry drained so the queue is clean afterwards.
    fake.state()
        .errors
        .push_back((-350, "Queue overflow".into()));
    fake.state()
        .errors
        .push_back((-113, "Undefined header".into()));
    match source.set_level(Dbm(0.0)).await.unwrap_err() {
        InstrumentError::Scpi { code, message, .. } => {
            assert_eq!(code, -350);
            assert!(message.contains("-113"), "{message}");
        }
        other => panic!("expected a SCPI error, got {other:?}"),
    }
    assert!(fake.state().errors.is_empty());
    assert_eq!(source.set_level(Dbm(0.0)).await.unwrap(), Dbm(0.0));
}

#[tokio::test]
async fn a_read_back_outside_the_tolerance_is_an_error() {
    let fake = FakeInstrument::start().await;
    let mut profile = quick_source_profile();
    profile.read_back.level_db = 0.001;
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    match source.set_level(Dbm(-3.456)).await.unwrap_err() {
        InstrumentError::ReadBack {
            setting, actual, ..
        } => {
            assert_eq!(setting, "level");
            assert!(actual.contains("-3.46"), "{actual}");
        }
        other => panic!("expected a read-back error, got {other:?}"),
    }
}

#[tokio::test]
async fn a_dropped_connection_is_recovered_within_the_step() {
    let fake = FakeInstrument::start().await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    // The output is unknown after connecting; the engine confirms it off first, so do the same.
    source.safe_off().await.unwrap();
    fake.state().faults.drop_after_commands = Some(1);
    assert_eq!(source.set_frequency(Hz(3e9)).await.unwrap(), Hz(3e9));
    assert_eq!(fake.state().connections, 2);
    // safe_off survives a drop too.
    source.set_output(true).await.unwrap();
    fake.state().faults.drop_after_commands = Some(1);
    source.safe_off().await.unwrap();
    assert!(!fake.state().output_on);
    assert_eq!(fake.state().connections, 3);
}

#[tokio::test]
async fn a_silent_instrument_times_out_cleanly() {
    let fake = FakeInstrument::start().await;
    let mut profile = quick_source_profile();
    profile.connection.retries = 0;
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    // The output is unknown after connecting; the engine confirms it off first, so do the same.
    source.safe_off().await.unwrap();
    fake.state().faults.silent = true;
    let started = Instant::now();
    let err = source.set_frequency(Hz(2e9)).await.unwrap_err();
    let waited = started.elapsed();
    assert!(matches!(err, InstrumentError::Timeout { .. }), "{err:?}");
    assert!(err.to_string().contains("did not answer"), "{err}");
    assert!(
        waited >= Duration::from_millis(300) && waited < Duration::from_secs(3),
        "{waited:?}"
    );
    fake.state().faults.silent = false;
    assert_eq!(source.set_frequency(Hz(2e9)).await.unwrap(), Hz(2e9));
}

#[tokio::test]
async fn a_garbled_reply_is_a_parse_error_then_the_link_recovers() {
    let fake = FakeInstrument::start().await;
    let mut profile = quick_source_profile();
    profile.connection.retries = 0;
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    // The output is unknown after connecting; the engine confirms it off first, so do the same.
    source.safe_off().await.unwrap();
    fake.state().faults.garble_next_reply = true;
    let err = source.output_enabled().await.unwrap_err();
    assert!(matches!(err, InstrumentError::Parse { .. }), "{err:?}");
    assert!(!source.output_enabled().await.unwrap());
}

async fn analyzer_round(format: DataFormat, byte_order: ByteOrder) {
    let fake = FakeInstrument::start().await;
    let mut analyzer =
        ScpiSpectrumAnalyzer::connect(&fake.resource(), quick_analyzer_profile(format, byte_order))
            .await
            .unwrap();
    assert!(!fake.state().continuous, "single-sweep mode after connect");
    let wanted = AnalyzerSettings {
        center: Hz(193.1e12),
        span: Hz(40e9),
        resolution_bandwidth: Hz(4e6),
        points: 2001,
    };
    let applied = analyzer.configure(&wanted).await.unwrap();
    // The fake rounds the bandwidth to the nearest it offers (5 MHz).
    assert_eq!(applied.resolution_bandwidth, Hz(5e6));
    assert_eq!(applied.center, wanted.center);
    assert_eq!(applied.span, wanted.span);
    assert_eq!(applied.points, 2001);
    analyzer.sweep().await.unwrap();
    assert_eq!(fake.state().sweeps, 1);
    let trace = analyzer.fetch_trace().await.unwrap();
    assert_eq!(trace.len(), 2001);
    assert_eq!(
        trace.power_dbm(),
        fake_trace_dbm(2001).as_slice(),
        "{format:?} {byte_order:?}"
    );
    let (first, last) = trace.span();
    assert!((first.0 - (193.1e12 - 20e9)).abs() < 1.0, "{first}");
    assert!((last.0 - (193.1e12 + 20e9)).abs() < 1.0, "{last}");
    assert_eq!(trace.resolution_bandwidth(), Some(Hz(5e6)));
}

#[tokio::test]
async fn analyzer_trace_in_ascii() {
    analyzer_round(DataFormat::Ascii, ByteOrder::Normal).await;
}

#[tokio::test]
async fn analyzer_trace_in_real32_big_endian() {
    analyzer_round(DataFormat::Real32, ByteOrder::Normal).await;
}

#[tokio::test]
async fn analyzer_trace_in_real32_little_endian() {
    analyzer_round(DataFormat::Real32, ByteOrder::Swapped).await;
}

#[tokio::test]
async fn analyzer_trace_in_real64_both_orders() {
    analyzer_round(DataFormat::Real64, ByteOrder::Normal).await;
    analyzer_round(DataFormat::Real64, ByteOrder::Swapped).await;
}

#[tokio::test]
async fn analyzer_refuses_impossible_settings_and_survives_a_drop_mid_sweep() {
    let fake = FakeInstrument::start().await;
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &fake.resource(),
        quick_analyzer_profile(DataFormat::Real32, ByteOrder::Normal),
    )
    .await
    .unwrap();
    for err in [
        analyzer.set_points(2).await.unwrap_err(),
        analyzer.set_points(10_000_000).await.unwrap_err(),
        analyzer.set_center(Hz(1e9)).await.unwrap_err(),
        analyzer.set_span(Hz(0.0)).await.unwrap_err(),
    ] {
        assert!(matches!(err, InstrumentError::OutOfRange { .. }), "{err:?}");
    }
    fake.state().faults.drop_after_commands = Some(1);
    analyzer.sweep().await.unwrap();
    assert_eq!(
        fake.state().sweeps,
        1,
        "the sweep ran once, after reconnecting"
    );
    let trace = analyzer.fetch_trace().await.unwrap();
    assert_eq!(trace.len(), 1001);
}

#[tokio::test]
async fn the_example_profiles_drive_the_fake_instrument() {
    // The example source profile speaks full paths with CR LF line ends.
    let fake = FakeInstrument::start_with(State {
        reply_terminator: "\r\n".into(),
        ..State::default()
    })
    .await;
    let mut profile =
        SourceProfile::from_file(&example_profile("example-synthesizer-crlf.toml")).unwrap();
    profile.connection.timeout_ms = 500;
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    assert_eq!(source.set_frequency(Hz(12.5e9)).await.unwrap(), Hz(12.5e9));
    assert!(source.set_output(true).await.unwrap());
    source.safe_off().await.unwrap();
    let commands = fake.state().commands.clone();
    assert!(
        commands.contains(&"SOURce:FREQuency:CW 12500000000\r".to_string())
            || commands.contains(&"SOURce:FREQuency:CW 12500000000".to_string()),
        "{commands:?}"
    );
    assert!(
        commands.iter().any(|c| c.trim_end() == "OUTPut:STATe 1"),
        "{commands:?}"
    );

    // The example analyzer profile: SENSe paths and little-endian REAL,64.
    let fake = FakeInstrument::start().await;
    let profile = AnalyzerProfile::from_file(&example_profile(
        "example-optical-analyzer-real64-swapped.toml",
    ))
    .unwrap();
    let mut analyzer = ScpiSpectrumAnalyzer::connect(&fake.resource(), profile)
        .await
        .unwrap();
    assert_eq!(fake.state().format, "REAL64");
    assert!(fake.state().swapped);
    analyzer.set_points(501).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    assert_eq!(trace.power_dbm(), fake_trace_dbm(501).as_slice());
}

#[tokio::test]
async fn a_bad_resource_string_is_refused_with_the_form_to_write() {
    let err = ScpiRfSource::connect("192.168.0.5:5025", SourceProfile::standard())
        .await
        .unwrap_err();
    assert!(
        matches!(err, InstrumentError::BadResource { .. }),
        "{err:?}"
    );
    assert!(
        err.to_string().contains("TCPIP::<host>::<port>::SOCKET"),
        "{err}"
    );
}

#[tokio::test]
async fn an_unusable_profile_is_refused_before_connecting() {
    let fake = FakeInstrument::start().await;
    let mut profile = quick_source_profile();
    profile.commands.set_frequency = "FREQuency".into();
    let err = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap_err();
    assert!(matches!(err, InstrumentError::BadProfile { .. }), "{err:?}");
    assert!(err.to_string().contains("commands.set_frequency"), "{err}");
    assert_eq!(fake.state().connections, 0);
}

#[tokio::test]
async fn common_commands_reset_and_event_status() {
    let fake = FakeInstrument::start().await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    source.set_frequency(Hz(7e9)).await.unwrap();
    // IEEE 488.2 §10.32 *RST returns the device to its reset state (from memory); the fake's
    // reset frequency is 1 GHz.
    source.reset().await.unwrap();
    assert_eq!(fake.state().frequency_hz, 1e9);
    let esr = source.session_mut().event_status().await.unwrap();
    assert!(!esr.has_error());
    let commands = fake.state().commands.clone();
    let reset = commands.iter().position(|c| c == "*RST").unwrap();
    assert_eq!(&commands[reset + 1..reset + 3], ["*OPC?", "SYSTem:ERRor?"]);
}

#[tokio::test]
async fn drivers_connect_from_configuration_as_trait_objects() {
    let fake = FakeInstrument::start().await;
    let mut source = halfwave_drivers::generic::connect_source(&fake.resource(), None)
        .await
        .unwrap();
    assert_eq!(source.identify().await.unwrap().model, "FAKE-1");
    let analyzer_profile = example_profile("example-optical-analyzer-real64-swapped.toml");
    let mut analyzer =
        halfwave_drivers::generic::connect_analyzer(&fake.resource(), Some(&analyzer_profile))
            .await
            .unwrap();
    assert_eq!(analyzer.capabilities().max_points, 50001);
    assert_eq!(analyzer.set_points(11).await.unwrap(), 11);
    let missing = Path::new("/nonexistent/profile.toml");
    let err = halfwave_drivers::generic::connect_source(&fake.resource(), Some(missing))
        .await
        .err()
        .unwrap();
    assert!(matches!(err, InstrumentError::BadProfile { .. }), "{err:?}");
    assert!(
        err.to_string().contains("/nonexistent/profile.toml"),
        "{err}"
    );
}
