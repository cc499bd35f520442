//! Spectrum prediction: the optical comb that a periodic phase drive makes, line by line.
//!
//! Convention: the field leaving the modulator is exp(i (2 pi f_c t + phi(t))) with
//! phi(t) = sum over tones of beta_j sin(h_j 2 pi F t + phase_j), and order n is the line at
//! f_c + n F. Each tone expands by the Jacobi-Anger identity (DLMF 10.12.1)
//! exp(i beta sin theta) = sum_k J_k(beta) e^{i k theta}, so tone j alone puts the complex
//! amplitude J_k(beta_j) e^{i k phase_j} at order k h_j. The product of the tones' factors is the
//! convolution of their line amplitudes, and line n carries |c_n|^2 of the unmodulated carrier's
//! power. A single tone at the fundamental gives the familiar J_n(beta)^2; a generator's second
//! harmonic or any shaped periodic drive is exact too, not a perturbation.
//!
//! Each tone's sum is cut at |k| <= K_j, the first K with
//! 2 sum_{k>K} (beta/2)^k / k! <= [`TONE_TAIL_TOLERANCE`]; since |J_k(x)| <= (x/2)^k / k!
//! (DLMF 10.14.4) this bounds the dropped amplitudes both in sum and in sup norm, and the
//! telescoping product bound gives the error of every line's relative power, reported as
//! [`Prediction::truncation_error_bound`] (about 1e-15; rounding adds a few 1e-16). The Bessel
//! values come from the library routine through [`super::bessel::bessel_j`].

use super::bessel::bessel_j;

/// The most tones one drive may have.
pub const MAX_TONES: usize = 8;
/// The highest harmonic number a tone may have.
pub const MAX_HARMONIC: u32 = 32;
/// The largest modulation index a tone may have (far past any practical drive: a modulator is
/// rarely driven past beta of about 10, common practice).
pub const MAX_MODULATION_INDEX: f64 = 50.0;
/// The largest phase a tone may be given, in degrees either side of zero.
pub const MAX_PHASE_DEG: f64 = 360.0;
/// The most orders either side of the carrier a prediction lists.
pub const MAX_ORDERS: u32 = 1000;
/// The highest modulation frequency accepted (1 THz, as for the V_pi lookups).
pub const MAX_MODULATION_FREQUENCY_HZ: f64 = 1e12;
/// Each tone's dropped Bessel terms sum (in absolute value, both sides) to at most this.
pub const TONE_TAIL_TOLERANCE: f64 = 1e-16;
/// Allowance for rounding in the Bessel values and the convolution, relative to the carrier's
/// power: the Parseval sums of the tests come out within 5e-16 of 1.
pub const ROUNDING_ALLOWANCE: f64 = 1e-15;

/// One sinusoidal component of the phase drive: beta sin(h 2 pi F t + phase).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Tone {
    /// Harmonic number h >= 1 of the modulation frequency.
    pub harmonic: u32,
    /// Peak phase deviation beta, radians.
    pub modulation_index: f64,
    /// Phase, degrees.
    pub phase_deg: f64,
}

/// One predicted line.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PredictedLine {
    /// n: the line sits at f_c + n F.
    pub order: i32,
    /// |c_n|^2: power relative to the unmodulated carrier.
    pub relative_power: f64,
}

impl PredictedLine {
    /// 10 log10 of the relative power; `None` for a line that is exactly absent (no combination
    /// of the tones' orders reaches it).
    pub fn relative_power_db(&self) -> Option<f64> {
        (self.relative_power > 0.0).then(|| 10.0 * self.relative_power.log10())
    }
}

/// The predicted comb for orders -N..=N.
#[derive(Debug, Clone, PartialEq)]
pub struct Prediction {
    /// Ascending in order.
    pub lines: Vec<PredictedLine>,
    /// Bound on the error of each line's relative power from cutting the Bessel sums.
    pub truncation_error_bound: f64,
    /// Relative powers below this (the truncation bound plus [`ROUNDING_ALLOWANCE`]) are not
    /// resolved: such a line is weaker than this, its value says no more.
    pub resolution_floor: f64,
    /// Highest Bessel order kept per tone, in the input's order.
    pub bessel_orders_kept: Vec<u32>,
}

/// An input value that cannot be predicted, named by its field path in the drive JSON.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InvalidDrive {
    /// Dotted path (`tones[1].harmonic`).
    pub field: String,
    pub message: String,
}

/// Checks a drive against the limits above; every problem at once.
pub fn check_drive(modulation_frequency_hz: f64, tones: &[Tone], orders: u32) -> Vec<InvalidDrive> {
    let mut problems = Vec::new();
    let mut bad = |field: String, message: String| problems.push(InvalidDrive { field, message });
    if !(modulation_frequency_hz.is_finite()
        && modulation_frequency_hz > 0.0
        && modulation_frequency_hz <= MAX_MODULATION_FREQUENCY_HZ)
    {
        bad(
            "modulation_frequency_hz".into(),
            format!("{modulation_frequency_hz} is not a frequency in hertz above 0 and at most {MAX_MODULATION_FREQUENCY_HZ:e}"),
        );
    }
    if tones.is_empty() || tones.len() > MAX_TONES {
        bad(
            "tones".into(),
            format!(
                "{} tones given; give 1 to {MAX_TONES} tones {{harmonic, modulation_index, phase_deg}}",
                tones.len()
            ),
        );
    }
    for (i, tone) in tones.iter().enumerate() {
        if !(1..=MAX_HARMONIC).contains(&tone.harmonic) {
            bad(
                format!("tones[{i}].harmonic"),
                format!(
                    "{} is not a harmonic number from 1 (the fundamental) to {MAX_HARMONIC}",
                    tone.harmonic
                ),
            );
        }
        if !(tone.modulation_index.is_finite()
            && (0.0..=MAX_MODULATION_INDEX).contains(&tone.modulation_index))
        {
            bad(
                format!("tones[{i}].modulation_index"),
                format!(
                    "{} is not a modulation index from 0 to {MAX_MODULATION_INDEX} rad (a negative index is the same tone with phase_deg + 180)",
                    tone.modulation_index
                ),
            );
        }
        if !(tone.phase_deg.is_finite() && tone.phase_deg.abs() <= MAX_PHASE_DEG) {
            bad(
                format!("tones[{i}].phase_deg"),
                format!(
                    "{} is not a phase in degrees from -{MAX_PHASE_DEG} to {MAX_PHASE_DEG}",
                    tone.phase_deg
                ),
            );
        }
    }
    if orders > MAX_ORDERS {
        bad(
            "orders".into(),
            format!(
                "{orders} is above {MAX_ORDERS}; ask for fewer orders either side of the carrier"
            ),
        );
    }
    problems
}

/// A complex number, enough for the convolution (the analysis needs no complex library).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
struct Complex {
    re: f64,
    im: f64,
}

impl Complex {
    fn mul_add(self, a: Complex, b: Complex) -> Complex {
        Complex {
            re: self.re + a.re * b.re - a.im * b.im,
            im: self.im + a.re * b.im + a.im * b.re,
        }
    }
    fn norm_sqr(self) -> f64 {
        self.re * self.re + self.im * self.im
    }
}

/// The smallest K with 2 sum_{k>K} (beta/2)^k / k! <= [`TONE_TAIL_TOLERANCE`], and that sum.
/// The terms are summed from far out inwards (where they have long stopped mattering), in logs
/// so that no power or factorial overflows.
fn bessel_cut(beta: f64) -> (u32, f64) {
    if beta == 0.0 {
        return (0, 0.0);
    }
    let ln_half = (beta / 2.0).ln();
    // Past k = beta the terms fall faster than geometrically; 60 more orders past the peak
    // take them below 1e-30 of it for every beta accepted here.
    let last = (beta.ceil() as u32).saturating_mul(3) + 60;
    let mut ln_factorial = Vec::with_capacity(last as usize + 2);
    let mut acc = 0.0;
    ln_factorial.push(0.0);
    for k in 1..=last + 1 {
        acc += f64::from(k).ln();
        ln_factorial.push(acc);
    }
    let term = |k: u32| (f64::from(k) * ln_half - ln_factorial[k as usize]).exp();
    // tail[K] = 2 sum_{k=K+1}^{last+1} term(k), built downwards; beyond `last` the remainder is
    // below the last term (ratio beta/2/(k+1) < 1/2 there), counted once more to be safe.
    let mut tail = 2.0 * 2.0 * term(last + 1);
    let mut cut = (last, tail);
    for k in (0..last).rev() {
        tail += 2.0 * term(k + 1);
        if tail <= TONE_TAIL_TOLERANCE {
            cut = (k, tail);
        } else {
            break;
        }
    }
    cut
}

/// Predicts the relative line powers of orders -`orders`..=`orders`; the input must pass
/// [`check_drive`] (it is checked again here, so a caller that skipped it gets its problems).
pub fn predict_spectrum(
    modulation_frequency_hz: f64,
    tones: &[Tone],
    orders: u32,
) -> Result<Prediction, Vec<InvalidDrive>> {
    let problems = check_drive(modulation_frequency_hz, tones, orders);
    if !problems.is_empty() {
        return Err(problems);
    }
    let n_out = orders as i64;
    let cuts: Vec<(u32, f64)> = tones
        .iter()
        .map(|t| bessel_cut(t.modulation_index))
        .collect();
    let reach: Vec<i64> = tones
        .iter()
        .zip(&cuts)
        .map(|(t, (k, _))| i64::from(*k) * i64::from(t.harmonic))
        .collect();
    // Amplitudes are kept for |n| <= half; past the orders asked for, only what later tones
    // can still bring back inside them is kept.
    let mut half: i64 = 0;
    let mut amplitudes = vec![Complex { re: 1.0, im: 0.0 }];
    let mut remaining: i64 = reach.iter().sum();
    for (j, tone) in tones.iter().enumerate() {
        let (k_max, _) = cuts[j];
        let h = i64::from(tone.harmonic);
        remaining -= reach[j];
        let new_half = (half + reach[j]).min(n_out + remaining);
        let phase = tone.phase_deg.to_radians();
        let factor: Vec<(i64, Complex)> = (-(k_max as i32)..=k_max as i32)
            .map(|k| {
                let j_k = bessel_j(k, tone.modulation_index);
                let angle = f64::from(k) * phase;
                (
                    i64::from(k) * h,
                    Complex {
                        re: j_k * angle.cos(),
                        im: j_k * angle.sin(),
                    },
                )
            })
            .collect();
        let mut next = vec![Complex::default(); (2 * new_half + 1) as usize];
        for (offset, a) in &factor {
            for (i, value) in amplitudes.iter().enumerate() {
                let n = i as i64 - half + offset;
                if n.abs() <= new_half {
                    let slot = &mut next[(n + new_half) as usize];
                    *slot = slot.mul_add(*value, *a);
                }
            }
        }
        amplitudes = next;
        half = new_half;
    }
    let lines = (-n_out..=n_out)
        .map(|n| PredictedLine {
            order: n as i32,
            relative_power: if n.abs() <= half {
                amplitudes[(n + half) as usize].norm_sqr()
            } else {
                0.0
            },
        })
        .collect();
    // ||prod f - prod g||_2 <= sum_j prod_{i<j} (1 + S_i) S_j with S_j each tone's dropped sum
    // (sup norm of the kept part <= 1 + S_i, L2 norm of the dropped part <= S_j); a line's power
    // then moves by at most delta (2 + delta).
    let mut grown = 1.0;
    let mut delta = 0.0;
    for (_, s) in &cuts {
        delta += grown * s;
        grown *= 1.0 + s;
    }
    let truncation_error_bound = delta * (2.0 + delta);
    Ok(Prediction {
        lines,
        truncation_error_bound,
        resolution_floor: truncation_error_bound + ROUNDING_ALLOWANCE,
        bessel_orders_kept: cuts.iter().map(|c| c.0).collect(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rustfft::{num_complex::Complex as FftComplex, FftPlanner};
    use std::f64::consts::PI;

    fn tone(harmonic: u32, modulation_index: f64, phase_deg: f64) -> Tone {
        Tone {
            harmonic,
            modulation_index,
            phase_deg,
        }
    }

    fn power(p: &Prediction, order: i32) -> f64 {
        p.lines
            .iter()
            .find(|l| l.order == order)
            .map(|l| l.relative_power)
            .unwrap()
    }

    #[test]
    fn a_single_tone_gives_bessel_squares_from_the_handbook() {
        // J_0, J_1, J_2 at x = 1, 2, 5: Abramowitz & Stegun, Handbook of Mathematical Functions,
        // Table 9.1 (the digits are also in NIST DLMF's tables; quoted from memory and checked
        // against Bessel's integral in `bessel::tests`). Relative power of order n is J_n^2, and
        // J_{-n}^2 = J_n^2 (DLMF 10.4.1); the phase of a single tone changes no power.
        let table: [(f64, [f64; 3]); 3] = [
            (
                1.0,
                [
                    0.765_197_686_557_967,
                    0.440_050_585_744_934,
                    0.114_903_484_931_901,
                ],
            ),
            (
                2.0,
                [
                    0.223_890_779_141_236,
                    0.576_724_807_756_874,
                    0.352_834_028_615_638,
                ],
            ),
            (
                5.0,
                [
                    -0.177_596_771_314_338,
                    -0.327_579_137_591_465,
                    0.046_565_116_277_752,
                ],
            ),
        ];
        for (beta, values) in table {
            for phase in [0.0, 37.0, -90.0] {
                let p = predict_spectrum(1e10, &[tone(1, beta, phase)], 3).unwrap();
                assert_eq!(p.lines.len(), 7);
                for (n, j) in values.iter().enumerate() {
                    let n = n as i32;
                    for order in [n, -n] {
                        let got = power(&p, order);
                        assert!(
                            (got - j * j).abs() < 1e-13,
                            "beta {beta} phase {phase} order {order}: {got} vs {}",
                            j * j
                        );
                    }
                }
            }
        }
        // The carrier null: J_0 vanishes at 2.404825557695773 (DLMF Table 10.21.1, A&S Table 9.5).
        let null = predict_spectrum(1e10, &[tone(1, 2.404_825_557_695_773, 0.0)], 1).unwrap();
        assert!(power(&null, 0) < 1e-28);
        // A tone on the second harmonic puts J_k^2 at order 2k and nothing at odd orders.
        let second = predict_spectrum(1e10, &[tone(2, 1.0, 0.0)], 4).unwrap();
        assert!((power(&second, 2) - 0.440_050_585_744_934f64.powi(2)).abs() < 1e-13);
        assert!((power(&second, -4) - 0.114_903_484_931_901f64.powi(2)).abs() < 1e-13);
        assert_eq!(power(&second, 1), 0.0);
        assert_eq!(second.lines[3].relative_power_db(), None);
    }

    /// |c_n|^2 of exp(i phi(t)) over one period by the discrete Fourier transform of the
    /// general-purpose `rustfft` library: a second way to the same lines, sharing no code with
    /// the Bessel sums.
    fn fft_line_powers(tones: &[Tone], samples: usize, orders: i32) -> Vec<f64> {
        let mut field: Vec<FftComplex<f64>> = (0..samples)
            .map(|s| {
                let theta = 2.0 * PI * s as f64 / samples as f64;
                let phi: f64 = tones
                    .iter()
                    .map(|t| {
                        t.modulation_index
                            * (f64::from(t.harmonic) * theta + t.phase_deg.to_radians()).sin()
                    })
                    .sum();
                FftComplex::from_polar(1.0, phi)
            })
            .collect();
        FftPlanner::<f64>::new()
            .plan_fft_forward(samples)
            .process(&mut field);
        (-orders..=orders)
            .map(|n| {
                // The forward transform uses e^{-i...}: line +n sits in bin n mod N.
                let bin = n.rem_euclid(samples as i32) as usize;
                field[bin].norm_sqr() / (samples * samples) as f64
            })
            .collect()
    }

    #[test]
    fn two_harmonics_agree_with_an_fft_of_the_field() {
        // The example (a fundamental with a second harmonic 30 degrees off) and two
        // harder drives: a strong fundamental with a weak third harmonic, and three tones.
        let drives: [&[Tone]; 3] = [
            &[tone(1, 1.3, 0.0), tone(2, 0.4, 30.0)],
            &[tone(1, 3.1, 10.0), tone(3, 0.25, -75.0)],
            &[tone(1, 2.0, 0.0), tone(2, 0.7, 120.0), tone(5, 0.3, 45.0)],
        ];
        for tones in drives {
            let orders = 24;
            let p = predict_spectrum(7.5e9, tones, orders as u32).unwrap();
            let fft = fft_line_powers(tones, 4096, orders);
            let mut compared = 0;
            for (line, reference) in p.lines.iter().zip(&fft) {
                assert!(
                    (line.relative_power - reference).abs() < 1e-12,
                    "{tones:?} order {}: {} vs FFT {reference}",
                    line.order,
                    line.relative_power
                );
                if 10.0 * reference.log10() > -60.0 {
                    let db = line.relative_power_db().unwrap();
                    assert!(
                        (db - 10.0 * reference.log10()).abs() < 0.01,
                        "{tones:?} order {}",
                        line.order
                    );
                    compared += 1;
                }
            }
            assert!(
                compared >= 9,
                "{tones:?}: only {compared} lines above -60 dB"
            );
            // With odd harmonics only, phi(t + T/2) = -phi(t), so |c_-n| = |c_n| (half-wave
            // symmetry of the Fourier series, common practice); an even harmonic breaks it (here
            // by more than 0.1 dB on the first pair), which is what makes it worth predicting.
            let asymmetry = (power(&p, 1) / power(&p, -1)).log10().abs() * 10.0;
            if tones.iter().any(|t| t.harmonic % 2 == 0) {
                assert!(asymmetry > 0.1, "{tones:?}: asymmetry {asymmetry} dB");
            } else {
                assert!(asymmetry < 1e-9, "{tones:?}: asymmetry {asymmetry} dB");
            }
        }
    }

    #[test]
    fn the_line_powers_sum_to_the_carrier_power() {
        // Parseval: |exp(i phi)| = 1, so the relative powers of all lines sum to 1 (for a single
        // tone, the sum rule J_0^2 + 2 sum J_k^2 = 1, DLMF 10.23.3).
        let drives: [&[Tone]; 4] = [
            &[tone(1, 0.2, 0.0)],
            &[tone(1, 1.3, 0.0), tone(2, 0.4, 30.0)],
            &[tone(1, 12.0, 5.0), tone(2, 3.0, -60.0), tone(3, 1.0, 200.0)],
            &[tone(1, 40.0, 0.0)],
        ];
        for tones in drives {
            let p = predict_spectrum(1e9, tones, 400).unwrap();
            let sum: f64 = p.lines.iter().map(|l| l.relative_power).sum();
            assert!((sum - 1.0).abs() < 1e-12, "{tones:?}: sum {sum}");
            assert!(p.truncation_error_bound < 1e-14, "{p:?}");
        }
    }

    #[test]
    fn the_bessel_cut_meets_its_tolerance() {
        // The dropped orders, evaluated directly, are within the stated bound (|J_k| summed).
        for beta in [0.01, 0.5, 1.3, 2.404_825_557_695_773, 7.0, 20.0, 50.0] {
            let (k, bound) = bessel_cut(beta);
            assert!(bound <= TONE_TAIL_TOLERANCE);
            assert!(f64::from(k) > beta, "beta {beta}: cut at {k}");
            let dropped: f64 = (k as i32 + 1..k as i32 + 80)
                .map(|n| 2.0 * bessel_j(n, beta).abs())
                .sum();
            assert!(
                dropped <= bound.max(1e-300),
                "beta {beta}: {dropped} > {bound}"
            );
        }
        assert_eq!(bessel_cut(0.0), (0, 0.0));
    }

    #[test]
    fn bad_drives_are_named_field_by_field() {
        let bad = [
            tone(0, 1.0, 0.0),
            tone(1, f64::NAN, 0.0),
            tone(2, 1.0, 400.0),
        ];
        let problems = predict_spectrum(-1.0, &bad, 5000).unwrap_err();
        let fields: Vec<&str> = problems.iter().map(|p| p.field.as_str()).collect();
        assert_eq!(
            fields,
            [
                "modulation_frequency_hz",
                "tones[0].harmonic",
                "tones[1].modulation_index",
                "tones[2].phase_deg",
                "orders"
            ]
        );
        assert_eq!(predict_spectrum(1e9, &[], 3).unwrap_err()[0].field, "tones");
        let many = vec![tone(1, 0.1, 0.0); MAX_TONES + 1];
        assert_eq!(
            predict_spectrum(1e9, &many, 3).unwrap_err()[0].field,
            "tones"
        );
        assert!(predict_spectrum(1e9, &[tone(1, 60.0, 0.0)], 3).is_err());
    }
}
