//! Parsing SCPI response data: numbers, special values, booleans, strings, arrays, error entries.
//!
//! Numbers are accepted in the three IEEE 488.2 response forms (NR1 integer, NR2 fixed point,
//! NR3 floating point with exponent) and, leniently, in the decimal-numeric program-data form that
//! many instruments echo back (`+1.5E+09`, `1.5e9`, `.5`). A number is checked against that grammar
//! before it reaches `f64::from_str`, so words that Rust would accept (`inf`, `NaN`, `infinity`)
//! are refused. The SCPI special values are mapped: 9.9E37 is +infinity, -9.9E37 is -infinity and
//! 9.91E37 is not-a-number. Whitespace around a value (and a trailing CR) is ignored.

use super::{excerpt, ParseError};

/// SCPI's stand-in for +infinity (SCPI-1999 Vol 1 §7.2.1, from memory).
pub const SCPI_INFINITY: f64 = 9.9e37;
/// SCPI's stand-in for not-a-number (SCPI-1999 Vol 1 §7.2.1, from memory).
pub const SCPI_NOT_A_NUMBER: f64 = 9.91e37;

/// Checks the decimal number grammar: `[+|-] (digits [. digits*] | . digits) [E [+|-] digits]`,
/// with optional whitespace around the `E` as IEEE 488.2 decimal numeric program data allows.
/// Returns the text with inner whitespace removed when it had any.
fn check_decimal_grammar(text: &str) -> Result<std::borrow::Cow<'_, str>, ParseError> {
    let bytes = text.as_bytes();
    let mut i = 0;
    if matches!(bytes.first(), Some(b'+' | b'-')) {
        i += 1;
    }
    let mut mantissa_digits = 0;
    while i < bytes.len() && bytes[i].is_ascii_digit() {
        i += 1;
        mantissa_digits += 1;
    }
    if i < bytes.len() && bytes[i] == b'.' {
        i += 1;
        while i < bytes.len() && bytes[i].is_ascii_digit() {
            i += 1;
            mantissa_digits += 1;
        }
    }
    if mantissa_digits == 0 {
        return Err(ParseError::new(format!(
            "{} is not a number (expected digits, e.g. 1, -2.5 or 1.5E+09)",
            excerpt(bytes)
        )));
    }
    let mantissa_end = i;
    let mut has_inner_space = false;
    while i < bytes.len() && bytes[i] == b' ' {
        i += 1;
        has_inner_space = true;
    }
    if i < bytes.len() && (bytes[i] == b'E' || bytes[i] == b'e') {
        i += 1;
        while i < bytes.len() && bytes[i] == b' ' {
            i += 1;
            has_inner_space = true;
        }
        if i < bytes.len() && (bytes[i] == b'+' || bytes[i] == b'-') {
            i += 1;
        }
        let exponent_start = i;
        while i < bytes.len() && bytes[i].is_ascii_digit() {
            i += 1;
        }
        if i == exponent_start {
            return Err(ParseError::new(format!(
                "{} has an exponent without digits",
                excerpt(bytes)
            )));
        }
    } else {
        i = mantissa_end;
        has_inner_space = false;
    }
    if i != bytes.len() {
        return Err(ParseError::new(format!(
            "{} is not a number: unexpected text after the digits",
            excerpt(bytes)
        )));
    }
    Ok(if has_inner_space {
        std::borrow::Cow::Owned(text.replace(' ', ""))
    } else {
        std::borrow::Cow::Borrowed(text)
    })
}

/// Trims the whitespace SCPI allows around a response value (spaces, tabs, CR, LF).
fn trim_value(text: &str) -> &str {
    text.trim_matches(|c: char| c == ' ' || c == '\t' || c == '\r' || c == '\n')
}

/// Parses one NR1/NR2/NR3 number, mapping the SCPI special values to infinities and NaN.
pub fn parse_number(text: &str) -> Result<f64, ParseError> {
    let text = trim_value(text);
    if text.is_empty() {
        return Err(ParseError::new("empty reply where a number was expected"));
    }
    let cleaned = check_decimal_grammar(text)?;
    let value: f64 = cleaned
        .parse()
        .map_err(|_| ParseError::new(format!("{} is not a number", excerpt(text.as_bytes()))))?;
    Ok(map_special_value(value))
}

/// Maps the SCPI special values (exactly as the instrument writes them, in any NR form) to
/// IEEE 754 infinities and NaN; other values pass through.
#[inline]
pub fn map_special_value(value: f64) -> f64 {
    if value == SCPI_INFINITY {
        f64::INFINITY
    } else if value == -SCPI_INFINITY {
        f64::NEG_INFINITY
    } else if value == SCPI_NOT_A_NUMBER || value == -SCPI_NOT_A_NUMBER {
        f64::NAN
    } else {
        value
    }
}

/// Parses an NR1 integer (an NR2/NR3 value is accepted when it is a whole number, since some
/// instruments answer `1.000000E+03` to a points query).
pub fn parse_integer(text: &str) -> Result<i64, ParseError> {
    let value = parse_number(text)?;
    if !value.is_finite() || value.fract() != 0.0 || value.abs() > 9.0e15 {
        return Err(ParseError::new(format!(
            "{} is not a whole number",
            excerpt(trim_value(text).as_bytes())
        )));
    }
    Ok(value as i64)
}

/// Parses a boolean reply: `1`/`0` (the IEEE 488.2 form) or `ON`/`OFF` (case-insensitive).
pub fn parse_bool(text: &str) -> Result<bool, ParseError> {
    let text = trim_value(text);
    if text.eq_ignore_ascii_case("ON") {
        return Ok(true);
    }
    if text.eq_ignore_ascii_case("OFF") {
        return Ok(false);
    }
    match parse_number(text) {
        Ok(1.0) => Ok(true),
        Ok(0.0) => Ok(false),
        _ => Err(ParseError::new(format!(
            "{} is not a boolean (expected 0, 1, ON or OFF)",
            excerpt(text.as_bytes())
        ))),
    }
}

/// Parses string response data: `"..."` with embedded quotes doubled (`""`), or `'...'` likewise.
/// Unquoted text is returned trimmed, since many instruments leave quotes out.
pub fn parse_string(text: &str) -> Result<String, ParseError> {
    let text = trim_value(text);
    let quote = match text.chars().next() {
        Some(q @ ('"' | '\'')) => q,
        _ => return Ok(text.to_string()),
    };
    let inner = &text[1..];
    let mut out = String::with_capacity(inner.len());
    let mut chars = inner.chars().peekable();
    while let Some(c) = chars.next() {
        if c == quote {
            if chars.peek() == Some(&quote) {
                chars.next();
                out.push(quote);
            } else if chars.next().is_none() {
                return Ok(out);
            } else {
                return Err(ParseError::new(format!(
                    "{} has text after the closing quote",
                    excerpt(text.as_bytes())
                )));
            }
        } else {
            out.push(c);
        }
    }
    Err(ParseError::new(format!(
        "{} is missing its closing quote",
        excerpt(text.as_bytes())
    )))
}

/// Parses a comma-separated list of numbers into `out` (cleared first), so a caller fetching many
/// traces can reuse one buffer.
pub fn parse_number_list_into(text: &str, out: &mut Vec<f64>) -> Result<(), ParseError> {
    out.clear();
    let text = trim_value(text);
    if text.is_empty() {
        return Err(ParseError::new(
            "empty reply where a list of numbers was expected",
        ));
    }
    for (index, field) in text.split(',').enumerate() {
        let value = parse_number(field)
            .map_err(|e| ParseError::new(format!("list element {index}: {e}")))?;
        out.push(value);
    }
    Ok(())
}

/// Parses a comma-separated list of numbers.
pub fn parse_number_list(text: &str) -> Result<Vec<f64>, ParseError> {
    let mut out = Vec::new();
    parse_number_list_into(text, &mut out)?;
    Ok(out)
}

/// One entry of the SCPI error queue (`SYSTem:ERRor?`): a code and its message.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ErrorEntry {
    /// 0 means "no error"; negative codes are defined by SCPI, positive ones by the instrument.
    pub code: i32,
    pub message: String,
}

impl ErrorEntry {
    /// True for the `0,"No error"` entry that ends the queue.
    pub fn is_no_error(&self) -> bool {
        self.code == 0
    }
}

/// Parses a `SYSTem:ERRor?` reply: `<code>,"<message>"` (the message may carry `;detail`).
/// A bare code without a message is accepted (some instruments answer `0`).
pub fn parse_error_entry(text: &str) -> Result<ErrorEntry, ParseError> {
    let text = trim_value(text);
    let (code_text, message_text) = match text.split_once(',') {
        Some((code, message)) => (code, message),
        None => (text, ""),
    };
    let code = parse_integer(code_text)
        .ok()
        .and_then(|c| i32::try_from(c).ok())
        .ok_or_else(|| {
            ParseError::new(format!(
                "{} is not an error-queue entry (expected <code>,\"<message>\" such as 0,\"No error\")",
                excerpt(text.as_bytes())
            ))
        })?;
    let message = parse_string(message_text)?;
    Ok(ErrorEntry { code, message })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nr1_nr2_nr3_forms() {
        // IEEE 488.2 §8.7.2 NR1 numeric response data: an integer, optional sign.
        assert_eq!(parse_number("42").unwrap(), 42.0);
        assert_eq!(parse_number("-7").unwrap(), -7.0);
        assert_eq!(parse_number("+0").unwrap(), 0.0);
        // IEEE 488.2 §8.7.3 NR2 numeric response data: digits with an explicit decimal point.
        assert_eq!(parse_number("-12.50").unwrap(), -12.5);
        assert_eq!(parse_number("0.001").unwrap(), 0.001);
        // IEEE 488.2 §8.7.4 NR3 numeric response data: mantissa, E, signed exponent.
        assert_eq!(parse_number("1.5E+09").unwrap(), 1.5e9);
        assert_eq!(parse_number("+2.000000E-03").unwrap(), 2e-3);
        assert_eq!(parse_number("-1.0e6").unwrap(), -1e6);
        // IEEE 488.2 §7.7.2 decimal numeric program data (lenient forms instruments echo):
        // leading point, trailing point, spaces around the E.
        assert_eq!(parse_number(".5").unwrap(), 0.5);
        assert_eq!(parse_number("5.").unwrap(), 5.0);
        assert_eq!(parse_number("1.5 E 3").unwrap(), 1500.0);
        // Terminators and surrounding whitespace are not part of the value (IEEE 488.2 §8.5,
        // response message terminator NL^END; from memory).
        assert_eq!(parse_number(" 3.25\r\n").unwrap(), 3.25);
    }

    #[test]
    fn special_values() {
        // SCPI-1999 Vol 1 §7.2.1 (from memory): INFinity = 9.9E37, NINFinity = -9.9E37,
        // NAN = 9.91E37.
        assert_eq!(parse_number("9.9E37").unwrap(), f64::INFINITY);
        assert_eq!(parse_number("+9.90000E+37").unwrap(), f64::INFINITY);
        assert_eq!(parse_number("-9.9E37").unwrap(), f64::NEG_INFINITY);
        assert!(parse_number("9.91E37").unwrap().is_nan());
        assert!(parse_number("9.910E+37").unwrap().is_nan());
        // A neighbouring value is an ordinary number.
        assert_eq!(parse_number("9.8E37").unwrap(), 9.8e37);
    }

    #[test]
    fn malformed_numbers_are_errors() {
        for bad in [
            "", "   ", "abc", "inf", "NaN", "infinity", "1.2.3", "1E", "1E+", "--1", "+", ".",
            "1,2", "0x10", "1e5x", "E5", "1 2",
        ] {
            assert!(parse_number(bad).is_err(), "{bad:?} should not parse");
        }
    }

    #[test]
    fn integers_and_booleans() {
        // IEEE 488.2 §8.7.2 NR1; a whole NR3 is accepted (common practice for points queries).
        assert_eq!(parse_integer("1001").unwrap(), 1001);
        assert_eq!(parse_integer("+1.001000E+03").unwrap(), 1001);
        assert!(parse_integer("10.5").is_err());
        assert!(parse_integer("9.9E37").is_err());
        // SCPI-1999 Vol 1 §7.3 boolean program data: ON|OFF|1|0; queries answer 1|0 (from memory).
        assert!(parse_bool("1").unwrap());
        assert!(!parse_bool("0\n").unwrap());
        assert!(parse_bool("on").unwrap());
        assert!(!parse_bool("OFF").unwrap());
        assert!(parse_bool("2").is_err());
        assert!(parse_bool("").is_err());
    }

    #[test]
    fn strings() {
        // IEEE 488.2 §8.7.8 string response data: quoted, embedded quotes doubled.
        assert_eq!(parse_string("\"No error\"").unwrap(), "No error");
        assert_eq!(parse_string("\"say \"\"hi\"\"\"").unwrap(), "say \"hi\"");
        assert_eq!(parse_string("'single'").unwrap(), "single");
        assert_eq!(parse_string("bare").unwrap(), "bare");
        assert!(parse_string("\"open").is_err());
        assert!(parse_string("\"a\"b").is_err());
    }

    #[test]
    fn arrays() {
        // SCPI-1999 Vol 1 (from memory): ASCII trace data is a comma-separated list of NRf values.
        assert_eq!(
            parse_number_list("-50.5,-3.0E+01,9.9E37, 1").unwrap(),
            vec![-50.5, -30.0, f64::INFINITY, 1.0]
        );
        assert_eq!(parse_number_list("7\n").unwrap(), vec![7.0]);
        assert!(parse_number_list("").is_err());
        assert!(parse_number_list("1,,2").is_err());
        assert!(parse_number_list("1,2,").is_err());
        let err = parse_number_list("1,x").unwrap_err();
        assert!(err.0.contains("element 1"), "{err}");
    }

    #[test]
    fn error_queue_entries() {
        // SCPI-1999 Vol 2 SYSTem:ERRor[:NEXT]? (from memory): <code>,"<message>".
        let e = parse_error_entry("0,\"No error\"").unwrap();
        assert!(e.is_no_error());
        assert_eq!(e.message, "No error");
        let e = parse_error_entry("-222,\"Data out of range;FREQ 1E12\"\n").unwrap();
        assert_eq!(e.code, -222);
        assert_eq!(e.message, "Data out of range;FREQ 1E12");
        let e = parse_error_entry("+0").unwrap();
        assert!(e.is_no_error());
        assert!(parse_error_entry("error").is_err());
        assert!(parse_error_entry("").is_err());
        assert!(parse_error_entry("99999999999,\"x\"").is_err());
    }
}
