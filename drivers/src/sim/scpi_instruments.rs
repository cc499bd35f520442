//! The SCPI command sets of the simulated RF source and analyzer, and how a received line is
//! executed against the bench state.
//!
//! Each instrument is a [`CommandTree`] (the agreed command set, in SCPI notation, in one table)
//! and a `match` over its command ids that calls the same [`BenchState`] operations as the
//! in-process handles. [`execute_line`] runs every unit of a line, queues errors in the
//! instrument's error queue (setting the event status bits), and returns the replies plus the
//! moment they may be sent: `*OPC?` and `TRACe?` are answered only once the sweep or settling in
//! progress is complete, which is what a client's wait-for-completion relies on.

use super::bench::Role;
use super::state::{BenchState, InstrumentStatus};
use crate::scpi::block::{encode_values, ByteOrder, DataFormat};
use crate::sim::scpi_parser::{
    codes, parse_line, Command, CommandTree, Forms, Param, ScpiError, Unit,
};
use std::sync::LazyLock;
use tokio::time::Instant;

/// IEEE 488.2 common commands and the SCPI error query, shared by both instruments.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Common {
    Identify,
    Reset,
    ClearStatus,
    OperationComplete,
    EventStatus,
    Wait,
    SystemError,
}

const COMMON_ROWS: [(&str, Common, Forms); 7] = [
    ("*IDN", Common::Identify, Forms::QueryOnly),
    ("*RST", Common::Reset, Forms::SetOnly),
    ("*CLS", Common::ClearStatus, Forms::SetOnly),
    ("*OPC", Common::OperationComplete, Forms::SetAndQuery),
    ("*ESR", Common::EventStatus, Forms::QueryOnly),
    ("*WAI", Common::Wait, Forms::SetOnly),
    ("SYSTem:ERRor[:NEXT]", Common::SystemError, Forms::QueryOnly),
];

/// The RF source's commands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SourceCommand {
    Common(Common),
    Frequency,
    Power,
    Output,
}

/// The analyzer's commands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AnalyzerCommand {
    Common(Common),
    Center,
    Span,
    Start,
    Stop,
    Bandwidth,
    Points,
    Continuous,
    Initiate,
    Format,
    ByteOrder,
    Trace,
}

fn with_common<Id: Copy>(
    wrap: fn(Common) -> Id,
    rows: &[(&'static str, Id, Forms)],
) -> CommandTree<Id> {
    let mut all: Vec<(&str, Id, Forms)> = COMMON_ROWS
        .iter()
        .map(|(notation, c, forms)| (*notation, wrap(*c), *forms))
        .collect();
    all.extend_from_slice(rows);
    CommandTree::new(&all)
}

/// The RF source's command tree (the agreed command set).
pub static SOURCE_COMMANDS: LazyLock<CommandTree<SourceCommand>> = LazyLock::new(|| {
    with_common(
        SourceCommand::Common,
        &[
            (
                "[SOURce:]FREQuency[:CW|:FIXed]",
                SourceCommand::Frequency,
                Forms::SetAndQuery,
            ),
            (
                "[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]",
                SourceCommand::Power,
                Forms::SetAndQuery,
            ),
            ("OUTPut[:STATe]", SourceCommand::Output, Forms::SetAndQuery),
        ],
    )
});

/// The analyzer's command tree (the agreed command set).
pub static ANALYZER_COMMANDS: LazyLock<CommandTree<AnalyzerCommand>> = LazyLock::new(|| {
    use AnalyzerCommand as A;
    with_common(
        A::Common,
        &[
            ("[SENSe:]FREQuency:CENTer", A::Center, Forms::SetAndQuery),
            ("[SENSe:]FREQuency:SPAN", A::Span, Forms::SetAndQuery),
            ("[SENSe:]FREQuency:STARt", A::Start, Forms::QueryOnly),
            ("[SENSe:]FREQuency:STOP", A::Stop, Forms::QueryOnly),
            (
                "[SENSe:]BANDwidth|BWIDth[:RESolution]",
                A::Bandwidth,
                Forms::SetAndQuery,
            ),
            ("[SENSe:]SWEep:POINts", A::Points, Forms::SetAndQuery),
            ("INITiate:CONTinuous", A::Continuous, Forms::SetAndQuery),
            ("INITiate[:IMMediate]", A::Initiate, Forms::SetOnly),
            ("FORMat[:DATA]", A::Format, Forms::SetAndQuery),
            ("FORMat:BORDer", A::ByteOrder, Forms::SetAndQuery),
            ("TRACe[:DATA]", A::Trace, Forms::QueryOnly),
        ],
    )
});

/// The power sensor's commands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SensorCommand {
    Common(Common),
    Configure,
    Measure,
    Frequency,
    Unit,
}

/// The power sensor's command tree (the standard power-meter subset the generic driver uses).
pub static SENSOR_COMMANDS: LazyLock<CommandTree<SensorCommand>> = LazyLock::new(|| {
    use SensorCommand as S;
    with_common(
        S::Common,
        &[
            (
                "CONFigure[:SCALar][:POWer][:AC]",
                S::Configure,
                Forms::SetAndQuery,
            ),
            (
                "MEASure[:SCALar][:POWer][:AC]",
                S::Measure,
                Forms::QueryOnly,
            ),
            (
                "[SENSe:]FREQuency[:CW|:FIXed]",
                S::Frequency,
                Forms::SetAndQuery,
            ),
            ("UNIT:POWer", S::Unit, Forms::SetAndQuery),
        ],
    )
});

/// What one command produced.
#[derive(Debug, Default)]
struct Response {
    body: Option<Vec<u8>>,
    /// Send only once the instrument is idle (sweep or settling complete).
    after_idle: bool,
}

impl Response {
    fn none() -> Result<Response, ScpiError> {
        Ok(Response::default())
    }

    fn text(text: impl Into<String>) -> Result<Response, ScpiError> {
        Ok(Response {
            body: Some(text.into().into_bytes()),
            after_idle: false,
        })
    }

    fn number(value: f64) -> Result<Response, ScpiError> {
        // Rust's shortest round-trip form is valid NR1/NR2/NR3 and reads back exactly.
        Response::text(format!("{value}"))
    }

    fn boolean(value: bool) -> Result<Response, ScpiError> {
        Response::text(if value { "1" } else { "0" })
    }
}

/// The replies to one line and when they may be sent.
#[derive(Debug, Default)]
pub struct LineOutcome {
    /// One reply per query, in order (already without terminator).
    pub replies: Vec<Vec<u8>>,
    /// Do not send before this moment.
    pub ready_at: Option<Instant>,
}

impl LineOutcome {
    /// The bytes to send: replies joined with `;` (IEEE 488.2, 8.4.1: several response message
    /// units in one message; from memory) and the newline terminator. `None` when no query was
    /// in the line.
    pub fn message(&self) -> Option<Vec<u8>> {
        if self.replies.is_empty() {
            return None;
        }
        let mut out = self.replies.join(&b';');
        out.push(b'\n');
        Some(out)
    }
}

fn status_mut(state: &mut BenchState, role: Role) -> &mut InstrumentStatus {
    match role {
        Role::RfSource => &mut state.source.status,
        Role::Analyzer => &mut state.analyzer.status,
        Role::PowerSensor => &mut state.sensor.status,
    }
}

/// Executes one received line (without its terminator) on one instrument.
pub fn execute_line(state: &mut BenchState, role: Role, line: &str) -> LineOutcome {
    match role {
        Role::RfSource => run_line(state, role, &SOURCE_COMMANDS, line, execute_source),
        Role::Analyzer => run_line(state, role, &ANALYZER_COMMANDS, line, execute_analyzer),
        Role::PowerSensor => run_line(state, role, &SENSOR_COMMANDS, line, execute_sensor),
    }
}

fn run_line<Id: Copy>(
    state: &mut BenchState,
    role: Role,
    tree: &CommandTree<Id>,
    line: &str,
    execute: fn(&mut BenchState, &Command<Id>) -> Result<Response, ScpiError>,
) -> LineOutcome {
    let mut outcome = LineOutcome::default();
    for parsed in parse_line(tree, line) {
        let result = parsed.and_then(|command| execute(state, &command));
        match result {
            Ok(response) => {
                if response.after_idle {
                    let busy = status_mut(state, role).busy_until;
                    outcome.ready_at = outcome.ready_at.max(busy);
                }
                if let Some(body) = response.body {
                    outcome.replies.push(body);
                }
            }
            Err(error) => status_mut(state, role).push_error(error),
        }
    }
    outcome
}

fn execute_common(
    state: &mut BenchState,
    role: Role,
    which: Common,
    command: &Command<impl Copy>,
) -> Result<Response, ScpiError> {
    command.no_params()?;
    match which {
        Common::Identify => {
            let id = match role {
                Role::RfSource => state.scenario.source_identity(),
                Role::Analyzer => state.scenario.analyzer_identity(),
                Role::PowerSensor => state.scenario.power_sensor.identity(),
            };
            Response::text(format!(
                "{},{},{},{}",
                id.manufacturer, id.model, id.serial, id.firmware
            ))
        }
        Common::Reset => {
            match role {
                Role::RfSource => state.reset_source(),
                Role::Analyzer => state.reset_analyzer(),
                Role::PowerSensor => state.reset_sensor(),
            }
            Response::none()
        }
        Common::ClearStatus => {
            let status = status_mut(state, role);
            status.errors.clear();
            status.event_status = 0;
            Response::none()
        }
        Common::OperationComplete if command.query => Ok(Response {
            body: Some(b"1".to_vec()),
            after_idle: true,
        }),
        Common::OperationComplete => {
            // Operation complete (bit 0), IEEE 488.2 11.5.1.1.
            status_mut(state, role).event_status |= 1;
            Response::none()
        }
        Common::EventStatus => {
            let status = status_mut(state, role);
            let value = status.event_status;
            status.event_status = 0;
            Response::text(value.to_string())
        }
        Common::Wait => Ok(Response {
            body: None,
            after_idle: true,
        }),
        Common::SystemError => Response::text(status_mut(state, role).errors.pop_entry()),
    }
}

fn execute_source(
    state: &mut BenchState,
    command: &Command<SourceCommand>,
) -> Result<Response, ScpiError> {
    match command.id {
        SourceCommand::Common(c) => execute_common(state, Role::RfSource, c, command),
        SourceCommand::Frequency if command.query => {
            let limits = state.scenario.source_limits();
            match min_or_max(command)? {
                Some(Bound::Min) => Response::number(limits.min_frequency.0),
                Some(Bound::Max) => Response::number(limits.max_frequency.0),
                None => Response::number(state.source.frequency.value()),
            }
        }
        SourceCommand::Frequency => {
            let hz = command.single_param()?.number(Unit::Hertz)?;
            state.set_source_frequency(hz)?;
            Response::none()
        }
        SourceCommand::Power if command.query => {
            let limits = state.scenario.source_limits();
            match min_or_max(command)? {
                Some(Bound::Min) => Response::number(limits.min_level.0),
                Some(Bound::Max) => Response::number(limits.max_level.0),
                None => Response::number(state.source.level.value()),
            }
        }
        SourceCommand::Power => {
            let dbm = command.single_param()?.number(Unit::DecibelMilliwatts)?;
            state.set_source_level(dbm)?;
            Response::none()
        }
        SourceCommand::Output if command.query => {
            command.no_params()?;
            Response::boolean(state.source.output_on)
        }
        SourceCommand::Output => {
            let on = command.single_param()?.boolean()?;
            state.set_source_output(on);
            Response::none()
        }
    }
}

fn execute_sensor(
    state: &mut BenchState,
    command: &Command<SensorCommand>,
) -> Result<Response, ScpiError> {
    use SensorCommand as S;
    match (command.id, command.query) {
        (S::Common(c), _) => execute_common(state, Role::PowerSensor, c, command),
        (S::Configure, true) => {
            command.no_params()?;
            Response::text("\"POW:AC\"")
        }
        // The expected value, resolution and channel list are accepted and not needed.
        (S::Configure, false) => {
            command.params_between(0, 3)?;
            Response::none()
        }
        (S::Measure, _) => {
            command.params_between(0, 3)?;
            let reading = state.take_sensor_reading();
            let value = match reading {
                super::sensor::Reading::Power(level) if state.sensor.unit_dbm => level.value(),
                super::sensor::Reading::Power(level) => level.to_milliwatts() / 1e3,
                super::sensor::Reading::OverRange => {
                    state.sensor.status.push_error(ScpiError::new(
                        codes::DATA_OUT_OF_RANGE,
                        "over range; reading not valid",
                    ));
                    super::sensor::OVER_RANGE_REPLY
                }
            };
            Ok(Response {
                body: Some(format!("{value:E}").into_bytes()),
                after_idle: true,
            })
        }
        (S::Frequency, true) => {
            let limits = state.scenario.power_sensor.limits();
            match min_or_max(command)? {
                Some(Bound::Min) => Response::number(limits.min_frequency.0),
                Some(Bound::Max) => Response::number(limits.max_frequency.0),
                None => Response::number(state.sensor.frequency.value()),
            }
        }
        (S::Frequency, false) => {
            let hz = command.single_param()?.number(Unit::Hertz)?;
            state.set_sensor_frequency(hz)?;
            Response::none()
        }
        (S::Unit, true) => {
            command.no_params()?;
            Response::text(if state.sensor.unit_dbm { "DBM" } else { "W" })
        }
        (S::Unit, false) => {
            state.sensor.unit_dbm = command.single_param()?.choice(&["DBM", "W"])? == 0;
            Response::none()
        }
    }
}

/// A MINimum/MAXimum query parameter.
enum Bound {
    Min,
    Max,
}

/// The optional `MINimum`/`MAXimum` parameter of a numeric query (SCPI-1999 Vol 1, 7.2.1.1:
/// the query returns the setting's lowest or highest allowed value). No parameter is `None`;
/// anything else is -224.
fn min_or_max<Id>(command: &Command<Id>) -> Result<Option<Bound>, ScpiError> {
    let Some(param) = command.params_between(0, 1)?.first() else {
        return Ok(None);
    };
    match param {
        Param::Word(w) if w == "MIN" || w == "MINIMUM" => Ok(Some(Bound::Min)),
        Param::Word(w) if w == "MAX" || w == "MAXIMUM" => Ok(Some(Bound::Max)),
        other => Err(ScpiError::new(
            codes::ILLEGAL_PARAMETER_VALUE,
            format!("{} takes MINimum or MAXimum, not {other}", command.text),
        )),
    }
}

fn execute_analyzer(
    state: &mut BenchState,
    command: &Command<AnalyzerCommand>,
) -> Result<Response, ScpiError> {
    use AnalyzerCommand as A;
    if command.query && !matches!(command.id, A::Trace | A::Common(_)) {
        command.no_params()?;
    }
    match (command.id, command.query) {
        (A::Common(c), _) => execute_common(state, Role::Analyzer, c, command),
        (A::Center, true) => Response::number(state.analyzer.center.value()),
        (A::Center, false) => {
            let hz = command.single_param()?.number(Unit::Hertz)?;
            state.set_center(hz)?;
            Response::none()
        }
        (A::Span, true) => Response::number(state.analyzer.span.value()),
        (A::Span, false) => {
            let hz = command.single_param()?.number(Unit::Hertz)?;
            state.set_span(hz)?;
            Response::none()
        }
        (A::Start, _) => Response::number(state.start().value()),
        (A::Stop, _) => Response::number(state.stop().value()),
        (A::Bandwidth, true) => Response::number(state.analyzer.resolution_bandwidth.value()),
        (A::Bandwidth, false) => {
            let hz = command.single_param()?.number(Unit::Hertz)?;
            state.set_resolution_bandwidth(hz)?;
            Response::none()
        }
        (A::Points, true) => Response::text(state.analyzer.points.to_string()),
        (A::Points, false) => {
            let points = command.single_param()?.integer()?;
            state.set_points(points)?;
            Response::none()
        }
        (A::Continuous, true) => Response::boolean(state.analyzer.continuous),
        (A::Continuous, false) => {
            state.analyzer.continuous = command.single_param()?.boolean()?;
            Response::none()
        }
        (A::Initiate, _) => {
            command.no_params()?;
            state.take_sweep();
            Response::none()
        }
        (A::Format, true) => Response::text(match state.analyzer.format {
            DataFormat::Ascii => "ASC",
            DataFormat::Real32 => "REAL,32",
            DataFormat::Real64 => "REAL,64",
        }),
        (A::Format, false) => {
            state.analyzer.format = data_format(command)?;
            Response::none()
        }
        (A::ByteOrder, true) => Response::text(match state.analyzer.byte_order {
            ByteOrder::Normal => "NORM",
            ByteOrder::Swapped => "SWAP",
        }),
        (A::ByteOrder, false) => {
            let choice = command.single_param()?.choice(&["NORMal", "SWAPped"])?;
            state.analyzer.byte_order = if choice == 0 {
                ByteOrder::Normal
            } else {
                ByteOrder::Swapped
            };
            Response::none()
        }
        (A::Trace, _) => trace_data(state, command),
    }
}

/// `FORMat[:DATA] ASCii[,<n>] | REAL[,32|,64]` (a bare REAL means REAL,32).
fn data_format(command: &Command<AnalyzerCommand>) -> Result<DataFormat, ScpiError> {
    let params = command.params_between(1, 2)?;
    let (Some(kind), length) = (params.first(), params.get(1)) else {
        return Err(ScpiError::new(
            codes::MISSING_PARAMETER,
            "FORMat needs ASCii or REAL",
        ));
    };
    match kind.choice(&["ASCii", "REAL"])? {
        // ASCii may carry a digit count, which the simulator ignores (it always sends 7).
        0 => {
            if let Some(n) = length {
                n.integer()?;
            }
            Ok(DataFormat::Ascii)
        }
        _ => match length.map(Param::integer).transpose()? {
            None | Some(32) => Ok(DataFormat::Real32),
            Some(64) => Ok(DataFormat::Real64),
            Some(other) => Err(ScpiError::new(
                codes::ILLEGAL_PARAMETER_VALUE,
                format!("REAL,{other}: the length must be 32 or 64"),
            )),
        },
    }
}

/// `TRACe[:DATA]? [TRACE1]`: the last sweep (a fresh one in continuous mode), in the selected
/// format, sent once the sweep in progress has completed.
fn trace_data(
    state: &mut BenchState,
    command: &Command<AnalyzerCommand>,
) -> Result<Response, ScpiError> {
    let params = command.params_between(0, 1)?;
    if let Some(name) = params.first() {
        name.choice(&["TRACE1", "TRC1"])?;
    }
    if state.analyzer.continuous {
        state.take_sweep();
    }
    let Some(sweep) = &state.analyzer.last_sweep else {
        return Err(ScpiError::new(
            codes::DATA_STALE,
            "no sweep taken yet; send INITiate first",
        ));
    };
    let body = match state.analyzer.format {
        DataFormat::Ascii => {
            let text: Vec<String> = sweep.power_dbm.iter().map(|v| format!("{v:.6E}")).collect();
            text.join(",").into_bytes()
        }
        format => encode_values(&sweep.power_dbm, format, state.analyzer.byte_order),
    };
    Ok(Response {
        body: Some(body),
        after_idle: true,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn nodes(header: &str) -> Vec<String> {
        header.split(':').map(str::to_string).collect()
    }

    #[test]
    fn every_agreed_header_resolves() {
        for h in [
            "FREQ",
            "SOUR:FREQ:CW",
            "POW:LEV:IMM:AMPL",
            "OUTP:STAT",
            "*IDN",
        ] {
            assert!(SOURCE_COMMANDS.resolve(&nodes(h)).is_some(), "{h}");
        }
        for h in [
            "SENS:FREQ:CENT",
            "FREQ:SPAN",
            "FREQ:STAR",
            "FREQ:STOP",
            "BWID:RES",
            "BAND",
            "SWE:POIN",
            "INIT:CONT",
            "INIT:IMM",
            "INIT",
            "FORM:DATA",
            "FORM:BORD",
            "TRAC:DATA",
            "SYST:ERR:NEXT",
        ] {
            assert!(ANALYZER_COMMANDS.resolve(&nodes(h)).is_some(), "{h}");
        }
    }
}
