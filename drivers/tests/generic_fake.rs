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
    // Each setting step read back, then drained the error queue, so an entry belongs to it.
    let commands = fake.state().commands.clone();
    let set = commands
        .iter()
        .position(|c| c == "FREQuency 2500000000")
        .unwrap();
    assert_eq!(commands[set + 1], "FREQuency?");
    assert_eq!(commands[set + 2], "SYSTem:ERRor?");
}

#[tokio::test]
async fn the_source_learns_its_ranges_from_the_instrument() {
    // SCPI-1999 Vol 1 §7.2.1.1 (from memory): a numeric query with MINimum or MAXimum returns
    // the lowest or highest allowed value. The fake states 1 kHz to 40 GHz and -130 to 25 dBm.
    let fake = FakeInstrument::start().await;
    let source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    let limits = source.limits();
    assert_eq!(limits.min_frequency, Hz(common::SOURCE_MIN_HZ));
    assert_eq!(limits.max_frequency, Hz(common::SOURCE_MAX_HZ));
    assert_eq!(limits.min_level, Dbm(common::SOURCE_MIN_DBM));
    assert_eq!(limits.max_level, Dbm(common::SOURCE_MAX_DBM));
    let notes = source.connection_notes();
    assert!(
        notes
            .iter()
            .all(|n| n.value.contains("stated by the instrument")),
        "{notes:?}"
    );
    let commands = fake.state().commands.clone();
    for query in [
        "FREQuency? MINimum",
        "FREQuency? MAXimum",
        "POWer? MINimum",
        "POWer? MAXimum",
    ] {
        assert!(
            commands.iter().any(|c| c == query),
            "{query} in {commands:?}"
        );
    }

    // A profile narrower than the instrument wins; a level of 26 dBm is refused before sending
    // on a 25 dBm instrument even though the profile would allow 30 dBm.
    let mut profile = quick_source_profile();
    profile.limits.max_level_dbm = Some(30.0);
    profile.limits.max_frequency_hz = Some(20e9);
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    assert_eq!(source.limits().max_level, Dbm(25.0));
    assert_eq!(source.limits().max_frequency, Hz(20e9));
    let err = source.set_level(Dbm(26.0)).await.unwrap_err();
    assert!(matches!(err, InstrumentError::OutOfRange { .. }), "{err:?}");

    // An instrument that states nothing: the profile, then the conservative default.
    let mut profile = quick_source_profile();
    profile.commands.query_min_level = String::new();
    profile.commands.query_max_level = String::new();
    profile.commands.query_min_frequency = "FREQuency? LOWest".into(); // refused: -224
    profile.limits.min_level_dbm = Some(-50.0);
    let source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    // The conservative default as README states it (10 MHz to 20 GHz, -100 to +10 dBm): the
    // values written out, so that raising the constant fails here.
    assert_eq!(source.limits().min_level, Dbm(-50.0));
    assert_eq!(source.limits().max_level, Dbm(10.0));
    assert_eq!(source.limits().min_frequency, Hz(10e6));
    assert_eq!(source.limits().max_frequency, Hz(20e9));
    let defaults = halfwave_drivers::profile::SourceLimitsProfile::CONSERVATIVE;
    assert_eq!(defaults.min_level, Dbm(-100.0));
    // The refusal was read and cleared at connect, not left for a later command.
    assert!(fake.state().errors.is_empty());
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
    // The range is not asked, so 60 GHz passes the driver's check and reaches the instrument.
    let mut profile = quick_source_profile();
    profile.commands.query_max_frequency = String::new();
    profile.limits.max_frequency_hz = Some(100e9);
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
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
    let err = source.set_level(Dbm(0.0)).await.unwrap_err();
    match &err {
        InstrumentError::Scpi { code, message, .. } => {
            assert_eq!(*code, -350);
            assert_eq!(message, "Queue overflow");
        }
        other => panic!("expected a SCPI error, got {other:?}"),
    }
    // Each entry keeps the <code>,"<message>" form of SCPI-1999 Vol 2 §21.8 (from memory),
    // none nested inside another's quotes.
    let text = err.to_string();
    assert!(
        text.contains("SCPI error -350,\"Queue overflow\" after"),
        "{text}"
    );
    assert!(
        text.contains("the error queue also held -113,\"Undefined header\""),
        "{text}"
    );
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
    // The source asked its error queue on a fresh connection, so the link was re-established
    // mid-step and the interlock tried to confirm the output off, which a silent instrument
    // cannot: the step fails as interrupted, carrying the first failure.
    assert!(
        matches!(err, InstrumentError::LinkInterrupted { .. }),
        "{err:?}"
    );
    let text = err.to_string();
    assert!(text.contains("did not answer FREQuency? within"), "{text}");
    // The error queue was asked on a fresh connection, and the message says it did not answer.
    assert!(
        text.contains("did not answer SYSTem:ERRor? on a fresh connection either"),
        "{text}"
    );
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
    // A point count past the profile's maximum in the fetch's own query (a wrong device on the
    // port, a garbled reply) is refused by name before anything is sized by it: 1e15 points
    // would ask for petabytes and abort the daemon with the RF output on.
    fake.state().points = 1_000_000_000_000_000;
    let err = analyzer.fetch_trace().await.unwrap_err();
    assert!(matches!(err, InstrumentError::Parse { .. }), "{err:?}");
    let text = err.to_string();
    assert!(
        text.contains("1000000000000000 points") && text.contains("capabilities.max_points"),
        "{text}"
    );
    fake.state().points = 1001;
    assert_eq!(analyzer.fetch_trace().await.unwrap().len(), 1001);
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
    // An analyzer profile that would let a trace be sized past what the store keeps (2^24).
    let mut profile = quick_analyzer_profile(DataFormat::Ascii, ByteOrder::Normal);
    profile.capabilities.max_points = (1 << 24) + 1;
    let err = ScpiSpectrumAnalyzer::connect(&fake.resource(), profile)
        .await
        .unwrap_err();
    assert!(matches!(err, InstrumentError::BadProfile { .. }), "{err:?}");
    assert!(err.to_string().contains("capabilities.max_points"), "{err}");
    // A point-count tolerance past the maximum (its i64 cast could also turn negative).
    let mut profile = quick_analyzer_profile(DataFormat::Ascii, ByteOrder::Normal);
    profile.read_back.points = usize::MAX;
    let err = ScpiSpectrumAnalyzer::connect(&fake.resource(), profile)
        .await
        .unwrap_err();
    assert!(err.to_string().contains("read_back.points"), "{err}");
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

#[tokio::test]
async fn a_query_the_instrument_does_not_know_is_reported_with_its_own_error() {
    // IEEE 488.2 §6.1.6 / SCPI-1999 Vol 2 §21.8.6 (from memory): an unknown header queues -113
    // and draws no response. The driver must read that entry, not just report a timeout.
    let fake = FakeInstrument::start_with(State {
        without_start_stop: true,
        ..State::default()
    })
    .await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    let err = source
        .session_mut()
        .query("FREQuency:STARt?")
        .await
        .unwrap_err();
    match &err {
        InstrumentError::Scpi {
            code, operation, ..
        } => {
            assert_eq!(*code, -113);
            assert!(operation.starts_with("FREQuency:STARt?"), "{operation}");
        }
        other => panic!("expected the instrument's -113, got {other:?}"),
    }
    let text = err.to_string();
    assert!(
        text.contains("it sent no reply to FREQuency:STARt?"),
        "{text}"
    );
    assert!(!text.contains("busy, hung"), "{text}");
    // Not repeated (the instrument has answered), and the queue is clean for the next command.
    let asked = fake
        .state()
        .commands
        .iter()
        .filter(|c| c.as_str() == "FREQuency:STARt?")
        .count();
    assert_eq!(asked, 1);
    assert!(fake.state().errors.is_empty());
    assert_eq!(source.set_level(Dbm(-1.0)).await.unwrap(), Dbm(-1.0));
}

/// README, "Connecting your instruments": when a query draws no reply, the error queue is read on
/// a fresh connection and the message says what it held; here the instrument queued nothing, so
/// the message says the queue was empty and what that suggests (busy, hung, another terminator).
#[tokio::test]
async fn a_query_unanswered_with_an_empty_error_queue_says_so() {
    let fake = FakeInstrument::start().await;
    let mut profile = quick_source_profile();
    profile.connection.retries = 0;
    let mut source = ScpiRfSource::connect(&fake.resource(), profile)
        .await
        .unwrap();
    source.safe_off().await.unwrap();
    fake.state().faults.unanswered_query = Some("FREQuency:STARt?".into());
    let err = source
        .session_mut()
        .query("FREQuency:STARt?")
        .await
        .unwrap_err();
    let text = err.to_string();
    assert!(matches!(err, InstrumentError::Unanswered { .. }), "{err:?}");
    assert!(
        text.contains("did not answer FREQuency:STARt? within"),
        "{text}"
    );
    assert!(
        text.contains(
            "on a fresh connection its error queue (SYSTem:ERRor?) was empty, so it accepted the \
             command without answering"
        ),
        "{text}"
    );
    assert!(text.contains("connection.read_terminator"), "{text}");
    // The queue was read on a second connection; the instrument answers the next step.
    assert_eq!(fake.state().connections, 2);
    assert!(fake.state().commands.iter().any(|c| c == "SYSTem:ERRor?"));
    assert_eq!(source.set_level(Dbm(-1.0)).await.unwrap(), Dbm(-1.0));
}

#[tokio::test]
async fn every_new_connection_starts_with_clear_status() {
    // IEEE 488.2 §10.3 (from memory): *CLS empties the error queue. An error left by another
    // connection must not be blamed on the first command of this one.
    let fake = FakeInstrument::start().await;
    let mut source = ScpiRfSource::connect(&fake.resource(), quick_source_profile())
        .await
        .unwrap();
    assert_eq!(
        fake.state().commands.first().map(String::as_str),
        Some("*CLS")
    );
    source.safe_off().await.unwrap();
    source.session_mut().transport_mut().disconnect();
    fake.state()
        .errors
        .push_back((-113, "Undefined header".into()));
    let before = fake.state().commands.len();
    assert_eq!(source.set_frequency(Hz(3e9)).await.unwrap(), Hz(3e9));
    let commands = fake.state().commands.clone();
    assert_eq!(commands[before], "*CLS", "{commands:?}");
    assert_eq!(fake.state().connections, 2);
}

#[tokio::test]
async fn an_analyzer_without_start_stop_is_read_through_center_and_span() {
    let fake = FakeInstrument::start_with(State {
        without_start_stop: true,
        ..State::default()
    })
    .await;
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &fake.resource(),
        quick_analyzer_profile(DataFormat::Real32, ByteOrder::Normal),
    )
    .await
    .unwrap();
    assert_eq!(
        analyzer.axis_method(),
        halfwave_drivers::profile::AxisMethod::CenterSpan
    );
    let notes = analyzer.connection_notes();
    let axis = notes.iter().find(|n| n.item == "frequency axis").unwrap();
    assert!(axis.value.contains("center_span"), "{axis:?}");
    assert!(axis.value.contains("-113"), "{axis:?}");
    // The probe asked STARt? once and cleared the -113 it drew.
    let asked = |q: &str| fake.state().commands.iter().filter(|c| *c == q).count();
    assert_eq!(asked("FREQuency:STARt?"), 1);
    assert!(fake.state().errors.is_empty());

    analyzer.set_points(1001).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    // The axis is centre -/+ span/2 in 1000 equal steps (the fake's 193.4 THz and 20 GHz).
    let f = trace.frequency_hz();
    assert_eq!(f.len(), 1001);
    assert!((f[0] - (193.4e12 - 10e9)).abs() < 1.0, "{}", f[0]);
    assert!((f[1000] - (193.4e12 + 10e9)).abs() < 1.0, "{}", f[1000]);
    assert_eq!(
        asked("FREQuency:STARt?"),
        1,
        "never asked again after the probe"
    );
}

#[tokio::test]
async fn a_refused_setup_command_names_the_profile_key() {
    let fake = FakeInstrument::start_with(State {
        without_continuous: true,
        ..State::default()
    })
    .await;
    let profile = quick_analyzer_profile(DataFormat::Ascii, ByteOrder::Normal);
    let err = ScpiSpectrumAnalyzer::connect(&fake.resource(), profile.clone())
        .await
        .unwrap_err();
    let text = err.to_string();
    assert!(
        matches!(err, InstrumentError::Scpi { code: -113, .. }),
        "{err:?}"
    );
    assert!(text.contains("commands.single_sweep_mode = \"\""), "{text}");
    // With the key emptied the analyzer connects and sweeps.
    let mut profile = profile;
    profile.commands.single_sweep_mode = String::new();
    let mut analyzer = ScpiSpectrumAnalyzer::connect(&fake.resource(), profile)
        .await
        .unwrap();
    analyzer.sweep().await.unwrap();
    assert_eq!(analyzer.fetch_trace().await.unwrap().len(), 1001);
}

#[tokio::test]
async fn the_format_is_asserted_before_every_fetch() {
    let fake = FakeInstrument::start().await;
    let mut analyzer = ScpiSpectrumAnalyzer::connect(
        &fake.resource(),
        quick_analyzer_profile(DataFormat::Real32, ByteOrder::Swapped),
    )
    .await
    .unwrap();
    analyzer.set_points(1001).await.unwrap();
    analyzer.sweep().await.unwrap();
    // Another client switches the instrument to ASCII, big-endian.
    fake.state().format = "ASC".into();
    fake.state().swapped = false;
    let trace = analyzer.fetch_trace().await.unwrap();
    assert_eq!(trace.power_dbm(), fake_trace_dbm(1001).as_slice());
    let commands = fake.state().commands.clone();
    let fetch = commands
        .iter()
        .rposition(|c| c == "TRACe:DATA? TRACE1")
        .unwrap();
    let format = commands
        .iter()
        .rposition(|c| c == "FORMat:DATA REAL,32")
        .unwrap();
    let order = commands
        .iter()
        .rposition(|c| c == "FORMat:BORDer SWAPped")
        .unwrap();
    assert!(format < fetch && order < fetch, "{commands:?}");
    // The fetch ends with an error-queue check.
    assert_eq!(commands[fetch + 1], "SYSTem:ERRor?");
}

#[tokio::test]
async fn an_explicit_axis_query_gives_a_non_linear_axis() {
    // An analyzer with neither STARt?/STOP? nor a linear grid: the profile names its axis query
    // (an invented dialect, TRACe:XVALues?) and the trace carries the reported frequencies.
    let fake = FakeInstrument::start_with(State {
        without_start_stop: true,
        ..State::default()
    })
    .await;
    let mut profile = quick_analyzer_profile(DataFormat::Real64, ByteOrder::Normal);
    profile.axis.method = halfwave_drivers::profile::AxisMethod::Query;
    profile.commands.query_axis = "TRACe:XVALues? TRACE1".into();
    let mut analyzer = ScpiSpectrumAnalyzer::connect(&fake.resource(), profile)
        .await
        .unwrap();
    analyzer.set_points(101).await.unwrap();
    analyzer.sweep().await.unwrap();
    let trace = analyzer.fetch_trace().await.unwrap();
    let expected = common::fake_axis_hz(&fake.state());
    assert_eq!(trace.frequency_hz(), expected.as_slice());
    assert!(fake.state().errors.is_empty());
    // A profile that asks for the query method without naming the query is refused.
    let mut bad = quick_analyzer_profile(DataFormat::Ascii, ByteOrder::Normal);
    bad.axis.method = halfwave_drivers::profile::AxisMethod::Query;
    let err = ScpiSpectrumAnalyzer::connect(&fake.resource(), bad)
        .await
        .unwrap_err();
    assert!(err.to_string().contains("commands.query_axis"), "{err}");
}

#[tokio::test]
async fn suggestions_name_the_keys_a_non_conforming_analyzer_needs() {
    use halfwave_drivers::generic::suggest::{as_toml, suggest_analyzer, suggest_source};
    let fake = FakeInstrument::start_with(State {
        without_start_stop: true,
        without_continuous: true,
        ..State::default()
    })
    .await;
    let profile = quick_analyzer_profile(DataFormat::Real32, ByteOrder::Normal);
    let suggestions = suggest_analyzer(&fake.resource(), &profile).await.unwrap();
    let lines: Vec<&str> = suggestions.iter().map(|s| s.line.as_str()).collect();
    assert_eq!(
        lines,
        ["single_sweep_mode = \"\"", "method = \"center_span\""],
        "{suggestions:?}"
    );
    // The fragment is a profile the driver accepts, and with it the analyzer connects.
    let fragment = as_toml("spectrum_analyzer", &suggestions);
    let mut fixed = AnalyzerProfile::from_toml_str(&fragment, "suggested").unwrap();
    fixed.connection = profile.connection.clone();
    let mut analyzer = ScpiSpectrumAnalyzer::connect(&fake.resource(), fixed)
        .await
        .unwrap();
    analyzer.sweep().await.unwrap();
    assert_eq!(analyzer.fetch_trace().await.unwrap().len(), 1001);
    // Every refusal was read and cleared.
    assert!(fake.state().errors.is_empty());

    // A conforming source: nothing to suggest.
    let source = FakeInstrument::start().await;
    let none = suggest_source(&source.resource(), &quick_source_profile())
        .await
        .unwrap();
    assert!(none.is_empty(), "{none:?}");
}
