//! IEEE 488.2 common commands: the command strings and parsers for their replies.
//!
//! Every SCPI instrument understands the same handful of starred commands, so they live apart from
//! any driver: `*IDN?` (identity), `*RST` (reset), `*CLS` (clear status and the error queue),
//! `*OPC?` (answers `1` once pending operations are complete) and `*ESR?` (the standard event
//! status register). The parsers are pure; the generic drivers send the commands through a profile
//! so that an instrument with a different dialect can override them.

use crate::scpi::response::parse_integer;
use crate::scpi::{excerpt, ParseError};
use crate::Identity;

/// `*IDN?`: identification query.
pub const IDENTIFY: &str = "*IDN?";
/// `*RST`: reset to the instrument's default state.
pub const RESET: &str = "*RST";
/// `*CLS`: clear status (event registers and the error queue).
pub const CLEAR_STATUS: &str = "*CLS";
/// `*OPC?`: answers `1` when all pending operations have completed.
pub const OPERATION_COMPLETE: &str = "*OPC?";
/// `*ESR?`: reads and clears the standard event status register.
pub const EVENT_STATUS: &str = "*ESR?";
/// `SYSTem:ERRor?`: the next entry of the SCPI error queue.
pub const SYSTEM_ERROR: &str = "SYSTem:ERRor?";

/// Parses an `*IDN?` reply: four comma-separated fields, manufacturer, model, serial number and
/// firmware level (IEEE 488.2 §10.14). Fields are trimmed; a serial or firmware of `0` means the
/// instrument does not report one and is kept as `0`. Extra commas are kept in the firmware field,
/// since some instruments put commas in it.
pub fn parse_identity(reply: &str) -> Result<Identity, ParseError> {
    let reply = reply.trim();
    let mut fields = reply.splitn(4, ',').map(str::trim);
    let mut next = || fields.next().filter(|f| !f.is_empty());
    match (next(), next(), next(), next()) {
        (Some(manufacturer), Some(model), Some(serial), Some(firmware)) => Ok(Identity {
            manufacturer: manufacturer.to_string(),
            model: model.to_string(),
            serial: serial.to_string(),
            firmware: firmware.to_string(),
        }),
        _ => Err(ParseError::new(format!(
            "{} is not an *IDN? reply (expected four comma-separated fields: manufacturer,model,serial,firmware)",
            excerpt(reply.as_bytes())
        ))),
    }
}

/// Parses the `*OPC?` reply, which must be `1` (IEEE 488.2 §10.19).
pub fn parse_operation_complete(reply: &str) -> Result<(), ParseError> {
    match parse_integer(reply) {
        Ok(1) => Ok(()),
        _ => Err(ParseError::new(format!(
            "{} is not the *OPC? reply 1",
            excerpt(reply.trim().as_bytes())
        ))),
    }
}

/// The standard event status register (`*ESR?`, IEEE 488.2 §11.5.1).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct EventStatus(pub u8);

impl EventStatus {
    /// Bit 0: operation complete.
    pub const OPERATION_COMPLETE: u8 = 1 << 0;
    /// Bit 2: query error (a reply was lost or asked for without a query).
    pub const QUERY_ERROR: u8 = 1 << 2;
    /// Bit 3: device-dependent error.
    pub const DEVICE_ERROR: u8 = 1 << 3;
    /// Bit 4: execution error (for example a value out of range).
    pub const EXECUTION_ERROR: u8 = 1 << 4;
    /// Bit 5: command error (a syntax error or an unknown header).
    pub const COMMAND_ERROR: u8 = 1 << 5;
    /// Bit 7: power on since the register was last read.
    pub const POWER_ON: u8 = 1 << 7;

    /// Parses an `*ESR?` reply (an NR1 from 0 to 255).
    pub fn parse(reply: &str) -> Result<EventStatus, ParseError> {
        parse_integer(reply)
            .ok()
            .and_then(|v| u8::try_from(v).ok())
            .map(EventStatus)
            .ok_or_else(|| {
                ParseError::new(format!(
                    "{} is not an *ESR? reply (expected a whole number from 0 to 255)",
                    excerpt(reply.trim().as_bytes())
                ))
            })
    }

    /// True when any of the four error bits (query, device, execution, command) is set.
    pub fn has_error(self) -> bool {
        self.0
            & (Self::QUERY_ERROR | Self::DEVICE_ERROR | Self::EXECUTION_ERROR | Self::COMMAND_ERROR)
            != 0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn identity_has_four_fields() {
        // IEEE 488.2 §10.14 *IDN?: <manufacturer>,<model>,<serial number>,<firmware level>;
        // the serial and firmware fields are "0" when not reported (from memory).
        let id = parse_identity("Example Photonics, OSA-1 ,SN0042,1.2.3\n").unwrap();
        assert_eq!(id.manufacturer, "Example Photonics");
        assert_eq!(id.model, "OSA-1");
        assert_eq!(id.serial, "SN0042");
        assert_eq!(id.firmware, "1.2.3");
        let id = parse_identity("ACME LAB,GEN2,0,0").unwrap();
        assert_eq!(id.serial, "0");
        let id = parse_identity("a,b,c,fw 1,build 7").unwrap();
        assert_eq!(id.firmware, "fw 1,build 7");
        for bad in ["", "a,b,c", "a,,c,d", "just text", ",,,"] {
            assert!(parse_identity(bad).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn operation_complete_is_one() {
        // IEEE 488.2 §10.19 *OPC? places an ASCII "1" in the output queue (from memory).
        assert!(parse_operation_complete("1\n").is_ok());
        assert!(parse_operation_complete("+1").is_ok());
        assert!(parse_operation_complete("0").is_err());
        assert!(parse_operation_complete("").is_err());
    }

    #[test]
    fn event_status_bits() {
        // IEEE 488.2 §11.5.1.1 standard event status register bit assignments (from memory):
        // bit 5 command error (32), bit 4 execution error (16), bit 0 operation complete (1).
        let esr = EventStatus::parse("33").unwrap();
        assert!(esr.has_error());
        assert_eq!(esr.0 & EventStatus::COMMAND_ERROR, 32);
        assert!(!EventStatus::parse("1").unwrap().has_error());
        assert!(!EventStatus::parse("128").unwrap().has_error());
        assert!(EventStatus::parse("256").is_err());
        assert!(EventStatus::parse("-1").is_err());
    }
}
