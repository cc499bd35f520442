//! The instrument line shape K: measured on the RF-off reference (a table read back by cubic
//! interpolation), a pseudo-Voigt, or a Voigt profile, with its slopes in the fit's parameters.

use super::model::wing_slope_share;
use super::DB_PER_NEPER;
use crate::analysis::faddeeva::VoigtCore;
use crate::analysis::reference_noise::{display_noise_db, table_window, TableNoise};
use crate::analysis::{faddeeva, smooth_shape};
use halfwave_units::Trace;
use serde::Serialize;
use std::sync::Arc;

/// Which line shape the fit used.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ShapeKind {
    /// Measured on the RF-off reference trace.
    Measured,
    /// Pseudo-Voigt with fitted width and mix.
    PseudoVoigt,
    /// Voigt profile (a Gaussian convolved with a Lorentzian) with both widths fitted.
    Voigt,
}

/// The instrument line shape K(x), unit peak at x = 0.
#[derive(Debug, Clone, PartialEq)]
pub struct LineShape {
    pub(super) kind: ShapeKind,
    /// Full width at half maximum of the Gaussian part (pseudo-Voigt) or of the measured line, Hz.
    pub(super) width_hz: f64,
    /// Pseudo-Voigt: full width at half maximum of the Lorentzian part, Hz.
    pub(super) width_l_hz: f64,
    /// 1 / width^2 and 1 / width_l^2, kept with the widths.
    pub(super) inv_width_sq: f64,
    pub(super) inv_width_l_sq: f64,
    /// Pseudo-Voigt Lorentzian fraction of the peak, 0..1.
    pub(super) eta: f64,
    /// Pseudo-Voigt: (eta / [`wing_weight`](eta))^2, the share of the Lorentzian width's slope
    /// that its slope in the mix takes at a fixed wing level (see `eval`), kept with the mix so
    /// that `eval`, the fit's innermost loop, does not divide for it.
    pub(super) wing_slope_share: f64,
    /// Measured: K at x0 + j h. The measured tables are shared (`Arc`), so that the fitted
    /// model returned with every fit does not copy them.
    pub(super) table: Arc<[f64]>,
    pub(super) x0: f64,
    pub(super) h: f64,
    pub(super) inv_h: f64,
    /// Measured: the last table index as a float (the end of the interpolated range, in table
    /// steps from x0), kept with the table.
    pub(super) t_last: f64,
    /// Measured: per table interval j (from x0 + j h), the Catmull-Rom cubic through the table's
    /// four neighbours of the interval, as the coefficients of 1, s, s^2, s^3 (s the fraction of
    /// the interval), with zeros beyond the table's ends (see `measured_value`).
    pub(super) cubic: Arc<[[f64; 4]]>,
    /// Measured: for each j, the largest table value at or beyond j away from the centre (for
    /// the reach of a line).
    envelope: Arc<[f64]>,
    /// Index of the table's peak.
    peak_index: usize,
    /// Voigt: w(z) along Im z = y = gamma / (sigma sqrt 2) (with the profile's peak w(iy)), and
    /// 1 / (sigma sqrt 2).
    pub(super) voigt: Option<Arc<VoigtCore>>,
    voigt_inv_s: f64,
    /// Measured point by point: how the reference's display noise sits in the table (see
    /// `reference_noise`); `None` for a smoothed or parametric shape.
    pub(super) table_noise: Option<Arc<TableNoise>>,
    /// Measured: the reference's floor under the line's wings, mW (0 when not known).
    pub(super) floor_mw: f64,
}

/// FWHM / sigma of a Gaussian: 2 sqrt(2 ln 2).
pub(super) const FWHM_PER_SIGMA: f64 = 2.354_820_045_030_949;

/// K, dK/dx, dK/d(ln Gaussian width), dK/d(eta) and dK/d(ln Lorentzian width); for a
/// pseudo-Voigt the last two at a fixed level of its far wings and along it ([`wing_level`]).
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct ShapeValue {
    pub(super) k: f64,
    pub(super) dx: f64,
    pub(super) dw: f64,
    pub(super) de: f64,
    pub(super) dl: f64,
}

impl LineShape {
    /// A pseudo-Voigt: a Gaussian of full width `width_hz` and a Lorentzian of full width
    /// `lorentzian_width_hz`, mixed with Lorentzian peak fraction `eta`. With two widths it follows
    /// both the core of a true Voigt profile (Gaussian-like) and its far wings (the Lorentzian's
    /// 1/x^2), which one shared width cannot.
    pub fn pseudo_voigt(width_hz: f64, lorentzian_width_hz: f64, eta: f64) -> LineShape {
        LineShape {
            kind: ShapeKind::PseudoVoigt,
            width_hz,
            width_l_hz: lorentzian_width_hz,
            inv_width_sq: 1.0 / (width_hz * width_hz),
            inv_width_l_sq: 1.0 / (lorentzian_width_hz * lorentzian_width_hz),
            eta: eta.clamp(0.0, 1.0),
            wing_slope_share: wing_slope_share(eta.clamp(0.0, 1.0)),
            table: Arc::from([]),
            x0: 0.0,
            h: 1.0,
            inv_h: 1.0,
            t_last: 0.0,
            cubic: Arc::from([]),
            envelope: Arc::from([]),
            peak_index: 0,
            voigt: None,
            voigt_inv_s: 0.0,
            table_noise: None,
            floor_mw: 0.0,
        }
    }

    /// A Voigt profile, unit peak: a Gaussian of full width `gaussian_width_hz` convolved with a
    /// Lorentzian of full width `lorentzian_width_hz` (a Gaussian resolution filter seen with a
    /// laser's Lorentzian line). K(x) = Re w(z) / w(iy), z = (x + i gamma) / (sigma sqrt 2),
    /// y = gamma / (sigma sqrt 2), gamma the Lorentzian's half width (DLMF 7.19.3; see
    /// [`faddeeva`]).
    pub fn voigt(gaussian_width_hz: f64, lorentzian_width_hz: f64) -> LineShape {
        let s = gaussian_width_hz / FWHM_PER_SIGMA * std::f64::consts::SQRT_2;
        let y = 0.5 * lorentzian_width_hz / s;
        let mut shape = LineShape::pseudo_voigt(gaussian_width_hz, lorentzian_width_hz, 0.0);
        shape.kind = ShapeKind::Voigt;
        shape.voigt = Some(Arc::new(VoigtCore::new(y)));
        shape.voigt_inv_s = 1.0 / s;
        shape
    }

    /// The Voigt profile nearest a fitted pseudo-Voigt `pv`: the same far-wing level (the
    /// Lorentzian's 1/x^2, which sets the weak lines' background) and the same full width at half
    /// maximum, by the Olivero-Longbothum relation between the Voigt's and its parts' widths
    /// (J. Quant. Spectrosc. Radiat. Transfer 17, 233, 1977: f_V = 0.5346 f_L + sqrt(0.2166 f_L^2
    /// + f_G^2), to 0.02 %).
    pub fn voigt_like(pv: &LineShape) -> LineShape {
        let fwhm = pv.fwhm();
        // The pseudo-Voigt's far wing: K ~ eta (f_L / 2)^2 / x^2.
        let wing = pv.eta * 0.25 * pv.width_l_hz * pv.width_l_hz;
        let mut gaussian = pv.width_hz;
        let mut lorentzian = pv.width_l_hz;
        for _ in 0..4 {
            // The Voigt's far wing: K ~ y s^2 / (sqrt(pi) erfcx(y) x^2) = gamma s / (sqrt(pi)
            // erfcx(y) x^2).
            let s = gaussian / FWHM_PER_SIGMA * std::f64::consts::SQRT_2;
            let mut gamma = wing * std::f64::consts::PI.sqrt() / s;
            gamma *= faddeeva::faddeeva(num_complex::Complex64::new(0.0, gamma / s)).re;
            lorentzian = (2.0 * gamma).max(1e-6 * fwhm);
            let rest = fwhm - 0.5346 * lorentzian;
            gaussian = (rest * rest - 0.2166 * lorentzian * lorentzian)
                .max(0.01 * fwhm * fwhm)
                .sqrt();
        }
        LineShape::voigt(gaussian, lorentzian)
    }

    /// The kind of shape.
    pub fn kind(&self) -> ShapeKind {
        self.kind
    }

    /// Full width at half maximum, Hz.
    pub fn width_hz(&self) -> f64 {
        self.width_hz
    }

    /// Lorentzian peak fraction (pseudo-Voigt only; 0 for a measured shape).
    pub fn eta(&self) -> f64 {
        self.eta
    }

    /// Full width at half maximum of the whole shape, Hz.
    pub fn fwhm(&self) -> f64 {
        if self.kind == ShapeKind::Measured {
            return self.width_hz;
        }
        let (mut lo, mut hi) = (0.0, 10.0 * self.width_hz.max(self.width_l_hz));
        for _ in 0..60 {
            let mid = 0.5 * (lo + hi);
            if self.eval(mid).k > 0.5 {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        lo + hi
    }

    /// The line shape measured on an RF-off trace: the points above the trace's floor, the
    /// floor removed, normalised to the peak, centred on the centroid of the part above half
    /// maximum. Its wings, where single points drown in the display noise, are averaged over a
    /// window of +-|x|/8 (a 1/x^2 Lorentzian wing is changed by under 1 % by such an average).
    /// `None` when the trace has fewer than `min_points_per_width` points across the half-maximum
    /// width (the shape cannot then be read between its samples) or shows no line. With at least
    /// 12 points per width the table is then smoothed (`smooth_shape`): ln K as a penalised cubic
    /// B-spline fitted to the reference's levels in dB, so that the reference's display noise
    /// does not make the model change from point to point.
    pub fn measured(reference: &Trace, min_points_per_width: f64) -> Option<LineShape> {
        LineShape::measured_with(reference, min_points_per_width, true)
    }

    /// [`LineShape::measured`], with the smoothing of `smooth_shape` (`smooth`) or point by point.
    pub(crate) fn measured_with(
        reference: &Trace,
        min_points_per_width: f64,
        smooth: bool,
    ) -> Option<LineShape> {
        let freq = reference.frequency_hz();
        let level = reference.power_dbm();
        let n = freq.len();
        if n < 8 {
            return None;
        }
        let h = (freq[n - 1] - freq[0]) / (n - 1) as f64;
        let peak = level
            .iter()
            .enumerate()
            .max_by(|a, b| a.1.total_cmp(b.1))
            .map(|(i, _)| i)?;
        // Half-maximum width and centroid of the core, from the excess over a first floor (the
        // median of the outer quarters).
        let mut outer: Vec<f64> = level
            .iter()
            .enumerate()
            .filter(|(i, _)| i.abs_diff(peak) > n / 4)
            .map(|(_, l)| *l)
            .step_by(((n / 2) / 512).max(1))
            .collect();
        if outer.len() < 8 {
            return None;
        }
        let mid = outer.len() / 2;
        let first_floor_db = *outer.select_nth_unstable_by(mid, f64::total_cmp).1;
        if level[peak] < first_floor_db + 20.0 {
            return None;
        }
        let linear: Vec<f64> = level.iter().map(|l| db_to_mw(*l)).collect();
        let first_floor = db_to_mw(first_floor_db);
        let top = linear[peak] - first_floor;
        let mut lo = peak;
        while lo > 0 && linear[lo - 1] - first_floor > 0.5 * top {
            lo -= 1;
        }
        let mut hi = peak;
        while hi + 1 < n && linear[hi + 1] - first_floor > 0.5 * top {
            hi += 1;
        }
        let width = (hi - lo + 1) as f64 * h;
        if width < min_points_per_width * h {
            return None;
        }
        let (mut m1, mut m0) = (0.0, 0.0);
        for i in lo..=hi {
            let e = linear[i] - first_floor;
            m0 += e;
            m1 += e * freq[i];
        }
        let centre = m1 / m0;
        // The floor under the wings: a Lorentzian wing falls as c / x^2 and does not reach the
        // floor within the span, so a median would count wing as floor. Beyond ten widths (the
        // core has no weight there) the levels are fitted by F + c / x^2, weighted for the
        // display noise, which is a fixed fraction of each level.
        let (mut s00, mut s01, mut s11, mut b0, mut b1) = (0.0, 0.0, 0.0, 0.0, 0.0);
        let mut count = 0;
        for i in 0..n {
            let x = freq[i] - centre;
            if x.abs() < 10.0 * width {
                continue;
            }
            let u = 1.0 / (x * x);
            let w = 1.0 / (linear[i] * linear[i]);
            s00 += w;
            s01 += w * u;
            s11 += w * u * u;
            b0 += w * linear[i];
            b1 += w * u * linear[i];
            count += 1;
        }
        let det = s00 * s11 - s01 * s01;
        let floor = if count >= 32 && det > 0.0 {
            let f = (b0 * s11 - b1 * s01) / det;
            if f > 0.0 && f <= first_floor * 1.5 {
                f
            } else {
                first_floor
            }
        } else {
            first_floor
        };
        let excess: Vec<f64> = linear.iter().map(|l| l - floor).collect();
        let top = excess[peak];
        // Prefix sums of x^2 K for the growing-window average of the wings (exact on a 1/x^2
        // wing, where x^2 K is flat).
        let mut prefix = Vec::with_capacity(n + 1);
        prefix.push(0.0);
        let mut s = 0.0;
        for (i, e) in excess.iter().enumerate() {
            let x = freq[i] - centre;
            s += e * x * x;
            prefix.push(s);
        }
        let core = (3.0 * width / h) as usize;
        let mut table = vec![0.0; n];
        for (i, slot) in table.iter_mut().enumerate() {
            let (a, b) = table_window(i, peak, core, n);
            *slot = if a == b {
                excess[i]
            } else {
                let x = freq[i] - centre;
                (prefix[b + 1] - prefix[a]) / (b + 1 - a) as f64 / (x * x)
            };
        }
        let mut top = top;
        let mut smoothed = false;
        if smooth {
            if let Some(spline) =
                smooth_shape::smoothed_excess(freq, level, &table, centre, floor, width)
            {
                table = spline;
                top = table.iter().fold(0.0, |a: f64, b| a.max(*b));
                smoothed = true;
            }
        }
        let scale = 1.0 / top;
        for v in table.iter_mut() {
            *v = (*v * scale).max(0.0);
        }
        let mut shape =
            LineShape::from_table(table, freq[0] - centre, h, width, ShapeKind::Measured);
        shape.floor_mw = floor;
        if !smoothed {
            let display_noise_db = display_noise_db(level);
            shape.table_noise = Some(Arc::new(TableNoise::new(
                freq.iter().map(|f| f - centre),
                &linear,
                display_noise_db,
                top,
                peak,
                core,
            )));
        }
        Some(shape)
    }

    pub(super) fn from_table(
        table: Vec<f64>,
        x0: f64,
        h: f64,
        width: f64,
        kind: ShapeKind,
    ) -> LineShape {
        let peak_index = table
            .iter()
            .enumerate()
            .max_by(|a, b| a.1.total_cmp(b.1))
            .map_or(0, |(i, _)| i);
        let mut envelope = table.clone();
        for i in (peak_index + 1..envelope.len()).rev().skip(1) {
            envelope[i] = envelope[i].max(envelope[i + 1]);
        }
        for i in 1..peak_index {
            envelope[i] = envelope[i].max(envelope[i - 1]);
        }
        let t_last = table.len() as f64 - 1.0;
        LineShape {
            kind,
            width_hz: width,
            width_l_hz: width,
            inv_width_sq: 1.0 / (width * width),
            inv_width_l_sq: 1.0 / (width * width),
            eta: 0.0,
            wing_slope_share: 0.0,
            cubic: catmull_rom_coefficients(&table).into(),
            table: table.into(),
            x0,
            h,
            inv_h: 1.0 / h,
            t_last,
            envelope: envelope.into(),
            peak_index,
            voigt: None,
            voigt_inv_s: 0.0,
            table_noise: None,
            floor_mw: 0.0,
        }
    }

    /// K at offset `x` (Hz) and its derivatives.
    #[inline(always)]
    pub(super) fn eval(&self, x: f64) -> ShapeValue {
        match self.kind {
            ShapeKind::PseudoVoigt => {
                let ln2 = std::f64::consts::LN_2;
                // One division per call: the divisions' latency dominated the fit's time.
                let (ig, il) = (self.inv_width_sq, self.inv_width_l_sq);
                let qg = x * x * ig;
                let ql = x * x * il;
                let g = unit_gaussian(qg);
                let l = 1.0 / (1.0 + 4.0 * ql);
                let eta = self.eta;
                // The Lorentzian part is fitted by its mix and the level of its far wings,
                // A = ln(D w_L^2) with D = [`wing_weight`](eta), about eta above
                // [`LORENTZIAN_HELD`] ([`wing_level`]): at a fixed A, w_L^2 = e^A / D moves with
                // eta, so dK/d(eta) takes eta (dD/d(eta) / D) (-1/2 dL/d(ln w_L)) =
                // -(eta / D)^2 4 L^2 x^2 / w_L^2 (the share kept with the shape), and dK/dA is
                // half of eta dL/d(ln w_L). (Without a second division.)
                let half_slope_l = 4.0 * l * l * ql;
                ShapeValue {
                    k: (1.0 - eta) * g + eta * l,
                    dx: (1.0 - eta) * g * (-8.0 * ln2 * x * ig) - eta * l * l * 8.0 * x * il,
                    dw: (1.0 - eta) * g * 8.0 * ln2 * qg,
                    de: l - g - self.wing_slope_share * half_slope_l,
                    dl: eta * half_slope_l,
                }
            }
            ShapeKind::Voigt => self.voigt_value(x),
            ShapeKind::Measured => {
                let (k, dx) = self.measured_value(x);
                ShapeValue {
                    k,
                    dx,
                    ..ShapeValue::default()
                }
            }
        }
    }

    /// A Voigt shape's K and its slopes at offset `x` (Hz). With z = u + iy, u = |x| / s,
    /// s = sigma sqrt 2, V = Re w(z) and E = w(iy): K = V / E; d/dx moves z by 1 / s, d/d(ln
    /// sigma) by -z, d/d(ln gamma) by iy (and E by -y E' and y E'), so each slope is
    /// (Re(w'(z) dz) - K dE) / E.
    #[inline(always)]
    fn voigt_value(&self, x: f64) -> ShapeValue {
        let Some(core) = self.voigt.as_deref() else {
            return ShapeValue::default();
        };
        let u = x.abs() * self.voigt_inv_s;
        let y = core.y();
        let (w, dw) = core.at(u);
        let inv_e = core.inv_peak();
        let k = w.re * inv_e;
        let dx = dw.re * self.voigt_inv_s * inv_e;
        let de = y * core.peak_slope();
        ShapeValue {
            k,
            dx: if x < 0.0 { -dx } else { dx },
            dw: (-(dw.re * u - dw.im * y) + k * de) * inv_e,
            de: 0.0,
            dl: (-dw.im * y - k * de) * inv_e,
        }
    }

    /// A measured shape's K and dK/dx at offset `x` (Hz): the fit's innermost loop.
    #[inline(always)]
    pub(super) fn measured_value(&self, x: f64) -> (f64, f64) {
        let t = (x - self.x0) * self.inv_h;
        let last = self.t_last;
        if t < 0.0 || t > last {
            // Beyond the table: a 1/x^2 wing from its end value.
            let (end_x, end_v) = if t < 0.0 {
                (self.x0, self.table[0])
            } else {
                (self.x0 + last * self.h, self.table[self.table.len() - 1])
            };
            let k = end_v * (end_x / x).powi(2);
            return (k, -2.0 * k / x);
        }
        // t >= 0 here, so truncation is the floor (`f64::floor` is a library call on the
        // baseline x86-64 target); through u32, whose conversion is shorter than usize's.
        let j = t as u32 as usize;
        let s = t - j as f64;
        let [c0, c1, c2, c3] = self.cubic[j];
        let k = c0 + s * (c1 + s * (c2 + s * c3));
        let dk = (c1 + s * (2.0 * c2 + 3.0 * s * c3)) * self.inv_h;
        (k, dk)
    }

    /// Whether the points of the axis `freq` lie on this measured shape's table grid: one table
    /// step apart, each within a millionth of a step of its place (the engine's case, where a
    /// trace and its RF-off reference share one axis; the absolute frequencies' rounding makes
    /// single steps differ by parts in 1e8). See [`GridLine`].
    pub(super) fn on_grid_of(&self, freq: &[f64]) -> bool {
        self.kind == ShapeKind::Measured && !self.cubic.is_empty() && self.steps_apart(freq, 1e-6)
    }

    /// Whether the points of `freq` lie one table step apart, each within `tolerance` of a step of
    /// its place counted from the first.
    pub(super) fn steps_apart(&self, freq: &[f64], tolerance: f64) -> bool {
        let (Some(&first), h) = (freq.first(), self.h) else {
            return false;
        };
        freq.iter()
            .enumerate()
            .all(|(i, f)| (f - first - i as f64 * h).abs() <= tolerance * h)
    }

    /// The line centred at `centre` (Hz) on a trace whose first point is at `first_freq` and
    /// whose points lie on the table's grid ([`LineShape::on_grid_of`]).
    pub(super) fn grid_line(&self, first_freq: f64, centre: f64) -> GridLine {
        let t = (first_freq - centre - self.x0) * self.inv_h;
        let whole = t.floor();
        let s = t - whole;
        let offset = if whole.abs() < 1e15 {
            whole as isize
        } else {
            isize::MIN / 2
        };
        GridLine {
            offset,
            k_weights: [1.0, s, s * s, s * s * s],
            slope_weights: [
                0.0,
                self.inv_h,
                2.0 * s * self.inv_h,
                3.0 * s * s * self.inv_h,
            ],
        }
    }

    /// K and dK/dx of `line` at trace point `point` (offset `x` Hz from the line's centre, for
    /// a point off the table): [`LineShape::measured_value`] without locating the point.
    #[inline(always)]
    pub(super) fn grid_value(&self, line: &GridLine, point: usize, x: f64) -> (f64, f64) {
        let index = (point as isize).wrapping_add(line.offset) as usize;
        // Intervals 0..len - 1 (the last entry starts none; the grid's shapes have a table):
        // beyond, the 1/x^2 wing (a point before the table wraps to a large index).
        if index < self.cubic.len().saturating_sub(1) {
            let c = self.cubic[index];
            let (kw, sw) = (line.k_weights, line.slope_weights);
            (
                c[0] + c[1] * kw[1] + c[2] * kw[2] + c[3] * kw[3],
                c[1] * sw[1] + c[2] * sw[2] + c[3] * sw[3],
            )
        } else {
            self.measured_value(x)
        }
    }

    /// Adds `weight` times dK(x)/dT_j to `sensitivity[j]` for the measured table's entries T_j that
    /// K at offset `x` (Hz) is interpolated from (the Catmull-Rom weights of the four neighbours,
    /// as in [`catmull_rom_coefficients`]); nothing beyond the table.
    pub(super) fn add_table_sensitivity(&self, x: f64, weight: f64, sensitivity: &mut [f64]) {
        let t = (x - self.x0) * self.inv_h;
        let last = self.table.len() as f64 - 1.0;
        if !(0.0..=last).contains(&t) {
            return;
        }
        let j = t as usize;
        let basis = catmull_rom_weights(t - j as f64);
        for (k, b) in basis.iter().enumerate() {
            if let Some(slot) = (j + k).checked_sub(1).and_then(|i| sensitivity.get_mut(i)) {
                *slot += weight * b;
            }
        }
    }

    /// [`LineShape::add_table_sensitivity`] for a run of points one table step apart, the first
    /// at offset `x_first` (Hz), with weights `scale` times `weights`: every point falls at the
    /// same fraction of its table interval, so the interpolation weights are computed once (the trace and its
    /// reference share one axis in the engine, which makes this the usual case).
    pub(super) fn add_run_sensitivity(
        &self,
        x_first: f64,
        scale: f64,
        weights: &[f64],
        sensitivity: &mut [f64],
    ) {
        let t = (x_first - self.x0) * self.inv_h;
        let whole = t.floor();
        let (j0, s) = (whole as i64, t - whole);
        let len = self.table.len().min(sensitivity.len()) as i64;
        let count = weights.len() as i64;
        // Points whose four entries j - 1..j + 2 all lie in the table (1 <= j <= len - 3), with
        // j = j0 + k for the run's k-th point; the others go one by one.
        // Saturating: a centre run far off the table (t beyond the i64 range, j0 saturated by the
        // cast) puts every point on the one-by-one path instead of overflowing.
        let lo = 1i64.saturating_sub(j0).clamp(0, count);
        let hi = (len - 2).saturating_sub(j0).clamp(lo, count);
        let (lo, hi) = (lo as usize, hi as usize);
        for k in (0..lo).chain(hi..weights.len()) {
            let weight = scale * weights[k];
            self.add_table_sensitivity(x_first + k as f64 * self.h, weight, sensitivity);
        }
        if lo == hi {
            return;
        }
        let [b0, b1, b2, b3] = catmull_rom_weights(s).map(|b| scale * b);
        let start = (j0 + lo as i64 - 1) as usize;
        let inner = &weights[lo..hi];
        let target = &mut sensitivity[start..start + inner.len() + 3];
        // Entry m of the target takes point m with b0, m - 1 with b1, m - 2 with b2 and m - 3
        // with b3: each entry written once (adding each point to four entries in turn made every
        // step wait for the one before it through memory).
        let entry = |p0: f64, p1: f64, p2: f64, p3: f64| {
            let mut v = b0 * p0;
            v += b1 * p1;
            v += b2 * p2;
            v += b3 * p3;
            v
        };
        // The entries whose four points all lie in the run, from windows of four (no bounds
        // checks in the loop); the three at each end, where the run begins or ends, one by one
        // with zeros for the points beyond it.
        let whole = inner.len().saturating_sub(3);
        for (slot, w) in target[3..3 + whole].iter_mut().zip(inner.windows(4)) {
            *slot += entry(w[3], w[2], w[1], w[0]);
        }
        let at = |m: usize, back: usize| {
            m.checked_sub(back)
                .and_then(|i| inner.get(i))
                .copied()
                .unwrap_or(0.0)
        };
        for m in (0..3.min(target.len())).chain(3 + whole..target.len()) {
            target[m] += entry(at(m, 0), at(m, 1), at(m, 2), at(m, 3));
        }
    }

    /// Half-widths (left, right) beyond which K stays below `ratio`, with a margin for a
    /// width that changes during the fit.
    pub(super) fn reach(&self, ratio: f64) -> (f64, f64) {
        if ratio >= 1.0 {
            return (0.0, 0.0);
        }
        match self.kind {
            ShapeKind::PseudoVoigt => {
                let (wg, wl) = (self.width_hz, self.width_l_hz);
                let part = 0.5 * ratio;
                let g = if (1.0 - self.eta) > part {
                    wg * ((((1.0 - self.eta) / part).ln()) / (4.0 * std::f64::consts::LN_2)).sqrt()
                } else {
                    0.0
                };
                let l = if self.eta > part {
                    0.5 * wl * (self.eta / part - 1.0).max(0.0).sqrt()
                } else {
                    0.0
                };
                let x = 1.1 * g.max(l) + 0.25 * wg;
                (x, x)
            }
            ShapeKind::Voigt => {
                // The Gaussian core where it reaches `ratio`, and the far wing, K ~ y s^2 /
                // (sqrt(pi) E x^2) (see [`LineShape::voigt_value`]).
                let wg = self.width_hz;
                let g = wg * ((1.0 / ratio).ln() / (4.0 * std::f64::consts::LN_2)).sqrt();
                let (y, inv_peak) = self
                    .voigt
                    .as_deref()
                    .map_or((0.0, 0.0), |core| (core.y(), core.inv_peak()));
                let l = (y * inv_peak / (std::f64::consts::PI.sqrt() * ratio)).sqrt()
                    / self.voigt_inv_s;
                let x = 1.1 * g.max(l) + 0.25 * wg;
                (x, x)
            }
            ShapeKind::Measured => {
                let side = |sign: f64| -> f64 {
                    let (end_index, step): (usize, isize) = if sign > 0.0 {
                        (self.table.len() - 1, 1)
                    } else {
                        (0, -1)
                    };
                    let end_x = (self.x0 + end_index as f64 * self.h).abs();
                    let end_v = self.table[end_index];
                    if end_v > ratio {
                        return end_x * (end_v / ratio).sqrt() + self.h;
                    }
                    // Walk the envelope out from the peak by bisection.
                    let (mut inner, mut outer) = (self.peak_index as isize, end_index as isize);
                    while (outer - inner).abs() > 1 {
                        let mid = (inner + outer) / 2;
                        if self.envelope[mid as usize] > ratio {
                            inner = mid;
                        } else {
                            outer = mid;
                        }
                    }
                    let _ = step;
                    (self.x0 + outer as f64 * self.h).abs() + 2.0 * self.h
                };
                (side(-1.0), side(1.0))
            }
        }
    }
}

/// One line of a measured shape on a trace whose points lie on the table's grid: point i falls
/// at table position i + `offset` + s with the same fraction s for every point, so K and its
/// slope there are the table's cubic of interval i + `offset` weighted by powers of s computed
/// once per line ([`LineShape::grid_value`]).
#[derive(Debug, Clone, Copy)]
pub(super) struct GridLine {
    pub(super) offset: isize,
    /// 1, s, s^2, s^3.
    k_weights: [f64; 4],
    /// 0, 1, 2 s, 3 s^2, each over the table step.
    slope_weights: [f64; 4],
}

/// The weights of the four table values p0..p3 (at j - 1..j + 2) in the Catmull-Rom cubic of
/// interval j at fraction `s` of it (the same cubic as [`catmull_rom_coefficients`]).
#[inline]
fn catmull_rom_weights(s: f64) -> [f64; 4] {
    let (s2, s3) = (s * s, s * s * s);
    [
        0.5 * (-s + 2.0 * s2 - s3),
        1.0 - 2.5 * s2 + 1.5 * s3,
        0.5 * s + 2.0 * s2 - 1.5 * s3,
        0.5 * (s3 - s2),
    ]
}

/// The Catmull-Rom cubic of every interval of `table` (one per entry; the last one is read at
/// its start only), with zeros taken beyond both ends: for interval j through the values
/// p0..p3 at j - 1..j + 2, K = p1 + s (c1 + s (c2 + s c3)).
fn catmull_rom_coefficients(table: &[f64]) -> Vec<[f64; 4]> {
    let at = |i: isize| -> f64 {
        if i < 0 || i as usize >= table.len() {
            0.0
        } else {
            table[i as usize]
        }
    };
    (0..table.len() as isize)
        .map(|j| {
            let (p0, p1, p2, p3) = (at(j - 1), at(j), at(j + 1), at(j + 2));
            [
                p1,
                0.5 * (p2 - p0),
                p0 - 2.5 * p1 + 2.0 * p2 - 0.5 * p3,
                0.5 * (p3 - p0) + 1.5 * (p1 - p2),
            ]
        })
        .collect()
}

#[inline]
pub(super) fn db_to_mw(db: f64) -> f64 {
    crate::analysis::comb::milliwatts(db)
}

/// The unit-peak Gaussian exp(-4 ln2 q) at q = x^2 / w^2 (w its full width), through the
/// branch-free 10^(L/10) of `comb` (L in dB); zero beyond 1e-70, where its products with 1/w^2
/// would be subnormal numbers (each costing a hundred cycles) while adding nothing.
#[inline(always)]
pub(super) fn unit_gaussian(q: f64) -> f64 {
    if q < 58.0 {
        db_to_mw(-4.0 * std::f64::consts::LN_2 * q * DB_PER_NEPER)
    } else {
        0.0
    }
}
