//! Bessel functions of the first kind J_n(beta), tabulated once for fast fitting.
//!
//! The line powers of a phase-modulated comb are P_n = P_total J_n(beta)^2 (Jacobi-Anger
//! expansion, DLMF 10.12). Fitting beta evaluates J_n for a dozen or more orders at hundreds of
//! trial values, and calling a Bessel routine each time (Miller's backward recurrence for n > x)
//! would dominate the analysis time. So the values and slopes J_n, J_n' = (J_{n-1} - J_{n+1}) / 2
//! (DLMF 10.6.1) are computed once with `puruspe::Jn` on a fine grid and read back through cubic
//! Hermite interpolation, which is exact to about 1e-10 at this grid step. Outside the table the
//! library routine is called directly.

use std::sync::OnceLock;

/// Highest order kept in the table.
pub const MAX_ORDER: usize = 30;
/// Largest argument kept in the table.
pub const TABLE_BETA_MAX: f64 = 16.0;
/// Grid step of the table.
pub const TABLE_STEP: f64 = 0.01;

/// First zero of J_0 (the carrier null), DLMF 10.21(i) / A&S Table 9.5.
pub const J0_FIRST_ZERO: f64 = 2.404_825_557_695_773;
/// First zero of J_1, DLMF 10.21(i) / A&S Table 9.5.
pub const J1_FIRST_ZERO: f64 = 3.831_705_970_207_512;

/// J_n(x) for any integer order by the library routine, using J_{-n} = (-1)^n J_n (DLMF 10.4.1).
pub fn bessel_j(n: i32, x: f64) -> f64 {
    let value = puruspe::Jn(n.unsigned_abs(), x.abs());
    let odd = n.unsigned_abs() % 2 == 1;
    let sign_from_order = if n < 0 && odd { -1.0 } else { 1.0 };
    let sign_from_argument = if x < 0.0 && odd { -1.0 } else { 1.0 };
    value * sign_from_order * sign_from_argument
}

/// The table of J_n and J_n' on the grid beta_i = i * TABLE_STEP.
pub struct BesselTable {
    /// Row-major: `values[i * STRIDE + n]` = J_n(beta_i) for n in 0..=MAX_ORDER.
    values: Vec<f64>,
    /// Same layout, slopes dJ_n/dbeta.
    slopes: Vec<f64>,
    rows: usize,
}

const STRIDE: usize = MAX_ORDER + 1;

impl BesselTable {
    /// The shared table, built on first use (about 50,000 library calls, a few milliseconds).
    pub fn get() -> &'static BesselTable {
        static TABLE: OnceLock<BesselTable> = OnceLock::new();
        TABLE.get_or_init(BesselTable::build)
    }

    fn build() -> BesselTable {
        let rows = (TABLE_BETA_MAX / TABLE_STEP).round() as usize + 1;
        let mut values = vec![0.0; rows * STRIDE];
        let mut slopes = vec![0.0; rows * STRIDE];
        let mut row = [0.0; STRIDE + 1];
        for i in 0..rows {
            let beta = i as f64 * TABLE_STEP;
            for (n, slot) in row.iter_mut().enumerate() {
                *slot = puruspe::Jn(n as u32, beta);
            }
            for n in 0..STRIDE {
                values[i * STRIDE + n] = row[n];
                // DLMF 10.6.1: J_0' = -J_1, J_n' = (J_{n-1} - J_{n+1}) / 2.
                slopes[i * STRIDE + n] = if n == 0 {
                    -row[1]
                } else {
                    0.5 * (row[n - 1] - row[n + 1])
                };
            }
        }
        BesselTable {
            values,
            slopes,
            rows,
        }
    }

    /// Number of grid rows.
    pub fn rows(&self) -> usize {
        self.rows
    }

    /// J_0..J_MAX_ORDER at grid point `i` (beta = i * TABLE_STEP); empty past the table.
    pub fn row(&self, i: usize) -> &[f64] {
        self.values.get(i * STRIDE..(i + 1) * STRIDE).unwrap_or(&[])
    }

    /// J_n(beta) and its slope, for |n| <= MAX_ORDER and 0 <= beta < TABLE_BETA_MAX from the
    /// table, otherwise from the library routine (slope by DLMF 10.6.1).
    pub fn value_and_slope(&self, n: i32, beta: f64) -> (f64, f64) {
        let order = n.unsigned_abs() as usize;
        let sign = if n < 0 && order % 2 == 1 { -1.0 } else { 1.0 };
        let position = beta / TABLE_STEP;
        let i = position.floor();
        if order <= MAX_ORDER && i >= 0.0 && (i as usize) + 1 < self.rows {
            let i = i as usize;
            let t = position - i as f64;
            let (y0, y1) = (
                self.values[i * STRIDE + order],
                self.values[(i + 1) * STRIDE + order],
            );
            let (d0, d1) = (
                self.slopes[i * STRIDE + order] * TABLE_STEP,
                self.slopes[(i + 1) * STRIDE + order] * TABLE_STEP,
            );
            let t2 = t * t;
            let t3 = t2 * t;
            let value = (2.0 * t3 - 3.0 * t2 + 1.0) * y0
                + (t3 - 2.0 * t2 + t) * d0
                + (-2.0 * t3 + 3.0 * t2) * y1
                + (t3 - t2) * d1;
            let slope = ((6.0 * t2 - 6.0 * t) * y0
                + (3.0 * t2 - 4.0 * t + 1.0) * d0
                + (-6.0 * t2 + 6.0 * t) * y1
                + (3.0 * t2 - 2.0 * t) * d1)
                / TABLE_STEP;
            (sign * value, sign * slope)
        } else {
            let value = bessel_j(n, beta);
            let slope = if n == 0 {
                -bessel_j(1, beta)
            } else {
                0.5 * (bessel_j(n - 1, beta) - bessel_j(n + 1, beta))
            };
            (value, slope)
        }
    }

    /// J_0(beta) .. J_{k-1}(beta) into `out` (k = `out.len()`, at most MAX_ORDER + 1), sharing
    /// the interpolation weights between orders: the inner loop of the fit.
    pub fn values_into(&self, beta: f64, out: &mut [f64]) {
        let position = beta / TABLE_STEP;
        let i = position.floor();
        if out.len() > STRIDE || !(i >= 0.0 && (i as usize) + 1 < self.rows) {
            for (n, slot) in out.iter_mut().enumerate() {
                *slot = bessel_j(n as i32, beta);
            }
            return;
        }
        let i = i as usize;
        let t = position - i as f64;
        let t2 = t * t;
        let t3 = t2 * t;
        let w_y0 = 2.0 * t3 - 3.0 * t2 + 1.0;
        let w_d0 = (t3 - 2.0 * t2 + t) * TABLE_STEP;
        let w_y1 = -2.0 * t3 + 3.0 * t2;
        let w_d1 = (t3 - t2) * TABLE_STEP;
        let k = out.len();
        let (y0, y1) = (
            &self.values[i * STRIDE..][..k],
            &self.values[(i + 1) * STRIDE..][..k],
        );
        let (d0, d1) = (
            &self.slopes[i * STRIDE..][..k],
            &self.slopes[(i + 1) * STRIDE..][..k],
        );
        for n in 0..k {
            out[n] = w_y0 * y0[n] + w_d0 * d0[n] + w_y1 * y1[n] + w_d1 * d1[n];
        }
    }

    /// The zeros of J_0 .. J_{orders-1} (at most MAX_ORDER + 1 orders) within [lo, hi], each by 40
    /// bisections on the sign change of its J_n over the interval (the zeros of J_n are simple,
    /// DLMF 10.21(i), so J_n changes sign at each; an interval of a few hundredths holds at most
    /// one zero of each order). Near such a zero a line's power J_n^2 is the same on both sides,
    /// so both fits look at the mirror image of their index about it.
    pub fn zeros_within(&self, orders: usize, lo: f64, hi: f64) -> Vec<f64> {
        let count = orders.min(MAX_ORDER + 1);
        let (mut below, mut above) = ([0.0; MAX_ORDER + 1], [0.0; MAX_ORDER + 1]);
        self.values_into(lo, &mut below[..count]);
        self.values_into(hi, &mut above[..count]);
        let mut zeros = Vec::new();
        for n in 0..count {
            if below[n] * above[n] >= 0.0 {
                continue;
            }
            let (mut a, mut b) = (lo, hi);
            let sign_lo = below[n].signum();
            for _ in 0..40 {
                let mid = 0.5 * (a + b);
                if self.value_and_slope(n as i32, mid).0.signum() == sign_lo {
                    a = mid;
                } else {
                    b = mid;
                }
            }
            zeros.push(0.5 * (a + b));
        }
        zeros
    }

    /// J_n(beta)^2, the relative power of line n.
    #[inline]
    pub fn power(&self, n: i32, beta: f64) -> f64 {
        let (value, _) = self.value_and_slope(n, beta);
        value * value
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rustfft::{num_complex::Complex, FftPlanner};

    /// J_n(x) by Bessel's integral J_n(x) = (1/pi) int_0^pi cos(n t - x sin t) dt (DLMF 10.9.2),
    /// with the trapezoid rule, which converges exponentially for this periodic integrand: a
    /// second, independent way to get the same numbers.
    fn bessel_integral(n: i32, x: f64) -> f64 {
        let steps = 2000;
        let h = std::f64::consts::PI / steps as f64;
        let f = |t: f64| (n as f64 * t - x * t.sin()).cos();
        let mut sum = 0.5 * (f(0.0) + f(std::f64::consts::PI));
        for k in 1..steps {
            sum += f(k as f64 * h);
        }
        sum * h / std::f64::consts::PI
    }

    #[test]
    fn library_matches_abramowitz_and_stegun_tables() {
        // (n, x, J_n(x)). J_0, J_1, J_2: Abramowitz & Stegun, Handbook of Mathematical Functions,
        // Table 9.1; J_3, J_5, J_10: A&S Table 9.2 / 9.3 (higher orders). Digits quoted from
        // memory, so every value is also checked against Bessel's integral (DLMF 10.9.2) below.
        let table: [(i32, f64, f64); 12] = [
            (0, 1.0, 0.765_197_686_557_967),   // A&S Table 9.1
            (1, 1.0, 0.440_050_585_744_934),   // A&S Table 9.1
            (2, 1.0, 0.114_903_484_931_901),   // A&S Table 9.1
            (0, 2.0, 0.223_890_779_141_236),   // A&S Table 9.1
            (1, 2.0, 0.576_724_807_756_874),   // A&S Table 9.1
            (2, 2.0, 0.352_834_028_615_638),   // A&S Table 9.1
            (0, 5.0, -0.177_596_771_314_338),  // A&S Table 9.1
            (1, 5.0, -0.327_579_137_591_465),  // A&S Table 9.1
            (2, 5.0, 0.046_565_116_277_752),   // A&S Table 9.1
            (3, 1.0, 0.019_563_353_982_668),   // A&S Table 9.2
            (5, 10.0, -0.234_061_528_186_794), // A&S Table 9.2
            (10, 10.0, 0.207_486_106_633_359), // A&S Table 9.3
        ];
        let lookup = BesselTable::get();
        for (n, x, expected) in table {
            let library = bessel_j(n, x);
            assert!(
                (library - expected).abs() < 1e-8,
                "J_{n}({x}) = {library}, table {expected}"
            );
            let integral = bessel_integral(n, x);
            assert!(
                (integral - expected).abs() < 1e-12,
                "Bessel integral J_{n}({x}) = {integral}, table {expected}"
            );
            let (fast, _) = lookup.value_and_slope(n, x);
            assert!((fast - expected).abs() < 1e-8, "table J_{n}({x}) = {fast}");
        }
    }

    fn table_zeros(orders: usize, lo: f64, hi: f64) -> Vec<f64> {
        BesselTable::get().zeros_within(orders, lo, hi)
    }

    #[test]
    fn zeros_match_dlmf() {
        // Zeros j_{0,1}, j_{0,2}, j_{1,1}, j_{1,2}: DLMF 10.21(i), Table 10.21.1 (A&S Table 9.5);
        // digits from memory, checked here by the sign change of the function around each.
        let zeros: [(i32, f64); 4] = [
            (0, J0_FIRST_ZERO),         // DLMF Table 10.21.1
            (0, 5.520_078_110_286_311), // DLMF Table 10.21.1
            (1, J1_FIRST_ZERO),         // DLMF Table 10.21.1
            (1, 7.015_586_669_815_619), // DLMF Table 10.21.1
        ];
        for (n, zero) in zeros {
            assert!(
                bessel_j(n, zero).abs() < 1e-8,
                "J_{n}({zero}) = {}",
                bessel_j(n, zero)
            );
            assert!(bessel_j(n, zero - 1e-6) * bessel_j(n, zero + 1e-6) < 0.0);
            assert!(bessel_integral(n, zero).abs() < 1e-12);
        }
        // The same zeros found by the table's bisection, each alone in a small interval, and
        // j_0,2 and j_1,2 together in one that holds both (only orders 0 and 1 searched).
        for (n, zero) in zeros {
            let found = table_zeros(n as usize + 1, zero - 0.01, zero + 0.013);
            assert!(
                found.iter().any(|z| (z - zero).abs() < 1e-9),
                "{found:?} for {zero}"
            );
        }
        let both = table_zeros(2, 5.4, 7.1);
        assert_eq!(both.len(), 2, "{both:?}");
        assert!(table_zeros(2, 2.5, 3.7).is_empty());
        // J_1 is largest at 1.8412 (first zero of J_1', DLMF Table 10.21.1): the slope changes sign.
        let table = BesselTable::get();
        assert!(table.value_and_slope(1, 1.8411).1 > 0.0);
        assert!(table.value_and_slope(1, 1.8413).1 < 0.0);
    }

    #[test]
    fn sum_rule_holds() {
        // DLMF 10.23.3 (with z = beta): J_0^2 + 2 sum_{k>=1} J_k^2 = 1.
        for beta in [0.1, 1.0, J0_FIRST_ZERO, 5.0, 8.0, 12.0, 15.5] {
            let mut sum = bessel_j(0, beta).powi(2);
            for k in 1..=60 {
                sum += 2.0 * bessel_j(k, beta).powi(2);
            }
            assert!((sum - 1.0).abs() < 1e-8, "beta {beta}: sum {sum}");
        }
    }

    #[test]
    fn fft_line_powers_match_jacobi_anger() {
        // exp(i beta cos t) = sum_n i^n J_n(beta) e^{i n t} (DLMF 10.12.3): the discrete Fourier
        // transform of one period of the phase-modulated field, computed with the general-purpose
        // rustfft library, gives line powers |c_n|^2 that must equal J_n(beta)^2.
        let samples = 512;
        let mut planner = FftPlanner::<f64>::new();
        let fft = planner.plan_fft_forward(samples);
        let table = BesselTable::get();
        for beta in [0.1, 1.0, 2.3, J0_FIRST_ZERO, 2.7, 5.0, 8.0, 12.0] {
            let mut field: Vec<Complex<f64>> = (0..samples)
                .map(|k| {
                    let t = 2.0 * std::f64::consts::PI * k as f64 / samples as f64;
                    Complex::from_polar(1.0, beta * t.cos())
                })
                .collect();
            fft.process(&mut field);
            for n in -25i32..=25 {
                // Forward DFT uses e^{-i...}: line +n sits in bin (-n mod N).
                let bin = (-n).rem_euclid(samples as i32) as usize;
                let power = field[bin].norm_sqr() / (samples * samples) as f64;
                let expected = bessel_j(n, beta).powi(2);
                assert!(
                    (power - expected).abs() < 1e-9,
                    "beta {beta} n {n}: fft {power} J^2 {expected}"
                );
                assert!(
                    (table.power(n, beta) - power).abs() < 1e-9,
                    "table beta {beta} n {n}"
                );
            }
        }
    }

    #[test]
    fn batch_values_match_single_values() {
        let table = BesselTable::get();
        let mut out = [0.0; 12];
        for beta in [0.0, 0.013, 2.404_825_557_695_773, 7.77, 15.999, 16.5] {
            table.values_into(beta, &mut out);
            for (n, v) in out.iter().enumerate() {
                assert!((v - bessel_j(n as i32, beta)).abs() < 1e-9, "J_{n}({beta})");
            }
        }
    }

    #[test]
    fn table_interpolation_matches_the_library_off_grid() {
        let table = BesselTable::get();
        let mut beta = 0.0;
        while beta < 15.9 {
            for n in [-7, -1, 0, 1, 2, 5, 12, 20, 30] {
                let (v, s) = table.value_and_slope(n, beta);
                assert!((v - bessel_j(n, beta)).abs() < 1e-9, "J_{n}({beta})");
                let expected_slope = 0.5 * (bessel_j(n - 1, beta) - bessel_j(n + 1, beta));
                assert!(
                    (s - expected_slope).abs() < 1e-6,
                    "J_{n}'({beta}) {s} vs {expected_slope}"
                );
            }
            beta += 0.0737;
        }
    }
}
