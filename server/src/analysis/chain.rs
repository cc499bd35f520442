//! The drive chain: generator level -> level at the modulator -> peak voltage, and back.
//!
//! The RF generator's level reaches the modulator through cables, attenuators and amplifiers whose
//! net gain changes with frequency. A calibration table of net gain versus frequency, linearly
//! interpolated and held constant beyond its ends, turns one into the other. Levels are converted
//! to peak voltage into the 50 ohm reference impedance with P = V_pk^2 / (2 R).

use super::AnalysisError;
use halfwave_units::{Db, Dbm, Hz, VoltsPeak};
use serde::{Deserialize, Serialize};

/// One calibration entry: the net gain of the chain at one frequency (amplifier gain minus cable
/// and attenuator losses; negative for a lossy chain).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ChainPoint {
    #[serde(rename = "frequency_hz")]
    pub frequency: Hz,
    #[serde(rename = "gain_db")]
    pub gain: Db,
}

/// A calibrated drive chain: net gain versus frequency.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DriveChain {
    points: Vec<ChainPoint>,
}

impl DriveChain {
    /// Builds a chain from calibration points. They must be finite, at distinct non-negative
    /// frequencies, and at least one; they are sorted by frequency here.
    pub fn new(mut points: Vec<ChainPoint>) -> Result<DriveChain, AnalysisError> {
        if points.is_empty() {
            return Err(AnalysisError::BadChainTable(
                "the table is empty; give at least one {frequency_hz, gain_db} entry".into(),
            ));
        }
        for (i, p) in points.iter().enumerate() {
            if !p.frequency.is_finite() || p.frequency.0 < 0.0 {
                return Err(AnalysisError::BadChainTable(format!(
                    "entry {} has frequency {}; frequencies must be finite and not negative",
                    i + 1,
                    p.frequency
                )));
            }
            if !p.gain.is_finite() {
                return Err(AnalysisError::BadChainTable(format!(
                    "entry {} has a gain that is not a finite number",
                    i + 1
                )));
            }
        }
        points.sort_by(|a, b| a.frequency.0.total_cmp(&b.frequency.0));
        if let Some(pair) = points.windows(2).find(|w| w[0].frequency == w[1].frequency) {
            return Err(AnalysisError::BadChainTable(format!(
                "two entries share the frequency {}; keep one gain per frequency",
                pair[0].frequency
            )));
        }
        Ok(DriveChain { points })
    }

    /// A chain with the same loss at every frequency (a positive `loss` lowers the level).
    pub fn flat_loss(loss: Db) -> DriveChain {
        DriveChain {
            points: vec![ChainPoint {
                frequency: Hz(0.0),
                gain: -loss,
            }],
        }
    }

    /// The calibration points, sorted by frequency.
    pub fn points(&self) -> &[ChainPoint] {
        &self.points
    }

    /// Net gain at `f`: linear interpolation between table entries, held constant beyond the ends.
    pub fn gain_at(&self, f: Hz) -> Db {
        let points = &self.points;
        let above = points.partition_point(|p| p.frequency.0 <= f.0);
        match (
            above.checked_sub(1).and_then(|i| points.get(i)),
            points.get(above),
        ) {
            (Some(lo), Some(hi)) => {
                let t = (f.0 - lo.frequency.0) / (hi.frequency.0 - lo.frequency.0);
                Db(lo.gain.0 + t * (hi.gain.0 - lo.gain.0))
            }
            (Some(only), None) | (None, Some(only)) => only.gain,
            (None, None) => Db(0.0),
        }
    }

    /// The level that reaches the modulator when the generator is set to `generator` at `f`.
    pub fn level_at_modulator(&self, f: Hz, generator: Dbm) -> Dbm {
        generator + self.gain_at(f)
    }

    /// The generator level that puts `at_modulator` on the modulator at `f`.
    pub fn generator_level_for(&self, f: Hz, at_modulator: Dbm) -> Dbm {
        at_modulator - self.gain_at(f)
    }
}

/// Modulation index of a peak drive voltage for a modulator of half-wave voltage `v_pi`:
/// beta = pi V_pk / V_pi.
pub fn modulation_index_for(v_peak: VoltsPeak, v_pi: VoltsPeak) -> f64 {
    std::f64::consts::PI * v_peak.0 / v_pi.0
}

/// Peak voltage that gives modulation index `beta` on a modulator of half-wave voltage `v_pi`.
pub fn peak_voltage_for_index(beta: f64, v_pi: VoltsPeak) -> VoltsPeak {
    VoltsPeak(beta * v_pi.0 / std::f64::consts::PI)
}

/// Generator level needed at `f` for modulation index `beta` on a modulator of half-wave voltage
/// `v_pi`; `None` when `beta` or `v_pi` is not positive and finite.
pub fn generator_level_for_index(
    chain: &DriveChain,
    f: Hz,
    beta: f64,
    v_pi: VoltsPeak,
) -> Option<Dbm> {
    let at_modulator = Dbm::from_volts_peak(peak_voltage_for_index(beta, v_pi))?;
    Some(chain.generator_level_for(f, at_modulator))
}

/// Fraction of its input power that a pad of `attenuation` dB turns into heat: 1 - 10^(-A/10).
pub fn pad_dissipated_fraction(attenuation: Db) -> f64 {
    1.0 - 10f64.powf(-attenuation.0 / 10.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol
    }

    #[test]
    fn pad_dissipation_follows_the_decibel_definition() {
        // A pad of A dB passes 10^(-A/10) of its input (definition of the decibel); a 30 dB pad
        // turns 99.9 % into heat, a 3 dB pad about half (domain primer, common practice).
        assert!(close(pad_dissipated_fraction(Db(30.0)), 0.999, 1e-12));
        assert!(close(pad_dissipated_fraction(Db(10.0)), 0.9, 1e-12));
        assert!(close(pad_dissipated_fraction(Db(3.0)), 0.4988, 1e-4));
        assert!(close(pad_dissipated_fraction(Db(0.0)), 0.0, 1e-15));
    }

    #[test]
    fn table_interpolates_linearly_and_holds_at_the_ends() {
        let chain = DriveChain::new(vec![
            ChainPoint {
                frequency: Hz(20e9),
                gain: Db(16.0),
            },
            ChainPoint {
                frequency: Hz(10e9),
                gain: Db(20.0),
            },
        ])
        .unwrap();
        assert_eq!(chain.gain_at(Hz(15e9)), Db(18.0));
        assert_eq!(chain.gain_at(Hz(1e9)), Db(20.0));
        assert_eq!(chain.gain_at(Hz(40e9)), Db(16.0));
        assert_eq!(chain.gain_at(Hz(10e9)), Db(20.0));
        assert_eq!(chain.gain_at(Hz(20e9)), Db(16.0));
        assert_eq!(chain.level_at_modulator(Hz(15e9), Dbm(0.0)), Dbm(18.0));
        assert_eq!(chain.generator_level_for(Hz(15e9), Dbm(18.0)), Dbm(0.0));
    }

    #[test]
    fn flat_loss_lowers_the_level() {
        let chain = DriveChain::flat_loss(Db(6.0));
        assert_eq!(chain.level_at_modulator(Hz(3e9), Dbm(10.0)), Dbm(4.0));
        assert_eq!(chain.generator_level_for(Hz(3e9), Dbm(4.0)), Dbm(10.0));
    }

    #[test]
    fn bad_tables_are_refused() {
        assert!(DriveChain::new(vec![]).is_err());
        let dup = vec![
            ChainPoint {
                frequency: Hz(1e9),
                gain: Db(1.0),
            },
            ChainPoint {
                frequency: Hz(1e9),
                gain: Db(2.0),
            },
        ];
        assert!(
            matches!(DriveChain::new(dup), Err(AnalysisError::BadChainTable(m)) if m.contains("share"))
        );
        let nan = vec![ChainPoint {
            frequency: Hz(1e9),
            gain: Db(f64::NAN),
        }];
        assert!(DriveChain::new(nan).is_err());
    }

    #[test]
    fn inverse_drive_reaches_the_target_index() {
        // beta = pi V_pk / V_pi (domain primer); the level for a target beta, passed forward
        // through the same chain, gives that beta back.
        let chain = DriveChain::flat_loss(Db(3.0));
        let v_pi = VoltsPeak(4.0);
        let f = Hz(10e9);
        let gen = generator_level_for_index(&chain, f, 1.2, v_pi).unwrap();
        let v = chain.level_at_modulator(f, gen).to_volts_peak();
        assert!(close(modulation_index_for(v, v_pi), 1.2, 1e-12));
        assert!(generator_level_for_index(&chain, f, 0.0, v_pi).is_none());
    }
}
