//! Lines and data records shared by both versions: comments stripped, numbers read, and records
//! of a fixed count of numbers gathered over one or more lines (each record starts on its own
//! line).

/// The lines that carry something: `(line number from 1, text without comment, trimmed)`.
pub fn content_lines(text: &str) -> Vec<(usize, &str)> {
    text.lines()
        .enumerate()
        .filter_map(|(i, line)| {
            let content = line.split('!').next().unwrap_or_default().trim();
            (!content.is_empty()).then_some((i + 1, content))
        })
        .collect()
}

/// The numbers on a data line; the error names the token that is not a finite number.
pub fn numbers(line: &str) -> Result<Vec<f64>, String> {
    line.split_whitespace()
        .map(|token| {
            token
                .parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| format!("{token:?} is not a number"))
        })
        .collect()
}

/// Gathers records of `size` numbers from consecutive lines.
#[derive(Debug)]
pub struct RecordReader {
    size: usize,
    pending: Vec<f64>,
    started_at: usize,
}

impl RecordReader {
    pub fn new(size: usize) -> RecordReader {
        RecordReader {
            size,
            pending: Vec::with_capacity(size),
            started_at: 0,
        }
    }

    /// True when no record is under way (the next line starts one).
    pub fn at_record_start(&self) -> bool {
        self.pending.is_empty()
    }

    /// Adds a line's numbers; returns a complete record (with the line it started on).
    pub fn push(
        &mut self,
        line: usize,
        values: &[f64],
    ) -> Result<Option<(usize, Vec<f64>)>, String> {
        if self.pending.is_empty() {
            self.started_at = line;
        }
        self.pending.extend_from_slice(values);
        if self.pending.len() > self.size {
            return Err(if self.started_at == line {
                format!(
                    "{} numbers on one line; a record here is a frequency and {} numbers ({} in all)",
                    values.len(),
                    self.size - 1,
                    self.size
                )
            } else {
                format!(
                    "the record that starts on line {} needs {} numbers (a frequency and {}); with \
                     this line it has {}: each record starts on a line of its own",
                    self.started_at,
                    self.size,
                    self.size - 1,
                    self.pending.len()
                )
            });
        }
        if self.pending.len() == self.size {
            let record = std::mem::replace(&mut self.pending, Vec::with_capacity(self.size));
            return Ok(Some((self.started_at, record)));
        }
        Ok(None)
    }

    /// An error for a record left incomplete at the end of the data, if there is one.
    pub fn unfinished(&self) -> Option<(usize, String)> {
        (!self.pending.is_empty()).then(|| {
            (
                self.started_at,
                format!(
                    "the record that starts here has {} of its {} numbers (a frequency and {}); the \
                     data ends before it is complete",
                    self.pending.len(),
                    self.size,
                    self.size - 1
                ),
            )
        })
    }
}

/// How the parameters of one frequency are laid out after the frequency.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// S11.
    OnePort,
    /// S11 S21 S12 S22 (every 1.x two-port; 2.0 `[Two-Port Data Order] 21_12`).
    TwoPort21First,
    /// S11 S12 S21 S22 (2.0 `[Two-Port Data Order] 12_21`).
    TwoPort12First,
    /// S11 S21 S22 of a reciprocal two-port (2.0 `[Matrix Format] Lower`; S12 = S21).
    TwoPortLower,
    /// S11 S12 S22 of a reciprocal two-port (2.0 `[Matrix Format] Upper`; S21 = S12).
    TwoPortUpper,
}

impl Layout {
    /// Numbers per record, the frequency included.
    pub fn size(self) -> usize {
        match self {
            Layout::OnePort => 3,
            Layout::TwoPort21First | Layout::TwoPort12First => 9,
            Layout::TwoPortLower | Layout::TwoPortUpper => 7,
        }
    }
}

/// Collects records into frequencies and network data.
#[derive(Debug)]
pub struct Collector {
    layout: Layout,
    format: super::options::Format,
    hz_per_unit: f64,
    pub frequencies: Vec<halfwave_units::Hz>,
    one: Vec<super::Complex>,
    two: Vec<super::TwoPort>,
}

impl Collector {
    pub fn new(layout: Layout, format: super::options::Format, hz_per_unit: f64) -> Collector {
        Collector {
            layout,
            format,
            hz_per_unit,
            frequencies: Vec::new(),
            one: Vec::new(),
            two: Vec::new(),
        }
    }

    /// The last frequency read, in the file's unit.
    pub fn last_frequency_in_file_unit(&self) -> Option<f64> {
        self.frequencies.last().map(|f| f.0 / self.hz_per_unit)
    }

    /// Adds one complete record; frequencies must be non-negative and strictly increasing.
    pub fn add(&mut self, record: &[f64]) -> Result<(), String> {
        let f = record[0];
        if f < 0.0 {
            return Err(format!("the frequency {f} is negative"));
        }
        if let Some(last) = self.last_frequency_in_file_unit() {
            if f <= last {
                return Err(format!(
                    "the frequency {f} does not follow {last}: frequencies must increase"
                ));
            }
        }
        if !(f * self.hz_per_unit).is_finite() {
            return Err(format!("the frequency {f} is too large to be a frequency"));
        }
        let c = |i: usize| self.format.complex(record[i], record[i + 1]);
        if let Some(i) = (1..record.len()).step_by(2).find(|&i| !c(i).is_finite()) {
            return Err(format!(
                "the pair {} {} is not a finite complex number in this format",
                record[i],
                record[i + 1]
            ));
        }
        match self.layout {
            Layout::OnePort => self.one.push(c(1)),
            Layout::TwoPort21First => self.two.push(super::TwoPort {
                s11: c(1),
                s21: c(3),
                s12: c(5),
                s22: c(7),
            }),
            Layout::TwoPort12First => self.two.push(super::TwoPort {
                s11: c(1),
                s12: c(3),
                s21: c(5),
                s22: c(7),
            }),
            Layout::TwoPortLower | Layout::TwoPortUpper => self.two.push(super::TwoPort {
                s11: c(1),
                s21: c(3),
                s12: c(3),
                s22: c(5),
            }),
        }
        self.frequencies
            .push(halfwave_units::Hz(f * self.hz_per_unit));
        Ok(())
    }

    pub fn len(&self) -> usize {
        self.frequencies.len()
    }

    /// The frequencies and the data.
    pub fn finish(self) -> (Vec<halfwave_units::Hz>, super::NetworkData) {
        let data = match self.layout {
            Layout::OnePort => super::NetworkData::OnePort(self.one),
            _ => super::NetworkData::TwoPort(self.two),
        };
        (self.frequencies, data)
    }
}
