//! Time bounds of the run list (`since`, `until`): a UTC date `YYYY-MM-DD` (midnight) or
//! milliseconds since the epoch, read through `calendar.rs`, and the OpenAPI schema that says so.

use crate::api::problem::FieldProblem;

/// The schema of a time bound: a date, or milliseconds since the epoch as digits, or empty.
pub fn time_bound_schema() -> utoipa::openapi::schema::Schema {
    use utoipa::openapi::schema::{AnyOfBuilder, KnownFormat, ObjectBuilder, SchemaFormat, Type};
    AnyOfBuilder::new()
        .item(
            ObjectBuilder::new()
                .schema_type(Type::String)
                .format(Some(SchemaFormat::KnownFormat(KnownFormat::Date))),
        )
        .item(
            ObjectBuilder::new()
                .schema_type(Type::String)
                .pattern(Some(TIME_BOUND_MS_PATTERN)),
        )
        .build()
        .into()
}

/// Milliseconds since the epoch in a time bound: up to 15 digits (beyond the year 9999), or
/// nothing.
const TIME_BOUND_MS_PATTERN: &str = "^[0-9]{0,15}$";

/// Parses `YYYY-MM-DD` (UTC midnight) or milliseconds since the epoch (1 to 15 digits, as the
/// document's pattern says).
pub fn parse_time_bound(field: &str, text: &str) -> Result<i64, FieldProblem> {
    if !text.is_empty() && text.len() <= 15 && text.bytes().all(|b| b.is_ascii_digit()) {
        if let Ok(ms) = text.parse::<i64>() {
            return Ok(ms);
        }
    }
    let bad = || {
        FieldProblem::new(
            field,
            format!("{text:?} is neither a date YYYY-MM-DD nor milliseconds since 1970-01-01 UTC"),
        )
    };
    crate::calendar::utc_midnight_ms(text).ok_or_else(bad)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dates_convert_to_epoch_milliseconds() {
        // Worked by hand: 1970..1999 are 30 years with 7 leap days, so 2000-01-01 is day
        // 30 * 365 + 7 = 10957; January (31) and February 2000 (29, a leap year) add 60.
        assert_eq!(parse_time_bound("since", "1970-01-01").unwrap(), 0);
        assert_eq!(
            parse_time_bound("since", "2000-03-01").unwrap(),
            11_017 * 86_400_000
        );
        assert_eq!(
            parse_time_bound("since", "1700000000000").unwrap(),
            1_700_000_000_000
        );
        assert_eq!(
            parse_time_bound("until", "2023-02-29").unwrap_err().field,
            "until"
        );
        assert!(parse_time_bound("until", "yesterday").is_err());
        // Only what the document's pattern allows: digits (at most 15) or a date.
        assert!(parse_time_bound("since", "+5").is_err());
        assert!(parse_time_bound("since", " 5").is_err());
        assert!(parse_time_bound("since", "-5").is_err());
        assert!(parse_time_bound("since", "1000000000000000").is_err());
        assert_eq!(
            parse_time_bound("since", "999999999999999").unwrap(),
            999_999_999_999_999
        );
    }
}
