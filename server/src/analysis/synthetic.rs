//! Synthetic comb traces computed from Bessel physics, for tests, benchmarks and demos.
//!
//! A phase-modulated carrier seen through an analyzer's resolution filter: lines at
//! f_c + n f_m with power P_total J_n(beta)^2 (DLMF 10.12), each drawn with a Gaussian filter
//! shape whose full width at half maximum is the resolution bandwidth (a common approximation of
//! an analyzer's filter), on top of a flat noise floor, with a caller-supplied noise in dB on
//! every point. The line powers come from the library routine `puruspe::Jn`, not from the
//! analysis' own table, so that tests built on these traces check the fit rather than repeat it.

use super::bessel::bessel_j;
use halfwave_units::{Dbm, Hz, Trace, TraceError};

/// Everything that defines a synthetic trace.
#[derive(Debug, Clone, PartialEq)]
pub struct SyntheticComb {
    /// Optical frequency of the carrier on the trace axis.
    pub carrier: Hz,
    /// Line spacing (the RF drive frequency).
    pub modulation_frequency: Hz,
    /// Modulation index beta.
    pub modulation_index: f64,
    /// Optical power of the unmodulated carrier.
    pub total_power: Dbm,
    /// Level of the flat noise floor.
    pub floor: Dbm,
    /// Full width at half maximum of the Gaussian line shape.
    pub resolution_bandwidth: Hz,
    /// First frequency of the axis.
    pub start: Hz,
    /// Last frequency of the axis.
    pub stop: Hz,
    /// Number of points (at least 3).
    pub points: usize,
    /// Extra gain of line n, in dB per order (n times this): a tilt that makes +n and -n differ,
    /// as residual amplitude modulation or an analyzer slope would.
    pub tilt_db_per_order: f64,
}

/// Highest order drawn (lines further out are far below any floor used here).
const DRAWN_ORDERS: i32 = 60;

impl SyntheticComb {
    /// A comb centred in a span that shows `half_span_orders` spacings either side of `centre`,
    /// with the carrier moved from the centre by `drift`, on 10,001 points.
    pub fn centred(
        centre: Hz,
        drift: Hz,
        modulation_frequency: Hz,
        modulation_index: f64,
        half_span_orders: f64,
    ) -> SyntheticComb {
        let half_span = modulation_frequency.0 * half_span_orders;
        SyntheticComb {
            carrier: Hz(centre.0 + drift.0),
            modulation_frequency,
            modulation_index,
            total_power: Dbm(0.0),
            floor: Dbm(-65.0),
            resolution_bandwidth: Hz(modulation_frequency.0 / 10.0),
            start: Hz(centre.0 - half_span),
            stop: Hz(centre.0 + half_span),
            points: 10_001,
            tilt_db_per_order: 0.0,
        }
    }

    /// The power of line `order` without noise or floor.
    pub fn line_power(&self, order: i32) -> Dbm {
        let relative = bessel_j(order, self.modulation_index).powi(2);
        let tilt = 10f64.powf(self.tilt_db_per_order * order as f64 / 10.0);
        Dbm(self.total_power.0 + 10.0 * (relative * tilt).log10())
    }

    /// Draws the trace, adding `noise_db()` (in dB) to every point. Fails only when the axis
    /// settings do not make a valid trace (a stop not above the start, non-finite values).
    pub fn trace(&self, noise_db: &mut dyn FnMut() -> f64) -> Result<Trace, TraceError> {
        let points = self.points.max(Trace::MIN_POINTS);
        let step = (self.stop.0 - self.start.0) / (points - 1) as f64;
        let fm = self.modulation_frequency.0;
        let sigma = self.resolution_bandwidth.0 / (8.0 * std::f64::consts::LN_2).sqrt();
        let reach = (5.0 * self.resolution_bandwidth.0 / fm).ceil() as i32;
        let line_mw: Vec<f64> = (-DRAWN_ORDERS..=DRAWN_ORDERS)
            .map(|n| self.line_power(n).to_milliwatts())
            .collect();
        let floor_mw = self.floor.to_milliwatts();
        let mut frequency = Vec::with_capacity(points);
        let mut power = Vec::with_capacity(points);
        for i in 0..points {
            let f = self.start.0 + step * i as f64;
            let nearest = ((f - self.carrier.0) / fm).round() as i32;
            let mut mw = floor_mw;
            for n in (nearest - reach).max(-DRAWN_ORDERS)..=(nearest + reach).min(DRAWN_ORDERS) {
                let offset = f - (self.carrier.0 + n as f64 * fm);
                let shape = (-0.5 * (offset / sigma).powi(2)).exp();
                mw += line_mw[(n + DRAWN_ORDERS) as usize] * shape;
            }
            frequency.push(f);
            power.push(10.0 * mw.log10() + noise_db());
        }
        Trace::new(frequency, power, None)
    }
}
