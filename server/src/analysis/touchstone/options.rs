//! The option line `# <unit> <parameter> <format> R <ohms>`: fields in any order, any case, each
//! at most once; omitted fields take the Touchstone defaults (GHz, S, MA, R 50; from memory of
//! the 1.1 specification, which 2.0 keeps).

use super::Complex;

/// How the two numbers of each parameter are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Real and imaginary part.
    RealImaginary,
    /// Linear magnitude and angle in degrees.
    MagnitudeAngle,
    /// 20 log10 of the magnitude and angle in degrees.
    DecibelAngle,
}

impl Format {
    /// The complex number the pair `(a, b)` stands for.
    pub fn complex(self, a: f64, b: f64) -> Complex {
        match self {
            Format::RealImaginary => Complex::new(a, b),
            Format::MagnitudeAngle => Complex::from_polar(a, b.to_radians()),
            Format::DecibelAngle => Complex::from_polar(10f64.powf(a / 20.0), b.to_radians()),
        }
    }
}

/// The option line's settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Options {
    /// Hertz per frequency unit of the file.
    pub hz_per_unit: f64,
    pub format: Format,
    /// `R`'s value, if the line gives one.
    pub reference_ohms: Option<f64>,
}

/// Reads the option line (without its `#`); the error says which field is wrong.
pub fn parse_option_line(rest: &str) -> Result<Options, String> {
    let mut unit: Option<f64> = None;
    let mut parameter = false;
    let mut format: Option<Format> = None;
    let mut reference: Option<f64> = None;
    let mut tokens = rest.split_whitespace();
    while let Some(token) = tokens.next() {
        let upper = token.to_ascii_uppercase();
        let set_unit = |u: &mut Option<f64>, v: f64| {
            if u.replace(v).is_some() {
                Err(format!(
                    "the option line names the frequency unit twice ({token:?})"
                ))
            } else {
                Ok(())
            }
        };
        match upper.as_str() {
            "HZ" => set_unit(&mut unit, 1.0)?,
            "KHZ" => set_unit(&mut unit, 1e3)?,
            "MHZ" => set_unit(&mut unit, 1e6)?,
            "GHZ" => set_unit(&mut unit, 1e9)?,
            "S" => {
                if parameter {
                    return Err("the option line names the parameter twice".into());
                }
                parameter = true;
            }
            "Y" | "Z" | "H" | "G" => {
                let what = match upper.as_str() {
                    "Y" => "admittance (Y)",
                    "Z" => "impedance (Z)",
                    "H" => "hybrid-h (H)",
                    _ => "hybrid-g (G)",
                };
                return Err(format!(
                    "{what} parameters are not read; only scattering (S) parameters are: \
                     export the file as S-parameters"
                ));
            }
            "RI" | "MA" | "DB" => {
                let f = match upper.as_str() {
                    "RI" => Format::RealImaginary,
                    "MA" => Format::MagnitudeAngle,
                    _ => Format::DecibelAngle,
                };
                if format.replace(f).is_some() {
                    return Err("the option line names the data format twice".into());
                }
            }
            "R" => {
                let value = tokens.next().ok_or(
                    "`R` on the option line has no value; give the reference impedance in ohms, e.g. `R 50`",
                )?;
                let ohms: f64 = value
                    .parse()
                    .ok()
                    .filter(|v: &f64| v.is_finite() && *v > 0.0)
                    .ok_or_else(|| {
                        format!(
                            "the reference impedance {value:?} is not a positive number of ohms"
                        )
                    })?;
                if reference.replace(ohms).is_some() {
                    return Err("the option line gives `R` twice".into());
                }
            }
            _ => {
                return Err(format!(
                    "unknown option {token:?}: the option line holds a frequency unit (Hz, kHz, \
                     MHz, GHz), the parameter (S), a format (RI, MA, DB) and `R <ohms>`"
                ))
            }
        }
    }
    Ok(Options {
        hz_per_unit: unit.unwrap_or(1e9),
        format: format.unwrap_or(Format::MagnitudeAngle),
        reference_ohms: reference,
    })
}
