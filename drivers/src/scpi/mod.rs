//! SCPI on the client side: parsing what instruments answer.
//!
//! - [`response`]: numbers in the IEEE 488.2 NR1/NR2/NR3 forms with the SCPI special values,
//!   booleans, quoted strings, comma-separated arrays and error-queue entries.
//! - [`block`]: arbitrary blocks (`#<d><len><bytes>` and `#0...<LF>`), binary `REAL,32`/`REAL,64`
//!   in either byte order, and finding where a reply ends in a byte stream that may hold binary.
//!
//! The instrument side (program messages parsed the way an instrument parses them) is used only
//! by the simulated bench and lives with it, in `crate::sim::scpi_parser`.
//!
//! Parsers here are pure functions over bytes or text and return [`ParseError`], never panic, so
//! they can be fuzzed and benchmarked alone; the transport and drivers wrap the error with the
//! instrument's name and the command that was sent.

pub mod block;
pub mod response;

#[cfg(test)]
mod fuzz_tests;

pub use block::{ByteOrder, DataFormat};

/// Why a reply could not be parsed: what was expected and what was found.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{0}")]
pub struct ParseError(pub String);

impl ParseError {
    pub(crate) fn new(message: impl Into<String>) -> ParseError {
        ParseError(message.into())
    }
}

/// Shows at most the first 40 characters of a reply in an error message.
pub(crate) fn excerpt(bytes: &[u8]) -> String {
    const LIMIT: usize = 40;
    let shown = &bytes[..bytes.len().min(LIMIT)];
    let mut text = String::from_utf8_lossy(shown).escape_debug().to_string();
    if bytes.len() > LIMIT {
        text.push_str(&format!("... ({} bytes)", bytes.len()));
    }
    format!("\"{text}\"")
}
