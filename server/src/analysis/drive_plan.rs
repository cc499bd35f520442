//! The drive planner's arithmetic: the generator level for a wanted modulation index at one
//! frequency, or the modulation index a given generator level makes, with the uncertainty of
//! each carried from V_pi and the drive chain.
//!
//! beta = pi V_pk / V_pi (the convention of [`super::vpi`]), V_pk from the level at the modulator
//! into 50 ohm and that level from the generator's through the chain's gain, all by the
//! functions of [`super::chain`]. The level needed goes as 20 log10(V_pi) - gain, so a relative
//! standard uncertainty u(V_pi)/V_pi becomes (20 / ln 10) u(V_pi)/V_pi dB, combined in quadrature
//! with the chain gain's standard uncertainty (GUM, JCGM 100:2008, 5.1.2; the two are
//! independent measurements). The same figure, read the other way, is the uncertainty of the
//! modulation index a set level gives: u(beta)/beta = (ln 10 / 20) u_level.

use super::chain::{modulation_index_for, peak_voltage_for_index};
use halfwave_units::{Db, Dbm, VoltsPeak};

/// dB per unit relative change of a voltage: 20 / ln 10.
pub const DB_PER_RELATIVE_VOLTAGE: f64 = 20.0 / std::f64::consts::LN_10;

/// What is asked: the level for an index, or the index of a level.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum DriveTarget {
    /// The generator level that gives this modulation index.
    ModulationIndex(f64),
    /// The modulation index this generator level gives.
    GeneratorLevel(Dbm),
}

/// V_pi and chain gain at the drive frequency, with their standard uncertainties.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DriveInputs {
    pub v_pi: VoltsPeak,
    pub v_pi_uncertainty: VoltsPeak,
    /// Net gain generator -> modulator at the frequency (negative for a loss).
    pub chain_gain: Db,
    pub chain_gain_uncertainty: Db,
}

/// A solved drive.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DriveSolution {
    pub modulation_index: f64,
    pub generator_level: Dbm,
    pub level_at_modulator: Dbm,
    pub v_peak: VoltsPeak,
    /// Standard uncertainty of the generator level that gives `modulation_index`, dB.
    pub level_uncertainty: Db,
    /// Standard uncertainty of the modulation index the generator level gives.
    pub modulation_index_uncertainty: f64,
}

/// Why a drive cannot be solved.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum DriveError {
    #[error("V_pi {0} is not a positive voltage")]
    BadVpi(VoltsPeak),
    #[error("the modulation index {0} is not positive and finite")]
    BadIndex(f64),
    #[error("the generator level {0} is not a finite level")]
    BadLevel(Dbm),
    #[error("the uncertainties must be finite and not negative")]
    BadUncertainty,
}

/// Solves one drive (see the module documentation).
pub fn solve_drive(inputs: &DriveInputs, target: DriveTarget) -> Result<DriveSolution, DriveError> {
    let v_pi = inputs.v_pi;
    if !(v_pi.0.is_finite() && v_pi.0 > 0.0) {
        return Err(DriveError::BadVpi(v_pi));
    }
    let (u_v, u_g) = (inputs.v_pi_uncertainty.0, inputs.chain_gain_uncertainty.0);
    let usable = u_v.is_finite()
        && u_v >= 0.0
        && u_g.is_finite()
        && u_g >= 0.0
        && inputs.chain_gain.0.is_finite();
    if !usable {
        return Err(DriveError::BadUncertainty);
    }
    let (modulation_index, level_at_modulator, v_peak) = match target {
        DriveTarget::ModulationIndex(beta) => {
            if !(beta.is_finite() && beta > 0.0) {
                return Err(DriveError::BadIndex(beta));
            }
            let v_peak = peak_voltage_for_index(beta, v_pi);
            let level = Dbm::from_volts_peak(v_peak).ok_or(DriveError::BadIndex(beta))?;
            (beta, level, v_peak)
        }
        DriveTarget::GeneratorLevel(generator) => {
            if !generator.0.is_finite() {
                return Err(DriveError::BadLevel(generator));
            }
            let level = generator + inputs.chain_gain;
            let v_peak = level.to_volts_peak();
            (modulation_index_for(v_peak, v_pi), level, v_peak)
        }
    };
    let level_uncertainty = (DB_PER_RELATIVE_VOLTAGE * u_v / v_pi.0).hypot(u_g);
    Ok(DriveSolution {
        modulation_index,
        generator_level: level_at_modulator - inputs.chain_gain,
        level_at_modulator,
        v_peak,
        level_uncertainty: Db(level_uncertainty),
        modulation_index_uncertainty: modulation_index * level_uncertainty
            / DB_PER_RELATIVE_VOLTAGE,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn inputs(v_pi: f64, u_v_pi: f64, gain: f64, u_gain: f64) -> DriveInputs {
        DriveInputs {
            v_pi: VoltsPeak(v_pi),
            v_pi_uncertainty: VoltsPeak(u_v_pi),
            chain_gain: Db(gain),
            chain_gain_uncertainty: Db(u_gain),
        }
    }

    #[test]
    fn level_for_an_index_worked_by_hand() {
        // Worked by hand (common practice: P = V_pk^2 / (2 x 50 ohm), beta = pi V_pk / V_pi):
        // V_pi = 4.0 V, beta = 1.2 -> V_pk = 1.2 x 4.0 / pi = 1.52789 V; P = 1.52789^2 / 100 =
        // 23.344 mW = 13.682 dBm at the modulator; through a 3 dB loss the generator gives
        // 16.682 dBm. u(V_pi) = 1 % -> 8.6859 x 0.01 = 0.0869 dB, with 0.1 dB for the chain in
        // quadrature 0.1325 dB; u(beta) = 1.2 x 0.1325 / 8.6859 = 0.0183.
        let s = solve_drive(
            &inputs(4.0, 0.04, -3.0, 0.1),
            DriveTarget::ModulationIndex(1.2),
        )
        .unwrap();
        assert!((s.v_peak.0 - 1.527_89).abs() < 1e-5, "{s:?}");
        assert!((s.level_at_modulator.0 - 13.682).abs() < 1e-3, "{s:?}");
        assert!((s.generator_level.0 - 16.682).abs() < 1e-3, "{s:?}");
        assert!((s.level_uncertainty.0 - 0.1325).abs() < 1e-4, "{s:?}");
        assert!(
            (s.modulation_index_uncertainty - 0.0183).abs() < 1e-4,
            "{s:?}"
        );
    }

    #[test]
    fn index_for_a_level_worked_by_hand() {
        // 0 dBm into 50 ohm is 0.3162 V peak (common practice); a modulator with
        // V_pi = pi x 0.3162 = 0.99346 V reaches beta = 1 with 0 dBm at its input, here a 10 dBm
        // generator through a 10 dB pad.
        let s = solve_drive(
            &inputs(0.993_459, 0.0, -10.0, 0.0),
            DriveTarget::GeneratorLevel(Dbm(10.0)),
        )
        .unwrap();
        assert!((s.v_peak.0 - 0.3162).abs() < 5e-5, "{s:?}");
        assert!((s.modulation_index - 1.0).abs() < 1e-5, "{s:?}");
        assert_eq!(s.level_uncertainty, Db(0.0));
        // And 10 dBm through a 3 dB loss onto V_pi = 4 V: 7 dBm, 0.70795 V peak, beta 0.55602.
        let s = solve_drive(
            &inputs(4.0, 0.0, -3.0, 0.0),
            DriveTarget::GeneratorLevel(Dbm(10.0)),
        )
        .unwrap();
        assert!((s.v_peak.0 - 0.707_95).abs() < 1e-5);
        assert!((s.modulation_index - 0.556_02).abs() < 1e-5);
    }

    #[test]
    fn the_two_directions_invert_each_other() {
        let i = inputs(5.3, 0.05, 18.0, 0.2);
        let forward = solve_drive(&i, DriveTarget::ModulationIndex(2.2)).unwrap();
        let back = solve_drive(&i, DriveTarget::GeneratorLevel(forward.generator_level)).unwrap();
        assert!((back.modulation_index - 2.2).abs() < 1e-12);
        assert_eq!(back.level_uncertainty, forward.level_uncertainty);
    }

    #[test]
    fn nonsense_is_refused() {
        let i = inputs(4.0, 0.0, 0.0, 0.0);
        assert!(solve_drive(&i, DriveTarget::ModulationIndex(0.0)).is_err());
        assert!(solve_drive(&i, DriveTarget::ModulationIndex(f64::NAN)).is_err());
        assert!(solve_drive(&i, DriveTarget::GeneratorLevel(Dbm(f64::INFINITY))).is_err());
        assert!(solve_drive(
            &inputs(0.0, 0.0, 0.0, 0.0),
            DriveTarget::ModulationIndex(1.0)
        )
        .is_err());
        assert!(solve_drive(
            &inputs(4.0, -1.0, 0.0, 0.0),
            DriveTarget::ModulationIndex(1.0)
        )
        .is_err());
    }
}
