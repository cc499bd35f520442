//! The generic power-sensor driver against the simulated sensor over SCPI/TCP (readings, the
//! calibration factor at the told frequency, over range, fault drills) and against scripted bad
//! replies from a small responder written here (clear errors, never a panic).

use halfwave_drivers::profile::{PowerUnit, SensorProfile};
use halfwave_drivers::sim::{Role, Scenario, SimBench, SimServer, SimServerConfig};
use halfwave_drivers::units::{Dbm, Hz};
use halfwave_drivers::{InstrumentError, PowerSensor, RfSource, ScpiPowerSensor};
use std::collections::VecDeque;
use std::sync::{Arc, Mutex};
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};
use tokio::net::TcpListener;

fn quick_profile() -> SensorProfile {
    let mut p = SensorProfile::standard();
    p.limits.max_frequency_hz = 40e9;
    p.connection.timeout_ms = 400;
    p.connection.connect_timeout_ms = 400;
    p.connection.reconnect_backoff_ms = 10;
    p.measure_timeout_ms = 400;
    p
}

async fn bench_with_sensor() -> (SimBench, SimServer, ScpiPowerSensor) {
    let bench = SimBench::new(Scenario::builtin().unwrap(), 7).with_time_factor(0.0);
    let server = SimServer::start(bench.clone(), SimServerConfig::any_free_ports())
        .await
        .unwrap();
    let sensor = ScpiPowerSensor::connect(&server.resource(Role::PowerSensor), quick_profile())
        .await
        .unwrap();
    (bench, server, sensor)
}

/// The simulated source on at `level` and `f`, in-process.
async fn drive(bench: &SimBench, f: Hz, level: Dbm) {
    let mut source = bench.rf_source();
    source.set_frequency(f).await.unwrap();
    source.set_level(level).await.unwrap();
    source.set_output(true).await.unwrap();
}

#[tokio::test]
async fn the_sensor_reads_the_chain_output_corrected_at_the_told_frequency() {
    let (bench, _server, mut sensor) = bench_with_sensor().await;
    let id = sensor.identify().await.unwrap();
    assert_eq!(id.model, bench.scenario().power_sensor.model);
    let f = Hz(10e9);
    drive(&bench, f, Dbm(0.0)).await;
    assert_eq!(sensor.set_frequency(f).await.unwrap(), f);
    let reading = sensor.measure().await.unwrap();
    // Truth from the scenario: the generator's level error less the chain loss. The reading may
    // differ by the sensor's 0.8 % calibration error (0.035 dB) and the mismatch, at most
    // -20 log10(1 - 0.1 x 0.05) = 0.044 dB, plus 0.01 dB noise.
    let truth = bench.scenario().generator_to_modulator_gain_at(f).0;
    assert!(
        (reading.0 - truth).abs() < 0.1,
        "reading {reading}, truth {truth} dBm"
    );
    let log = bench.command_log(Role::PowerSensor);
    for sent in [
        "CONFigure:SCALar:POWer:AC",
        "UNIT:POWer DBM",
        "SENSe:FREQuency 10000000000",
        "MEASure:SCALar:POWer:AC?",
    ] {
        assert!(log.iter().any(|l| l == sent), "{sent} not in {log:?}");
    }

    // Told the wrong frequency, the sensor corrects with the wrong factor: K(18 GHz) / K(1 GHz)
    // from the built-in table, 91.4 / 98.2, is -0.312 dB.
    let f = Hz(18e9);
    drive(&bench, f, Dbm(0.0)).await;
    sensor.set_frequency(f).await.unwrap();
    let right = sensor.measure().await.unwrap();
    sensor.set_frequency(Hz(1e9)).await.unwrap();
    let wrong = sensor.measure().await.unwrap();
    let expected = 10.0 * (91.4_f64 / 98.2).log10();
    assert!(
        ((wrong.0 - right.0) - expected).abs() < 0.05,
        "wrong {wrong}, right {right}, expected {expected} dB apart"
    );
}

#[tokio::test]
async fn over_range_and_out_of_band_requests_are_refused_with_the_reason() {
    let (bench, _server, mut sensor) = bench_with_sensor().await;
    // 50 GHz is outside the profile's limits: refused before anything is sent.
    let err = sensor.set_frequency(Hz(50e9)).await.unwrap_err();
    assert!(matches!(err, InstrumentError::OutOfRange { .. }), "{err}");
    assert!(!bench
        .command_log(Role::PowerSensor)
        .iter()
        .any(|l| l.starts_with("SENSe:FREQuency 5")));
    // About +22 dBm reaches the sensor: over its +20 dBm range (and under its damage level).
    drive(&bench, Hz(1e9), Dbm(23.0)).await;
    sensor.set_frequency(Hz(1e9)).await.unwrap();
    let err = sensor.measure().await.unwrap_err().to_string();
    assert!(err.contains("over range"), "{err}");
    assert!(bench.sensor_damage_events().is_empty());
    // The queue was drained with the error: the next reading in range is good.
    drive(&bench, Hz(1e9), Dbm(0.0)).await;
    assert!(sensor.measure().await.is_ok());
}

#[tokio::test]
async fn the_sensor_driver_survives_the_fault_drills() {
    let (bench, server, mut sensor) = bench_with_sensor().await;
    drive(&bench, Hz(2e9), Dbm(-5.0)).await;
    sensor.set_frequency(Hz(2e9)).await.unwrap();
    let faults = server.faults(Role::PowerSensor);
    // A garbled reply: the step is repeated on a new connection and the reading is good.
    faults.garble_replies(1);
    let reading = sensor.measure().await.unwrap();
    assert!(
        (reading.0 - (-5.0 + bench.scenario().generator_to_modulator_gain_at(Hz(2e9)).0)).abs()
            < 0.1
    );
    // The link dropped mid-conversation: reconnected, repeated.
    faults.drop_after_commands(0);
    assert!(sensor.measure().await.is_ok());
    // Silence: a clear error naming the query, not a hang or a panic.
    faults.stop_answering();
    let err = sensor.measure().await.unwrap_err();
    assert!(err.is_link_fault(), "{err}");
    assert!(err.to_string().contains("MEASure"), "{err}");
    faults.resume();
    assert!(sensor.measure().await.is_ok());
    // An error the instrument queued is reported with the reading it spoiled.
    faults.push_error(-230, "injected");
    let err = sensor.measure().await.unwrap_err().to_string();
    assert!(err.contains("-230") && err.contains("MEASure"), "{err}");
}

/// A responder that answers the standard queries and serves the scripted readings and
/// frequency read-backs in order; `SYSTem:ERRor?` always says no error.
async fn scripted_sensor(readings: Vec<&str>, frequency_replies: Vec<&str>) -> String {
    let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let readings = Arc::new(Mutex::new(
        readings
            .into_iter()
            .map(String::from)
            .collect::<VecDeque<_>>(),
    ));
    let frequencies = Arc::new(Mutex::new(
        frequency_replies
            .into_iter()
            .map(String::from)
            .collect::<VecDeque<_>>(),
    ));
    tokio::spawn(async move {
        while let Ok((socket, _)) = listener.accept().await {
            let (readings, frequencies) = (readings.clone(), frequencies.clone());
            tokio::spawn(async move {
                let (read, mut write) = socket.into_split();
                let mut lines = BufReader::new(read).lines();
                while let Ok(Some(line)) = lines.next_line().await {
                    let upper = line.trim().to_ascii_uppercase();
                    let reply = if upper.starts_with("*IDN?") {
                        Some("Test Fixtures,SENSOR-FAKE,TF-1,1.0".to_string())
                    } else if upper.starts_with("SYST") {
                        Some("0,\"No error\"".to_string())
                    } else if upper.starts_with("MEAS") {
                        readings.lock().unwrap().pop_front()
                    } else if upper.starts_with("SENS") && upper.ends_with('?') {
                        frequencies.lock().unwrap().pop_front()
                    } else {
                        None
                    };
                    if let Some(reply) = reply {
                        if write
                            .write_all(format!("{reply}\n").as_bytes())
                            .await
                            .is_err()
                        {
                            return;
                        }
                    }
                }
            });
        }
    });
    format!("TCPIP::127.0.0.1::{}::SOCKET", addr.port())
}

#[tokio::test]
async fn bad_replies_give_errors_that_say_what_is_wrong() {
    let resource = scripted_sensor(
        vec!["abc", "9.91E37", "9.9E37", "1E6", "25.0", "-3.25"],
        vec!["2000000000", "7"],
    )
    .await;
    let mut sensor = ScpiPowerSensor::connect(&resource, quick_profile())
        .await
        .unwrap();
    assert_eq!(sensor.set_frequency(Hz(2e9)).await.unwrap(), Hz(2e9));
    // The read-back disagrees with the request.
    let err = sensor.set_frequency(Hz(3e9)).await.unwrap_err();
    assert!(matches!(err, InstrumentError::ReadBack { .. }), "{err}");
    let cases = [
        "not a number",            // abc
        "no valid reading",        // 9.91E37
        "over range",              // 9.9E37
        "no power sensor reports", // 1E6 dBm
        "over its range",          // 25 dBm > +20 dBm
    ];
    for expected in cases {
        let err = sensor.measure().await.unwrap_err().to_string();
        assert!(err.contains(expected), "expected {expected:?} in {err}");
    }
    assert_eq!(sensor.measure().await.unwrap(), Dbm(-3.25));
}

#[tokio::test]
async fn linear_readings_are_converted_and_a_non_positive_one_is_refused() {
    let resource = scripted_sensor(vec!["0.001", "-2E-9"], vec![]).await;
    let mut profile = quick_profile();
    profile.commands.reading_unit = PowerUnit::Watt;
    profile.commands.set_unit = "UNIT:POWer W".into();
    let mut sensor = ScpiPowerSensor::connect(&resource, profile).await.unwrap();
    // 1 mW is 0 dBm (definition of the dBm; common practice).
    assert_eq!(sensor.measure().await.unwrap(), Dbm(0.0));
    let err = sensor.measure().await.unwrap_err().to_string();
    assert!(err.contains("below the sensor's noise"), "{err}");
}
