//! Touchstone files (`.s1p`, `.s2p`): the S-parameters of the drive chain's parts as a network
//! analyzer exports them, read into complex S-parameters referred to 50 ohm.
//!
//! What is read (Touchstone 1.1 and Touchstone 2.0, the IBIS open standard; details from memory
//! of both specifications):
//! - Version 1.x: an option line `# <unit> <parameter> <format> R <ohms>` (fields in any order,
//!   case-insensitive; an omitted field takes the specification's default: GHz, S, MA, R 50),
//!   `!` comments, and data records of a frequency and 2 n^2 numbers that may continue over
//!   several lines. The port count comes from the file name (`.s1p`, `.s2p`).
//! - Version 2.0: `[Version] 2.0`, the option line, `[Number of Ports]`, `[Two-Port Data Order]`
//!   (`12_21` or `21_12`, required for two-ports), `[Number of Frequencies]`, optional
//!   `[Reference]`, `[Matrix Format]` (`Full`, `Lower`, `Upper`), `[Number of Noise Frequencies]`,
//!   `[Begin Information]`...`[End Information]` (skipped), `[Network Data]`, `[Noise Data]`
//!   (skipped with a note) and `[End]`.
//! - Formats: `RI` (real, imaginary), `MA` (linear magnitude, angle in degrees), `DB`
//!   (20 log10 |S|, angle in degrees).
//! - A 1.x two-port record is `f S11 S21 S12 S22`: S21 comes before S12 (the order the 1.x
//!   specification keeps for two-ports only).
//! - Noise parameters after a 1.x two-port's network data (where the frequency stops increasing)
//!   are skipped with a note.
//! - A reference impedance other than 50 ohm, real and the same at every port, is renormalised to
//!   50 ohm: S' = (S - rho I)(I - rho S)^-1 with rho = (50 - R) / (50 + R) (for a one-port the
//!   familiar Gamma' = (Gamma - rho) / (1 - rho Gamma)); per-port different references are refused.
//!
//! Refused by name: parameters other than S (Y, Z, H, G), more than two ports, mixed-mode data,
//! frequencies that do not increase, and anything the specification does not allow. Every error
//! names the file and, where there is one, the line.
//!
//! Pure: text in, network out. Reading the file is the caller's business (the CLI's
//! `chain` commands).

mod options;
mod records;
mod v1;
mod v2;

use halfwave_units::{Hz, REFERENCE_IMPEDANCE_OHMS};
pub use num_complex::Complex64 as Complex;

/// The S-parameters of a two-port at one frequency.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TwoPort {
    pub s11: Complex,
    pub s21: Complex,
    pub s12: Complex,
    pub s22: Complex,
}

/// The network data of a file, one entry per frequency.
#[derive(Debug, Clone, PartialEq)]
pub enum NetworkData {
    /// Reflection coefficient of a one-port (a load such as the modulator's RF input).
    OnePort(Vec<Complex>),
    /// A two-port (cable, attenuator, amplifier, bias tee).
    TwoPort(Vec<TwoPort>),
}

/// Which specification a file follows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Version {
    V1,
    V2,
}

/// A Touchstone file read and referred to 50 ohm.
#[derive(Debug, Clone, PartialEq)]
pub struct Touchstone {
    /// The file's name as given by the caller (used in every message).
    pub file: String,
    pub version: Version,
    /// Strictly increasing.
    pub frequencies: Vec<Hz>,
    /// Referred to 50 ohm, one entry per frequency.
    pub data: NetworkData,
    /// What was skipped or converted (noise parameters, renormalisation), for the operator.
    pub notes: Vec<String>,
}

impl Touchstone {
    /// Number of ports (1 or 2).
    pub fn ports(&self) -> usize {
        match self.data {
            NetworkData::OnePort(_) => 1,
            NetworkData::TwoPort(_) => 2,
        }
    }

    /// Lowest and highest frequency.
    pub fn range(&self) -> (Hz, Hz) {
        // A parsed file has at least one frequency.
        let first = self.frequencies.first().copied().unwrap_or(Hz(0.0));
        let last = self.frequencies.last().copied().unwrap_or(Hz(0.0));
        (first, last)
    }
}

/// Why a Touchstone file (or a cascade of them) was refused: the file, the line where there is
/// one, and what to do.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{file}{}: {message}", line.map(|l| format!(", line {l}")).unwrap_or_default())]
pub struct TouchstoneError {
    pub file: String,
    pub line: Option<usize>,
    pub message: String,
}

impl TouchstoneError {
    pub(crate) fn at(file: &str, line: usize, message: impl Into<String>) -> TouchstoneError {
        TouchstoneError {
            file: file.to_string(),
            line: Some(line),
            message: message.into(),
        }
    }

    pub(crate) fn whole(file: &str, message: impl Into<String>) -> TouchstoneError {
        TouchstoneError {
            file: file.to_string(),
            line: None,
            message: message.into(),
        }
    }
}

/// Reads a Touchstone file's text. `file` names it in messages and, for version 1.x, gives the
/// port count by its extension (`.s1p`, `.s2p`, any case).
pub fn parse(text: &str, file: &str) -> Result<Touchstone, TouchstoneError> {
    let lines = records::content_lines(text);
    let starts_v2 = lines
        .first()
        .is_some_and(|(_, l)| l.to_ascii_lowercase().starts_with("[version]"));
    if starts_v2 {
        v2::parse(&lines, file, ports_from_name(file).ok().flatten())
    } else {
        let ports = match ports_from_name(file) {
            Ok(Some(ports)) => ports,
            Ok(None) => return Err(TouchstoneError::whole(
                file,
                "cannot tell the port count: a Touchstone 1.x file is named .s1p (one-port) or \
                     .s2p (two-port), and a 2.0 file starts with [Version] 2.0",
            )),
            Err(message) => return Err(TouchstoneError::whole(file, message)),
        };
        v1::parse(&lines, file, ports)
    }
}

/// The port count a `.sNp` name states: `Ok(None)` for another extension, an error for N other
/// than 1 or 2.
fn ports_from_name(file: &str) -> Result<Option<usize>, String> {
    let lower = file.to_ascii_lowercase();
    let Some(ext) = lower.rsplit_once('.').map(|(_, e)| e) else {
        return Ok(None);
    };
    let Some(digits) = ext.strip_prefix('s').and_then(|e| e.strip_suffix('p')) else {
        return Ok(None);
    };
    match digits.parse::<usize>() {
        Ok(n @ (1 | 2)) => Ok(Some(n)),
        Ok(n) => Err(format!(
            "a {n}-port file: only one-port (.s1p) and two-port (.s2p) files are read; export the \
             two ports of the path the drive signal takes"
        )),
        Err(_) => Ok(None),
    }
}

/// Refers a one-port's reflection coefficient measured against `reference_ohms` to 50 ohm.
fn renormalise_one_port(gamma: Complex, reference_ohms: f64) -> Complex {
    let rho = rho(reference_ohms);
    (gamma - rho) / (Complex::new(1.0, 0.0) - rho * gamma)
}

fn rho(reference_ohms: f64) -> f64 {
    (REFERENCE_IMPEDANCE_OHMS - reference_ohms) / (REFERENCE_IMPEDANCE_OHMS + reference_ohms)
}

/// Refers a two-port's S-matrix measured against `reference_ohms` at both ports to 50 ohm:
/// S' = (S - rho I)(I - rho S)^-1. `None` when I - rho S is singular.
fn renormalise_two_port(s: TwoPort, reference_ohms: f64) -> Option<TwoPort> {
    let rho = rho(reference_ohms);
    let one = Complex::new(1.0, 0.0);
    // M = I - rho S and its inverse.
    let (m11, m12, m21, m22) = (
        one - rho * s.s11,
        -rho * s.s12,
        -rho * s.s21,
        one - rho * s.s22,
    );
    let det = m11 * m22 - m12 * m21;
    if det.norm() < 1e-12 || !det.is_finite() {
        return None;
    }
    let (i11, i12, i21, i22) = (m22 / det, -m12 / det, -m21 / det, m11 / det);
    // N = S - rho I.
    let (n11, n12, n21, n22) = (s.s11 - rho, s.s12, s.s21, s.s22 - rho);
    Some(TwoPort {
        s11: n11 * i11 + n12 * i21,
        s12: n11 * i12 + n12 * i22,
        s21: n21 * i11 + n22 * i21,
        s22: n21 * i12 + n22 * i22,
    })
}

/// Puts the parsed records into a network, renormalising to 50 ohm when the reference differs
/// (`data` already holds S11 or S11, S21, S12, S22 per frequency, whatever the file's order).
pub(crate) fn build(
    file: &str,
    version: Version,
    frequencies: Vec<Hz>,
    data: NetworkData,
    reference_ohms: f64,
    mut notes: Vec<String>,
) -> Result<Touchstone, TouchstoneError> {
    let data = if reference_ohms == REFERENCE_IMPEDANCE_OHMS {
        data
    } else {
        notes.push(format!(
            "measured against {reference_ohms} ohm; renormalised to {REFERENCE_IMPEDANCE_OHMS} ohm"
        ));
        match data {
            NetworkData::OnePort(gammas) => NetworkData::OnePort(
                gammas
                    .into_iter()
                    .map(|g| renormalise_one_port(g, reference_ohms))
                    .collect(),
            ),
            NetworkData::TwoPort(rows) => {
                let mut out = Vec::with_capacity(rows.len());
                for (s, f) in rows.into_iter().zip(&frequencies) {
                    out.push(renormalise_two_port(s, reference_ohms).ok_or_else(|| {
                        TouchstoneError::whole(
                            file,
                            format!(
                                "at {} the S-matrix cannot be renormalised from {reference_ohms} \
                                 to 50 ohm (I - rho S is singular); export it at 50 ohm",
                                f
                            ),
                        )
                    })?);
                }
                NetworkData::TwoPort(out)
            }
        }
    };
    Ok(Touchstone {
        file: file.to_string(),
        version,
        frequencies,
        data,
        notes,
    })
}

#[cfg(test)]
mod tests;
