//! The raw-socket transport against loopback servers: framing, timeouts, dropped connections,
//! reconnection and terminators.

mod common;

use common::{scripted_server, FakeInstrument};
use halfwave_drivers::scpi::block::decode_binary_reply_into;
use halfwave_drivers::scpi::{ByteOrder, DataFormat};
use halfwave_drivers::{InstrumentError, Resource, ScpiTransport, TransportConfig};
use std::time::{Duration, Instant};

/// A loopback instrument answers in microseconds, so the tests' timeouts only have to be reached
/// where a timeout is the point: 3 s leaves a loaded CI machine room to schedule a reply, and the
/// tests that wait for a timeout set a short one of their own.
fn quick_config() -> TransportConfig {
    TransportConfig {
        timeout: Duration::from_secs(3),
        connect_timeout: Duration::from_secs(3),
        reconnect_attempts: 3,
        reconnect_backoff: Duration::from_millis(10),
        ..TransportConfig::default()
    }
}

async fn connect(resource: &str) -> ScpiTransport {
    ScpiTransport::connect(Resource::parse(resource).unwrap(), quick_config())
        .await
        .unwrap()
}

#[tokio::test]
async fn query_returns_the_reply_without_terminator() {
    let fake = FakeInstrument::start().await;
    let mut t = connect(&fake.resource()).await;
    let idn = t.query("*IDN?").await.unwrap();
    assert_eq!(idn, "Halfwave Test Fixtures,FAKE-1,TF000123,0.1");
    t.write("FREQ 2.5E9").await.unwrap();
    assert_eq!(t.query("FREQ?").await.unwrap(), "2.5E9");
    assert_eq!(fake.state().commands, ["*IDN?", "FREQ 2.5E9", "FREQ?"]);
}

#[tokio::test]
async fn a_block_containing_newlines_arrives_whole() {
    // IEEE 488.2 §8.7.9: the payload of a definite block may hold any byte, including LF.
    // 1.0 as a big-endian f32 after a float whose bytes include 0x0A.
    let value_with_lf = f32::from_be_bytes([0x41, 0x0A, 0x0A, 0x0A]);
    let mut block = b"#18".to_vec();
    block.extend(value_with_lf.to_be_bytes());
    block.extend(1.0f32.to_be_bytes());
    block.push(b'\n');
    let addr = scripted_server(vec![block, b"+1\n".to_vec()]).await;
    let mut t = connect(&format!("TCPIP::127.0.0.1::{}::SOCKET", addr.port())).await;
    let reply = t.query_raw("TRAC:DATA? TRACE1").await.unwrap().to_vec();
    let mut values = Vec::new();
    decode_binary_reply_into(&reply, DataFormat::Real32, ByteOrder::Normal, &mut values).unwrap();
    assert_eq!(values, vec![f64::from(value_with_lf), 1.0]);
    // The stream is still in step: the next reply is the next one sent.
    assert_eq!(t.query("*OPC?").await.unwrap(), "+1");
}

#[tokio::test]
async fn crlf_terminators_are_configurable() {
    let addr = scripted_server(vec![b"-3.5\r\n".to_vec(), b"7\r\n".to_vec()]).await;
    let config = TransportConfig {
        read_terminator: b"\r\n".to_vec(),
        write_terminator: b"\n".to_vec(),
        ..quick_config()
    };
    let resource = Resource::parse(&format!("TCPIP0::127.0.0.1::{}::SOCKET", addr.port())).unwrap();
    let mut t = ScpiTransport::connect(resource, config).await.unwrap();
    assert_eq!(t.query("POW?").await.unwrap(), "-3.5");
    assert_eq!(t.query("SWE:POIN?").await.unwrap(), "7");
}

#[tokio::test]
async fn a_silent_instrument_times_out_cleanly_and_the_link_recovers() {
    let fake = FakeInstrument::start().await;
    let config = TransportConfig {
        timeout: Duration::from_millis(300),
        ..quick_config()
    };
    let mut t = ScpiTransport::connect(Resource::parse(&fake.resource()).unwrap(), config)
        .await
        .unwrap();
    fake.state().faults.silent = true;
    let started = Instant::now();
    let err = t.query("*IDN?").await.unwrap_err();
    let waited = started.elapsed();
    assert!(
        matches!(err, InstrumentError::Timeout { after, .. } if after == Duration::from_millis(300)),
        "{err:?}"
    );
    assert!(err.needs_reconnect());
    assert!(
        waited >= Duration::from_millis(300),
        "gave up after {waited:?}"
    );
    assert!(
        !t.is_connected(),
        "a timed-out link is dropped so late bytes cannot be misread"
    );
    fake.state().faults.silent = false;
    let recovered = t
        .query_with_timeout("*IDN?", Duration::from_secs(3))
        .await
        .unwrap();
    assert!(recovered.contains("FAKE-1"));
    assert_eq!(t.connection_count(), 2);
}

#[tokio::test]
async fn a_dropped_connection_is_reported_and_the_next_operation_reconnects() {
    let fake = FakeInstrument::start().await;
    let mut t = connect(&fake.resource()).await;
    fake.state().faults.drop_after_commands = Some(1);
    let err = t.query("FREQ?").await.unwrap_err();
    assert!(matches!(err, InstrumentError::Connection { .. }), "{err:?}");
    assert!(err.to_string().contains("closed the connection"), "{err}");
    assert_eq!(t.query("FREQ?").await.unwrap(), "1E9");
    assert_eq!(fake.state().connections, 2);
}

#[tokio::test]
async fn a_garbled_reply_is_a_parse_error_and_the_link_recovers() {
    let fake = FakeInstrument::start().await;
    let mut t = connect(&fake.resource()).await;
    fake.state().faults.garble_next_reply = true;
    let err = t.query("FREQ?").await.unwrap_err();
    assert!(matches!(err, InstrumentError::Parse { .. }), "{err:?}");
    assert_eq!(t.query("FREQ?").await.unwrap(), "1E9");
}

#[tokio::test]
async fn slow_replies_within_the_timeout_are_fine() {
    let fake = FakeInstrument::start().await;
    let mut t = connect(&fake.resource()).await;
    fake.state().faults.reply_delay = Duration::from_millis(50);
    assert_eq!(t.query("FREQ?").await.unwrap(), "1E9");
    fake.state().faults.reply_delay = Duration::from_millis(500);
    let err = t
        .query_with_timeout("FREQ?", Duration::from_millis(100))
        .await
        .unwrap_err();
    assert!(matches!(err, InstrumentError::Timeout { .. }), "{err:?}");
    let reply = t
        .query_with_timeout("FREQ?", Duration::from_secs(2))
        .await
        .unwrap();
    assert_eq!(reply, "1E9");
}

#[tokio::test]
async fn nobody_listening_is_a_connection_error_after_the_retries() {
    // Bind and close a listener to get a port nobody listens on.
    let port = {
        let l = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        l.local_addr().unwrap().port()
    };
    let resource = Resource::parse(&format!("TCPIP::127.0.0.1::{port}::SOCKET")).unwrap();
    let started = Instant::now();
    let err = ScpiTransport::connect(resource, quick_config())
        .await
        .unwrap_err();
    // Three attempts with a backoff of 10 ms, then 20 ms, between them.
    assert!(
        started.elapsed() >= Duration::from_millis(30),
        "{:?}",
        started.elapsed()
    );
    match err {
        InstrumentError::Connection { operation, .. } => {
            assert!(operation.contains("3 attempts"), "{operation}")
        }
        other => panic!("expected a connection error, got {other:?}"),
    }
}

#[tokio::test]
async fn an_empty_read_terminator_is_refused() {
    let config = TransportConfig {
        read_terminator: Vec::new(),
        ..quick_config()
    };
    let resource = Resource::parse("TCPIP::127.0.0.1::SOCKET").unwrap();
    assert!(matches!(
        ScpiTransport::unconnected(resource, config),
        Err(InstrumentError::BadResource { .. })
    ));
}

#[tokio::test]
async fn an_idle_connection_closed_by_the_instrument_is_replaced_before_the_next_command() {
    // An instrument that answers one query per connection and then hangs up.
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let port = listener.local_addr().unwrap().port();
    tokio::spawn(async move {
        use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};
        while let Ok((socket, _)) = listener.accept().await {
            let (read, mut write) = socket.into_split();
            let mut lines = BufReader::new(read).lines();
            if let Ok(Some(_)) = lines.next_line().await {
                let _ = write.write_all(b"1\n").await;
            }
        }
    });
    let mut t = connect(&format!("TCPIP::127.0.0.1::{port}::SOCKET")).await;
    assert_eq!(t.query("*OPC?").await.unwrap(), "1");
    // Let the close reach this side.
    tokio::time::sleep(Duration::from_millis(50)).await;
    assert_eq!(t.query("*OPC?").await.unwrap(), "1");
    assert_eq!(t.connection_count(), 2);
}

#[tokio::test]
async fn unrequested_bytes_are_not_taken_for_the_next_reply() {
    // The instrument answers the first query twice; the second copy must not answer query two.
    let addr = scripted_server(vec![b"1\n1\n".to_vec(), b"2\n".to_vec()]).await;
    let mut t = connect(&format!("TCPIP::127.0.0.1::{}::SOCKET", addr.port())).await;
    assert_eq!(t.query("Q1?").await.unwrap(), "1");
    tokio::time::sleep(Duration::from_millis(20)).await;
    assert_eq!(t.query("Q2?").await.unwrap(), "2");
}
