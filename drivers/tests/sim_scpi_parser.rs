//! Instrument-side SCPI parsing checked against the rules of SCPI 1999 and IEEE 488.2.
//!
//! Clause numbers are given from memory where marked; each case names the rule it checks.

use halfwave_drivers::sim::scpi_parser::{
    codes, parse_line, parse_param, Command, CommandTree, ErrorQueue, Forms, Param, ScpiError, Unit,
};

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Id {
    Idn,
    Rst,
    SourceFrequency,
    SourcePower,
    Output,
    Center,
    Span,
    Start,
    Bandwidth,
    Trace,
}

fn tree() -> CommandTree<Id> {
    CommandTree::new(&[
        ("*IDN", Id::Idn, Forms::QueryOnly),
        ("*RST", Id::Rst, Forms::SetOnly),
        (
            "[SOURce:]FREQuency[:CW|:FIXed]",
            Id::SourceFrequency,
            Forms::SetAndQuery,
        ),
        (
            "[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]",
            Id::SourcePower,
            Forms::SetAndQuery,
        ),
        ("OUTPut[:STATe]", Id::Output, Forms::SetAndQuery),
        ("[SENSe:]FREQuency:CENTer", Id::Center, Forms::SetAndQuery),
        ("[SENSe:]FREQuency:SPAN", Id::Span, Forms::SetAndQuery),
        ("[SENSe:]FREQuency:STARt", Id::Start, Forms::QueryOnly),
        (
            "[SENSe:]BANDwidth|BWIDth[:RESolution]",
            Id::Bandwidth,
            Forms::SetAndQuery,
        ),
        ("TRACe[:DATA]", Id::Trace, Forms::QueryOnly),
    ])
}

fn one(line: &str) -> Result<Command<Id>, ScpiError> {
    let mut results = parse_line(&tree(), line);
    assert_eq!(results.len(), 1, "{line}: {results:?}");
    results.remove(0)
}

fn id_of(line: &str) -> Id {
    match one(line) {
        Ok(c) => c.id,
        Err(e) => panic!("{line} was refused: {e}"),
    }
}

fn code_of(line: &str) -> i32 {
    match one(line) {
        Ok(c) => panic!("{line} was accepted as {c:?}"),
        Err(e) => e.code,
    }
}

fn hertz(text: &str) -> Result<f64, i32> {
    parse_param(text)
        .and_then(|p| p.number(Unit::Hertz))
        .map_err(|e| e.code)
}

#[test]
fn long_and_short_forms_are_both_accepted_and_nothing_in_between() {
    // SCPI 1999 vol. 1, 6.2.1 (from memory): a keyword is accepted in its short form (the
    // capitals) or its long form; any other abbreviation is an undefined header.
    assert_eq!(id_of("FREQ 1"), Id::SourceFrequency);
    assert_eq!(id_of("FREQUENCY 1"), Id::SourceFrequency);
    assert_eq!(id_of("BWID 1"), Id::Bandwidth);
    assert_eq!(id_of("BANDWIDTH:RESOLUTION 1"), Id::Bandwidth);
    assert_eq!(code_of("FREQU 1"), codes::UNDEFINED_HEADER);
    assert_eq!(code_of("FRE 1"), codes::UNDEFINED_HEADER);
    assert_eq!(code_of("FREQ:CENTE 1"), codes::UNDEFINED_HEADER);
}

#[test]
fn headers_and_suffixes_are_case_insensitive() {
    // IEEE 488.2, 7.6.1.2 and SCPI 1999 vol. 1, 6.1 (from memory): upper- and lower-case
    // letters in headers are equivalent; suffix units likewise (7.7.3).
    assert_eq!(id_of("freq:cent 1"), Id::Center);
    assert_eq!(id_of("Sense:Frequency:Center 1"), Id::Center);
    assert_eq!(id_of("*idn?"), Id::Idn);
    assert_eq!(hertz("1 ghz"), Ok(1e9));
    assert_eq!(hertz("1 GhZ"), Ok(1e9));
}

#[test]
fn optional_nodes_may_be_left_out_or_given() {
    // SCPI 1999 vol. 1, 6.2.5 (from memory): nodes in square brackets are optional.
    for line in [
        "FREQ 1",
        "SOUR:FREQ 1",
        "SOURCE:FREQUENCY:CW 1",
        "FREQ:FIX 1",
        ":SOUR:FREQ:FIXED 1",
    ] {
        assert_eq!(id_of(line), Id::SourceFrequency, "{line}");
    }
    for line in [
        "POW 0",
        "POW:LEV:IMM:AMPL 0",
        "SOUR:POW:AMPL 0",
        "POWER:LEVEL 0",
    ] {
        assert_eq!(id_of(line), Id::SourcePower, "{line}");
    }
    assert_eq!(id_of("OUTP ON"), Id::Output);
    assert_eq!(id_of("OUTP:STAT ON"), Id::Output);
    assert_eq!(id_of("TRAC? TRACE1"), Id::Trace);
    assert_eq!(id_of("TRACE:DATA? TRACE1"), Id::Trace);
    // Numeric suffix 1 on a keyword is the same as no suffix (SCPI 1999 vol. 1, 6.2.5.2, from
    // memory); the simulated instruments have no second instance.
    assert_eq!(id_of("SENS1:FREQ:CENT 1"), Id::Center);
    assert_eq!(id_of("SOURce1:FREQuency 1"), Id::SourceFrequency);
    assert_eq!(code_of("SENS2:FREQ:CENT 1"), codes::UNDEFINED_HEADER);
    assert_eq!(code_of("SENS11:FREQ:CENT 1"), codes::UNDEFINED_HEADER);
    // A mandatory node cannot be left out.
    assert_eq!(code_of("SENS:CENT 1"), codes::UNDEFINED_HEADER);
}

#[test]
fn suffix_multipliers_follow_the_scpi_table() {
    // SCPI 1999 vol. 1, 7.7.3, suffix multiplier table (from memory): MA = 1e6, K = 1e3,
    // M = 1e-3, U = 1e-6, G = 1e9; MHZ is the special case meaning megahertz.
    assert_eq!(hertz("1GHZ"), Ok(1e9));
    assert_eq!(hertz("2.5 KHZ"), Ok(2.5e3));
    assert_eq!(hertz("5MHZ"), Ok(5e6));
    assert_eq!(hertz("5 mhz"), Ok(5e6), "MHZ means mega in any case");
    assert_eq!(hertz("5 MAHZ"), Ok(5e6));
    assert_eq!(hertz("7 UHZ"), Ok(7e-6));
    assert_eq!(hertz("3 THZ"), Ok(3e12));
    assert_eq!(hertz("193.4e12"), Ok(193.4e12));
    assert_eq!(hertz("1.5E3 KHZ"), Ok(1.5e6));
    assert_eq!(hertz("+.5HZ"), Ok(0.5));
    // MOHM is the other special case (mega, not milli).
    let ohms = parse_param("2 MOHM").and_then(|p| p.number(Unit::Ohms));
    assert_eq!(ohms, Ok(2e6));
    let millivolts = parse_param("250 MV").and_then(|p| p.number(Unit::Volts));
    assert!((millivolts.unwrap() - 0.25).abs() < 1e-15);
    // dBm takes no multiplier; a suffix of another unit is an invalid suffix (-131).
    let level = parse_param("-3.5 DBM").and_then(|p| p.number(Unit::DecibelMilliwatts));
    assert_eq!(level, Ok(-3.5));
    let bad = parse_param("-3.5 KDBM").and_then(|p| p.number(Unit::DecibelMilliwatts));
    assert_eq!(bad.map_err(|e| e.code), Err(codes::INVALID_SUFFIX));
    assert_eq!(hertz("1 V"), Err(codes::INVALID_SUFFIX));
    let unitless = parse_param("1001 HZ").and_then(|p| p.number(Unit::None));
    assert_eq!(unitless.map_err(|e| e.code), Err(codes::INVALID_SUFFIX));
}

#[test]
fn malformed_numbers_are_syntax_errors() {
    // IEEE 488.2, 7.7.2 (decimal numeric program data), from memory: one mantissa, an optional
    // exponent; anything else is a syntax error (-102 in SCPI's generic form).
    assert_eq!(hertz("1.2.3"), Err(codes::SYNTAX_ERROR));
    assert_eq!(hertz("-"), Err(codes::SYNTAX_ERROR));
    assert_eq!(hertz("1e5$"), Err(codes::SYNTAX_ERROR));
    assert_eq!(code_of("FREQ 1,,2"), codes::SYNTAX_ERROR);
    assert_eq!(code_of("FR%Q 1"), codes::SYNTAX_ERROR);
}

#[test]
fn parameter_count_and_type_errors_have_their_codes() {
    // SCPI 1999 vol. 2, chapter 21 (error codes): -109 missing parameter, -108 parameter not
    // allowed, -104 data type error, -224 illegal parameter value.
    let missing = one("FREQ").unwrap();
    assert_eq!(
        missing.single_param().unwrap_err().code,
        codes::MISSING_PARAMETER
    );
    let extra = one("FREQ 1,2").unwrap();
    assert_eq!(
        extra.single_param().unwrap_err().code,
        codes::PARAMETER_NOT_ALLOWED
    );
    let query_with_param = one("FREQ? 5").unwrap();
    assert_eq!(
        query_with_param.no_params().unwrap_err().code,
        codes::PARAMETER_NOT_ALLOWED
    );
    let word = one("FREQ ON").unwrap();
    let as_number = word.single_param().and_then(|p| p.number(Unit::Hertz));
    assert_eq!(as_number.unwrap_err().code, codes::DATA_TYPE_ERROR);
    let maybe = one("OUTP MAYBE").unwrap();
    let as_bool = maybe.single_param().and_then(Param::boolean);
    assert_eq!(as_bool.unwrap_err().code, codes::ILLEGAL_PARAMETER_VALUE);
}

#[test]
fn booleans_and_choices() {
    // SCPI 1999 vol. 1, 7.3 (from memory): boolean ON|OFF or a number, non-zero after
    // rounding meaning ON.
    for (text, value) in [
        ("ON", true),
        ("off", false),
        ("1", true),
        ("0", false),
        ("0.4", false),
    ] {
        assert_eq!(parse_param(text).unwrap().boolean(), Ok(value), "{text}");
    }
    // Character data matches long or short form of a choice (SCPI 1999 vol. 1, 7.3).
    let choices = ["ASCii", "REAL"];
    assert_eq!(parse_param("asc").unwrap().choice(&choices), Ok(0));
    assert_eq!(parse_param("ASCII").unwrap().choice(&choices), Ok(0));
    assert_eq!(parse_param("real").unwrap().choice(&choices), Ok(1));
    assert_eq!(
        parse_param("ASCI")
            .unwrap()
            .choice(&choices)
            .unwrap_err()
            .code,
        codes::ILLEGAL_PARAMETER_VALUE
    );
    // String program data: doubled quotes stand for one (IEEE 488.2, 7.7.5).
    assert_eq!(
        parse_param("\"say \"\"hi\"\"\"").unwrap(),
        Param::Text("say \"hi\"".into())
    );
}

#[test]
fn query_and_set_forms() {
    // SCPI 1999 vol. 1, 6.3 (from memory): a header without a query form followed by `?` is
    // undefined (-113); a query-only header sent as a setting is refused as a command error.
    assert_eq!(code_of("*RST?"), codes::UNDEFINED_HEADER);
    assert_eq!(code_of("FREQ:STAR 1"), codes::COMMAND_ERROR);
    assert_eq!(code_of("*IDN"), codes::COMMAND_ERROR);
    let q = one("FREQ:STAR?").unwrap();
    assert!(q.query);
    assert_eq!(q.id, Id::Start);
}

#[test]
fn several_commands_in_one_line_and_the_current_path() {
    // SCPI 1999 vol. 1, 6.2.4 (from memory): after FREQ:CENT the current path is FREQ, so
    // `SPAN` means FREQ:SPAN; a leading colon returns to the root; common commands do not
    // change the path.
    let results = parse_line(&tree(), "FREQ:CENT 193THZ;SPAN 20GHZ;*IDN?;:OUTP OFF");
    let ids: Vec<Id> = results.iter().map(|r| r.as_ref().unwrap().id).collect();
    assert_eq!(ids, vec![Id::Center, Id::Span, Id::Idn, Id::Output]);
    // Leniency: a unit that does not resolve under the current path is tried from the root.
    let results = parse_line(&tree(), "FREQ:CENT 1;FREQ:SPAN 2;BAND 3");
    let ids: Vec<Id> = results.iter().map(|r| r.as_ref().unwrap().id).collect();
    assert_eq!(ids, vec![Id::Center, Id::Span, Id::Bandwidth]);
    // A `;` inside a quoted string does not split the line (IEEE 488.2, 7.7.5).
    let results = parse_line(&tree(), "FREQ \"a;b\";*RST");
    assert_eq!(results.len(), 2);
    // Empty units are ignored.
    assert_eq!(parse_line(&tree(), "  ;*RST; ").len(), 1);
}

#[test]
fn a_command_error_discards_the_rest_of_the_line() {
    // IEEE 488.2, 6.1.6 (from memory): after a command error the parser skips the rest of the
    // program message.
    let results = parse_line(&tree(), "BOGUS 1;*RST;FREQ 1");
    assert_eq!(results.len(), 1);
    assert_eq!(
        results[0].as_ref().unwrap_err().code,
        codes::UNDEFINED_HEADER
    );
}

#[test]
fn error_queue_is_fifo_and_overflows_with_350() {
    // SCPI 1999 vol. 2, 21.8 (from memory): first in, first out; `0,"No error"` when empty;
    // on overflow the most recent entry is replaced by -350 "Queue overflow".
    let mut q = ErrorQueue::new(4);
    assert_eq!(q.pop_entry(), "0,\"No error\"");
    for code in [-113, -222, -224, -102, -109, -108] {
        q.push(ScpiError::bare(code));
    }
    assert_eq!(q.len(), 4);
    assert_eq!(q.pop_entry(), "-113,\"Undefined header\"");
    assert_eq!(q.pop_entry(), "-222,\"Data out of range\"");
    assert_eq!(q.pop_entry(), "-224,\"Illegal parameter value\"");
    assert_eq!(q.pop_entry(), "-350,\"Queue overflow\"");
    assert_eq!(q.pop_entry(), "0,\"No error\"");
    // A detail follows the standard message after a semicolon, quotes doubled.
    let e = ScpiError::new(codes::UNDEFINED_HEADER, "FOO \"x\"");
    assert_eq!(e.queue_entry(), "-113,\"Undefined header;FOO \"\"x\"\"\"");
}
