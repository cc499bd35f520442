//! Touchstone 1.x: one option line, then records; two-ports in the order S11 S21 S12 S22, noise
//! parameters (a two-port's second block, where the frequency stops increasing) skipped.

use super::options::parse_option_line;
use super::records::{numbers, Collector, Layout, RecordReader};
use super::{build, Touchstone, TouchstoneError, Version};
use halfwave_units::REFERENCE_IMPEDANCE_OHMS;

pub fn parse(
    lines: &[(usize, &str)],
    file: &str,
    ports: usize,
) -> Result<Touchstone, TouchstoneError> {
    let layout = if ports == 1 {
        Layout::OnePort
    } else {
        Layout::TwoPort21First
    };
    let mut options = None;
    let mut collector: Option<Collector> = None;
    let mut reader = RecordReader::new(layout.size());
    let mut notes = Vec::new();
    for &(line, text) in lines {
        if let Some(rest) = text.strip_prefix('#') {
            if options.is_some() {
                return Err(TouchstoneError::at(
                    file,
                    line,
                    "a second option line; a Touchstone file has one, before the data",
                ));
            }
            let parsed = parse_option_line(rest).map_err(|m| TouchstoneError::at(file, line, m))?;
            collector = Some(Collector::new(layout, parsed.format, parsed.hz_per_unit));
            options = Some(parsed);
            continue;
        }
        if text.starts_with('[') {
            return Err(TouchstoneError::at(
                file,
                line,
                format!(
                    "the keyword {text:?} belongs to Touchstone 2.0, whose files start with \
                     [Version] 2.0; this file has no [Version] line"
                ),
            ));
        }
        let Some(collector) = collector.as_mut() else {
            return Err(TouchstoneError::at(
                file,
                line,
                "data before the option line; the file must start with a line such as \
                 `# GHz S MA R 50`",
            ));
        };
        let values = numbers(text).map_err(|m| TouchstoneError::at(file, line, m))?;
        if ports == 2 && reader.at_record_start() {
            if let (Some(&f), Some(last)) =
                (values.first(), collector.last_frequency_in_file_unit())
            {
                if f <= last {
                    let end = lines.last().map_or(line, |l| l.0);
                    notes.push(format!(
                        "noise parameters on lines {line} to {end} skipped (the frequency falls \
                         back to {f} after {last}, which starts the noise block)"
                    ));
                    break;
                }
            }
        }
        if let Some((start, record)) = reader
            .push(line, &values)
            .map_err(|m| TouchstoneError::at(file, line, m))?
        {
            collector
                .add(&record)
                .map_err(|m| TouchstoneError::at(file, start, m))?;
        }
    }
    if let Some((line, message)) = reader.unfinished() {
        return Err(TouchstoneError::at(file, line, message));
    }
    let (Some(options), Some(collector)) = (options, collector) else {
        return Err(TouchstoneError::whole(
            file,
            "no option line (`# GHz S MA R 50` or similar) and no data: is this a Touchstone file?",
        ));
    };
    if collector.len() == 0 {
        return Err(TouchstoneError::whole(
            file,
            "the option line is followed by no network data",
        ));
    }
    let (frequencies, data) = collector.finish();
    build(
        file,
        Version::V1,
        frequencies,
        data,
        options.reference_ohms.unwrap_or(REFERENCE_IMPEDANCE_OHMS),
        notes,
    )
}
