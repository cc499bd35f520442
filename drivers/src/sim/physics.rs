//! The optics of the simulated bench: drive voltage -> comb of lines -> analyzer trace.
//!
//! Two steps, kept apart so that each can be checked against its own reference:
//! - [`comb_lines`]: the field after a sinusoidally driven phase modulator is, by the
//!   Jacobi-Anger expansion (NIST DLMF 10.12), sum_n i^n J_n(beta) e^{i n w t}; residual amplitude
//!   modulation 1 + m cos(w t + theta) mixes neighbouring orders and makes +n and -n unequal.
//!   Bessel values come from `puruspe`.
//! - [`render_trace`]: the analyzer sees each line through its resolution filter (Gaussian or
//!   Lorentzian, FWHM = RBW) broadened by the laser's Lorentzian linewidth (a pseudo-Voigt
//!   profile, Thompson, Cox & Hastings, J. Appl. Cryst. 20 (1987) 79; coefficients from memory),
//!   on top of a noise floor, with a little display noise. It loops over the lines and adds each
//!   one's shape only over the points where it rises above a thousandth of the floor, so a
//!   10,001-point trace costs a few hundred microseconds at most.

use halfwave_units::{Dbm, VoltsPeak, REFERENCE_IMPEDANCE_OHMS};
use rand::Rng;
use rand_distr::StandardNormal;

use super::noise::trace_noise;
use super::scenario::FilterShape;

/// Peak voltage of a sine of this level into the reference impedance: V_pk = sqrt(2 R P).
pub fn peak_voltage(level: Dbm) -> VoltsPeak {
    VoltsPeak((2.0 * REFERENCE_IMPEDANCE_OHMS * level.to_watts().value()).sqrt())
}

/// Modulation index beta = pi V_pk / V_pi.
pub fn modulation_index(v_peak: VoltsPeak, v_pi: VoltsPeak) -> f64 {
    std::f64::consts::PI * v_peak.value() / v_pi.value()
}

/// J_n(x) for any integer order, using J_{-n} = (-1)^n J_n (DLMF 10.4.1).
pub fn bessel_j(order: i32, x: f64) -> f64 {
    let magnitude = puruspe::Jn(order.unsigned_abs(), x.abs());
    // J_n(-x) = (-1)^n J_n(x) as well (DLMF 10.4.1).
    let sign_from_order = if order < 0 && order % 2 != 0 {
        -1.0
    } else {
        1.0
    };
    let sign_from_x = if x < 0.0 && order % 2 != 0 { -1.0 } else { 1.0 };
    magnitude * sign_from_order * sign_from_x
}

/// One line of the comb: its order n (offset n * f_m from the carrier) and its power as a
/// fraction of the optical power without modulation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CombLine {
    pub order: i32,
    pub relative_power: f64,
}

/// The highest order worth computing for index beta: beyond |n| ~ beta + 12 the lines are more than
/// 100 dB down (J_n(x) falls off like (x/2)^n / n! once n exceeds x; common practice).
pub fn highest_order(beta: f64) -> i32 {
    (beta.abs().ceil() as i32).saturating_add(12).min(400)
}

/// The comb after the modulator: phase index `beta`, residual AM of depth `am_depth` at phase
/// `am_phase_rad` relative to the drive.
///
/// With E(t) = (1 + m cos(wt + theta)) sum_n i^n J_n e^{inwt}, collecting e^{inwt} gives
/// c_n = i^n [J_n + (m/2)(-i e^{i theta} J_{n-1} + i e^{-i theta} J_{n+1})], and the line power
/// is |c_n|^2. Without AM this is J_n(beta)^2 (and sums to 1, DLMF 10.23.3).
pub fn comb_lines(beta: f64, am_depth: f64, am_phase_rad: f64) -> Vec<CombLine> {
    let top = highest_order(beta);
    let j: Vec<f64> = (-top - 1..=top + 1).map(|n| bessel_j(n, beta)).collect();
    let at = |n: i32| -> f64 {
        let index = (n + top + 1) as usize;
        j.get(index).copied().unwrap_or(0.0)
    };
    // -i e^{i theta} = sin(theta) - i cos(theta);  i e^{-i theta} = sin(theta) + i cos(theta).
    let (s, c) = am_phase_rad.sin_cos();
    let half_m = 0.5 * am_depth;
    (-top..=top)
        .map(|n| {
            let below = at(n - 1);
            let above = at(n + 1);
            let re = at(n) + half_m * s * (below + above);
            let im = half_m * c * (above - below);
            CombLine {
                order: n,
                relative_power: re * re + im * im,
            }
        })
        .collect()
}

/// A line as the analyzer's input sees it: absolute frequency and power in milliwatts.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OpticalLine {
    pub frequency_hz: f64,
    pub power_mw: f64,
}

/// What the analyzer does to the light.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Rendering {
    pub start_hz: f64,
    pub stop_hz: f64,
    pub points: usize,
    pub resolution_bandwidth_hz: f64,
    pub filter: FilterShape,
    pub laser_linewidth_hz: f64,
    pub noise_floor_dbm: f64,
    pub display_noise_db: f64,
}

/// Line shape of a line of unit power seen through the filter: peak heights and widths of a
/// Gaussian part and a Lorentzian part, normalised so that a line of zero linewidth shows its
/// power at the peak (the calibration of a CW signal, common practice) and the area is kept.
#[derive(Debug, Clone, Copy)]
struct LineShape {
    gaussian_peak: f64,
    /// 4 ln 2 / FWHM^2, so that the Gaussian is exp(-k x^2).
    gaussian_k: f64,
    lorentzian_peak: f64,
    /// (FWHM / 2)^2.
    lorentzian_half_width_sq: f64,
}

impl LineShape {
    fn new(filter: FilterShape, rbw: f64, linewidth: f64) -> LineShape {
        let ln2 = std::f64::consts::LN_2;
        match filter {
            FilterShape::Lorentzian => {
                // Lorentzian (x) Lorentzian = Lorentzian with the widths added; area kept.
                let width = rbw + linewidth;
                LineShape {
                    gaussian_peak: 0.0,
                    gaussian_k: 0.0,
                    lorentzian_peak: rbw / width,
                    lorentzian_half_width_sq: 0.25 * width * width,
                }
            }
            FilterShape::Gaussian => {
                let (g, l) = (rbw, linewidth);
                // Pseudo-Voigt FWHM and mixing (Thompson, Cox & Hastings 1987; from memory).
                let f = (g.powi(5)
                    + 2.69269 * g.powi(4) * l
                    + 2.42843 * g.powi(3) * l.powi(2)
                    + 4.47163 * g.powi(2) * l.powi(3)
                    + 0.07842 * g * l.powi(4)
                    + l.powi(5))
                .powf(0.2);
                let r = l / f;
                let eta = (1.36603 * r - 0.47719 * r * r + 0.11116 * r * r * r).clamp(0.0, 1.0);
                // Area of the unit-peak Gaussian filter: g * sqrt(pi / (4 ln 2)); the
                // area-normalised profiles of FWHM f peak at 2 sqrt(ln2/pi)/f and 2/(pi f).
                let area = g * (std::f64::consts::PI / (4.0 * ln2)).sqrt();
                LineShape {
                    gaussian_peak: (1.0 - eta) * area * 2.0 * (ln2 / std::f64::consts::PI).sqrt()
                        / f,
                    gaussian_k: 4.0 * ln2 / (f * f),
                    lorentzian_peak: eta * area * 2.0 / (std::f64::consts::PI * f),
                    lorentzian_half_width_sq: 0.25 * f * f,
                }
            }
        }
    }
}

/// Adds `amplitude * shape(x)` over the index window where it exceeds `threshold`.
fn add_line(
    powers: &mut [f64],
    start: f64,
    step: f64,
    line: OpticalLine,
    shape: &LineShape,
    threshold: f64,
) {
    let points = powers.len();
    let window = |half_width: f64| -> (usize, usize) {
        let lo = ((line.frequency_hz - half_width - start) / step)
            .ceil()
            .max(0.0);
        let hi = ((line.frequency_hz + half_width - start) / step)
            .floor()
            .min(points as f64 - 1.0);
        if hi < lo {
            (1, 0)
        } else {
            (lo as usize, hi as usize)
        }
    };
    let g_amp = line.power_mw * shape.gaussian_peak;
    if g_amp > threshold {
        // exp(-k x^2) > threshold / amp  <=>  |x| < sqrt(ln(amp / threshold) / k)
        let half = ((g_amp / threshold).ln() / shape.gaussian_k).sqrt();
        let (lo, hi) = window(half);
        let x0 = start + step * lo as f64 - line.frequency_hz;
        let k = shape.gaussian_k;
        for (j, p) in powers.iter_mut().take(hi + 1).skip(lo).enumerate() {
            let x = x0 + step * j as f64;
            *p += g_amp * (-k * x * x).exp();
        }
    }
    let l_amp = line.power_mw * shape.lorentzian_peak;
    if l_amp > threshold {
        let w2 = shape.lorentzian_half_width_sq;
        // amp * w2 / (x^2 + w2) > threshold  <=>  |x| < sqrt(w2 (amp / threshold - 1))
        let half = (w2 * (l_amp / threshold - 1.0)).sqrt();
        let (lo, hi) = window(half);
        let scaled = l_amp * w2;
        let x0 = start + step * lo as f64 - line.frequency_hz;
        if let Some(slice) = powers.get_mut(lo..=hi) {
            for (j, p) in slice.iter_mut().enumerate() {
                let x = x0 + step * j as f64;
                *p += scaled / (x * x + w2);
            }
        }
    }
}

impl Rendering {
    /// The frequency of each point the rendering draws (linear from start to stop), for pairing
    /// a rendered trace with its axis.
    pub fn frequencies_hz(&self) -> Vec<f64> {
        let points = self.points.max(2);
        let step = (self.stop_hz - self.start_hz) / (points - 1) as f64;
        (0..points)
            .map(|i| self.start_hz + step * i as f64)
            .collect()
    }
}

/// The noise-free displayed power (mW) at each point of a linear axis from `start_hz` to
/// `stop_hz`: the noise floor plus every line seen through the filter.
pub fn render_linear(lines: &[OpticalLine], r: &Rendering) -> Vec<f64> {
    let points = r.points.max(2);
    let floor_mw = Dbm(r.noise_floor_dbm).to_milliwatts();
    let mut powers = vec![floor_mw; points];
    let step = (r.stop_hz - r.start_hz) / (points - 1) as f64;
    if step.is_nan() || step <= 0.0 {
        return powers;
    }
    let shape = LineShape::new(r.filter, r.resolution_bandwidth_hz, r.laser_linewidth_hz);
    let threshold = floor_mw * 1e-3;
    for line in lines {
        add_line(&mut powers, r.start_hz, step, *line, &shape, threshold);
    }
    powers
}

/// A trace in dBm: [`render_linear`] plus Gaussian display noise of `display_noise_db`.
/// The noise is drawn from a fast generator seeded once per trace from `rng` (see
/// [`super::noise`]), so the same `rng` state gives the same trace.
pub fn render_trace<R: Rng>(lines: &[OpticalLine], r: &Rendering, rng: &mut R) -> Vec<f64> {
    let mut powers = render_linear(lines, r);
    let mut noise = trace_noise(rng.next_u64());
    let sigma = r.display_noise_db;
    for p in &mut powers {
        *p = 10.0 * p.log10();
    }
    if sigma > 0.0 {
        for p in &mut powers {
            *p += sigma * noise.sample::<f64, _>(StandardNormal);
        }
    }
    powers
}
