//! The drive chain's gain at one frequency from power-sensor readings, with its standard
//! uncertainty (GUM, JCGM 100:2008). Pure: readings in, a gain and its budget out.
//!
//! gain = mean over the readings of (sensor reading - generator level read back), in dB. The
//! readings are corrected by the sensor's calibration factor at this frequency (the engine tells
//! the sensor the frequency first). Three uncorrelated inputs, in dB:
//! - the sensor's specification: a stated +/- a % of the reading (its data sheet's accuracy,
//!   calibration factor included), a rectangular distribution (GUM 4.3.7): limit
//!   10 log10(1 + a/100) dB, standard uncertainty limit / sqrt(3);
//! - mismatch between the chain's output (|Gamma_s|) and the sensor (|Gamma_l|): the reading is
//!   off by -10 log10|1 - Gamma_s Gamma_l|^2, whose limits are 20 log10(1 +/- |Gamma_s||Gamma_l|)
//!   dB for an unknown phase; the phase is unknown and the error U-shaped, standard uncertainty
//!   the larger limit / sqrt(2) (the standard treatment of mismatch, e.g. EA-4/02 M:2013 and UKAS
//!   M3003, which use the divisor sqrt(2) for it; from memory);
//! - repeatability (Type A, GUM 4.2): the experimental standard deviation of the readings' gains
//!   divided by sqrt(n), the standard deviation of their mean (GUM 4.2.3).
//!
//! Combined in quadrature (GUM 5.1.2); the standard uncertainty (k = 1) is what the chain table
//! stores in `gain_uncertainty_db`, and V_pi's budget expands later.

use halfwave_units::{Db, Dbm};
use serde::{Deserialize, Serialize};

/// The stated figures the Type B terms come from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SensorFigures {
    /// The sensor's accuracy, +/- percent of the reading.
    pub accuracy_percent: f64,
    /// |Gamma_l| of the sensor's input.
    pub sensor_reflection: f64,
    /// |Gamma_s| of the chain's output.
    pub source_reflection: f64,
}

/// One reading: the generator's read-back level and what the sensor showed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SensorReading {
    pub generator_level: Dbm,
    pub reading: Dbm,
}

/// The gain at one frequency and where its uncertainty comes from, all in dB.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct GainEstimate {
    pub gain_db: f64,
    pub readings: usize,
    /// Experimental standard deviation of one reading's gain.
    pub reading_standard_deviation_db: f64,
    /// Standard uncertainty of the mean (Type A).
    pub repeatability_db: f64,
    /// Standard uncertainty from the sensor's specification (Type B, rectangular).
    pub sensor_specification_db: f64,
    /// The mismatch limits, 20 log10(1 + |Gs||Gl|) and 20 log10(1 - |Gs||Gl|).
    pub mismatch_limit_high_db: f64,
    pub mismatch_limit_low_db: f64,
    /// Standard uncertainty from mismatch (Type B, U-shaped).
    pub mismatch_db: f64,
    /// The three combined in quadrature (k = 1).
    pub standard_uncertainty_db: f64,
}

/// Why no gain could be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum GainError {
    #[error("at least two readings are needed for their repeatability; got {0}")]
    TooFewReadings(usize),
    #[error("{0} is not usable: {1}")]
    BadFigure(&'static str, String),
    #[error("a reading or level is not a finite number")]
    NotFinite,
}

/// The mismatch limits in dB for reflection magnitudes `source` and `load`:
/// (20 log10(1 + |Gs||Gl|), 20 log10(1 - |Gs||Gl|)).
pub fn mismatch_limits_db(source: f64, load: f64) -> (f64, f64) {
    let product = source * load;
    (
        20.0 * (1.0 + product).log10(),
        20.0 * (1.0 - product).log10(),
    )
}

/// The gain and its uncertainty from the readings at one frequency (see the module docs).
pub fn gain_from_readings(
    readings: &[SensorReading],
    figures: SensorFigures,
) -> Result<GainEstimate, GainError> {
    let n = readings.len();
    if n < 2 {
        return Err(GainError::TooFewReadings(n));
    }
    if !(figures.accuracy_percent.is_finite() && (0.0..=50.0).contains(&figures.accuracy_percent)) {
        return Err(GainError::BadFigure(
            "sensor_accuracy_percent",
            format!("{} is not from 0 to 50", figures.accuracy_percent),
        ));
    }
    for (name, value) in [
        ("sensor_reflection_coefficient", figures.sensor_reflection),
        ("source_reflection_coefficient", figures.source_reflection),
    ] {
        if !(value.is_finite() && (0.0..1.0).contains(&value)) {
            return Err(GainError::BadFigure(
                name,
                format!("{value} is not from 0 up to 1"),
            ));
        }
    }
    let gains: Vec<f64> = readings
        .iter()
        .map(|r| (r.reading - r.generator_level).value())
        .collect();
    if gains.iter().any(|g| !g.is_finite()) {
        return Err(GainError::NotFinite);
    }
    let mean = gains.iter().sum::<f64>() / n as f64;
    let variance = gains.iter().map(|g| (g - mean).powi(2)).sum::<f64>() / (n - 1) as f64;
    let deviation = variance.sqrt();
    let repeatability = deviation / (n as f64).sqrt();
    let specification = 10.0 * (1.0 + figures.accuracy_percent / 100.0).log10() / 3f64.sqrt();
    let (high, low) = mismatch_limits_db(figures.source_reflection, figures.sensor_reflection);
    let mismatch = high.abs().max(low.abs()) / 2f64.sqrt();
    let combined = (repeatability.powi(2) + specification.powi(2) + mismatch.powi(2)).sqrt();
    Ok(GainEstimate {
        gain_db: mean,
        readings: n,
        reading_standard_deviation_db: deviation,
        repeatability_db: repeatability,
        sensor_specification_db: specification,
        mismatch_limit_high_db: high,
        mismatch_limit_low_db: low,
        mismatch_db: mismatch,
        standard_uncertainty_db: combined,
    })
}

/// The gain as a [`Db`].
impl GainEstimate {
    pub fn gain(&self) -> Db {
        Db(self.gain_db)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn reading(level: f64, shown: f64) -> SensorReading {
        SensorReading {
            generator_level: Dbm(level),
            reading: Dbm(shown),
        }
    }

    #[test]
    fn mismatch_limits_match_the_published_values() {
        // Mismatch uncertainty tables (e.g. the VSWR tables of RF measurement handbooks; from
        // memory): VSWR 1.5 (|G| = 0.2) against VSWR 1.22 (|G| = 0.1) gives +0.172 / -0.175 dB.
        let (high, low) = mismatch_limits_db(0.2, 0.1);
        assert!((high - 0.1720).abs() < 5e-4, "{high}");
        assert!((low - -0.1755).abs() < 5e-4, "{low}");
        // VSWR 2.0 (|G| = 1/3) against itself: 20 log10(1 +/- 1/9) = +0.915 / -1.023 dB.
        let (high, low) = mismatch_limits_db(1.0 / 3.0, 1.0 / 3.0);
        assert!((high - 0.9151).abs() < 5e-4, "{high}");
        assert!((low - -1.0231).abs() < 5e-4, "{low}");
    }

    #[test]
    fn the_budget_combines_the_three_terms() {
        // Gains -3.0, -3.2, -3.1, -3.3, -2.9 dB: mean -3.1, sample standard deviation
        // sqrt(0.1 / 4) = 0.158 (by hand), of the mean 0.0707.
        let readings = [
            reading(0.0, -3.0),
            reading(0.0, -3.2),
            reading(5.0, 1.9),
            reading(5.0, 1.7),
            reading(5.0, 2.1),
        ];
        let figures = SensorFigures {
            accuracy_percent: 3.0,
            sensor_reflection: 0.1,
            source_reflection: 0.2,
        };
        let e = gain_from_readings(&readings, figures).unwrap();
        assert!((e.gain_db - -3.1).abs() < 1e-12);
        assert!((e.reading_standard_deviation_db - 0.158_113_9).abs() < 1e-6);
        assert!((e.repeatability_db - 0.070_710_7).abs() < 1e-6);
        // 10 log10(1.03) = 0.12837 dB, / sqrt(3) = 0.07412 (GUM 4.3.7).
        assert!((e.sensor_specification_db - 0.074_116).abs() < 1e-5);
        // 0.1755 / sqrt(2) = 0.1241 (U-shaped).
        assert!((e.mismatch_db - 0.124_10).abs() < 1e-4);
        let combined = (0.070_710_7f64.powi(2) + 0.074_116f64.powi(2) + 0.124_10f64.powi(2)).sqrt();
        assert!((e.standard_uncertainty_db - combined).abs() < 1e-4);
    }

    #[test]
    fn unusable_inputs_are_named() {
        let figures = SensorFigures {
            accuracy_percent: 3.0,
            sensor_reflection: 0.1,
            source_reflection: 0.1,
        };
        assert_eq!(
            gain_from_readings(&[reading(0.0, -1.0)], figures),
            Err(GainError::TooFewReadings(1))
        );
        let bad = SensorFigures {
            source_reflection: 1.0,
            ..figures
        };
        let err = gain_from_readings(&[reading(0.0, -1.0), reading(0.0, -1.0)], bad).unwrap_err();
        assert!(
            err.to_string().contains("source_reflection_coefficient"),
            "{err}"
        );
        let err =
            gain_from_readings(&[reading(0.0, f64::NAN), reading(0.0, -1.0)], figures).unwrap_err();
        assert_eq!(err, GainError::NotFinite);
    }
}
