//! Touchstone 2.0: keywords in brackets around the option line and the data. The header
//! (`[Version] 2.0`, option line, `[Number of Ports]`, `[Two-Port Data Order]`,
//! `[Number of Frequencies]`, optional `[Reference]`, `[Matrix Format]`,
//! `[Number of Noise Frequencies]`, `[Begin Information]`...`[End Information]`) precedes
//! `[Network Data]`; `[Noise Data]` is skipped with a note; `[End]` closes the file.

use super::options::{parse_option_line, Options};
use super::records::{numbers, Collector, Layout, RecordReader};
use super::{build, Touchstone, TouchstoneError, Version};
use halfwave_units::REFERENCE_IMPEDANCE_OHMS;

/// Where in the file the reader is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Section {
    Header,
    /// Inside `[Reference]`, which may continue over lines until every port has a value.
    Reference,
    Information,
    Network,
    Noise {
        from: usize,
    },
}

/// The header's settings, gathered before `[Network Data]`.
#[derive(Debug, Default)]
struct Header {
    options: Option<Options>,
    ports: Option<usize>,
    order_12_first: Option<bool>,
    frequencies: Option<(usize, usize)>,
    references: Vec<f64>,
    reference_line: Option<usize>,
    matrix: Option<&'static str>,
}

/// `[Name] rest` with the name lowercased and its spaces collapsed, if the line is a keyword.
fn keyword(text: &str) -> Option<(String, &str)> {
    let inner = text.strip_prefix('[')?;
    let (name, rest) = inner.split_once(']')?;
    let name = name.split_whitespace().collect::<Vec<_>>().join(" ");
    Some((name.to_ascii_lowercase(), rest.trim()))
}

fn count(file: &str, line: usize, what: &str, rest: &str) -> Result<usize, TouchstoneError> {
    rest.parse::<usize>()
        .ok()
        .filter(|n| *n > 0)
        .ok_or_else(|| {
            TouchstoneError::at(
                file,
                line,
                format!("[{what}] needs a positive whole number, not {rest:?}"),
            )
        })
}

pub fn parse(
    lines: &[(usize, &str)],
    file: &str,
    ports_by_name: Option<usize>,
) -> Result<Touchstone, TouchstoneError> {
    let mut header = Header::default();
    let mut section = Section::Header;
    let mut data: Option<(Collector, RecordReader, usize)> = None;
    let mut notes = Vec::new();
    let mut ended = false;
    let mut lines_iter = lines.iter();

    // [Version] 2.0 is the first line that carries something (the caller checked the keyword).
    if let Some(&(line, text)) = lines_iter.next() {
        let (_, version) = keyword(text).unwrap_or_default();
        if version != "2.0" {
            return Err(TouchstoneError::at(
                file,
                line,
                format!(
                    "[Version] {version:?}: this reader follows Touchstone 2.0; files without a \
                     [Version] line are read as 1.x"
                ),
            ));
        }
    }

    for &(line, text) in lines_iter {
        let at = |m: String| TouchstoneError::at(file, line, m);
        if section == Section::Information {
            if keyword(text).is_some_and(|(k, _)| k == "end information") {
                section = Section::Header;
            }
            continue;
        }
        if let Section::Noise { .. } = section {
            if keyword(text).is_some_and(|(k, _)| k == "end") {
                ended = true;
                break;
            }
            continue;
        }
        if let Some(rest) = text.strip_prefix('#') {
            if section != Section::Header {
                return Err(at("the option line belongs before [Network Data]".into()));
            }
            if header.options.is_some() {
                return Err(at(
                    "a second option line; a Touchstone file has one, after [Version]".into(),
                ));
            }
            header.options = Some(parse_option_line(rest).map_err(at)?);
            continue;
        }
        let Some((name, rest)) = keyword(text) else {
            match section {
                Section::Reference => {
                    let values = numbers(text).map_err(at)?;
                    header.references.extend(values);
                    if header.references.len() >= header.ports.unwrap_or(1) {
                        section = Section::Header;
                    }
                    continue;
                }
                Section::Network => {
                    let (collector, reader, _) = data
                        .as_mut()
                        .ok_or_else(|| at("network data without a header".into()))?;
                    let values = numbers(text).map_err(at)?;
                    if let Some((start, record)) = reader.push(line, &values).map_err(at)? {
                        collector
                            .add(&record)
                            .map_err(|m| TouchstoneError::at(file, start, m))?;
                    }
                    continue;
                }
                _ => {
                    return Err(at(format!(
                        "{text:?} is neither a keyword nor the option line; data belongs after \
                         [Network Data]"
                    )))
                }
            }
        };
        if section == Section::Reference {
            return Err(at(format!(
                "[Reference] gives {} value(s) for {} port(s)",
                header.references.len(),
                header.ports.unwrap_or(1)
            )));
        }
        if section == Section::Network && !matches!(name.as_str(), "noise data" | "end") {
            return Err(at(format!(
                "[{name}] inside the network data; only [Noise Data] or [End] may follow it"
            )));
        }
        match name.as_str() {
            "version" => return Err(at("a second [Version] line".into())),
            "number of ports" => {
                let n = count(file, line, "Number of Ports", rest)?;
                if n > 2 {
                    return Err(at(format!(
                        "a {n}-port file: only one-port and two-port files are read; export the \
                         two ports of the path the drive signal takes"
                    )));
                }
                if let Some(by_name) = ports_by_name {
                    if by_name != n {
                        return Err(at(format!(
                            "[Number of Ports] {n} but the file is named as a {by_name}-port \
                             (.s{by_name}p)"
                        )));
                    }
                }
                header.ports = Some(n);
            }
            "two-port data order" => {
                header.order_12_first = Some(match rest {
                    "12_21" => true,
                    "21_12" => false,
                    other => {
                        return Err(at(format!(
                            "[Two-Port Data Order] {other:?}: it is 12_21 or 21_12"
                        )))
                    }
                });
            }
            "number of frequencies" => {
                header.frequencies =
                    Some((count(file, line, "Number of Frequencies", rest)?, line));
            }
            "number of noise frequencies" => {
                count(file, line, "Number of Noise Frequencies", rest)?;
            }
            "reference" => {
                let Some(ports) = header.ports else {
                    return Err(at(
                        "[Reference] before [Number of Ports]; state the port count first".into(),
                    ));
                };
                header.reference_line = Some(line);
                header.references = numbers(rest).map_err(at)?;
                if header.references.len() < ports {
                    section = Section::Reference;
                }
            }
            "matrix format" => {
                header.matrix = Some(match rest.to_ascii_lowercase().as_str() {
                    "full" => "full",
                    "lower" => "lower",
                    "upper" => "upper",
                    other => {
                        return Err(at(format!(
                            "[Matrix Format] {other:?}: it is Full, Lower or Upper"
                        )))
                    }
                });
            }
            "mixed-mode order" => {
                return Err(at(
                    "mixed-mode (differential) data is not read; export single-ended S-parameters"
                        .into(),
                ))
            }
            "begin information" => section = Section::Information,
            "network data" => {
                let (layout, options) = header_layout(file, line, &header)?;
                data = Some((
                    Collector::new(layout, options.format, options.hz_per_unit),
                    RecordReader::new(layout.size()),
                    line,
                ));
                section = Section::Network;
            }
            "noise data" => {
                if section != Section::Network {
                    return Err(at("[Noise Data] before [Network Data]".into()));
                }
                check_data_end(file, &data)?;
                section = Section::Noise { from: line };
            }
            "end" => {
                if section != Section::Network {
                    return Err(at("[End] before [Network Data]".into()));
                }
                check_data_end(file, &data)?;
                ended = true;
                break;
            }
            other => {
                return Err(at(format!(
                    "unknown keyword [{other}]; see the Touchstone 2.0 specification"
                )))
            }
        }
    }
    if let Section::Noise { from } = section {
        notes.push(format!("noise parameters from line {from} skipped"));
    }
    if !ended {
        return Err(TouchstoneError::whole(
            file,
            "no [End] line: the file is incomplete (a Touchstone 2.0 file ends with [End])",
        ));
    }
    // [End] is accepted only after [Network Data], whose header states the frequency count.
    let (Some((collector, _, data_line)), Some((expected, count_line))) =
        (data, header.frequencies)
    else {
        return Err(TouchstoneError::whole(
            file,
            "no [Network Data] before [End]",
        ));
    };
    if collector.len() != expected {
        return Err(TouchstoneError::at(
            file,
            count_line,
            format!(
                "[Number of Frequencies] says {expected} but [Network Data] (line {data_line}) \
                 holds {}",
                collector.len()
            ),
        ));
    }
    let reference = reference_ohms(file, &header)?;
    let (frequencies, network) = collector.finish();
    build(file, Version::V2, frequencies, network, reference, notes)
}

/// The record layout the header states; refuses a header that lacks what the data needs.
fn header_layout(
    file: &str,
    line: usize,
    header: &Header,
) -> Result<(Layout, Options), TouchstoneError> {
    let missing = |what: &str| {
        TouchstoneError::at(
            file,
            line,
            format!("[Network Data] before {what}; the header must state it first"),
        )
    };
    let options = header
        .options
        .ok_or_else(|| missing("the option line (`# GHz S RI R 50` or similar)"))?;
    let ports = header.ports.ok_or_else(|| missing("[Number of Ports]"))?;
    if header.frequencies.is_none() {
        return Err(missing("[Number of Frequencies]"));
    }
    if ports == 1 {
        if header.order_12_first.is_some() {
            return Err(TouchstoneError::at(
                file,
                line,
                "[Two-Port Data Order] in a one-port file; it belongs to two-ports only",
            ));
        }
        return Ok((Layout::OnePort, options));
    }
    let layout = match header.matrix.unwrap_or("full") {
        "lower" => Layout::TwoPortLower,
        "upper" => Layout::TwoPortUpper,
        _ => match header.order_12_first {
            Some(true) => Layout::TwoPort12First,
            Some(false) => Layout::TwoPort21First,
            None => return Err(missing("[Two-Port Data Order] (12_21 or 21_12)")),
        },
    };
    Ok((layout, options))
}

/// Refuses network data that ends inside a record.
fn check_data_end(
    file: &str,
    data: &Option<(Collector, RecordReader, usize)>,
) -> Result<(), TouchstoneError> {
    if let Some((_, reader, _)) = data {
        if let Some((line, message)) = reader.unfinished() {
            return Err(TouchstoneError::at(file, line, message));
        }
    }
    Ok(())
}

/// The one reference impedance of every port: `[Reference]` if given, else the option line's
/// `R`, else 50 ohm. Different values per port are refused.
fn reference_ohms(file: &str, header: &Header) -> Result<f64, TouchstoneError> {
    let Some(line) = header.reference_line else {
        return Ok(header
            .options
            .and_then(|o| o.reference_ohms)
            .unwrap_or(REFERENCE_IMPEDANCE_OHMS));
    };
    let ports = header.ports.unwrap_or(1);
    if header.references.len() != ports {
        return Err(TouchstoneError::at(
            file,
            line,
            format!(
                "[Reference] gives {} value(s) for {ports} port(s)",
                header.references.len()
            ),
        ));
    }
    let first = header.references[0];
    if header.references.iter().any(|r| *r <= 0.0) {
        return Err(TouchstoneError::at(
            file,
            line,
            "[Reference] impedances must be positive ohms",
        ));
    }
    if header.references.iter().any(|r| *r != first) {
        return Err(TouchstoneError::at(
            file,
            line,
            format!(
                "[Reference] differs between ports ({:?} ohm); only one reference impedance for \
                 every port is renormalised: export the file at 50 ohm",
                header.references
            ),
        ));
    }
    Ok(first)
}
