//! The drive chain's gain from Touchstone files: two-ports cascaded in signal order, terminated
//! in the modulator's one-port, as the transducer gain from a matched source.
//!
//! - Cascade of two two-ports A then B (signal-flow reduction; the same result as multiplying
//!   their T- or ABCD-matrices, which the tests check independently):
//!   S21 = A21 B21 / (1 - A22 B11), S12 = A12 B12 / (1 - A22 B11),
//!   S11 = A11 + A12 A21 B11 / (1 - A22 B11), S22 = B22 + B21 B12 A22 / (1 - A22 B11).
//! - Chain gain: transducer gain with a matched source (Gamma_S = 0; the generator's level is
//!   the power it delivers into a matched 50 ohm load):
//!   G_T = |S21|^2 (1 - |Gamma_L|^2) / |1 - S22 Gamma_L|^2 (Pozar, Microwave Engineering, 4th
//!   ed., section 12.1; equation number not quoted, from memory). Without a load file, Gamma_L = 0
//!   and G_T = |S21|^2. The power reaching the modulator is the generator's level plus G_T in dB.
//! - Frequencies: those of the first two-port that lie inside every file's range (no file is
//!   extrapolated; a chain without a common frequency is refused naming the files and ranges).
//!   The other files are interpolated linearly in frequency between their two neighbouring
//!   points, magnitude (linear) and phase separately, the phase unwrapped across that one step
//!   (the step taken as the shorter way round). Real/imaginary interpolation would shrink the
//!   magnitude of a long line between points (|S21| of a lossless line would dip to
//!   cos(dphi/2)); magnitude/phase keeps it. Files must sample phase finer than half a turn per
//!   point, as network analyzer sweeps do (common practice).
//!
//! Pure: parsed files in, gain table out.

use super::chain::ChainPoint;
use super::touchstone::{Complex, NetworkData, Touchstone, TouchstoneError, TwoPort};
use halfwave_units::{Db, Hz};

/// The chain's gain at the common frequencies, with notes for the operator.
#[derive(Debug, Clone, PartialEq)]
pub struct ChainGain {
    pub points: Vec<ChainPoint>,
    /// What was left out or converted (each file's own notes, frequencies outside a range).
    pub notes: Vec<String>,
}

/// Two two-ports in cascade, `a` first (nearer the generator).
pub fn cascade(a: TwoPort, b: TwoPort) -> TwoPort {
    let loop_gain = Complex::new(1.0, 0.0) - a.s22 * b.s11;
    TwoPort {
        s11: a.s11 + a.s12 * a.s21 * b.s11 / loop_gain,
        s21: a.s21 * b.s21 / loop_gain,
        s12: a.s12 * b.s12 / loop_gain,
        s22: b.s22 + b.s21 * b.s12 * a.s22 / loop_gain,
    }
}

/// Transducer power gain from a matched source into a load of reflection coefficient `load`
/// (`None`: matched load), as a power ratio.
pub fn transducer_gain(s: TwoPort, load: Option<Complex>) -> f64 {
    let s21 = s.s21.norm_sqr();
    match load {
        None => s21,
        Some(gamma) => {
            s21 * (1.0 - gamma.norm_sqr()) / (Complex::new(1.0, 0.0) - s.s22 * gamma).norm_sqr()
        }
    }
}

/// Linear interpolation of magnitude and (unwrapped) phase between `lo` and `hi` at fraction `t`.
pub fn interpolate_complex(lo: Complex, hi: Complex, t: f64) -> Complex {
    let magnitude = lo.norm() + t * (hi.norm() - lo.norm());
    let (p0, p1) = (lo.arg(), hi.arg());
    let mut step = p1 - p0;
    // The shorter way round: step in (-pi, pi].
    let turn = std::f64::consts::TAU;
    step -= turn * (step / turn).round();
    if step <= -std::f64::consts::PI {
        step += turn;
    }
    Complex::from_polar(magnitude, p0 + t * step)
}

/// Where `f` falls in `frequencies` (sorted, strictly increasing): the lower index and the
/// fraction towards the next; `None` outside the range.
fn locate(frequencies: &[Hz], f: Hz) -> Option<(usize, f64)> {
    let (first, last) = (frequencies.first()?, frequencies.last()?);
    if f.0 < first.0 || f.0 > last.0 {
        return None;
    }
    let above = frequencies.partition_point(|x| x.0 <= f.0);
    let lo = above.saturating_sub(1);
    if lo + 1 >= frequencies.len() || frequencies[lo].0 == f.0 {
        return Some((lo, 0.0));
    }
    let t = (f.0 - frequencies[lo].0) / (frequencies[lo + 1].0 - frequencies[lo].0);
    Some((lo, t))
}

/// A two-port's S-parameters at `f`, interpolated; `None` outside its range or for a one-port.
pub fn two_port_at(network: &Touchstone, f: Hz) -> Option<TwoPort> {
    let NetworkData::TwoPort(rows) = &network.data else {
        return None;
    };
    let (i, t) = locate(&network.frequencies, f)?;
    if t == 0.0 {
        return rows.get(i).copied();
    }
    let (a, b) = (rows.get(i)?, rows.get(i + 1)?);
    Some(TwoPort {
        s11: interpolate_complex(a.s11, b.s11, t),
        s21: interpolate_complex(a.s21, b.s21, t),
        s12: interpolate_complex(a.s12, b.s12, t),
        s22: interpolate_complex(a.s22, b.s22, t),
    })
}

/// A one-port's reflection coefficient at `f`, interpolated; `None` outside its range or for a
/// two-port.
pub fn one_port_at(network: &Touchstone, f: Hz) -> Option<Complex> {
    let NetworkData::OnePort(gammas) = &network.data else {
        return None;
    };
    let (i, t) = locate(&network.frequencies, f)?;
    if t == 0.0 {
        return gammas.get(i).copied();
    }
    Some(interpolate_complex(*gammas.get(i)?, *gammas.get(i + 1)?, t))
}

fn describe_range(network: &Touchstone) -> String {
    let (lo, hi) = network.range();
    format!("{} covers {} Hz to {} Hz", network.file, lo.0, hi.0)
}

/// The chain's gain: `two_ports` cascaded in order (generator first), terminated in `load`
/// (matched when `None`), at the first two-port's frequencies that every file covers.
pub fn chain_gain(
    two_ports: &[Touchstone],
    load: Option<&Touchstone>,
) -> Result<ChainGain, TouchstoneError> {
    let Some(first) = two_ports.first() else {
        return Err(TouchstoneError::whole(
            "(no file)",
            "give at least one two-port (.s2p) file of the chain",
        ));
    };
    for network in two_ports {
        if network.ports() != 2 {
            return Err(TouchstoneError::whole(
                &network.file,
                "is a one-port; the chain's parts are two-ports (.s2p), and the modulator's \
                 one-port goes with --load",
            ));
        }
    }
    if let Some(load) = load {
        if load.ports() != 1 {
            return Err(TouchstoneError::whole(
                &load.file,
                "is a two-port; the load is the modulator's one-port (.s1p) reflection",
            ));
        }
    }
    let all: Vec<&Touchstone> = two_ports.iter().chain(load).collect();
    let mut notes: Vec<String> = all
        .iter()
        .flat_map(|n| {
            n.notes
                .iter()
                .map(move |note| format!("{}: {note}", n.file))
        })
        .collect();
    let mut frequencies = first.frequencies.clone();
    for network in &all[1..] {
        let (lo, hi) = network.range();
        let before = frequencies.len();
        frequencies.retain(|f| f.0 >= lo.0 && f.0 <= hi.0);
        if frequencies.is_empty() {
            return Err(TouchstoneError::whole(
                &network.file,
                format!(
                    "no common frequency: {}, but {}; measure the parts over the same band (a \
                     file is never extrapolated)",
                    describe_range(network),
                    describe_range(first)
                ),
            ));
        }
        if frequencies.len() < before {
            notes.push(format!(
                "{} of {}'s frequencies lie outside {} Hz to {} Hz ({}) and are left out (no \
                 extrapolation)",
                before - frequencies.len(),
                first.file,
                lo.0,
                hi.0,
                network.file
            ));
        }
    }
    let mut points = Vec::with_capacity(frequencies.len());
    for f in frequencies {
        // Every file covers f: the common grid was cut to each range above.
        let mut total: Option<TwoPort> = None;
        for network in two_ports {
            let s = two_port_at(network, f).ok_or_else(|| {
                TouchstoneError::whole(
                    &network.file,
                    format!("{}; {} Hz is outside", describe_range(network), f.0),
                )
            })?;
            total = Some(match total {
                None => s,
                Some(before) => cascade(before, s),
            });
        }
        let Some(total) = total else { break };
        let gamma = match load {
            Some(load) => Some(one_port_at(load, f).ok_or_else(|| {
                TouchstoneError::whole(
                    &load.file,
                    format!("{}; {} Hz is outside", describe_range(load), f.0),
                )
            })?),
            None => None,
        };
        let gain = transducer_gain(total, gamma);
        let db = Db::from_power_ratio(gain)
            .filter(|g| g.is_finite())
            .ok_or_else(|| {
                TouchstoneError::whole(
                    &first.file,
                    format!(
                        "at {} Hz the chain passes no power (transducer gain {gain}); check the \
                     files' S21",
                        f.0
                    ),
                )
            })?;
        points.push(ChainPoint {
            frequency: f,
            gain: db,
        });
    }
    Ok(ChainGain { points, notes })
}

#[cfg(test)]
mod tests {
    //! Reference values come from published formulas evaluated here, never from the code under
    //! test: a matched attenuator of A dB has S21 = S12 = 10^(-A/20) and S11 = S22 = 0, a
    //! lossless matched line of electrical length theta has S21 = S12 = e^(-j theta) (Pozar,
    //! Microwave Engineering, 4th ed., chapters 2 and 4; common practice), and two-ports in
    //! cascade multiply their ABCD matrices, converted to and from S by Pozar's table 4.2
    //! (from memory; written out below).

    use super::*;
    use crate::analysis::touchstone::{parse, Version};

    fn c(re: f64, im: f64) -> Complex {
        Complex::new(re, im)
    }

    fn pad(db: f64) -> TwoPort {
        let a = c(10f64.powf(-db / 20.0), 0.0);
        TwoPort {
            s11: c(0.0, 0.0),
            s21: a,
            s12: a,
            s22: c(0.0, 0.0),
        }
    }

    fn line(theta: f64) -> TwoPort {
        let t = Complex::from_polar(1.0, -theta);
        TwoPort {
            s11: c(0.0, 0.0),
            s21: t,
            s12: t,
            s22: c(0.0, 0.0),
        }
    }

    /// S -> ABCD for a common real Z0 (Pozar table 4.2).
    fn abcd_from_s(s: TwoPort, z0: f64) -> [[Complex; 2]; 2] {
        let one = c(1.0, 0.0);
        let d = 2.0 * s.s21;
        [
            [
                ((one + s.s11) * (one - s.s22) + s.s12 * s.s21) / d,
                z0 * ((one + s.s11) * (one + s.s22) - s.s12 * s.s21) / d,
            ],
            [
                ((one - s.s11) * (one - s.s22) - s.s12 * s.s21) / (z0 * d),
                ((one - s.s11) * (one + s.s22) + s.s12 * s.s21) / d,
            ],
        ]
    }

    /// ABCD -> S for a common real Z0 (Pozar table 4.2).
    fn s_from_abcd(m: [[Complex; 2]; 2], z0: f64) -> TwoPort {
        let (a, b, cc, d) = (m[0][0], m[0][1], m[1][0], m[1][1]);
        let den = a + b / z0 + cc * z0 + d;
        TwoPort {
            s11: (a + b / z0 - cc * z0 - d) / den,
            s12: 2.0 * (a * d - b * cc) / den,
            s21: 2.0 / den,
            s22: (-a + b / z0 - cc * z0 + d) / den,
        }
    }

    fn mul(x: [[Complex; 2]; 2], y: [[Complex; 2]; 2]) -> [[Complex; 2]; 2] {
        let e = |i: usize, j: usize| x[i][0] * y[0][j] + x[i][1] * y[1][j];
        [[e(0, 0), e(0, 1)], [e(1, 0), e(1, 1)]]
    }

    fn near(a: Complex, b: Complex, tol: f64) {
        assert!((a - b).norm() <= tol, "{a} vs {b}");
    }

    /// A two-port written as a Touchstone 1.x RI file at the given frequencies (GHz).
    fn s2p(name: &str, rows: &[(f64, TwoPort)]) -> Touchstone {
        let mut text = String::from("# GHz S RI R 50\n");
        for (f, s) in rows {
            text.push_str(&format!(
                "{f} {} {} {} {} {} {} {} {}\n",
                s.s11.re, s.s11.im, s.s21.re, s.s21.im, s.s12.re, s.s12.im, s.s22.re, s.s22.im
            ));
        }
        parse(&text, name).unwrap()
    }

    fn s1p(name: &str, rows: &[(f64, Complex)]) -> Touchstone {
        let mut text = String::from("# GHz S RI R 50\n");
        for (f, g) in rows {
            text.push_str(&format!("{f} {} {}\n", g.re, g.im));
        }
        parse(&text, name).unwrap()
    }

    #[test]
    fn matched_attenuators_add_in_decibels() {
        let total = cascade(cascade(pad(3.0), pad(6.0)), pad(10.0));
        near(total.s21, c(10f64.powf(-19.0 / 20.0), 0.0), 1e-15);
        near(total.s11, c(0.0, 0.0), 1e-15);
        let files = [
            s2p("a3.s2p", &[(1.0, pad(3.0)), (2.0, pad(3.0))]),
            s2p("a6.s2p", &[(1.0, pad(6.0)), (2.0, pad(6.0))]),
        ];
        let gain = chain_gain(&files, None).unwrap();
        assert_eq!(gain.points.len(), 2);
        for p in &gain.points {
            assert!((p.gain.0 + 9.0).abs() < 1e-12, "{}", p.gain);
        }
    }

    #[test]
    fn lossless_lines_keep_the_magnitude_and_add_their_phases() {
        let (t1, t2) = (0.7, 2.9);
        let total = cascade(line(t1), line(t2));
        near(total.s21, Complex::from_polar(1.0, -(t1 + t2)), 1e-15);
        near(total.s12, Complex::from_polar(1.0, -(t1 + t2)), 1e-15);
        let files = [
            s2p("l1.s2p", &[(1.0, line(t1))]),
            s2p("l2.s2p", &[(1.0, line(t2))]),
        ];
        let gain = chain_gain(&files, None).unwrap();
        assert!(gain.points[0].gain.0.abs() < 1e-12);
    }

    #[test]
    fn a_mismatched_load_behind_a_matched_pad_loses_one_minus_gamma_squared() {
        // G_T = |S21|^2 (1 - |Gamma_L|^2) / |1 - S22 Gamma_L|^2 with S22 = 0, Gamma_L = 0.2:
        // 10^(-0.3) * 0.96, i.e. -3 dB + 10 log10(0.96) = -3.1773 dB.
        let files = [s2p("a3.s2p", &[(1.0, pad(3.0)), (3.0, pad(3.0))])];
        let load = s1p("mod.s1p", &[(1.0, c(0.2, 0.0)), (3.0, c(0.2, 0.0))]);
        let gain = chain_gain(&files, Some(&load)).unwrap();
        let expected = -3.0 + 10.0 * 0.96f64.log10();
        for p in &gain.points {
            assert!(
                (p.gain.0 - expected).abs() < 1e-12,
                "{} vs {expected}",
                p.gain
            );
        }
        assert!((expected + 3.177_287_669_604_316).abs() < 1e-12);
    }

    fn mismatched_stages() -> (TwoPort, TwoPort) {
        // Two non-reciprocal, mismatched two-ports (an amplifier-like and a cable-like one).
        let a = TwoPort {
            s11: c(0.2, -0.1),
            s21: c(2.5, 1.2),
            s12: c(0.02, 0.01),
            s22: c(-0.3, 0.25),
        };
        let b = TwoPort {
            s11: c(0.15, 0.1),
            s21: c(0.6, -0.5),
            s12: c(0.6, -0.5),
            s22: c(-0.05, 0.2),
        };
        (a, b)
    }

    #[test]
    fn mismatch_between_stages_matches_the_abcd_product() {
        let (a, b) = mismatched_stages();
        let expected = s_from_abcd(mul(abcd_from_s(a, 50.0), abcd_from_s(b, 50.0)), 50.0);
        let got = cascade(a, b);
        near(got.s11, expected.s11, 1e-12);
        near(got.s21, expected.s21, 1e-12);
        near(got.s12, expected.s12, 1e-12);
        near(got.s22, expected.s22, 1e-12);

        // Terminated in a complex load: G_T from the ABCD result and Pozar's formula.
        let gamma = c(0.3, -0.2);
        let g_t = expected.s21.norm_sqr() * (1.0 - gamma.norm_sqr())
            / (c(1.0, 0.0) - expected.s22 * gamma).norm_sqr();
        let files = [s2p("amp.s2p", &[(5.0, a)]), s2p("cable.s2p", &[(5.0, b)])];
        let load = s1p("mod.s1p", &[(4.0, gamma), (6.0, gamma)]);
        let gain = chain_gain(&files, Some(&load)).unwrap();
        assert!((gain.points[0].gain.0 - 10.0 * g_t.log10()).abs() < 1e-10);
        // The direct power balance: power into the load over the available power of a matched
        // source, from the ABCD voltages (V_s = 2 V into a matched source impedance of 50 ohm).
        let m = mul(abcd_from_s(a, 50.0), abcd_from_s(b, 50.0));
        let z_load = 50.0 * (c(1.0, 0.0) + gamma) / (c(1.0, 0.0) - gamma);
        // V1 = A V2 + B I2, I1 = C V2 + D I2, V2 = Z_L I2, V_s = V1 + 50 I1.
        let i2 = c(2.0, 0.0) / (m[0][0] * z_load + m[0][1] + 50.0 * (m[1][0] * z_load + m[1][1]));
        let p_load = 0.5 * i2.norm_sqr() * z_load.re;
        let p_available = 2.0f64.powi(2) / (8.0 * 50.0);
        assert!((p_load / p_available - g_t).abs() < 1e-12 * g_t);
    }

    #[test]
    fn interpolation_follows_magnitude_and_unwrapped_phase() {
        // A lossless line sampled every 90 degrees: half-way between, |S21| stays 1 and the
        // phase is the mean (real/imaginary interpolation would give cos(45 deg) = 0.707).
        let coarse = s2p(
            "line.s2p",
            &[(1.0, line(0.0)), (2.0, line(std::f64::consts::FRAC_PI_2))],
        );
        let mid = two_port_at(&coarse, Hz(1.5e9)).unwrap();
        near(
            mid.s21,
            Complex::from_polar(1.0, -std::f64::consts::FRAC_PI_4),
            1e-12,
        );
        // Across the +-180 degree cut: 170 deg and -170 deg meet at 180 deg, not 0.
        let lo = Complex::from_polar(0.5, 170f64.to_radians());
        let hi = Complex::from_polar(1.0, (-170f64).to_radians());
        near(interpolate_complex(lo, hi, 0.5), c(-0.75, 0.0), 1e-12);
        // Magnitude linear in frequency: a quarter of the way from 0.5 to 1.0 is 0.625.
        near(
            interpolate_complex(c(0.5, 0.0), c(1.0, 0.0), 0.25),
            c(0.625, 0.0),
            1e-15,
        );
        // Exactly on a point: that point.
        near(
            two_port_at(&coarse, Hz(2e9)).unwrap().s21,
            line(std::f64::consts::FRAC_PI_2).s21,
            0.0,
        );
        assert!(two_port_at(&coarse, Hz(2.1e9)).is_none());
    }

    #[test]
    fn the_first_files_frequencies_inside_every_range_are_used() {
        let first = s2p(
            "a.s2p",
            &[
                (1.0, pad(1.0)),
                (2.0, pad(1.0)),
                (3.0, pad(1.0)),
                (4.0, pad(1.0)),
            ],
        );
        // The second file covers 1.5 to 3.5 GHz on its own grid, a 2 dB pad at 1.5 GHz rising
        // to 4 dB at 3.5 GHz; |S21| is interpolated linearly between its points.
        let (s_lo, s_hi) = (pad(2.0), pad(4.0));
        let second = s2p("b.s2p", &[(1.5, s_lo), (3.5, s_hi)]);
        let gain = chain_gain(&[first, second], None).unwrap();
        let f: Vec<f64> = gain.points.iter().map(|p| p.frequency.0).collect();
        assert_eq!(f, vec![2e9, 3e9]);
        for (p, t) in gain.points.iter().zip([0.25, 0.75]) {
            let m = s_lo.s21.re + t * (s_hi.s21.re - s_lo.s21.re);
            let expected = -1.0 + 20.0 * m.log10();
            assert!(
                (p.gain.0 - expected).abs() < 1e-12,
                "{} vs {expected}",
                p.gain
            );
        }
        assert!(
            gain.notes
                .iter()
                .any(|n| n.contains("2 of a.s2p's frequencies") && n.contains("b.s2p")),
            "{:?}",
            gain.notes
        );
    }

    #[test]
    fn no_common_band_and_wrong_port_counts_are_refused_by_file() {
        let low = s2p("low.s2p", &[(1.0, pad(1.0)), (2.0, pad(1.0))]);
        let high = s2p("high.s2p", &[(5.0, pad(1.0)), (6.0, pad(1.0))]);
        let e = chain_gain(&[low.clone(), high], None).unwrap_err();
        assert_eq!(e.file, "high.s2p");
        let text = e.to_string();
        assert!(text.contains("no common frequency"), "{text}");
        assert!(text.contains("5000000000 Hz to 6000000000 Hz"), "{text}");
        assert!(text.contains("never extrapolated"), "{text}");

        let load = s1p("mod.s1p", &[(1.0, c(0.1, 0.0)), (2.0, c(0.1, 0.0))]);
        let e = chain_gain(&[low.clone(), load.clone()], None).unwrap_err();
        assert_eq!(e.file, "mod.s1p");
        assert!(e.to_string().contains("--load"));
        let e = chain_gain(std::slice::from_ref(&low), Some(&low)).unwrap_err();
        assert!(e.to_string().contains("is a two-port"), "{e}");
        assert!(chain_gain(&[], Some(&load)).is_err());

        let dead = s2p(
            "open.s2p",
            &[
                (1.0, pad(1.0)),
                (
                    2.0,
                    TwoPort {
                        s21: c(0.0, 0.0),
                        ..pad(1.0)
                    },
                ),
            ],
        );
        let e = chain_gain(&[dead], None).unwrap_err();
        assert!(e.to_string().contains("passes no power"), "{e}");
        assert_eq!(low.version, Version::V1);
    }
}
