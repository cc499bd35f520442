//! Arbitrary blocks and binary trace data.
//!
//! Analyzers send traces either as ASCII lists or as IEEE 488.2 arbitrary blocks: definite length
//! `#<d><len><bytes>` (one digit d, then d digits giving the byte count) or indefinite length
//! `#0<bytes><LF>`. With `FORMat:DATA REAL,32` or `REAL,64` the bytes are IEEE 754 floats, big-endian
//! after `FORMat:BORDer NORMal` and little-endian after `FORMat:BORDer SWAPped`.
//!
//! Binary payloads may contain the terminator byte, so the transport cannot simply read up to a
//! newline: [`reply_end`] finds where a reply ends by reading a block header first. Decoding goes
//! straight from the byte slice with `chunks_exact` and `from_be_bytes`/`from_le_bytes` into a
//! reusable `Vec<f64>`, which is what makes megabyte traces cheap (see `drivers/benches`).

use super::{excerpt, ParseError};
use serde::{Deserialize, Serialize};

/// Byte order of binary trace data (`FORMat:BORDer`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum ByteOrder {
    /// `NORMal`: big-endian, most significant byte first (the SCPI default).
    #[default]
    Normal,
    /// `SWAPped`: little-endian.
    Swapped,
}

/// The trace data format (`FORMat:DATA`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum DataFormat {
    /// Comma-separated ASCII numbers.
    Ascii,
    /// 32-bit IEEE 754 floats in a block.
    #[default]
    Real32,
    /// 64-bit IEEE 754 floats in a block.
    Real64,
}

impl DataFormat {
    /// Bytes per value in a binary block (`None` for ASCII).
    pub fn value_width(self) -> Option<usize> {
        match self {
            DataFormat::Ascii => None,
            DataFormat::Real32 => Some(4),
            DataFormat::Real64 => Some(8),
        }
    }
}

/// Largest block header digit count (IEEE 488.2 allows 1 to 9 length digits).
const MAX_LENGTH_DIGITS: usize = 9;

/// The payload of a definite-length block and its total length in `bytes` (header included).
struct DefiniteHeader {
    payload_start: usize,
    payload_len: usize,
}

/// Reads a definite-length header `#<d><len>` at the start of `bytes`. `Ok(None)` means more
/// bytes are needed to tell; an error means the header is malformed.
fn definite_header(bytes: &[u8]) -> Result<Option<DefiniteHeader>, ParseError> {
    let Some(&digit) = bytes.get(1) else {
        return Ok(None);
    };
    if !digit.is_ascii_digit() || digit == b'0' {
        return Err(ParseError::new(format!(
            "block header {} must have a length digit 1-9 after '#' (or #0 for an indefinite block)",
            excerpt(bytes)
        )));
    }
    let digits = usize::from(digit - b'0');
    debug_assert!(digits <= MAX_LENGTH_DIGITS);
    let Some(length_text) = bytes.get(2..2 + digits) else {
        return Ok(None);
    };
    let mut payload_len: usize = 0;
    for &b in length_text {
        if !b.is_ascii_digit() {
            return Err(ParseError::new(format!(
                "block header {} announces {digits} length digits but they are not all digits",
                excerpt(bytes)
            )));
        }
        payload_len = payload_len * 10 + usize::from(b - b'0');
    }
    Ok(Some(DefiniteHeader {
        payload_start: 2 + digits,
        payload_len,
    }))
}

/// Finds where the first reply in `buf` ends, including its `terminator`.
///
/// A reply starting with `#` is read as a block: for a definite block the terminator is looked for
/// only after the announced byte count, for an indefinite block (`#0`) the reply ends at the first
/// LF. IEEE 488.2 ends an indefinite block with NL together with the END message; a raw socket has
/// no END, so binary data that contains an LF byte cannot travel in an indefinite block over TCP
/// (profiles should select definite blocks, which every REAL format uses). Any other reply ends at the first terminator. Searching
/// starts at `search_from` (bytes already searched without success), so reading a reply in pieces
/// stays linear. Returns `Ok(None)` when more bytes are needed, and an error for a malformed
/// block header, after which the stream is out of step and the connection should be reset.
pub fn reply_end(
    buf: &[u8],
    terminator: &[u8],
    search_from: usize,
) -> Result<Option<usize>, ParseError> {
    if terminator.is_empty() {
        return Err(ParseError::new("the read terminator must not be empty"));
    }
    let (search_start, term): (usize, &[u8]) = match buf.first() {
        Some(b'#') => match buf.get(1) {
            None => return Ok(None),
            Some(b'0') => (2, b"\n"),
            Some(_) => match definite_header(buf)? {
                None => return Ok(None),
                Some(header) => {
                    let block_end = header.payload_start.saturating_add(header.payload_len);
                    if buf.len() < block_end {
                        return Ok(None);
                    }
                    (block_end, terminator)
                }
            },
        },
        _ => (0, terminator),
    };
    let start = search_start.max(search_from.saturating_sub(term.len() - 1));
    Ok(find(buf.get(start..).unwrap_or(&[]), term).map(|at| start + at + term.len()))
}

/// Finds `needle` in `haystack` (single-byte needles take the fast path).
fn find(haystack: &[u8], needle: &[u8]) -> Option<usize> {
    match needle {
        [single] => haystack.iter().position(|b| b == single),
        _ => haystack.windows(needle.len()).position(|w| w == needle),
    }
}

/// Splits an arbitrary block at the start of `reply` into its payload and what follows it.
///
/// Definite blocks take exactly the announced bytes; indefinite blocks (`#0`) take everything up to
/// the final LF of `reply`. Errors for a missing `#`, a bad length digit, non-digit length
/// characters, or fewer bytes than announced.
pub fn split_block(reply: &[u8]) -> Result<(&[u8], &[u8]), ParseError> {
    match reply.first() {
        Some(b'#') => {}
        Some(_) => {
            return Err(ParseError::new(format!(
                "{} is not an arbitrary block (it must start with '#')",
                excerpt(reply)
            )))
        }
        None => {
            return Err(ParseError::new(
                "empty reply where a data block was expected",
            ))
        }
    }
    if reply.get(1) == Some(&b'0') {
        let body = &reply[2..];
        let end = body.iter().rposition(|&b| b == b'\n').ok_or_else(|| {
            ParseError::new(format!(
                "indefinite block {} is not terminated by a newline",
                excerpt(reply)
            ))
        })?;
        return Ok((&body[..end], &body[end..]));
    }
    let header = definite_header(reply)?
        .ok_or_else(|| ParseError::new(format!("block header {} is truncated", excerpt(reply))))?;
    let end = header.payload_start.saturating_add(header.payload_len);
    match (reply.get(header.payload_start..end), reply.get(end..)) {
        (Some(payload), Some(rest)) => Ok((payload, rest)),
        _ => Err(ParseError::new(format!(
            "block announces {} bytes but only {} arrived; the reply was cut short",
            header.payload_len,
            reply.len().saturating_sub(header.payload_start)
        ))),
    }
}

/// Magnitude from which a decoded value may be one of the SCPI special values (9.9E37, 9.91E37);
/// only traces holding such a value take the second, mapping pass.
const SPECIAL_THRESHOLD: f64 = 9.8e37;

/// Decodes 32-bit floats into `out` (appended), mapping the SCPI special values.
///
/// The hot loop converts without branches and only notes whether any value is large enough to be
/// a special value; the mapping runs as a second pass when one is. This keeps the loop
/// vectorisable (see `drivers/benches/scpi.rs`).
pub fn decode_real32_into(
    payload: &[u8],
    order: ByteOrder,
    out: &mut Vec<f64>,
) -> Result<(), ParseError> {
    if !payload.len().is_multiple_of(4) {
        return Err(ParseError::new(format!(
            "a REAL,32 block must hold a multiple of 4 bytes, this one holds {}",
            payload.len()
        )));
    }
    let start = out.len();
    out.resize(start + payload.len() / 4, 0.0);
    let decoded = out.get_mut(start..).unwrap_or_default();
    let word = |c: &[u8]| <[u8; 4]>::try_from(c).unwrap_or_default();
    let mut any_large = false;
    let pairs = decoded.iter_mut().zip(payload.chunks_exact(4));
    match order {
        ByteOrder::Normal => {
            for (value, bytes) in pairs {
                let v = f64::from(f32::from_be_bytes(word(bytes)));
                any_large |= v.abs() >= SPECIAL_THRESHOLD;
                *value = v;
            }
        }
        ByteOrder::Swapped => {
            for (value, bytes) in pairs {
                let v = f64::from(f32::from_le_bytes(word(bytes)));
                any_large |= v.abs() >= SPECIAL_THRESHOLD;
                *value = v;
            }
        }
    }
    if any_large {
        decoded.iter_mut().for_each(|v| *v = special32(*v));
    }
    Ok(())
}

/// Decodes 64-bit floats into `out` (appended), mapping the SCPI special values.
pub fn decode_real64_into(
    payload: &[u8],
    order: ByteOrder,
    out: &mut Vec<f64>,
) -> Result<(), ParseError> {
    if !payload.len().is_multiple_of(8) {
        return Err(ParseError::new(format!(
            "a REAL,64 block must hold a multiple of 8 bytes, this one holds {}",
            payload.len()
        )));
    }
    let start = out.len();
    out.resize(start + payload.len() / 8, 0.0);
    let decoded = out.get_mut(start..).unwrap_or_default();
    let word = |c: &[u8]| <[u8; 8]>::try_from(c).unwrap_or_default();
    let mut any_large = false;
    let pairs = decoded.iter_mut().zip(payload.chunks_exact(8));
    match order {
        ByteOrder::Normal => {
            for (value, bytes) in pairs {
                let v = f64::from_be_bytes(word(bytes));
                any_large |= v.abs() >= SPECIAL_THRESHOLD;
                *value = v;
            }
        }
        ByteOrder::Swapped => {
            for (value, bytes) in pairs {
                let v = f64::from_le_bytes(word(bytes));
                any_large |= v.abs() >= SPECIAL_THRESHOLD;
                *value = v;
            }
        }
    }
    if any_large {
        decoded
            .iter_mut()
            .for_each(|v| *v = super::response::map_special_value(*v));
    }
    Ok(())
}

/// Maps the SCPI special values as a 32-bit float carries them (the nearest f32 to 9.9E37 and
/// 9.91E37, widened to f64).
#[inline]
fn special32(value: f64) -> f64 {
    const INF32: f32 = 9.9e37;
    const NAN32: f32 = 9.91e37;
    let (inf, nan) = (f64::from(INF32), f64::from(NAN32));
    if value == inf {
        f64::INFINITY
    } else if value == -inf {
        f64::NEG_INFINITY
    } else if value == nan || value == -nan {
        f64::NAN
    } else {
        value
    }
}

/// Decodes a whole binary trace reply (a block, then optionally the terminator) into `out`
/// (cleared first). Anything but whitespace after the block is an error.
pub fn decode_binary_reply_into(
    reply: &[u8],
    format: DataFormat,
    order: ByteOrder,
    out: &mut Vec<f64>,
) -> Result<(), ParseError> {
    out.clear();
    let (payload, rest) = split_block(reply)?;
    if !rest.iter().all(|b| b.is_ascii_whitespace()) {
        return Err(ParseError::new(format!(
            "unexpected bytes {} after the data block",
            excerpt(rest)
        )));
    }
    match format {
        DataFormat::Real32 => decode_real32_into(payload, order, out),
        DataFormat::Real64 => decode_real64_into(payload, order, out),
        DataFormat::Ascii => {
            // An ASCII list sent inside a block: parse the payload as text.
            let text = std::str::from_utf8(payload).map_err(|_| {
                ParseError::new("an ASCII data block holds bytes that are not text")
            })?;
            super::response::parse_number_list_into(text, out)
        }
    }
}

/// Encodes values as a definite-length block of REAL,32 or REAL,64 (for tests, benchmarks and
/// anything that serves SCPI data). ASCII gives a comma-separated list without a block.
pub fn encode_values(values: &[f64], format: DataFormat, order: ByteOrder) -> Vec<u8> {
    let width = match format.value_width() {
        Some(w) => w,
        None => {
            let text: Vec<String> = values.iter().map(|v| format!("{v:E}")).collect();
            return text.join(",").into_bytes();
        }
    };
    let payload_len = values.len() * width;
    let len_text = payload_len.to_string();
    let mut out = Vec::with_capacity(payload_len + len_text.len() + 2);
    out.push(b'#');
    out.extend_from_slice(len_text.len().to_string().as_bytes());
    out.extend_from_slice(len_text.as_bytes());
    for &v in values {
        match (format, order) {
            (DataFormat::Real32, ByteOrder::Normal) => {
                out.extend_from_slice(&(v as f32).to_be_bytes())
            }
            (DataFormat::Real32, ByteOrder::Swapped) => {
                out.extend_from_slice(&(v as f32).to_le_bytes())
            }
            (DataFormat::Real64, ByteOrder::Normal) => out.extend_from_slice(&v.to_be_bytes()),
            (DataFormat::Real64, ByteOrder::Swapped) => out.extend_from_slice(&v.to_le_bytes()),
            (DataFormat::Ascii, _) => {}
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn definite_length_block() {
        // IEEE 488.2 §8.7.9 definite length arbitrary block response data: '#', one non-zero
        // digit d, d digits giving the byte count, then exactly that many bytes.
        let (payload, rest) = split_block(b"#15hello\n").unwrap();
        assert_eq!(payload, b"hello");
        assert_eq!(rest, b"\n");
        let (payload, rest) = split_block(b"#210abc\ndef\n0X").unwrap();
        assert_eq!(payload, b"abc\ndef\n0X", "payload may contain newlines");
        assert!(rest.is_empty());
        // Leading zeros in the length field are allowed (the field is fixed-width digits).
        let (payload, _) = split_block(b"#3003xyz").unwrap();
        assert_eq!(payload, b"xyz");
        // A zero-length block is legal.
        let (payload, _) = split_block(b"#10").unwrap();
        assert!(payload.is_empty());
    }

    #[test]
    fn indefinite_length_block() {
        // IEEE 488.2 §8.7.10 indefinite length arbitrary block: "#0", bytes, ended by NL^END.
        let (payload, rest) = split_block(b"#0abc\x01\x02\n").unwrap();
        assert_eq!(payload, b"abc\x01\x02");
        assert_eq!(rest, b"\n");
        // An indefinite block with no newline is not complete.
        assert!(split_block(b"#0abc").is_err());
    }

    #[test]
    fn malformed_blocks_are_errors() {
        for (bad, why) in [
            (&b""[..], "empty"),
            (b"12,3", "no #"),
            (b"#", "no length digit"),
            (b"#A5hello", "length digit not a digit"),
            (b"#3", "truncated length field"),
            (b"#21", "truncated length field"),
            (b"#2x5hello", "non-digit in length field"),
            (b"#15hell", "truncated payload"),
            (b"#9999999999", "payload far shorter than announced"),
            (b"#0", "indefinite without newline"),
        ] {
            assert!(split_block(bad).is_err(), "{why}: {bad:?}");
        }
    }

    #[test]
    fn real32_both_byte_orders() {
        // IEEE 754 single 1.0 = 0x3F800000 and -2.5 = 0xC0200000 (IEEE 754-2008 binary32
        // encoding; from memory). NORMal is big-endian, SWAPped little-endian
        // (SCPI-1999 Vol 2 FORMat:BORDer; from memory).
        let big = b"#18\x3F\x80\x00\x00\xC0\x20\x00\x00";
        let little = b"#18\x00\x00\x80\x3F\x00\x00\x20\xC0";
        let mut out = Vec::new();
        decode_binary_reply_into(big, DataFormat::Real32, ByteOrder::Normal, &mut out).unwrap();
        assert_eq!(out, vec![1.0, -2.5]);
        decode_binary_reply_into(little, DataFormat::Real32, ByteOrder::Swapped, &mut out).unwrap();
        assert_eq!(out, vec![1.0, -2.5]);
        // A payload that is not a whole number of floats is refused.
        assert!(decode_binary_reply_into(
            b"#13abc",
            DataFormat::Real32,
            ByteOrder::Normal,
            &mut out
        )
        .is_err());
    }

    #[test]
    fn real64_both_byte_orders() {
        // IEEE 754 double 1.0 = 0x3FF0000000000000 (IEEE 754-2008 binary64; from memory).
        let big = b"#18\x3F\xF0\x00\x00\x00\x00\x00\x00";
        let little = b"#18\x00\x00\x00\x00\x00\x00\xF0\x3F";
        let mut out = Vec::new();
        decode_binary_reply_into(big, DataFormat::Real64, ByteOrder::Normal, &mut out).unwrap();
        assert_eq!(out, vec![1.0]);
        decode_binary_reply_into(little, DataFormat::Real64, ByteOrder::Swapped, &mut out).unwrap();
        assert_eq!(out, vec![1.0]);
        assert!(decode_binary_reply_into(
            b"#14abcd",
            DataFormat::Real64,
            ByteOrder::Normal,
            &mut out
        )
        .is_err());
    }

    #[test]
    fn binary_special_values() {
        // SCPI-1999 Vol 1 §7.2.1 special values (from memory), carried as binary floats.
        let values = [9.9e37, -9.9e37, -42.0];
        for format in [DataFormat::Real32, DataFormat::Real64] {
            let block = encode_values(&values, format, ByteOrder::Normal);
            let mut out = Vec::new();
            decode_binary_reply_into(&block, format, ByteOrder::Normal, &mut out).unwrap();
            assert_eq!(
                out,
                vec![f64::INFINITY, f64::NEG_INFINITY, -42.0],
                "{format:?}"
            );
            let nan = encode_values(&[9.91e37], format, ByteOrder::Swapped);
            decode_binary_reply_into(&nan, format, ByteOrder::Swapped, &mut out).unwrap();
            assert!(out[0].is_nan());
        }
    }

    #[test]
    fn encode_decode_round_trip() {
        let values: Vec<f64> = (0..1000).map(|i| -80.0 + f64::from(i) * 0.0625).collect();
        for format in [DataFormat::Real32, DataFormat::Real64] {
            for order in [ByteOrder::Normal, ByteOrder::Swapped] {
                let block = encode_values(&values, format, order);
                let mut out = Vec::new();
                decode_binary_reply_into(&block, format, order, &mut out).unwrap();
                assert_eq!(out, values, "{format:?} {order:?}");
            }
        }
    }

    #[test]
    fn trailing_junk_after_block_is_refused() {
        let mut out = Vec::new();
        assert!(decode_binary_reply_into(
            b"#14\x00\x00\x00\x00junk\n",
            DataFormat::Real32,
            ByteOrder::Normal,
            &mut out
        )
        .is_err());
    }

    #[test]
    fn reply_framing() {
        // Plain replies end at the terminator.
        assert_eq!(reply_end(b"1.5\nrest", b"\n", 0).unwrap(), Some(4));
        assert_eq!(reply_end(b"1.5", b"\n", 0).unwrap(), None);
        assert_eq!(reply_end(b"1.5\r\n", b"\r\n", 0).unwrap(), Some(5));
        assert_eq!(reply_end(b"1.5\r", b"\r\n", 4).unwrap(), None);
        assert_eq!(reply_end(b"1.5\r\n", b"\r\n", 4).unwrap(), Some(5));
        // IEEE 488.2 §8.7.9: a definite block may contain the terminator byte; the reply ends at
        // the terminator after the announced bytes.
        assert_eq!(reply_end(b"#13a\nb\n", b"\n", 0).unwrap(), Some(7));
        assert_eq!(reply_end(b"#13a\nb", b"\n", 0).unwrap(), None);
        assert_eq!(reply_end(b"#13a\n", b"\n", 0).unwrap(), None);
        assert_eq!(reply_end(b"#", b"\n", 0).unwrap(), None);
        assert_eq!(reply_end(b"#2", b"\n", 0).unwrap(), None);
        assert_eq!(reply_end(b"#21", b"\n", 0).unwrap(), None);
        // IEEE 488.2 §8.7.10: an indefinite block ends at NL.
        assert_eq!(reply_end(b"#0ab\n", b"\r\n", 0).unwrap(), Some(5));
        // A malformed header is an error, not a wait for bytes that never come.
        assert!(reply_end(b"#x", b"\n", 0).is_err());
        assert!(reply_end(b"#2a1", b"\n", 0).is_err());
        assert!(reply_end(b"1", b"", 0).is_err());
    }
}
