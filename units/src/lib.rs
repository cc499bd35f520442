//! Physical-unit newtypes shared by every Halfwave crate.
//!
//! A level in dBm cannot be passed where volts are wanted: each quantity has its own type, and only
//! the operations that make physical sense are defined (a level plus a gain is a level; a level
//! minus a level is a ratio in dB; hertz add to hertz). Every type is a transparent `f64` in serde,
//! so JSON and CSV carry plain numbers and the unit lives in the field name (`frequency_hz`,
//! `level_dbm`, `v_pi_volts`).
//!
//! The [`Trace`] (an analyzer sweep) lives here too: it is the one measured value that crosses
//! from the drivers to the analysis.

#![forbid(unsafe_code)]

pub mod identity;
pub mod trace;
pub mod wavelength;
pub use identity::Identity;
pub use trace::{Trace, TraceError};
pub use wavelength::Medium;

use serde::{Deserialize, Serialize};
use std::fmt;
use std::ops::{Add, Div, Mul, Neg, Sub};

/// Reference impedance of RF drive chains, in ohms (the universal 50 ohm system; common practice).
pub const REFERENCE_IMPEDANCE_OHMS: f64 = 50.0;

/// Speed of light in vacuum, m/s (exact, SI definition).
pub const SPEED_OF_LIGHT_M_PER_S: f64 = 299_792_458.0;

macro_rules! quantity {
    ($(#[$meta:meta])* $name:ident, $suffix:literal) => {
        $(#[$meta])*
        #[derive(Debug, Clone, Copy, PartialEq, PartialOrd, Default, Serialize, Deserialize)]
        #[serde(transparent)]
        pub struct $name(pub f64);

        impl $name {
            /// The bare number, in this type's unit.
            #[inline]
            pub const fn value(self) -> f64 {
                self.0
            }

            /// True when the number is finite (not NaN or infinite).
            #[inline]
            pub fn is_finite(self) -> bool {
                self.0.is_finite()
            }
        }

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                if let Some(precision) = f.precision() {
                    write!(f, "{:.*} {}", precision, self.0, $suffix)
                } else {
                    write!(f, "{} {}", self.0, $suffix)
                }
            }
        }

        impl Neg for $name {
            type Output = $name;
            #[inline]
            fn neg(self) -> $name {
                $name(-self.0)
            }
        }

        impl Mul<f64> for $name {
            type Output = $name;
            #[inline]
            fn mul(self, rhs: f64) -> $name {
                $name(self.0 * rhs)
            }
        }

        impl Div<f64> for $name {
            type Output = $name;
            #[inline]
            fn div(self, rhs: f64) -> $name {
                $name(self.0 / rhs)
            }
        }
    };
}

macro_rules! linear_quantity {
    ($name:ident) => {
        impl Add for $name {
            type Output = $name;
            #[inline]
            fn add(self, rhs: $name) -> $name {
                $name(self.0 + rhs.0)
            }
        }

        impl Sub for $name {
            type Output = $name;
            #[inline]
            fn sub(self, rhs: $name) -> $name {
                $name(self.0 - rhs.0)
            }
        }

        impl Div for $name {
            type Output = f64;
            #[inline]
            fn div(self, rhs: $name) -> f64 {
                self.0 / rhs.0
            }
        }
    };
}

quantity!(
    /// A frequency in hertz (RF drive frequency, optical offset, resolution bandwidth).
    Hz,
    "Hz"
);
linear_quantity!(Hz);

quantity!(
    /// An absolute power level in dBm (decibels relative to one milliwatt).
    Dbm,
    "dBm"
);

quantity!(
    /// A power ratio in decibels (a loss, a gain, an asymmetry).
    Db,
    "dB"
);
linear_quantity!(Db);

quantity!(
    /// A peak (amplitude) voltage in volts: the amplitude of a sine drive, and V_pi, the peak
    /// drive voltage for a phase shift of pi, so that beta = pi V_peak / V_pi.
    ///
    /// Not interchangeable with [`VoltsRms`]: the two types do not add, compare or convert
    /// implicitly, so an rms value cannot be passed where a peak value is wanted. The only
    /// conversions are the sine-wave ones ([`VoltsPeak::to_rms_sine`], [`VoltsRms::to_peak_sine`])
    /// and those from a level into the reference impedance ([`Dbm::to_volts_peak`]).
    ///
    /// ```compile_fail
    /// use halfwave_units::{VoltsPeak, VoltsRms};
    /// // An rms value is not a peak value: this does not compile.
    /// let _sum = VoltsPeak(1.0) + VoltsRms(1.0);
    /// ```
    VoltsPeak,
    "V"
);
linear_quantity!(VoltsPeak);

quantity!(
    /// An rms voltage in volts (what a power into a resistance gives: V_rms = sqrt(P R)). See
    /// [`VoltsPeak`] for why the two are separate types.
    ///
    /// ```compile_fail
    /// use halfwave_units::{VoltsPeak, VoltsRms};
    /// fn modulation_index(v_peak: VoltsPeak, v_pi: VoltsPeak) -> f64 { v_peak / v_pi }
    /// // An rms drive must be converted first: this does not compile.
    /// let _beta = modulation_index(VoltsRms(0.2), VoltsPeak(4.0));
    /// ```
    VoltsRms,
    "V rms"
);
linear_quantity!(VoltsRms);

quantity!(
    /// A duration in seconds.
    Seconds,
    "s"
);
linear_quantity!(Seconds);

quantity!(
    /// A power in watts.
    Watts,
    "W"
);
linear_quantity!(Watts);

quantity!(
    /// An optical wavelength in nanometres.
    Nanometers,
    "nm"
);
linear_quantity!(Nanometers);

impl Hz {
    /// From gigahertz.
    #[inline]
    pub fn from_ghz(ghz: f64) -> Hz {
        Hz(ghz * 1e9)
    }

    /// From megahertz.
    #[inline]
    pub fn from_mhz(mhz: f64) -> Hz {
        Hz(mhz * 1e6)
    }

    /// In gigahertz.
    #[inline]
    pub fn ghz(self) -> f64 {
        self.0 * 1e-9
    }
}

impl Dbm {
    /// The rms voltage of this level into the reference impedance (50 ohm):
    /// V_rms = sqrt(P R).
    #[inline]
    pub fn to_volts_rms(self) -> VoltsRms {
        VoltsRms((self.to_watts().0 * REFERENCE_IMPEDANCE_OHMS).sqrt())
    }

    /// The peak voltage of a sine wave of this level into the reference impedance (50 ohm):
    /// V_peak = sqrt(2) V_rms = sqrt(2 P R).
    #[inline]
    pub fn to_volts_peak(self) -> VoltsPeak {
        self.to_volts_rms().to_peak_sine()
    }

    /// The level of a sine wave of peak voltage `v` into the reference impedance (50 ohm):
    /// P = V_peak^2 / (2 R). `None` unless `v` is positive and finite.
    #[inline]
    pub fn from_volts_peak(v: VoltsPeak) -> Option<Dbm> {
        if !(v.0.is_finite() && v.0 > 0.0) {
            return None;
        }
        Dbm::from_watts(Watts(v.0 * v.0 / (2.0 * REFERENCE_IMPEDANCE_OHMS)))
    }

    /// The power this level stands for: P(W) = 10^((L - 30) / 10).
    #[inline]
    pub fn to_watts(self) -> Watts {
        Watts(10f64.powf((self.0 - 30.0) / 10.0))
    }

    /// The power in milliwatts: 10^(L / 10).
    #[inline]
    pub fn to_milliwatts(self) -> f64 {
        10f64.powf(self.0 / 10.0)
    }

    /// The level of a power in watts; `None` for a power that is not positive.
    #[inline]
    pub fn from_watts(p: Watts) -> Option<Dbm> {
        (p.0 > 0.0).then(|| Dbm(10.0 * p.0.log10() + 30.0))
    }

    /// The level of a power in milliwatts; `None` for a power that is not positive.
    #[inline]
    pub fn from_milliwatts(mw: f64) -> Option<Dbm> {
        (mw > 0.0).then(|| Dbm(10.0 * mw.log10()))
    }
}

/// A level raised by a gain (or lowered by a negative one) is a level.
impl Add<Db> for Dbm {
    type Output = Dbm;
    #[inline]
    fn add(self, rhs: Db) -> Dbm {
        Dbm(self.0 + rhs.0)
    }
}

/// A level lowered by a loss is a level.
impl Sub<Db> for Dbm {
    type Output = Dbm;
    #[inline]
    fn sub(self, rhs: Db) -> Dbm {
        Dbm(self.0 - rhs.0)
    }
}

/// The ratio of two levels is a value in dB.
impl Sub for Dbm {
    type Output = Db;
    #[inline]
    fn sub(self, rhs: Dbm) -> Db {
        Db(self.0 - rhs.0)
    }
}

impl Db {
    /// The linear power ratio: 10^(dB / 10).
    #[inline]
    pub fn power_ratio(self) -> f64 {
        10f64.powf(self.0 / 10.0)
    }

    /// The dB value of a linear power ratio; `None` for a ratio that is not positive.
    #[inline]
    pub fn from_power_ratio(ratio: f64) -> Option<Db> {
        (ratio > 0.0).then(|| Db(10.0 * ratio.log10()))
    }

    /// The dB value of a linear amplitude (voltage) ratio: 20 log10(r).
    #[inline]
    pub fn from_amplitude_ratio(ratio: f64) -> Option<Db> {
        (ratio > 0.0).then(|| Db(20.0 * ratio.log10()))
    }
}

impl VoltsPeak {
    /// The rms value of a sine wave of this amplitude: V_rms = V_peak / sqrt(2). Holds for a
    /// sine only, which is what an RF drive at one frequency is.
    #[inline]
    pub fn to_rms_sine(self) -> VoltsRms {
        VoltsRms(self.0 / std::f64::consts::SQRT_2)
    }
}

impl VoltsRms {
    /// The amplitude of a sine wave of this rms value: V_peak = sqrt(2) V_rms. Holds for a sine
    /// only.
    #[inline]
    pub fn to_peak_sine(self) -> VoltsPeak {
        VoltsPeak(self.0 * std::f64::consts::SQRT_2)
    }
}

impl Nanometers {
    /// The optical frequency of this vacuum wavelength: f = c / lambda.
    #[inline]
    pub fn to_frequency(self) -> Hz {
        Hz(SPEED_OF_LIGHT_M_PER_S / (self.0 * 1e-9))
    }

    /// The frequency width of a small wavelength interval `width` around this wavelength:
    /// df = c * dl / l^2.
    #[inline]
    pub fn frequency_width(self, width: Nanometers) -> Hz {
        let l = self.0 * 1e-9;
        Hz(SPEED_OF_LIGHT_M_PER_S * width.0 * 1e-9 / (l * l))
    }
}

impl Seconds {
    /// As a `std::time::Duration`; negative or non-finite values become zero.
    pub fn to_duration(self) -> std::time::Duration {
        if self.0.is_finite() && self.0 > 0.0 {
            std::time::Duration::from_secs_f64(self.0)
        } else {
            std::time::Duration::ZERO
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zero_dbm_is_one_milliwatt() {
        // Definition of the dBm (common practice).
        assert!((Dbm(0.0).to_watts().0 - 1e-3).abs() < 1e-15);
        assert!((Dbm(30.0).to_watts().0 - 1.0).abs() < 1e-12);
        assert!((Dbm::from_watts(Watts(1e-3)).unwrap().0).abs() < 1e-12);
        assert!(Dbm::from_watts(Watts(0.0)).is_none());
    }

    #[test]
    fn zero_dbm_into_50_ohm_in_rms_and_peak_volts() {
        // 1 mW into 50 ohm: V_rms = sqrt(1e-3 W * 50 ohm) = sqrt(0.05) = 0.2236 V, and for a sine
        // V_peak = sqrt(2) * 0.2236 = 0.3162 V (common practice, computed by hand).
        assert!((Dbm(0.0).to_volts_rms().0 - 0.2236).abs() < 5e-5);
        assert!((Dbm(0.0).to_volts_peak().0 - 0.3162).abs() < 5e-5);
        // 20 dBm = 100 mW: V_rms = sqrt(5) = 2.236 V, V_peak = sqrt(10) = 3.162 V (computed by
        // hand).
        assert!((Dbm(20.0).to_volts_rms().0 - 2.236).abs() < 5e-4);
        assert!((Dbm(20.0).to_volts_peak().0 - 3.162).abs() < 5e-4);
        // Sine-wave rms <-> peak: 2 V rms is 2 sqrt(2) = 2.8284 V peak (common practice,
        // computed by hand).
        assert!((VoltsRms(2.0).to_peak_sine().0 - 2.8284).abs() < 5e-5);
        assert!((VoltsPeak(2.8284).to_rms_sine().0 - 2.0).abs() < 5e-5);
        // Back from a peak voltage: 0.3162 V peak into 50 ohm is 0 dBm (computed by hand).
        assert!(
            Dbm::from_volts_peak(VoltsPeak(0.316_227_766))
                .unwrap()
                .0
                .abs()
                < 1e-8
        );
        assert!(Dbm::from_volts_peak(VoltsPeak(0.0)).is_none());
        assert!(Dbm::from_volts_peak(VoltsPeak(f64::NAN)).is_none());
    }

    #[test]
    fn volts_serialise_as_plain_numbers() {
        // `v_pi_volts` and `v_peak_volts` keep their JSON: a bare number.
        assert_eq!(serde_json::to_string(&VoltsPeak(4.25)).unwrap(), "4.25");
        assert_eq!(serde_json::to_string(&VoltsRms(0.5)).unwrap(), "0.5");
        let back: VoltsPeak = serde_json::from_str("3.5").unwrap();
        assert_eq!(back, VoltsPeak(3.5));
    }

    #[test]
    fn level_arithmetic_keeps_units() {
        let at_modulator = Dbm(10.0) - Db(3.0) + Db(20.0);
        assert_eq!(at_modulator, Dbm(27.0));
        assert_eq!(Dbm(5.0) - Dbm(2.0), Db(3.0));
    }

    #[test]
    fn wavelength_interval_to_frequency_width() {
        // domain primer: 0.02 nm at 1550 nm is about 2.5 GHz (df = c dl / l^2).
        let df = Nanometers(1550.0).frequency_width(Nanometers(0.02));
        assert!((df.ghz() - 2.4957).abs() < 1e-3, "{df}");
    }

    #[test]
    fn serde_is_transparent() {
        assert_eq!(serde_json::to_string(&Hz(1.5e9)).unwrap(), "1500000000.0");
        let back: Dbm = serde_json::from_str("-3.5").unwrap();
        assert_eq!(back, Dbm(-3.5));
    }
}
