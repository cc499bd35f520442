//! Dates and times as Halfwave shows and reads them, through the `jiff` crate: stored times are
//! integer milliseconds since 1970-01-01 UTC; people see and type UTC calendar dates.

/// Milliseconds since the Unix epoch as `YYYY-MM-DD HH:MM:SS UTC`. A value outside the
/// calendar's range (years -9999 to 9999) is written as the number of milliseconds.
pub fn utc_time(unix_ms: i64) -> String {
    match jiff::Timestamp::from_millisecond(unix_ms) {
        Ok(t) => t.strftime("%Y-%m-%d %H:%M:%S UTC").to_string(),
        Err(_) => format!("{unix_ms} ms since 1970-01-01 UTC (outside the calendar)"),
    }
}

/// The UTC midnight starting `YYYY-MM-DD` (proleptic Gregorian, four-digit year), in
/// milliseconds since the epoch; `None` for anything else, including dates that do not exist.
pub fn utc_midnight_ms(text: &str) -> Option<i64> {
    let b = text.as_bytes();
    // jiff also reads other ISO 8601 forms (expanded years); only the plain one is offered.
    if b.len() != 10 || b[4] != b'-' || b[7] != b'-' {
        return None;
    }
    let date: jiff::civil::Date = text.parse().ok()?;
    let midnight = jiff::tz::TimeZone::UTC
        .to_timestamp(date.to_datetime(jiff::civil::Time::midnight()))
        .ok()?;
    Some(midnight.as_millisecond())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unix_epoch_and_a_leap_day_format_as_dates() {
        // Reference dates: the Unix epoch, and 2024-02-29 12:00:00 UTC = 1709208000 s (POSIX
        // time as computed by `date -u -d @1709208000`).
        assert_eq!(utc_time(0), "1970-01-01 00:00:00 UTC");
        assert_eq!(utc_time(1_709_208_000_000), "2024-02-29 12:00:00 UTC");
        assert_eq!(utc_time(-1000), "1969-12-31 23:59:59 UTC");
        assert!(utc_time(i64::MAX).contains("outside the calendar"));
    }

    #[test]
    fn dates_convert_to_epoch_milliseconds() {
        // Worked by hand: 1970..1999 are 30 years with 7 leap days, so 2000-01-01 is day
        // 30 * 365 + 7 = 10957; January (31) and February 2000 (29, a leap year) add 60.
        assert_eq!(utc_midnight_ms("1970-01-01"), Some(0));
        assert_eq!(utc_midnight_ms("2000-03-01"), Some(11_017 * 86_400_000));
        // 2023 is not a leap year; 1900 is not either (divisible by 100, not by 400).
        assert_eq!(utc_midnight_ms("2023-02-29"), None);
        assert_eq!(utc_midnight_ms("1900-02-29"), None);
        assert_eq!(utc_midnight_ms("2000-02-29"), Some(11_016 * 86_400_000));
        for bad in ["2024-2-29", "+02024-02-29", "2024-13-01", "yesterday", ""] {
            assert_eq!(utc_midnight_ms(bad), None, "{bad}");
        }
    }
}
