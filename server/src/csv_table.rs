//! The one way Halfwave reads and writes CSV (RFC 4180, through the `csv` crate).
//!
//! Read: a UTF-8 byte-order mark is skipped, blank lines and lines starting with `#` are
//! comments, cells are trimmed, and the header is compared without regard to case. Every data
//! row comes back with its line number in the file, parsed as numbers or with the reason it
//! could not be, so a caller can stop at the first bad row (a trace) or report all of them (a
//! chain upload). Write: cells quoted only where RFC 4180 needs it (a comma, a quote or a line
//! break), inner quotes doubled, rows ended by `\n`.

/// Why a table cannot be read at all.
#[derive(Debug, Clone, PartialEq)]
pub enum TableError {
    /// No header line (the text is empty, blank or only comments).
    Empty,
    /// The header differs from the expected one.
    Header { line: usize, found: String },
    /// The text is not CSV (e.g. an unterminated quote), at this line.
    Malformed { line: usize, detail: String },
}

/// One data row: its line in the text and its numbers, or what is wrong with it.
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    pub line: usize,
    /// The row as written (cells joined by commas), for messages.
    pub text: String,
    pub values: Result<Vec<f64>, String>,
}

/// Reads a numeric table whose header is exactly `header` (any case). Each data row must hold
/// `header.len()` numbers.
pub fn read_numeric(text: &str, header: &[&str]) -> Result<Vec<Row>, TableError> {
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    // Comments and blank lines are dropped here, keeping each remaining line's number: the
    // reader's own line count loses track of skipped lines after the first record.
    let mut kept = String::with_capacity(text.len());
    let mut line_of_record = Vec::new();
    for (index, line) in text.lines().enumerate() {
        let trimmed = line.trim();
        if trimmed.is_empty() || trimmed.starts_with('#') {
            continue;
        }
        kept.push_str(line);
        kept.push('\n');
        line_of_record.push(index + 1);
    }
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .trim(csv::Trim::All)
        .flexible(true)
        .from_reader(kept.as_bytes());
    let line_of = |record_index: u64| {
        line_of_record
            .get(record_index as usize)
            .copied()
            .unwrap_or(0)
    };
    let mut rows = Vec::new();
    let mut header_seen = false;
    for record in reader.records() {
        let record = record.map_err(|e| TableError::Malformed {
            line: e.position().map_or(0, |p| line_of(p.record())),
            detail: e.to_string(),
        })?;
        let line = record.position().map_or(0, |p| line_of(p.record()));
        let cells: Vec<&str> = record.iter().collect();
        let joined = cells.join(",");
        if !header_seen {
            let matches = cells.len() == header.len()
                && cells
                    .iter()
                    .zip(header)
                    .all(|(c, h)| c.eq_ignore_ascii_case(h));
            if !matches {
                return Err(TableError::Header {
                    line,
                    found: joined,
                });
            }
            header_seen = true;
            continue;
        }
        let values = if cells.len() != header.len() {
            Err(format!(
                "expected {} values (`{}`), found {}",
                header.len(),
                header.join(","),
                cells.len()
            ))
        } else {
            cells
                .iter()
                .zip(header)
                .map(|(cell, column)| {
                    cell.parse::<f64>()
                        .map_err(|_| format!("`{cell}` in column {column} is not a number"))
                })
                .collect()
        };
        rows.push(Row {
            line,
            text: joined,
            values,
        });
    }
    if header_seen {
        Ok(rows)
    } else {
        Err(TableError::Empty)
    }
}

/// Writes rows of text cells as CSV (the first row is usually the header).
pub fn write_rows<I, R, C>(rows: I) -> String
where
    I: IntoIterator<Item = R>,
    R: IntoIterator<Item = C>,
    C: AsRef<[u8]>,
{
    let mut writer = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .quote_style(csv::QuoteStyle::Necessary)
        .from_writer(Vec::new());
    for row in rows {
        // Writing to memory cannot fail (no I/O); a failure would only drop the row.
        let _ = writer.write_record(row);
    }
    let bytes = writer.into_inner().unwrap_or_default();
    // Every cell came in as text; the writer adds only ASCII quotes, commas and newlines.
    String::from_utf8(bytes).unwrap_or_default()
}

/// A trace as the CSV `halfwave analyze` reads: header `frequency_hz,power_dbm`, one point per
/// row, each value in Rust's shortest form that reads back to the same `f64`.
pub fn write_trace(trace: &halfwave_units::Trace) -> String {
    let header = ["frequency_hz".to_string(), "power_dbm".to_string()];
    let rows = trace
        .frequency_hz()
        .iter()
        .zip(trace.power_dbm())
        .map(|(f, p)| [f.to_string(), p.to_string()]);
    write_rows(std::iter::once(header).chain(rows))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bom_comments_blank_lines_and_case_are_accepted() {
        let text = "\u{feff}# exported 2026-12-02\n\nFrequency_Hz , gain_db\n1e9, -3.5\n\n# note\n2e9,-4\n";
        let rows = read_numeric(text, &["frequency_hz", "gain_db"]).unwrap();
        assert_eq!(rows.len(), 2);
        assert_eq!(rows[0].line, 4);
        assert_eq!(rows[0].values, Ok(vec![1e9, -3.5]));
        assert_eq!(rows[1].line, 7);
    }

    #[test]
    fn bad_rows_are_numbered_and_named() {
        let text = "frequency_hz,gain_db\n1e9,x\n2e9\n3e9,1,2\n";
        let rows = read_numeric(text, &["frequency_hz", "gain_db"]).unwrap();
        assert_eq!(
            rows[0].values,
            Err("`x` in column gain_db is not a number".into())
        );
        assert_eq!(rows[1].line, 3);
        assert!(rows[1].values.as_ref().unwrap_err().contains("found 1"));
        assert!(rows[2].values.as_ref().unwrap_err().contains("found 3"));
        assert_eq!(
            read_numeric("# only\n\n", &["a"]).unwrap_err(),
            TableError::Empty
        );
        assert_eq!(
            read_numeric("f,p\n1,2\n", &["frequency_hz", "power_dbm"]).unwrap_err(),
            TableError::Header {
                line: 1,
                found: "f,p".into()
            }
        );
    }

    #[test]
    fn written_cells_are_quoted_as_rfc_4180_says() {
        // RFC 4180 section 2, rules 6 and 7: fields with commas, quotes or line breaks are
        // enclosed in double quotes, and a quote inside is doubled.
        let out = write_rows([["a", "b,c", "say \"hi\"", "line\nbreak", ""]]);
        assert_eq!(out, "a,\"b,c\",\"say \"\"hi\"\"\",\"line\nbreak\",\n");
    }

    #[test]
    fn a_trace_is_written_as_before_and_reads_back_exactly() {
        let trace = halfwave_units::Trace::new(
            vec![193.4e12, 193.400_000_001e12, 193.400_000_002e12],
            vec![-3.25, -70.1, 0.1 + 0.2],
            None,
        )
        .unwrap();
        let text = write_trace(&trace);
        // The text the route wrote by hand before (`{f},{p}` per row after the header).
        assert_eq!(
            text,
            "frequency_hz,power_dbm\n193400000000000,-3.25\n193400000001000,-70.1\n193400000002000,0.30000000000000004\n"
        );
        let rows = read_numeric(&text, &["frequency_hz", "power_dbm"]).unwrap();
        let back: Vec<f64> = rows.iter().map(|r| r.values.as_ref().unwrap()[1]).collect();
        assert_eq!(back, trace.power_dbm());
    }
}
