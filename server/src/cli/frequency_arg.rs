//! Frequencies on the command line: hertz as a number (`7.5e9`), or with a unit the way people
//! write them on a bench (`7.5GHz`, `750 MHz`, `100kHz`, `2e10Hz`).
//!
//! Units are read without regard to case, so `mhz` is megahertz: no drive of this trade is in
//! millihertz. The value is not checked here beyond being a number; each command's own check
//! (positive, within the calibration) names what is wrong with it, also for a negative value.

/// Hertz per unit, by the unit's lower-case name.
const UNITS: [(&str, f64); 4] = [("ghz", 1e9), ("mhz", 1e6), ("khz", 1e3), ("hz", 1.0)];

/// Parses `7.5e9`, `7.5GHz`, `7.5 GHz`, `750MHz`, `100kHz` or `2e10Hz` into hertz; for clap's
/// `value_parser`.
pub fn parse_frequency_hz(text: &str) -> Result<f64, String> {
    let trimmed = text.trim();
    let lower = trimmed.to_ascii_lowercase();
    let (number, per_unit) = UNITS
        .iter()
        .find_map(|&(unit, hz)| {
            lower
                .strip_suffix(unit)
                .map(|number| (number.trim_end(), hz))
        })
        .unwrap_or((lower.as_str(), 1.0));
    match number.parse::<f64>() {
        Ok(value) if value.is_finite() => Ok(value * per_unit),
        _ => Err(format!(
            "{trimmed:?} is not a frequency; give hertz (7.5e9) or a number with Hz, kHz, MHz or GHz (7.5GHz)"
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::parse_frequency_hz;

    #[test]
    fn units_scale_the_number() {
        // SI prefixes (common practice): k = 1e3, M = 1e6, G = 1e9.
        assert_eq!(parse_frequency_hz("7.5e9"), Ok(7.5e9));
        assert_eq!(parse_frequency_hz("7.5GHz"), Ok(7.5e9));
        assert_eq!(parse_frequency_hz("7.5 GHz"), Ok(7.5e9));
        assert_eq!(parse_frequency_hz(" 750MHz "), Ok(750e6));
        assert_eq!(parse_frequency_hz("750mhz"), Ok(750e6));
        assert_eq!(parse_frequency_hz("100kHz"), Ok(100e3));
        assert_eq!(parse_frequency_hz("2e10Hz"), Ok(2e10));
        // Negative values pass, so that the command's own check names them.
        assert_eq!(parse_frequency_hz("-1GHz"), Ok(-1e9));
    }

    #[test]
    fn what_is_not_a_frequency_is_named_with_the_forms_that_are() {
        for bad in ["7.5THz", "GHz", "", "seven", "inf", "NaN", "7.5 G Hz"] {
            let error = parse_frequency_hz(bad).expect_err(bad);
            assert!(
                error.contains("7.5GHz") && error.contains("7.5e9"),
                "{error}"
            );
        }
    }
}
