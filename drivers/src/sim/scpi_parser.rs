//! Instrument-side SCPI command parsing: what an instrument does with the bytes a client sends.
//!
//! The simulated bench serves its instruments over TCP with this parser, so the client drivers are
//! tested against the rules of SCPI 1999 rather than against string comparisons:
//! - a program message is one line; message units inside it are separated by `;`, and a unit
//!   without a leading `:` is first resolved relative to the path of the previous compound header
//!   (SCPI 1999 vol. 1, 6.2.4, from memory). As a deliberate leniency it falls back to the root,
//!   so `FREQ:CENT 1GHZ;FREQ:SPAN 2GHZ` works as clients often expect;
//! - keywords match their short form (the capitals of `FREQuency`) or their long form, in any
//!   case, and nothing in between (SCPI 1999 vol. 1, 6.2.1);
//! - nodes in brackets are optional (`[SOURce:]FREQuency[:CW|:FIXed]`, SCPI 1999 vol. 1, 6.2.5);
//! - numeric parameters take a suffix with a multiplier (`MA` mega, `K` kilo, `M` milli, `U` micro,
//!   and the special cases `MHZ` and `MOHM` meaning mega; SCPI 1999 vol. 1, 7.7.3, from memory);
//! - errors carry the standard codes (SCPI 1999 vol. 2, chapter 21) and land in an [`ErrorQueue`]
//!   that overflows with -350 in its last slot.
//!
//! The module is pure (no I/O): a [`CommandTree`] maps headers to an instrument's own command ids,
//! [`parse_line`] turns one received line into commands or errors, and [`Param`] converts
//! parameters to numbers, booleans and choices with the right error codes.

use std::collections::VecDeque;
use std::fmt;

/// Standard SCPI error codes used by Halfwave's instruments (SCPI 1999 vol. 2, chapter 21).
pub mod codes {
    /// No error (`0,"No error"`).
    pub const NO_ERROR: i32 = 0;
    /// Generic command error.
    pub const COMMAND_ERROR: i32 = -100;
    /// A character or element that the syntax does not allow.
    pub const SYNTAX_ERROR: i32 = -102;
    /// A parameter of the wrong type (text where a number belongs).
    pub const DATA_TYPE_ERROR: i32 = -104;
    /// More parameters than the command takes.
    pub const PARAMETER_NOT_ALLOWED: i32 = -108;
    /// Fewer parameters than the command needs.
    pub const MISSING_PARAMETER: i32 = -109;
    /// A header the instrument does not know.
    pub const UNDEFINED_HEADER: i32 = -113;
    /// A suffix that does not fit the parameter.
    pub const INVALID_SUFFIX: i32 = -131;
    /// A number outside the instrument's range.
    pub const DATA_OUT_OF_RANGE: i32 = -222;
    /// A value not among those the command accepts.
    pub const ILLEGAL_PARAMETER_VALUE: i32 = -224;
    /// Data requested that does not exist or is outdated.
    pub const DATA_STALE: i32 = -230;
    /// The error queue overflowed.
    pub const QUEUE_OVERFLOW: i32 = -350;
}

/// The standard message for a code (SCPI 1999 vol. 2, chapter 21).
pub fn standard_message(code: i32) -> &'static str {
    match code {
        codes::NO_ERROR => "No error",
        codes::COMMAND_ERROR => "Command error",
        codes::SYNTAX_ERROR => "Syntax error",
        codes::DATA_TYPE_ERROR => "Data type error",
        codes::PARAMETER_NOT_ALLOWED => "Parameter not allowed",
        codes::MISSING_PARAMETER => "Missing parameter",
        codes::UNDEFINED_HEADER => "Undefined header",
        codes::INVALID_SUFFIX => "Invalid suffix",
        codes::DATA_OUT_OF_RANGE => "Data out of range",
        codes::ILLEGAL_PARAMETER_VALUE => "Illegal parameter value",
        codes::DATA_STALE => "Data corrupt or stale",
        codes::QUEUE_OVERFLOW => "Queue overflow",
        c if (-199..=-100).contains(&c) => "Command error",
        c if (-299..=-200).contains(&c) => "Execution error",
        c if (-399..=-300).contains(&c) => "Device-specific error",
        c if (-499..=-400).contains(&c) => "Query error",
        _ => "Device-specific error",
    }
}

/// One SCPI error: a standard code and, optionally, a detail appended to the message after `;`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ScpiError {
    pub code: i32,
    pub detail: Option<String>,
}

impl ScpiError {
    /// An error with the standard message and a detail.
    pub fn new(code: i32, detail: impl Into<String>) -> ScpiError {
        ScpiError {
            code,
            detail: Some(detail.into()),
        }
    }

    /// An error with only the standard message.
    pub fn bare(code: i32) -> ScpiError {
        ScpiError { code, detail: None }
    }

    /// True for command errors (-100 to -199), after which the rest of the line is discarded
    /// (IEEE 488.2, 6.1.6, from memory).
    pub fn is_command_error(&self) -> bool {
        (-199..=-100).contains(&self.code)
    }

    /// The entry as `SYSTem:ERRor?` reports it: `-113,"Undefined header;FOO"`.
    pub fn queue_entry(&self) -> String {
        let mut message = standard_message(self.code).to_string();
        if let Some(detail) = &self.detail {
            message.push(';');
            // A double quote inside a string is doubled (IEEE 488.2 string response data).
            message.push_str(&detail.replace('"', "\"\""));
        }
        format!("{},\"{}\"", self.code, message)
    }
}

impl fmt::Display for ScpiError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.queue_entry())
    }
}

impl std::error::Error for ScpiError {}

/// The instrument's error queue: first in, first out; when full, the last slot says -350
/// "Queue overflow" and newer errors are dropped (SCPI 1999 vol. 2, 21.8, from memory).
#[derive(Debug, Clone)]
pub struct ErrorQueue {
    entries: VecDeque<ScpiError>,
    capacity: usize,
}

impl ErrorQueue {
    /// A queue holding at most `capacity` entries (at least 2: one error and the overflow marker).
    pub fn new(capacity: usize) -> ErrorQueue {
        ErrorQueue {
            entries: VecDeque::new(),
            capacity: capacity.max(2),
        }
    }

    /// Adds an error, or marks the overflow when the queue is full.
    pub fn push(&mut self, error: ScpiError) {
        if self.entries.len() + 1 < self.capacity {
            self.entries.push_back(error);
        } else if self.entries.len() + 1 == self.capacity {
            self.entries
                .push_back(ScpiError::bare(codes::QUEUE_OVERFLOW));
        }
    }

    /// Removes and returns the oldest entry as `SYSTem:ERRor?` reports it, or `0,"No error"`.
    pub fn pop_entry(&mut self) -> String {
        match self.entries.pop_front() {
            Some(e) => e.queue_entry(),
            None => ScpiError::bare(codes::NO_ERROR).queue_entry(),
        }
    }

    /// Removes the oldest error, if any.
    pub fn pop(&mut self) -> Option<ScpiError> {
        self.entries.pop_front()
    }

    /// Empties the queue (`*CLS`).
    pub fn clear(&mut self) {
        self.entries.clear();
    }

    /// Number of entries waiting.
    pub fn len(&self) -> usize {
        self.entries.len()
    }

    /// True when no error is waiting.
    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }
}

/// A keyword of the command tree: long form and short form, both upper case.
#[derive(Debug, Clone, PartialEq, Eq)]
struct Keyword {
    long: String,
    short: String,
}

impl Keyword {
    /// From SCPI notation: the capitals (and digits, and a leading `*`) are the short form.
    fn from_notation(text: &str) -> Keyword {
        let short: String = text
            .chars()
            .take_while(|c| c.is_ascii_uppercase() || c.is_ascii_digit() || *c == '*')
            .collect();
        Keyword {
            long: text.to_ascii_uppercase(),
            short,
        }
    }

    fn matches(&self, token_upper: &str) -> bool {
        token_upper == self.short || token_upper == self.long
    }

    /// Header matching also accepts the numeric suffix 1 (`SENSe1`, `SOURce1`): a keyword that
    /// takes a numeric suffix means instance 1 when the suffix is left out (SCPI 1999 vol. 1,
    /// 6.2.5.2, from memory). The simulated instruments have one instance of everything, so any
    /// other suffix stays an undefined header.
    fn matches_header_node(&self, token_upper: &str) -> bool {
        if self.matches(token_upper) {
            return true;
        }
        let ends_in_digit = |s: &str| s.ends_with(|c: char| c.is_ascii_digit());
        match token_upper.strip_suffix('1') {
            Some(base) if !ends_in_digit(base) && !ends_in_digit(&self.long) => self.matches(base),
            _ => false,
        }
    }
}

/// One level of a header pattern: alternative keywords, possibly optional.
#[derive(Debug, Clone)]
struct PatternNode {
    alternatives: Vec<Keyword>,
    optional: bool,
}

/// A header in SCPI notation, e.g. `[SOURce:]FREQuency[:CW|:FIXed]` or `*IDN`.
#[derive(Debug, Clone)]
pub struct HeaderPattern {
    nodes: Vec<PatternNode>,
    notation: String,
}

impl HeaderPattern {
    /// Reads SCPI notation: `:` separates levels, `[...]` marks an optional level, `|` separates
    /// alternatives. Empty pieces are ignored, so the reading never fails; the instruments' tables
    /// are checked by their tests.
    pub fn parse(notation: &str) -> HeaderPattern {
        let mut nodes = Vec::new();
        let mut rest = notation;
        while !rest.is_empty() {
            if let Some(after_bracket) = rest.strip_prefix('[') {
                let end = after_bracket.find(']').unwrap_or(after_bracket.len());
                let inside = &after_bracket[..end];
                Self::push_node(&mut nodes, inside, true);
                rest = after_bracket.get(end + 1..).unwrap_or("");
            } else {
                let end = rest.find(['[', ':']).unwrap_or(rest.len());
                Self::push_node(&mut nodes, &rest[..end], false);
                rest = &rest[end..];
                rest = rest.strip_prefix(':').unwrap_or(rest);
            }
        }
        HeaderPattern {
            nodes,
            notation: notation.to_string(),
        }
    }

    fn push_node(nodes: &mut Vec<PatternNode>, text: &str, optional: bool) {
        let alternatives: Vec<Keyword> = text
            .split('|')
            .map(|alt| alt.trim_matches(':'))
            .filter(|alt| !alt.is_empty())
            .map(Keyword::from_notation)
            .collect();
        if !alternatives.is_empty() {
            nodes.push(PatternNode {
                alternatives,
                optional,
            });
        }
    }

    /// The notation this pattern was read from.
    pub fn notation(&self) -> &str {
        &self.notation
    }

    /// True when the upper-case header nodes match this pattern.
    pub fn matches(&self, header: &[String]) -> bool {
        Self::match_from(&self.nodes, header)
    }

    fn match_from(pattern: &[PatternNode], header: &[String]) -> bool {
        let Some((node, pattern_rest)) = pattern.split_first() else {
            return header.is_empty();
        };
        if let Some((token, header_rest)) = header.split_first() {
            if node
                .alternatives
                .iter()
                .any(|k| k.matches_header_node(token))
                && Self::match_from(pattern_rest, header_rest)
            {
                return true;
            }
        }
        node.optional && Self::match_from(pattern_rest, header)
    }
}

/// Whether a command may be sent as a setting, as a query, or both.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Forms {
    SetOnly,
    QueryOnly,
    SetAndQuery,
}

/// An instrument's command set: header patterns mapped to its own command ids.
#[derive(Debug, Clone)]
pub struct CommandTree<Id> {
    entries: Vec<(HeaderPattern, Id, Forms)>,
}

impl<Id: Copy> CommandTree<Id> {
    /// Builds the tree from `(notation, id, forms)` rows.
    pub fn new(rows: &[(&str, Id, Forms)]) -> CommandTree<Id> {
        CommandTree {
            entries: rows
                .iter()
                .map(|(notation, id, forms)| (HeaderPattern::parse(notation), *id, *forms))
                .collect(),
        }
    }

    /// The command a header names, if any.
    pub fn resolve(&self, header: &[String]) -> Option<(Id, Forms)> {
        self.entries
            .iter()
            .find(|(pattern, _, _)| pattern.matches(header))
            .map(|(_, id, forms)| (*id, *forms))
    }
}

/// Units a numeric parameter may carry.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unit {
    /// No unit: any suffix is refused.
    None,
    Hertz,
    DecibelMilliwatts,
    Seconds,
    Volts,
    Ohms,
}

impl Unit {
    fn suffix(self) -> &'static str {
        match self {
            Unit::None => "",
            Unit::Hertz => "HZ",
            Unit::DecibelMilliwatts => "DBM",
            Unit::Seconds => "S",
            Unit::Volts => "V",
            Unit::Ohms => "OHM",
        }
    }
}

/// The value of a SCPI suffix multiplier (SCPI 1999 vol. 1, 7.7.3, table 7-2; from memory).
/// `M` is milli and `MA` is mega: suffixes are case-insensitive, so they cannot be told apart
/// by case.
pub fn suffix_multiplier(prefix: &str) -> Option<f64> {
    Some(match prefix {
        "EX" => 1e18,
        "PE" => 1e15,
        "T" => 1e12,
        "G" => 1e9,
        "MA" => 1e6,
        "K" => 1e3,
        "M" => 1e-3,
        "U" => 1e-6,
        "N" => 1e-9,
        "P" => 1e-12,
        "F" => 1e-15,
        "A" => 1e-18,
        _ => return None,
    })
}

/// One parameter of a program message unit.
#[derive(Debug, Clone, PartialEq)]
pub enum Param {
    /// Decimal numeric program data with an optional suffix (upper case, as received).
    Number { value: f64, suffix: Option<String> },
    /// Character program data (a mnemonic such as `ON`, `ASCii`, `TRACE1`), upper case.
    Word(String),
    /// String program data (quotes removed, doubled quotes undone).
    Text(String),
}

impl Param {
    /// The number in the unit's base (hertz, dBm, seconds...), with the suffix applied.
    /// Errors: -104 for text where a number belongs, -131 for a suffix that does not fit.
    pub fn number(&self, unit: Unit) -> Result<f64, ScpiError> {
        let (value, suffix) = match self {
            Param::Number { value, suffix } => (*value, suffix.as_deref()),
            other => {
                return Err(ScpiError::new(
                    codes::DATA_TYPE_ERROR,
                    format!("expected a number, got {other}"),
                ))
            }
        };
        let Some(suffix) = suffix else {
            return Ok(value);
        };
        let base = unit.suffix();
        let multiplier = if unit == Unit::None {
            None
        } else if suffix == base {
            Some(1.0)
        } else if unit == Unit::Hertz && suffix == "MHZ" {
            // SCPI special case: MHZ is megahertz, never millihertz.
            Some(1e6)
        } else if unit == Unit::Ohms && suffix == "MOHM" {
            // SCPI special case: MOHM is megohm.
            Some(1e6)
        } else if unit == Unit::DecibelMilliwatts {
            None
        } else {
            suffix.strip_suffix(base).and_then(suffix_multiplier)
        };
        match multiplier {
            Some(m) => Ok(value * m),
            None => Err(ScpiError::new(
                codes::INVALID_SUFFIX,
                if unit == Unit::None {
                    format!("{suffix} given, but this parameter takes no unit")
                } else {
                    format!("{suffix} given, expected {base} with an optional multiplier")
                },
            )),
        }
    }

    /// A whole number without unit (rounded to the nearest integer, IEEE 488.2 7.7.2.2).
    pub fn integer(&self) -> Result<i64, ScpiError> {
        let value = self.number(Unit::None)?;
        let rounded = value.round();
        if rounded.abs() > 9.0e15 {
            return Err(ScpiError::new(
                codes::DATA_OUT_OF_RANGE,
                format!("{value} is too large"),
            ));
        }
        Ok(rounded as i64)
    }

    /// A boolean: `ON`/`OFF` or a number, non-zero after rounding meaning on
    /// (SCPI 1999 vol. 1, 7.3). Errors: -224 for any other word.
    pub fn boolean(&self) -> Result<bool, ScpiError> {
        match self {
            Param::Word(w) if w == "ON" => Ok(true),
            Param::Word(w) if w == "OFF" => Ok(false),
            Param::Number {
                suffix: None,
                value,
            } => Ok(value.round() != 0.0),
            other => Err(ScpiError::new(
                codes::ILLEGAL_PARAMETER_VALUE,
                format!("{other} is not ON, OFF, 1 or 0"),
            )),
        }
    }

    /// Which of the choices (SCPI notation, e.g. `ASCii`) this word names, by index.
    /// Errors: -224 when it names none of them, -104 when it is not a word.
    pub fn choice(&self, choices: &[&str]) -> Result<usize, ScpiError> {
        let Param::Word(word) = self else {
            return Err(ScpiError::new(
                codes::DATA_TYPE_ERROR,
                format!("expected one of {}, got {self}", choices.join("|")),
            ));
        };
        choices
            .iter()
            .position(|c| Keyword::from_notation(c).matches(word))
            .ok_or_else(|| {
                ScpiError::new(
                    codes::ILLEGAL_PARAMETER_VALUE,
                    format!("{word} is not one of {}", choices.join("|")),
                )
            })
    }
}

impl fmt::Display for Param {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Param::Number {
                value,
                suffix: Some(s),
            } => write!(f, "{value} {s}"),
            Param::Number {
                value,
                suffix: None,
            } => write!(f, "{value}"),
            Param::Word(w) => f.write_str(w),
            Param::Text(t) => write!(f, "\"{t}\""),
        }
    }
}

/// One program message unit after parsing, not yet resolved against a command tree.
#[derive(Debug, Clone, PartialEq)]
pub struct ProgramUnit {
    /// Header nodes in upper case (`["FREQ", "CENT"]`, or `["*IDN"]`).
    pub nodes: Vec<String>,
    /// A common command (`*IDN?`): never changes the current path.
    pub common: bool,
    /// The header started with `:` (resolved from the root).
    pub absolute: bool,
    /// The header ended with `?`.
    pub query: bool,
    pub params: Vec<Param>,
}

/// A command resolved against an instrument's tree.
#[derive(Debug, Clone, PartialEq)]
pub struct Command<Id> {
    pub id: Id,
    pub query: bool,
    pub params: Vec<Param>,
    /// The unit as received, for logs and error details.
    pub text: String,
}

impl<Id> Command<Id> {
    /// Checks that no parameter was given (-108 otherwise).
    pub fn no_params(&self) -> Result<(), ScpiError> {
        if self.params.is_empty() {
            Ok(())
        } else {
            Err(ScpiError::new(
                codes::PARAMETER_NOT_ALLOWED,
                format!("{} takes no parameter", self.text),
            ))
        }
    }

    /// The only parameter (-109 when missing, -108 when there are more).
    pub fn single_param(&self) -> Result<&Param, ScpiError> {
        self.params_between(1, 1)?;
        self.params.first().ok_or_else(|| self.missing())
    }

    /// Checks the parameter count (-109 below `min`, -108 above `max`).
    pub fn params_between(&self, min: usize, max: usize) -> Result<&[Param], ScpiError> {
        if self.params.len() < min {
            Err(self.missing())
        } else if self.params.len() > max {
            Err(ScpiError::new(
                codes::PARAMETER_NOT_ALLOWED,
                format!(
                    "{} takes at most {max} parameter(s), got {}",
                    self.text,
                    self.params.len()
                ),
            ))
        } else {
            Ok(&self.params)
        }
    }

    fn missing(&self) -> ScpiError {
        ScpiError::new(
            codes::MISSING_PARAMETER,
            format!("{} needs a parameter", self.text),
        )
    }
}

/// Splits a line into message units at `;` outside quoted strings.
pub fn split_units(line: &str) -> Vec<&str> {
    split_outside_quotes(line, ';')
}

/// Splits `text` at `separator` wherever it is not inside a single- or double-quoted string.
fn split_outside_quotes(text: &str, separator: char) -> Vec<&str> {
    let mut pieces = Vec::new();
    let mut quote: Option<char> = None;
    let mut start = 0;
    for (i, c) in text.char_indices() {
        match quote {
            Some(q) if c == q => quote = None,
            Some(_) => {}
            None if c == '"' || c == '\'' => quote = Some(c),
            None if c == separator => {
                pieces.push(&text[start..i]);
                start = i + c.len_utf8();
            }
            None => {}
        }
    }
    pieces.push(&text[start..]);
    pieces
}

fn syntax(detail: impl Into<String>) -> ScpiError {
    ScpiError::new(codes::SYNTAX_ERROR, detail)
}

/// Parses one message unit (`FREQ:CENT 193.4THZ`, `*IDN?`); `Ok(None)` for an empty unit.
pub fn parse_unit(text: &str) -> Result<Option<ProgramUnit>, ScpiError> {
    let text = text.trim();
    if text.is_empty() {
        return Ok(None);
    }
    let header_end = text
        .find(|c: char| c.is_ascii_whitespace())
        .unwrap_or(text.len());
    let (header, rest) = text.split_at(header_end);
    let (header, query) = match header.strip_suffix('?') {
        Some(h) => (h, true),
        None => (header, false),
    };
    let common = header.starts_with('*');
    let (body, absolute) = match header.strip_prefix(':') {
        Some(b) if !common => (b, true),
        _ => (header, false),
    };
    let mut nodes = Vec::new();
    if common {
        let name = &body[1..];
        if name.is_empty() || !name.chars().all(|c| c.is_ascii_alphanumeric()) {
            return Err(syntax(format!("bad common command header {header:?}")));
        }
        nodes.push(body.to_ascii_uppercase());
    } else {
        for node in body.split(':') {
            let good = node.chars().next().is_some_and(|c| c.is_ascii_alphabetic())
                && node.chars().all(|c| c.is_ascii_alphanumeric() || c == '_');
            if !good {
                return Err(syntax(format!("bad header {header:?}")));
            }
            nodes.push(node.to_ascii_uppercase());
        }
    }
    let params = if rest.trim().is_empty() {
        Vec::new()
    } else {
        split_outside_quotes(rest, ',')
            .into_iter()
            .map(parse_param)
            .collect::<Result<Vec<_>, _>>()?
    };
    Ok(Some(ProgramUnit {
        nodes,
        common,
        absolute,
        query,
        params,
    }))
}

/// Parses one parameter: a number with optional suffix, a word, or a quoted string.
pub fn parse_param(text: &str) -> Result<Param, ScpiError> {
    let text = text.trim();
    let Some(first) = text.chars().next() else {
        return Err(syntax("empty parameter between commas"));
    };
    if first == '"' || first == '\'' {
        let inner = text
            .strip_prefix(first)
            .and_then(|t| t.strip_suffix(first))
            .ok_or_else(|| syntax(format!("unterminated string {text}")))?;
        let doubled: String = [first, first].iter().collect();
        return Ok(Param::Text(inner.replace(&doubled, &first.to_string())));
    }
    if first.is_ascii_alphabetic() {
        if text.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
            return Ok(Param::Word(text.to_ascii_uppercase()));
        }
        return Err(syntax(format!("bad character data {text:?}")));
    }
    parse_number(text)
}

/// Decimal numeric program data (IEEE 488.2, 7.7.2): sign, mantissa, optional exponent, then an
/// optional suffix after optional white space.
fn parse_number(text: &str) -> Result<Param, ScpiError> {
    let bytes = text.as_bytes();
    let mut i = 0;
    if matches!(bytes.first(), Some(b'+' | b'-')) {
        i += 1;
    }
    let int_start = i;
    while bytes.get(i).is_some_and(u8::is_ascii_digit) {
        i += 1;
    }
    let mut digits = i - int_start;
    if bytes.get(i) == Some(&b'.') {
        i += 1;
        let frac_start = i;
        while bytes.get(i).is_some_and(u8::is_ascii_digit) {
            i += 1;
        }
        digits += i - frac_start;
    }
    if digits == 0 {
        return Err(syntax(format!("{text:?} is not a number")));
    }
    if matches!(bytes.get(i), Some(b'e' | b'E')) {
        let mut j = i + 1;
        if matches!(bytes.get(j), Some(b'+' | b'-')) {
            j += 1;
        }
        let exp_start = j;
        while bytes.get(j).is_some_and(u8::is_ascii_digit) {
            j += 1;
        }
        // `1EX` would be a (strange) suffix, not an exponent: only take E followed by digits.
        if j > exp_start {
            i = j;
        }
    }
    let (number, suffix) = text.split_at(i);
    let value: f64 = number
        .parse()
        .map_err(|_| syntax(format!("{text:?} is not a number")))?;
    if !value.is_finite() {
        return Err(ScpiError::new(
            codes::DATA_OUT_OF_RANGE,
            format!("{number} is beyond any range"),
        ));
    }
    let suffix = suffix.trim_start();
    if suffix.is_empty() {
        return Ok(Param::Number {
            value,
            suffix: None,
        });
    }
    if !suffix.chars().all(|c| c.is_ascii_alphabetic() || c == '/') {
        return Err(syntax(format!("bad character in number {text:?}")));
    }
    Ok(Param::Number {
        value,
        suffix: Some(suffix.to_ascii_uppercase()),
    })
}

/// Parses one received line against a command tree: one result per non-empty message unit.
/// After a command error (-1xx) the rest of the line is discarded (IEEE 488.2, 6.1.6; from
/// memory), so the returned list ends with that error.
pub fn parse_line<Id: Copy>(
    tree: &CommandTree<Id>,
    line: &str,
) -> Vec<Result<Command<Id>, ScpiError>> {
    let mut results = Vec::new();
    let mut path: Vec<String> = Vec::new();
    for unit_text in split_units(line) {
        let unit = match parse_unit(unit_text) {
            Ok(Some(unit)) => unit,
            Ok(None) => continue,
            Err(e) => {
                results.push(Err(e));
                break;
            }
        };
        let result = resolve_unit(tree, &mut path, unit, unit_text.trim());
        let stop = matches!(&result, Err(e) if e.is_command_error());
        results.push(result);
        if stop {
            break;
        }
    }
    results
}

fn resolve_unit<Id: Copy>(
    tree: &CommandTree<Id>,
    path: &mut Vec<String>,
    unit: ProgramUnit,
    text: &str,
) -> Result<Command<Id>, ScpiError> {
    let mut resolved = None;
    if !unit.common && !unit.absolute && !path.is_empty() {
        let mut full = path.clone();
        full.extend(unit.nodes.iter().cloned());
        if let Some(found) = tree.resolve(&full) {
            resolved = Some((found, full));
        }
    }
    if resolved.is_none() {
        if let Some(found) = tree.resolve(&unit.nodes) {
            resolved = Some((found, unit.nodes.clone()));
        }
    }
    let Some(((id, forms), mut full)) = resolved else {
        return Err(ScpiError::new(
            codes::UNDEFINED_HEADER,
            format!(
                "{}{}",
                unit.nodes.join(":"),
                if unit.query { "?" } else { "" }
            ),
        ));
    };
    if !unit.common {
        full.pop();
        *path = full;
    }
    match (forms, unit.query) {
        (Forms::SetOnly, true) => Err(ScpiError::new(
            codes::UNDEFINED_HEADER,
            format!("{} has no query form", unit.nodes.join(":")),
        )),
        (Forms::QueryOnly, false) => Err(ScpiError::new(
            codes::COMMAND_ERROR,
            format!("{} is a query only; add ?", unit.nodes.join(":")),
        )),
        _ => Ok(Command {
            id,
            query: unit.query,
            params: unit.params,
            text: text.to_string(),
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pattern_reads_optional_nodes_and_alternatives() {
        let p = HeaderPattern::parse("[SOURce:]FREQuency[:CW|:FIXed]");
        let h = |s: &str| -> Vec<String> { s.split(':').map(str::to_string).collect() };
        assert!(p.matches(&h("FREQ")));
        assert!(p.matches(&h("SOUR:FREQ:CW")));
        assert!(p.matches(&h("FREQUENCY:FIXED")));
        assert!(!p.matches(&h("FREQU")));
        assert!(!p.matches(&h("SOUR:CW")));
    }
}
