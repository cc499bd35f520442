//! The Faddeeva function w(z) = exp(-z^2) erfc(-iz) in the upper half plane, and a table of it
//! along one horizontal line for the Voigt line shape.
//!
//! A Gaussian filter seen with a laser's Lorentzian line is a Voigt profile, the real part of w
//! (DLMF 7.19.3-4: U(x, t) and V(x, t) are its real and imaginary parts). The fit evaluates it at
//! thousands of offsets per step for one pair of widths, so [`VoigtCore`] tabulates w and its
//! slope along the line Im z = y once per pair and reads them back by quintic Hermite
//! interpolation; far from the centre (|z| >= [`ASYMPTOTIC_RADIUS`]) the asymptotic series is
//! summed instead.
//!
//! - Near the centre: Weideman's rational series (J. A. C. Weideman, "Computation of the complex
//!   error function", SIAM J. Numer. Anal. 31(5), 1497-1518, 1994) with N = 32 terms.
//! - Far out: w(z) ~ (i / (sqrt(pi) z)) sum_m (1/2)_m / z^{2m} (DLMF 7.12.1 for erfc, valid for
//!   -pi/4 < ph z < 5pi/4; the term exp(-z^2) it leaves out is under 3e-16 there).
//! - Slopes: dw/dz = -2 z w + 2i / sqrt(pi) (DLMF 7.10.2), and by differentiating it
//!   d2w/dz2 = -2 (w + z w') and d3w/dz3 = -2 (2 w' + z w'').

use num_complex::Complex64 as Complex;
use std::sync::OnceLock;

/// 1 / sqrt(pi).
const FRAC_1_SQRT_PI: f64 = 0.564_189_583_547_756_3;

/// Weideman's number of terms.
const WEIDEMAN_TERMS: usize = 32;

/// |z| from which the asymptotic series is summed (its 12th term is under 2e-11 here).
const ASYMPTOTIC_RADIUS: f64 = 6.0;

/// Most terms of the asymptotic series (at |z| = 6); fewer farther out, see [`asymptotic_terms`].
const ASYMPTOTIC_TERMS: usize = 12;

/// The series' coefficients c_m = (1/2)_m = (2m-1)!! / 2^m.
const ASYMPTOTIC_COEFFICIENTS: [f64; ASYMPTOTIC_TERMS] = {
    let mut c = [0.0; ASYMPTOTIC_TERMS];
    c[0] = 1.0;
    let mut m = 1;
    while m < ASYMPTOTIC_TERMS {
        c[m] = c[m - 1] * (m as f64 - 0.5);
        m += 1;
    }
    c
};

/// Terms of the asymptotic series that bring its truncation, about c_M / |z|^{2M}, under 3e-10
/// relative at |z|^2 = `r2` (the fit asks for most values far out on the wings, where a few
/// terms do).
#[inline]
fn asymptotic_terms(r2: f64) -> usize {
    if r2 >= 2500.0 {
        3
    } else if r2 >= 400.0 {
        4
    } else if r2 >= 100.0 {
        6
    } else {
        ASYMPTOTIC_TERMS
    }
}

/// Spacing of [`VoigtCore`]'s table in Re z. The quintic Hermite error is under h^6/46080 times
/// the sixth derivative (at most about 120 for w, 1700 for dw/dz near the centre): under 1e-9.
const TABLE_STEP: f64 = 0.05;

/// Weideman's coefficients a_1..a_N for L = sqrt(N / sqrt 2): the cosine transform of
/// exp(-t^2) (L^2 + t^2) sampled at t = L tan(theta / 2), theta = k pi / M, M = 2N.
fn weideman_coefficients() -> &'static [f64; WEIDEMAN_TERMS] {
    static COEFFICIENTS: OnceLock<[f64; WEIDEMAN_TERMS]> = OnceLock::new();
    COEFFICIENTS.get_or_init(|| {
        let n = WEIDEMAN_TERMS;
        let m = 2 * n;
        let l = weideman_l();
        let f = |k: i64| -> f64 {
            let theta = k as f64 * std::f64::consts::PI / m as f64;
            let t = l * (0.5 * theta).tan();
            (-t * t).exp() * (l * l + t * t)
        };
        let mut a = [0.0; WEIDEMAN_TERMS];
        for (slot, a_n) in a.iter_mut().enumerate() {
            let order = (slot + 1) as f64;
            // The samples are even in k, so the transform is a cosine sum (k = -M is zero).
            let mut sum = 0.0;
            for k in -(m as i64) + 1..m as i64 {
                sum += f(k) * (std::f64::consts::PI * k as f64 * order / m as f64).cos();
            }
            *a_n = sum / (2 * m) as f64;
        }
        a
    })
}

fn weideman_l() -> f64 {
    (WEIDEMAN_TERMS as f64 / std::f64::consts::SQRT_2).sqrt()
}

/// w(z) by Weideman's series, for Im z >= 0.
fn weideman(z: Complex) -> Complex {
    let a = weideman_coefficients();
    let l = weideman_l();
    let i = Complex::new(0.0, 1.0);
    let denominator = Complex::new(l, 0.0) - i * z;
    let zz = (Complex::new(l, 0.0) + i * z) / denominator;
    let mut p = Complex::new(0.0, 0.0);
    for a_n in a.iter().rev() {
        p = p * zz + a_n;
    }
    let inv = denominator.inv();
    p * 2.0 * inv * inv + inv * FRAC_1_SQRT_PI
}

/// w(z) and dw/dz by the asymptotic series, for |z| >= [`ASYMPTOTIC_RADIUS`] and Im z >= 0:
/// w = (i / sqrt pi) sum_m c_m z^-(2m+1), dw/dz = -(i / sqrt pi) sum_m (2m+1) c_m z^-(2m+2),
/// c_m = (1/2)_m = (2m-1)!! / 2^m. Both summed directly (dw/dz from -2 z w + 2i/sqrt(pi) would
/// lose its digits to cancellation far out).
#[inline]
fn asymptotic(z: Complex) -> (Complex, Complex) {
    let inv = z.inv();
    let inv2 = inv * inv;
    // Horner's scheme unrolled for each count of terms (the Voigt fits of traces whose lines'
    // wings cover the span call this tens of thousands of times per step).
    let (s, ds) = match asymptotic_terms(z.norm_sqr()) {
        3 => asymptotic_sums::<3>(inv2),
        4 => asymptotic_sums::<4>(inv2),
        6 => asymptotic_sums::<6>(inv2),
        _ => asymptotic_sums::<ASYMPTOTIC_TERMS>(inv2),
    };
    // (i k) s and (-i k) ds, k = 1/sqrt(pi), without the products with the zero real part.
    let k = FRAC_1_SQRT_PI;
    (
        Complex::new(-k * s.im, k * s.re) * inv,
        Complex::new(k * ds.im, -k * ds.re) * inv2,
    )
}

/// The series' first `M` terms in q = 1/z^2: sum_m c_m q^m and sum_m (2m+1) c_m q^m.
#[inline(always)]
fn asymptotic_sums<const M: usize>(q: Complex) -> (Complex, Complex) {
    let c = &ASYMPTOTIC_COEFFICIENTS;
    let mut s = Complex::new(c[M - 1], 0.0);
    let mut ds = Complex::new(c[M - 1] * (2 * M - 1) as f64, 0.0);
    for m in (0..M - 1).rev() {
        s = s * q + c[m];
        ds = ds * q + c[m] * (2 * m + 1) as f64;
    }
    (s, ds)
}

/// The Faddeeva function w(z) for Im z >= 0.
pub fn faddeeva(z: Complex) -> Complex {
    if z.norm_sqr() >= ASYMPTOTIC_RADIUS * ASYMPTOTIC_RADIUS {
        asymptotic(z).0
    } else {
        weideman(z)
    }
}

/// dw/dz from w (DLMF 7.10.2).
fn slope(z: Complex, w: Complex) -> Complex {
    -2.0 * z * w + Complex::new(0.0, 2.0 * FRAC_1_SQRT_PI)
}

/// w and dw/dz along the line Im z = y (y >= 0) for Re z >= 0: tabulated where |z| is under
/// [`ASYMPTOTIC_RADIUS`], summed beyond.
#[derive(Debug, Clone, PartialEq)]
pub struct VoigtCore {
    y: f64,
    /// Table nodes u_j = j h: w and its first three derivatives in z there.
    w: Vec<Complex>,
    dw: Vec<Complex>,
    d2w: Vec<Complex>,
    d3w: Vec<Complex>,
    /// Re z beyond which the asymptotic series is summed on this line.
    table_end: f64,
    /// 1 / w(iy) = 1 / erfcx(y): the Voigt profile's peak, by which it is normalised.
    inv_peak: f64,
    /// d erfcx(y) / dy = 2 y erfcx(y) - 2 / sqrt(pi) (DLMF 7.10.2 at z = iy).
    peak_slope: f64,
}

impl VoigtCore {
    /// The table for Im z = `y`.
    pub fn new(y: f64) -> VoigtCore {
        let y = y.max(0.0);
        let r2 = ASYMPTOTIC_RADIUS * ASYMPTOTIC_RADIUS;
        let table_end = if y * y >= r2 {
            0.0
        } else {
            (r2 - y * y).sqrt()
        };
        let count = if table_end > 0.0 {
            (table_end / TABLE_STEP).ceil() as usize + 2
        } else {
            0
        };
        let mut core = VoigtCore {
            y,
            w: Vec::with_capacity(count),
            dw: Vec::with_capacity(count),
            d2w: Vec::with_capacity(count),
            d3w: Vec::with_capacity(count),
            table_end,
            inv_peak: 0.0,
            peak_slope: 0.0,
        };
        for j in 0..count {
            let z = Complex::new(j as f64 * TABLE_STEP, y);
            let w = faddeeva(z);
            let dw = slope(z, w);
            core.w.push(w);
            core.dw.push(dw);
            let d2w = -2.0 * (w + z * dw);
            core.d2w.push(d2w);
            core.d3w.push(-2.0 * (2.0 * dw + z * d2w));
        }
        let peak = core.at(0.0).0.re;
        core.inv_peak = 1.0 / peak;
        core.peak_slope = 2.0 * y * peak - 2.0 * FRAC_1_SQRT_PI;
        core
    }

    /// 1 / w(iy), the inverse of the Voigt profile's peak on this line.
    pub fn inv_peak(&self) -> f64 {
        self.inv_peak
    }

    /// The slope of the peak w(iy) = erfcx(y) in y.
    pub fn peak_slope(&self) -> f64 {
        self.peak_slope
    }

    /// Im z of the line.
    pub fn y(&self) -> f64 {
        self.y
    }

    /// w(u + iy) and dw/dz there, for u >= 0.
    #[inline]
    pub fn at(&self, u: f64) -> (Complex, Complex) {
        if u >= self.table_end {
            return asymptotic(Complex::new(u, self.y));
        }
        let t = u * (1.0 / TABLE_STEP);
        // u >= 0, so truncation is the floor.
        let j = t as usize;
        let s = t - j as f64;
        let h = TABLE_STEP;
        // Quintic Hermite basis on [0, 1]: values, first and second derivatives at both ends.
        let s2 = s * s;
        let s3 = s2 * s;
        let s4 = s3 * s;
        let s5 = s4 * s;
        let p0 = 1.0 - 10.0 * s3 + 15.0 * s4 - 6.0 * s5;
        let p1 = 1.0 - p0;
        let v0 = (s - 6.0 * s3 + 8.0 * s4 - 3.0 * s5) * h;
        let v1 = (-4.0 * s3 + 7.0 * s4 - 3.0 * s5) * h;
        let a0 = 0.5 * (s2 - 3.0 * s3 + 3.0 * s4 - s5) * h * h;
        let a1 = 0.5 * (s3 - 2.0 * s4 + s5) * h * h;
        let (k, n) = (j, j + 1);
        // A function from its values and first two derivatives at both ends.
        let blend = |f: &[Complex], df: &[Complex], d2f: &[Complex]| {
            f[k] * p0 + df[k] * v0 + d2f[k] * a0 + f[n] * p1 + df[n] * v1 + d2f[n] * a1
        };
        let w = blend(&self.w, &self.dw, &self.d2w);
        let dw = blend(&self.dw, &self.d2w, &self.d3w);
        (w, dw)
    }
}

/// Simpson's rule for `f` on [a, b] with `n` (even) intervals: the tests' quadrature, a method
/// independent of the series above.
#[cfg(test)]
pub(crate) fn simpson(f: impl Fn(f64) -> f64, a: f64, b: f64, n: usize) -> f64 {
    let h = (b - a) / n as f64;
    let mut sum = f(a) + f(b);
    for k in 1..n {
        sum += f(a + k as f64 * h) * if k % 2 == 1 { 4.0 } else { 2.0 };
    }
    sum * h / 3.0
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64, relative: f64) -> bool {
        (a - b).abs() <= relative * b.abs().max(1e-300)
    }

    /// w(iy) = erfcx(y) = exp(y^2) erfc(y) (DLMF 7.2.3 at z = iy). erfc(1) = 0.157299207050285,
    /// erfc(2) = 0.004677734981047, erfc(0.5) = 0.479500122186953 (A&S Table 7.1, to 15 digits from
    /// memory of the table's common values).
    #[test]
    fn on_the_imaginary_axis_it_is_the_scaled_complementary_error_function() {
        for (y, erfc) in [
            (0.5, 0.479_500_122_186_953),
            (1.0, 0.157_299_207_050_285),
            (2.0, 0.004_677_734_981_047),
        ] {
            let w = faddeeva(Complex::new(0.0, y));
            let expected = (y * y).exp() * erfc;
            assert!(
                close(w.re, expected, 1e-12),
                "y {y}: {} vs {expected}",
                w.re
            );
            assert!(w.im.abs() < 1e-13, "y {y}: im {}", w.im);
        }
        // Beyond the asymptotic radius, against Laplace's continued fraction (an independent
        // method; A&S 7.1.14): erfcx(y) = (1 / sqrt pi) / (y + (1/2) / (y + 1 / (y + (3/2) / ...))).
        for y in [6.5, 10.0, 40.0] {
            let mut tail = y;
            for k in (1..200).rev() {
                tail = y + 0.5 * k as f64 / tail;
            }
            let expected = FRAC_1_SQRT_PI / tail;
            let w = faddeeva(Complex::new(0.0, y));
            assert!(close(w.re, expected, 1e-9), "y {y}: {} vs {expected}", w.re);
        }
    }

    /// On the real axis Re w = exp(-x^2) and Im w = (2 / sqrt pi) F(x), F Dawson's integral
    /// (DLMF 7.2.5 and 7.5.1): F(0.5) = 0.424436383502022, F(1) = 0.538079506912768,
    /// F(2) = 0.301340388923687 (A&S Table 7.5; from memory), and F(7) = 0.07218097 from its
    /// asymptotic series (1 / 2x) (1 + 1/(2x^2) + 3/(4x^4) + 15/(8x^6)) (A&S 7.1.23 with 7.5).
    #[test]
    fn on_the_real_axis_it_is_the_gaussian_and_dawsons_integral() {
        for (x, dawson, tolerance) in [
            (0.5, 0.424_436_383_502_022, 1e-12),
            (1.0, 0.538_079_506_912_768, 1e-12),
            (2.0, 0.301_340_388_923_687, 1e-12),
            (7.0, 0.072_180_97, 1e-6),
        ] {
            let w = faddeeva(Complex::new(x, 0.0));
            assert!((w.re - (-x * x).exp()).abs() < 1e-13, "x {x}: re {}", w.re);
            let expected = 2.0 * FRAC_1_SQRT_PI * dawson;
            assert!(
                close(w.im, expected, tolerance),
                "x {x}: im {} vs {expected}",
                w.im
            );
        }
    }

    /// Against the defining integral, computed by quadrature (an independent method): for y > 0,
    /// w(x + iy) = (i / pi) int exp(-t^2) / (z - t) dt (DLMF 7.7.2 rearranged), so
    /// Re w = (y / pi) int exp(-t^2) / ((x - t)^2 + y^2) dt and
    /// Im w = (1 / pi) int exp(-t^2) (x - t) / ((x - t)^2 + y^2) dt.
    #[test]
    fn matches_the_defining_integral_across_the_upper_half_plane() {
        let integral = |x: f64, y: f64| -> (f64, f64) {
            // Simpson on [-9, 9] with a step well under y.
            let pi = std::f64::consts::PI;
            let d = |t: f64| (x - t) * (x - t) + y * y;
            let re = simpson(|t| (-t * t).exp() * y / d(t), -9.0, 9.0, 200_000) / pi;
            let im = simpson(|t| (-t * t).exp() * (x - t) / d(t), -9.0, 9.0, 200_000) / pi;
            (re, im)
        };
        for &x in &[0.0, 0.3, 1.0, 2.5, 4.0, 5.9, 6.5, 12.0] {
            for &y in &[0.05, 0.2, 1.0, 3.0, 5.0] {
                let (re, im) = integral(x, y);
                let w = faddeeva(Complex::new(x, y));
                assert!(
                    (w.re - re).abs() < 1e-9 * (1.0 + re.abs()) && (w.im - im).abs() < 1e-9,
                    "w({x} + {y}i) = {w} against the integral's {re} + {im}i"
                );
            }
        }
    }

    /// The two series against each other where both hold (|z| from 6 to 30, near the real axis):
    /// the real part there is the Voigt profile's far wing, about y / (sqrt(pi) x^2), which must
    /// keep its relative accuracy although |w| is a thousand times larger.
    #[test]
    fn the_asymptotic_series_and_weidemans_agree_on_the_far_wings() {
        for &y in &[1e-3, 0.01, 0.2, 2.0] {
            for &x in &[6.0, 8.0, 15.0, 30.0] {
                let z = Complex::new(x, y);
                let (far, far_slope) = asymptotic(z);
                let near = weideman(z);
                assert!(
                    close(far.re, near.re, 1e-7),
                    "re at {z}: {} vs {}",
                    far.re,
                    near.re
                );
                assert!(
                    close(far.im, near.im, 1e-9),
                    "im at {z}: {} vs {}",
                    far.im,
                    near.im
                );
                let s = slope(z, near);
                assert!(
                    (far_slope - s).norm() < 1e-7 * s.norm(),
                    "slope at {z}: {far_slope} vs {s}"
                );
            }
        }
    }

    /// The table read between its nodes against w computed directly, on lines from nearly the
    /// real axis to beyond the asymptotic radius, and its slope against DLMF 7.10.2. Beyond the
    /// table (|z| >= 6) the read is the asymptotic series itself, so there only the slope, summed
    /// as its own series, is compared with DLMF 7.10.2 applied to w.
    #[test]
    fn the_table_reads_back_w_and_its_slope_between_its_nodes() {
        for &y in &[0.0, 1e-3, 0.02, 0.3, 1.5, 4.0, 5.99, 7.0] {
            let core = VoigtCore::new(y);
            let mut u = 0.0;
            while u < 40.0 {
                let z = Complex::new(u, y);
                let (w, dw) = core.at(u);
                let exact = faddeeva(z);
                let exact_slope = slope(z, exact);
                assert!((w - exact).norm() < 2e-9, "w at {z}: {w} vs {exact}");
                assert!(
                    (dw - exact_slope).norm() < 2e-8 * (1.0 + exact_slope.norm()),
                    "dw at {z}: {dw} vs {exact_slope}"
                );
                u += 0.0137;
            }
        }
    }
}
