//! Optical wavelength and frequency, in vacuum or in standard air.
//!
//! Some optical analyzers set and report their axis in wavelength (metres) rather than in
//! frequency, and many report the wavelength **in air**. Halfwave works in optical frequency,
//! so such an axis is converted point by point: f = c / (n(lambda) * lambda_air), where n is the
//! refractive index of the medium (1 for vacuum).
//!
//! Air is taken as **standard air** (dry, 15 °C, 101 325 Pa, 0.03 % CO2) with the dispersion
//! formula of B. Edlén, "The refractive index of air", Metrologia 2(2), 71–80 (1966):
//!
//! (n_s − 1) × 10^8 = 8342.13 + 2 406 030 / (130 − σ²) + 15 997 / (38.9 − σ²),
//!
//! σ the vacuum wavenumber in µm⁻¹. Near 1550 nm, n_s − 1 ≈ 2.73 × 10⁻⁴, so reading an air
//! wavelength as if it were a vacuum one would put the axis 53 GHz off and scale every line
//! spacing by 2.7 × 10⁻⁴. Laboratory air (say 22 °C) differs from standard air by about 10⁻⁵ in
//! n: 2 GHz in absolute frequency and 10⁻⁵ of a line spacing, far below what V_pi needs.

use crate::SPEED_OF_LIGHT_M_PER_S;
use serde::{Deserialize, Serialize};

/// The medium an instrument's wavelengths are stated in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Medium {
    /// Vacuum wavelengths: f = c / lambda.
    #[default]
    Vacuum,
    /// Wavelengths in standard air (Edlén 1966): f = c / (n_s lambda). Also spelt `air`.
    #[serde(alias = "air")]
    StandardAir,
}

impl std::fmt::Display for Medium {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Medium::Vacuum => "vacuum",
            Medium::StandardAir => "standard air (Edlén 1966)",
        })
    }
}

/// Refractive index of standard air at the **vacuum** wavelength `vacuum_m` (metres), by
/// Edlén's 1966 formula (see the module comment). Valid from about 200 nm to 2 µm, the range
/// the formula was fitted over; outside it the value is an extrapolation.
pub fn standard_air_index(vacuum_m: f64) -> f64 {
    let sigma = 1e-6 / vacuum_m; // µm⁻¹
    let s2 = sigma * sigma;
    1.0 + (8342.13 + 2_406_030.0 / (130.0 - s2) + 15_997.0 / (38.9 - s2)) * 1e-8
}

impl Medium {
    /// The refractive index of this medium for light of vacuum wavelength `vacuum_m`.
    pub fn index_at_vacuum_wavelength(self, vacuum_m: f64) -> f64 {
        match self {
            Medium::Vacuum => 1.0,
            Medium::StandardAir => standard_air_index(vacuum_m),
        }
    }

    /// The vacuum wavelength of light whose wavelength in this medium is `medium_m`:
    /// lambda_vac = n(lambda_vac) * lambda_medium, solved by fixed-point iteration (n depends
    /// on lambda only through the dispersion term, so three steps reach 1e-15).
    pub fn vacuum_wavelength(self, medium_m: f64) -> f64 {
        match self {
            Medium::Vacuum => medium_m,
            Medium::StandardAir => {
                let mut vacuum = medium_m;
                for _ in 0..4 {
                    vacuum = standard_air_index(vacuum) * medium_m;
                }
                vacuum
            }
        }
    }

    /// The optical frequency of light whose wavelength in this medium is `medium_m` metres.
    pub fn frequency_hz(self, medium_m: f64) -> f64 {
        SPEED_OF_LIGHT_M_PER_S / self.vacuum_wavelength(medium_m)
    }

    /// The wavelength in this medium, in metres, of light of optical frequency `frequency_hz`.
    pub fn wavelength_m(self, frequency_hz: f64) -> f64 {
        let vacuum = SPEED_OF_LIGHT_M_PER_S / frequency_hz;
        vacuum / self.index_at_vacuum_wavelength(vacuum)
    }

    /// d(frequency)/d(wavelength in the medium) magnitude at `frequency_hz`, in Hz per metre:
    /// converts a small wavelength interval (a resolution bandwidth, a span) to hertz and back.
    /// Taken as the exact difference over ±1 pm so the dispersion term is included.
    pub fn hz_per_metre(self, frequency_hz: f64) -> f64 {
        let l = self.wavelength_m(frequency_hz);
        let h = 1e-12;
        (self.frequency_hz(l - h) - self.frequency_hz(l + h)) / (2.0 * h)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn standard_air_agrees_with_published_air_and_vacuum_wavelengths() {
        // Sodium D lines as the NIST Atomic Spectra Database lists them, air and vacuum
        // wavelengths in nm (values from memory): D2 588.9950 / 589.1583, D1 589.5924 /
        // 589.7558. NIST converts with a formula for standard air of its own choosing, so
        // agreement to 0.2 pm (3e-7 relative) is what two good formulas give.
        for (air_nm, vacuum_nm) in [(588.9950, 589.1583), (589.5924, 589.7558)] {
            let got = Medium::StandardAir.vacuum_wavelength(air_nm * 1e-9) * 1e9;
            assert!(
                (got - vacuum_nm).abs() < 2e-4,
                "{air_nm} nm air -> {got} nm vacuum"
            );
        }
        // The iodine-stabilised helium-neon line: 632.9913 nm in vacuum, 632.816 nm in
        // standard air, as commonly quoted (common practice; from memory).
        let air = Medium::StandardAir.wavelength_m(SPEED_OF_LIGHT_M_PER_S / 632.9913e-9) * 1e9;
        assert!((air - 632.816).abs() < 1e-3, "{air}");
        // Edlén 1966 at 1550 nm: n − 1 = 2.73e-4 (the telecom figure, common practice).
        let n = standard_air_index(1550e-9);
        assert!((n - 1.0 - 2.73e-4).abs() < 0.01e-4, "{n}");
    }

    #[test]
    fn vacuum_is_c_over_lambda_and_conversions_invert() {
        // c = 299 792 458 m/s exactly (SI definition): 1550 nm is 193.414 489 THz.
        let f = Medium::Vacuum.frequency_hz(1550e-9);
        assert!((f - 193.414_489e12).abs() < 1e6, "{f}");
        for medium in [Medium::Vacuum, Medium::StandardAir] {
            for f in [180e12, 193.4e12, 240e12] {
                let back = medium.frequency_hz(medium.wavelength_m(f));
                assert!((back - f).abs() < 1.0, "{medium}: {f} -> {back}");
            }
        }
    }

    #[test]
    fn the_width_conversion_is_the_derivative() {
        // df = c dl / l^2 in vacuum (differentiating f = c / l): 0.1 nm at 1550 nm is 12.48 GHz.
        let f = Medium::Vacuum.frequency_hz(1550e-9);
        let width = Medium::Vacuum.hz_per_metre(f) * 0.1e-9;
        assert!((width - 12.478e9).abs() < 5e6, "{width}");
        // In air the same wavelength interval is a slightly larger frequency interval
        // (wavelengths are shorter by n): ratio n within 1e-5 (dispersion makes up the rest).
        let air = Medium::StandardAir.hz_per_metre(f) * 0.1e-9;
        let ratio = air / width;
        assert!(
            (ratio - standard_air_index(1550e-9)).abs() < 1e-5,
            "{ratio}"
        );
    }
}
