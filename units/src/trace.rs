//! The spectrum trace: what an analyzer returns and what the analysis reads.
//!
//! It lives beside the unit types because it is the one value that crosses from the drivers to
//! the analysis, and neither should depend on the other for it. The axis is kept as plain `f64`
//! vectors (hertz and dBm, named in the fields) so that the analysis can run over 10,001 points
//! without conversions; [`Trace::new`] proves the shape once so that later code need not.

use crate::Hz;
use serde::{Deserialize, Serialize};

/// Why a trace was refused.
#[derive(Debug, Clone, PartialEq)]
pub enum TraceError {
    /// The frequency and power columns have different lengths.
    LengthMismatch { frequencies: usize, powers: usize },
    /// Fewer points than any analysis can use.
    TooShort { points: usize, minimum: usize },
    /// A value is NaN or infinite (index of the point, which column).
    NotFinite { index: usize, column: &'static str },
    /// The frequency axis does not strictly increase at this index.
    NotIncreasing { index: usize },
}

impl std::fmt::Display for TraceError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            TraceError::LengthMismatch { frequencies, powers } => write!(
                f,
                "the trace has {frequencies} frequencies but {powers} power values; both columns must have one value per point"
            ),
            TraceError::TooShort { points, minimum } => write!(
                f,
                "the trace has {points} points; at least {minimum} are needed"
            ),
            TraceError::NotFinite { index, column } => write!(
                f,
                "point {index} has a {column} that is not a finite number"
            ),
            TraceError::NotIncreasing { index } => write!(
                f,
                "the frequency axis must strictly increase, but point {index} is not above the one before it"
            ),
        }
    }
}

impl std::error::Error for TraceError {}

/// One analyzer sweep: frequency axis in hertz (optical frequency, absolute or relative to any
/// fixed origin), power in dBm, and the resolution bandwidth when the instrument reported it.
///
/// Deserialising goes through [`Trace::new`], so a trace read from JSON is checked like any other.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "TraceFields")]
pub struct Trace {
    frequency_hz: Vec<f64>,
    power_dbm: Vec<f64>,
    resolution_bandwidth_hz: Option<Hz>,
}

/// A trace's fields as serialised, before [`Trace::new`] has checked them.
#[derive(Deserialize)]
struct TraceFields {
    frequency_hz: Vec<f64>,
    power_dbm: Vec<f64>,
    resolution_bandwidth_hz: Option<Hz>,
}

impl TryFrom<TraceFields> for Trace {
    type Error = TraceError;

    fn try_from(fields: TraceFields) -> Result<Trace, TraceError> {
        Trace::new(
            fields.frequency_hz,
            fields.power_dbm,
            fields.resolution_bandwidth_hz,
        )
    }
}

impl Trace {
    /// The fewest points a trace may have.
    pub const MIN_POINTS: usize = 3;

    /// The most points the daemon keeps per stored trace (2^24 = 16,777,216; analyzers offer at
    /// most a few hundred thousand): the store's trace codec refuses more, and an analyzer
    /// profile may not allow more. Not checked by [`Trace::new`].
    pub const MAX_STORED_POINTS: usize = 1 << 24;

    /// Builds a trace, checking equal lengths, finite values and a strictly increasing axis.
    pub fn new(
        frequency_hz: Vec<f64>,
        power_dbm: Vec<f64>,
        resolution_bandwidth: Option<Hz>,
    ) -> Result<Trace, TraceError> {
        if frequency_hz.len() != power_dbm.len() {
            return Err(TraceError::LengthMismatch {
                frequencies: frequency_hz.len(),
                powers: power_dbm.len(),
            });
        }
        if frequency_hz.len() < Self::MIN_POINTS {
            return Err(TraceError::TooShort {
                points: frequency_hz.len(),
                minimum: Self::MIN_POINTS,
            });
        }
        for (index, (f, p)) in frequency_hz.iter().zip(&power_dbm).enumerate() {
            if !f.is_finite() {
                return Err(TraceError::NotFinite {
                    index,
                    column: "frequency",
                });
            }
            if !p.is_finite() {
                return Err(TraceError::NotFinite {
                    index,
                    column: "power",
                });
            }
            if index > 0 && *f <= frequency_hz[index - 1] {
                return Err(TraceError::NotIncreasing { index });
            }
        }
        Ok(Trace {
            frequency_hz,
            power_dbm,
            resolution_bandwidth_hz: resolution_bandwidth,
        })
    }

    /// Frequencies of the points, in hertz, strictly increasing.
    pub fn frequency_hz(&self) -> &[f64] {
        &self.frequency_hz
    }

    /// Powers of the points, in dBm.
    pub fn power_dbm(&self) -> &[f64] {
        &self.power_dbm
    }

    /// The resolution bandwidth the instrument reported, if any.
    pub fn resolution_bandwidth(&self) -> Option<Hz> {
        self.resolution_bandwidth_hz
    }

    /// Number of points.
    pub fn len(&self) -> usize {
        self.frequency_hz.len()
    }

    /// Always false for a trace built by [`Trace::new`]; present for API symmetry.
    pub fn is_empty(&self) -> bool {
        self.frequency_hz.is_empty()
    }

    /// First and last frequency.
    pub fn span(&self) -> (Hz, Hz) {
        (
            Hz(self.frequency_hz[0]),
            Hz(self.frequency_hz[self.frequency_hz.len() - 1]),
        )
    }

    /// The same trace with the resolution bandwidth set.
    pub fn with_resolution_bandwidth(mut self, rbw: Option<Hz>) -> Trace {
        self.resolution_bandwidth_hz = rbw;
        self
    }

    /// Takes the columns apart (for storage without copying).
    pub fn into_parts(self) -> (Vec<f64>, Vec<f64>, Option<Hz>) {
        (
            self.frequency_hz,
            self.power_dbm,
            self.resolution_bandwidth_hz,
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn deserialising_checks_the_trace_like_new() {
        let good = Trace::new(vec![1.0, 2.0, 3.0], vec![-3.0, 0.0, -3.0], Some(Hz(5e6))).unwrap();
        let text = serde_json::to_string(&good).unwrap();
        assert_eq!(serde_json::from_str::<Trace>(&text).unwrap(), good);
        let uneven = r#"{"frequency_hz":[1,2,3],"power_dbm":[0,0],"resolution_bandwidth_hz":null}"#;
        let err = serde_json::from_str::<Trace>(uneven).unwrap_err();
        assert!(
            err.to_string().contains("3 frequencies but 2 power values"),
            "{err}"
        );
        let backwards =
            r#"{"frequency_hz":[3,2,1],"power_dbm":[0,0,0],"resolution_bandwidth_hz":null}"#;
        let err = serde_json::from_str::<Trace>(backwards).unwrap_err();
        assert!(err.to_string().contains("strictly increase"), "{err}");
    }

    #[test]
    fn refuses_bad_shapes() {
        assert!(matches!(
            Trace::new(vec![1.0, 2.0, 3.0], vec![0.0, 0.0], None),
            Err(TraceError::LengthMismatch { .. })
        ));
        assert!(matches!(
            Trace::new(vec![1.0, 2.0], vec![0.0, 0.0], None),
            Err(TraceError::TooShort { .. })
        ));
        assert!(matches!(
            Trace::new(vec![1.0, 1.0, 3.0], vec![0.0; 3], None),
            Err(TraceError::NotIncreasing { index: 1 })
        ));
        assert!(matches!(
            Trace::new(vec![1.0, 2.0, 3.0], vec![0.0, f64::NAN, 0.0], None),
            Err(TraceError::NotFinite {
                index: 1,
                column: "power"
            })
        ));
        let ok = Trace::new(vec![1.0, 2.0, 3.0], vec![-10.0; 3], Some(Hz(5.0))).unwrap();
        assert_eq!(ok.len(), 3);
        assert_eq!(ok.span(), (Hz(1.0), Hz(3.0)));
    }
}
