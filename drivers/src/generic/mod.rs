//! Generic SCPI drivers: one [`RfSource`](crate::RfSource), one
//! [`SpectrumAnalyzer`](crate::SpectrumAnalyzer) and one [`PowerSensor`](crate::PowerSensor)
//! implementation for any instrument that speaks
//! SCPI over a raw socket, adapted to a model by its command profile ([`crate::profile`]).
//!
//! Both drivers share a [`session::ScpiSession`]: the transport plus the common-command profile.
//! It runs each configuration step as "send, drain the error queue, read back", repeats a step
//! that failed on the link (after the transport reconnects) up to the profile's retry count, and
//! turns error-queue entries into [`InstrumentError::Scpi`](crate::InstrumentError::Scpi) with the
//! code and message. Each driver adds range checks before sending and tolerance checks after.

pub mod analyzer;
pub mod sensor;
pub mod session;
pub mod source;
pub mod suggest;

pub use analyzer::ScpiSpectrumAnalyzer;
pub use sensor::{connect_sensor, ScpiPowerSensor};
pub use session::ScpiSession;
pub use source::ScpiRfSource;

/// Connects a generic RF source from configuration: the resource string and an optional profile
/// file (the standard SCPI tree when `None`).
pub async fn connect_source(
    resource: &str,
    profile: Option<&std::path::Path>,
) -> Result<Box<dyn crate::RfSource>, crate::InstrumentError> {
    let profile = crate::profile::SourceProfile::from_optional_file(profile).map_err(|e| {
        crate::InstrumentError::BadProfile {
            resource: resource.to_string(),
            reason: e.to_string(),
        }
    })?;
    Ok(Box::new(ScpiRfSource::connect(resource, profile).await?))
}

/// Connects a generic spectrum analyzer from configuration: the resource string and an optional
/// profile file (the standard SCPI tree when `None`).
pub async fn connect_analyzer(
    resource: &str,
    profile: Option<&std::path::Path>,
) -> Result<Box<dyn crate::SpectrumAnalyzer>, crate::InstrumentError> {
    let profile = crate::profile::AnalyzerProfile::from_optional_file(profile).map_err(|e| {
        crate::InstrumentError::BadProfile {
            resource: resource.to_string(),
            reason: e.to_string(),
        }
    })?;
    Ok(Box::new(
        ScpiSpectrumAnalyzer::connect(resource, profile).await?,
    ))
}

/// Formats a number for a command in plain decimal (NR1 or NR2, never an exponent), with the
/// shortest digits that read back as the same `f64`.
pub fn format_decimal(value: f64) -> String {
    format!("{value}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn decimal_forms() {
        // IEEE 488.2 §7.7.2 decimal numeric program data accepts NR1 and NR2 (from memory).
        assert_eq!(format_decimal(1e9), "1000000000");
        assert_eq!(format_decimal(193.4e12), "193400000000000");
        assert_eq!(format_decimal(-10.25), "-10.25");
        assert_eq!(format_decimal(0.001), "0.001");
    }
}
