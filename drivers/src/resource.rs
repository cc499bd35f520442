//! VISA-style resource strings for raw-socket SCPI instruments.
//!
//! Bench configuration names instruments the way lab people already write them:
//! `TCPIP::<host>::<port>::SOCKET` (the VISA "raw socket" form). The board number is optional
//! (`TCPIP0::...`), the port defaults to 5025 (the LXI convention for SCPI over raw TCP) when it is
//! left out, and keywords are case-insensitive as in VISA. Anything else, in particular the
//! `::INSTR` forms that need VXI-11 or HiSLIP, is refused with a message that says which form to
//! write, so a typo never turns into a connection attempt to the wrong place.

use crate::InstrumentError;
use std::fmt;
use std::str::FromStr;

/// The TCP port SCPI instruments listen on for raw socket connections (LXI convention).
pub const LXI_SCPI_RAW_PORT: u16 = 5025;

/// A parsed raw-socket resource: where to connect.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct Resource {
    host: String,
    port: u16,
}

impl Resource {
    /// A resource for a host and port (no parsing; the host must not be empty).
    pub fn new(host: impl Into<String>, port: u16) -> Result<Resource, InstrumentError> {
        let host = host.into();
        if host.trim().is_empty() || host.chars().any(char::is_whitespace) {
            return Err(InstrumentError::BadResource {
                resource: host,
                reason: "the host must be a name or an IP address without spaces".into(),
            });
        }
        Ok(Resource { host, port })
    }

    /// The host name or IP address (IPv6 without brackets).
    pub fn host(&self) -> &str {
        &self.host
    }

    /// The TCP port.
    pub fn port(&self) -> u16 {
        self.port
    }

    /// The `host:port` form a socket connect call takes (IPv6 in brackets).
    pub fn socket_address(&self) -> String {
        if self.host.contains(':') {
            format!("[{}]:{}", self.host, self.port)
        } else {
            format!("{}:{}", self.host, self.port)
        }
    }

    /// Parses a resource string; see the module documentation for the accepted forms.
    pub fn parse(text: &str) -> Result<Resource, InstrumentError> {
        let bad = |reason: String| InstrumentError::BadResource {
            resource: text.to_string(),
            reason,
        };
        let expected =
            "write TCPIP::<host>::<port>::SOCKET (for example TCPIP::192.168.1.20::5025::SOCKET; \
                        TCPIP0:: and a missing port, which means 5025, are accepted too)";
        let trimmed = text.trim();
        let (interface, rest) = trimmed
            .split_once("::")
            .ok_or_else(|| bad(format!("no '::' separators; {expected}")))?;
        let board = interface
            .get(..5)
            .filter(|prefix| prefix.eq_ignore_ascii_case("TCPIP"))
            .map(|_| &interface[5..])
            .ok_or_else(|| {
                bad(format!(
                    "interface {interface:?} is not TCPIP; only raw TCP sockets are supported, {expected}"
                ))
            })?;
        if !board.chars().all(|c| c.is_ascii_digit()) {
            return Err(bad(format!(
                "interface {interface:?} must be TCPIP or TCPIP followed by a board number; {expected}"
            )));
        }

        // The host may be a bracketed IPv6 address, which itself contains colons.
        let bracketed_host = rest.starts_with('[');
        let (host, after_host) = if let Some(bracketed) = rest.strip_prefix('[') {
            let (inside, after) = bracketed
                .split_once(']')
                .ok_or_else(|| bad(format!("IPv6 host is missing its closing ']'; {expected}")))?;
            let after = if after.is_empty() {
                after
            } else {
                after
                    .strip_prefix("::")
                    .ok_or_else(|| bad(format!("expected '::' after the IPv6 host; {expected}")))?
            };
            (inside, after)
        } else {
            match rest.split_once("::") {
                Some((host, after)) => (host, after),
                None => (rest, ""),
            }
        };
        if host.is_empty()
            || host
                .chars()
                .any(|c| c.is_whitespace() || (c == ':' && !bracketed_host))
        {
            return Err(bad(format!(
                "the host {host:?} is empty or malformed; {expected}"
            )));
        }

        let fields: Vec<&str> = if after_host.is_empty() {
            Vec::new()
        } else {
            after_host.split("::").collect()
        };
        let port = match fields.as_slice() {
            [class] if class.eq_ignore_ascii_case("SOCKET") => LXI_SCPI_RAW_PORT,
            [port, class] if class.eq_ignore_ascii_case("SOCKET") => match port.parse::<u16>() {
                Ok(p) if p > 0 => p,
                _ => {
                    return Err(bad(format!(
                        "port {port:?} is not a number from 1 to 65535; {expected}"
                    )))
                }
            },
            [.., class] if class.eq_ignore_ascii_case("INSTR") => {
                return Err(bad(format!(
                    "INSTR resources need VXI-11 or HiSLIP, which Halfwave does not speak; use the \
                     instrument's raw SCPI socket instead: {expected}"
                )))
            }
            [] => {
                return Err(bad(format!(
                    "the resource class is missing (it must end in ::SOCKET); {expected}"
                )))
            }
            _ => {
                return Err(bad(format!(
                    "unrecognised fields after the host; {expected}"
                )))
            }
        };
        Resource::new(host, port).map_err(|_| bad(format!("the host is malformed; {expected}")))
    }
}

impl FromStr for Resource {
    type Err = InstrumentError;

    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Resource::parse(s)
    }
}

/// The canonical form, `TCPIP::<host>::<port>::SOCKET`.
impl fmt::Display for Resource {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.host.contains(':') {
            write!(f, "TCPIP::[{}]::{}::SOCKET", self.host, self.port)
        } else {
            write!(f, "TCPIP::{}::{}::SOCKET", self.host, self.port)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // The accepted forms follow the VISA raw-socket resource syntax
    // (TCPIP[board]::host::port::SOCKET; from memory of the IVI VISA specification, §4.3.1).
    #[test]
    fn accepts_the_visa_socket_forms() {
        let r = Resource::parse("TCPIP::192.168.1.20::5025::SOCKET").unwrap();
        assert_eq!((r.host(), r.port()), ("192.168.1.20", 5025));
        let r = Resource::parse("TCPIP0::bench-osa.lab::6000::SOCKET").unwrap();
        assert_eq!((r.host(), r.port()), ("bench-osa.lab", 6000));
        let r = Resource::parse("tcpip::localhost::socket").unwrap();
        // LXI convention: port 5025 for raw SCPI (common practice).
        assert_eq!((r.host(), r.port()), ("localhost", 5025));
        let r = Resource::parse("TCPIP::[::1]::5025::SOCKET").unwrap();
        assert_eq!((r.host(), r.port()), ("::1", 5025));
        assert_eq!(r.socket_address(), "[::1]:5025");
        assert_eq!(r.to_string(), "TCPIP::[::1]::5025::SOCKET");
        let r = Resource::parse("TCPIP::10.0.0.2::SOCKET").unwrap();
        assert_eq!(r.to_string(), "TCPIP::10.0.0.2::5025::SOCKET");
    }

    #[test]
    fn refuses_everything_else_with_a_reason() {
        for (text, needle) in [
            ("10.0.0.2:5025", "no '::'"),
            ("GPIB0::12::INSTR", "not TCPIP"),
            ("TCPIP::10.0.0.2::INSTR", "INSTR"),
            ("TCPIP::10.0.0.2::hislip0::INSTR", "INSTR"),
            ("TCPIP::10.0.0.2", "class is missing"),
            ("TCPIP::10.0.0.2::70000::SOCKET", "port"),
            ("TCPIP::10.0.0.2::0::SOCKET", "port"),
            ("TCPIP::10.0.0.2::abc::SOCKET", "port"),
            ("TCPIP::::5025::SOCKET", "host"),
            ("TCPIPX::h::SOCKET", "board number"),
            ("TCPIP::h::1::2::SOCKET", "unrecognised"),
            ("TCPIP::[::1::SOCKET", "closing"),
            ("", "no '::'"),
        ] {
            match Resource::parse(text) {
                Err(InstrumentError::BadResource { reason, .. }) => {
                    assert!(reason.contains(needle), "{text:?}: {reason}")
                }
                other => panic!("{text:?} should be refused, got {other:?}"),
            }
        }
    }
}
