//! V_pi between and beyond the frequencies a run measured: linear interpolation inside the
//! measured range, and the cautious straight-line extrapolation a caller may ask for outside it.
//!
//! Pure: the store reads the rows and implements [`VpiSample`] for them; the lookup rule (which
//! run answers) stays with the device's record in `store::history`.

use halfwave_units::{Hz, VoltsPeak};

/// A measured V_pi at one frequency, whatever row it was read from.
pub trait VpiSample {
    fn frequency_hz(&self) -> f64;
    fn v_pi_volts(&self) -> f64;
    fn v_pi_uncertainty_volts(&self) -> f64;
}

/// V_pi at `frequency` from one run's results, sorted or not: the measured value at a measured
/// frequency, otherwise linear interpolation between the nearest measured frequencies below and
/// above. The uncertainty is interpolated with the same weights (treating the two neighbours'
/// uncertainties as fully correlated, the cautious choice: it never comes out smaller than the
/// smaller of the two). `None` when the frequency is outside the measured range or there are no
/// results.
pub fn interpolate_vpi<S: VpiSample>(
    results: &[S],
    frequency: Hz,
) -> Option<(VoltsPeak, VoltsPeak, Hz, Hz)> {
    let f = frequency.value();
    if !f.is_finite() {
        return None;
    }
    let below = results
        .iter()
        .filter(|r| r.frequency_hz() <= f)
        .max_by(|a, b| a.frequency_hz().total_cmp(&b.frequency_hz()))?;
    let above = results
        .iter()
        .filter(|r| r.frequency_hz() >= f)
        .min_by(|a, b| a.frequency_hz().total_cmp(&b.frequency_hz()))?;
    let span = above.frequency_hz() - below.frequency_hz();
    if span <= 0.0 {
        // `f` is a measured frequency.
        return Some((
            VoltsPeak(below.v_pi_volts()),
            VoltsPeak(below.v_pi_uncertainty_volts()),
            Hz(below.frequency_hz()),
            Hz(above.frequency_hz()),
        ));
    }
    let t = (f - below.frequency_hz()) / span;
    let v_pi = below.v_pi_volts() + t * (above.v_pi_volts() - below.v_pi_volts());
    let uncertainty = below.v_pi_uncertainty_volts()
        + t * (above.v_pi_uncertainty_volts() - below.v_pi_uncertainty_volts());
    Some((
        VoltsPeak(v_pi),
        VoltsPeak(uncertainty),
        Hz(below.frequency_hz()),
        Hz(above.frequency_hz()),
    ))
}

/// V_pi at `frequency` outside one run's measured range, for a caller that asked to extrapolate:
/// the straight line through the two measured frequencies nearest that end (held flat when the
/// run measured one frequency). The line is a guess, so its departure from the end value is
/// counted as a further standard uncertainty, combined in quadrature with the end value's own:
/// the farther out, the wider. Returns (V_pi, uncertainty, and the two measured frequencies
/// used, lower first); `None` inside the range (interpolate instead), without results, or when
/// the line reaches zero or below.
pub fn extrapolate_vpi<S: VpiSample>(
    results: &[S],
    frequency: Hz,
) -> Option<(VoltsPeak, VoltsPeak, Hz, Hz)> {
    let f = frequency.value();
    if !f.is_finite() || results.is_empty() {
        return None;
    }
    let mut sorted: Vec<&S> = results.iter().collect();
    sorted.sort_by(|a, b| a.frequency_hz().total_cmp(&b.frequency_hz()));
    let (first, last) = (sorted[0], sorted[sorted.len() - 1]);
    let (end, next) = if f < first.frequency_hz() {
        (first, sorted.get(1).copied().unwrap_or(first))
    } else if f > last.frequency_hz() {
        (
            last,
            sorted.len().checked_sub(2).map_or(last, |i| sorted[i]),
        )
    } else {
        return None;
    };
    let span = next.frequency_hz() - end.frequency_hz();
    let slope = if span == 0.0 {
        0.0
    } else {
        (next.v_pi_volts() - end.v_pi_volts()) / span
    };
    let v_pi = end.v_pi_volts() + slope * (f - end.frequency_hz());
    if !(v_pi.is_finite() && v_pi > 0.0) {
        return None;
    }
    let uncertainty = end.v_pi_uncertainty_volts().hypot(v_pi - end.v_pi_volts());
    let (lower, upper) = if end.frequency_hz() <= next.frequency_hz() {
        (end, next)
    } else {
        (next, end)
    };
    Some((
        VoltsPeak(v_pi),
        VoltsPeak(uncertainty),
        Hz(lower.frequency_hz()),
        Hz(upper.frequency_hz()),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// (frequency Hz, V_pi V, standard uncertainty V).
    struct Row(f64, f64, f64);

    impl VpiSample for Row {
        fn frequency_hz(&self) -> f64 {
            self.0
        }
        fn v_pi_volts(&self) -> f64 {
            self.1
        }
        fn v_pi_uncertainty_volts(&self) -> f64 {
            self.2
        }
    }

    /// Measured at 1, 2 and 4 GHz, deliberately unsorted.
    fn run() -> Vec<Row> {
        vec![
            Row(4e9, 6.0, 0.30),
            Row(1e9, 4.0, 0.10),
            Row(2e9, 5.0, 0.20),
        ]
    }

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    #[test]
    fn interpolation_is_linear_between_the_neighbours() {
        // Hand-worked: 3 GHz is halfway from 2 GHz (5.0 V, 0.20 V) to 4 GHz (6.0 V, 0.30 V):
        // V_pi = 5.0 + 0.5 * 1.0 = 5.5 V, u = 0.20 + 0.5 * 0.10 = 0.25 V.
        let (v, u, lo, hi) = interpolate_vpi(&run(), Hz(3e9)).unwrap();
        assert!(close(v.0, 5.5) && close(u.0, 0.25), "{v:?} {u:?}");
        assert_eq!((lo.0, hi.0), (2e9, 4e9));
        // Hand-worked: 1.25 GHz is a quarter of the way from 1 to 2 GHz: 4.0 + 0.25 * 1.0 = 4.25 V,
        // u = 0.10 + 0.25 * 0.10 = 0.125 V.
        let (v, u, lo, hi) = interpolate_vpi(&run(), Hz(1.25e9)).unwrap();
        assert!(close(v.0, 4.25) && close(u.0, 0.125), "{v:?} {u:?}");
        assert_eq!((lo.0, hi.0), (1e9, 2e9));
    }

    #[test]
    fn a_measured_frequency_gives_its_own_value() {
        let (v, u, lo, hi) = interpolate_vpi(&run(), Hz(2e9)).unwrap();
        assert_eq!((v.0, u.0, lo.0, hi.0), (5.0, 0.20, 2e9, 2e9));
    }

    #[test]
    fn interpolation_refuses_outside_the_range_and_non_finite_input() {
        assert!(interpolate_vpi(&run(), Hz(0.5e9)).is_none());
        assert!(interpolate_vpi(&run(), Hz(5e9)).is_none());
        assert!(interpolate_vpi(&run(), Hz(f64::NAN)).is_none());
        assert!(interpolate_vpi::<Row>(&[], Hz(1e9)).is_none());
    }

    #[test]
    fn extrapolation_follows_the_end_line_and_widens() {
        // Hand-worked: above 4 GHz the line through 2 GHz (5.0 V) and 4 GHz (6.0 V) has slope
        // 0.5 V/GHz, so 5 GHz gives 6.5 V; the 0.5 V departure from the end value adds in
        // quadrature to its 0.30 V: u = sqrt(0.30^2 + 0.5^2) = sqrt(0.34) = 0.583095... V.
        let (v, u, lo, hi) = extrapolate_vpi(&run(), Hz(5e9)).unwrap();
        assert!(close(v.0, 6.5), "{v:?}");
        assert!(close(u.0, 0.34f64.sqrt()), "{u:?}");
        assert_eq!((lo.0, hi.0), (2e9, 4e9));
        // Hand-worked: below 1 GHz the line through 1 GHz (4.0 V) and 2 GHz (5.0 V), 1 V/GHz:
        // 0.5 GHz gives 3.5 V, u = sqrt(0.10^2 + 0.5^2) = sqrt(0.26) V.
        let (v, u, lo, hi) = extrapolate_vpi(&run(), Hz(0.5e9)).unwrap();
        assert!(close(v.0, 3.5) && close(u.0, 0.26f64.sqrt()), "{v:?} {u:?}");
        assert_eq!((lo.0, hi.0), (1e9, 2e9));
    }

    #[test]
    fn extrapolation_refuses_inside_the_range_and_a_line_through_zero() {
        assert!(extrapolate_vpi(&run(), Hz(3e9)).is_none());
        // Hand-worked: the line through 1 GHz (1.0 V) and 2 GHz (5.0 V) gives -3.0 V at 0 Hz:
        // no V_pi, refused.
        let steep = [Row(1e9, 1.0, 0.1), Row(2e9, 5.0, 0.1)];
        assert!(extrapolate_vpi(&steep, Hz(0.0)).is_none());
        // Hand-worked: 1.0 V at 1 GHz and 3.0 V at 2 GHz give 1.0 - 2.0 x 0.6 = -0.2 V at 0.4 GHz,
        // refused; 0.8 GHz gives 0.6 V, 0.4 V past the end value (u = sqrt(0^2 + 0.4^2)); 1.5 GHz
        // is inside the range.
        let two = [Row(2e9, 3.0, 0.0), Row(1e9, 1.0, 0.0)];
        assert!(extrapolate_vpi(&two, Hz(0.4e9)).is_none());
        let (v, u, _, _) = extrapolate_vpi(&two, Hz(0.8e9)).unwrap();
        assert!(close(v.0, 0.6) && close(u.0, 0.4), "{v:?} {u:?}");
        assert!(extrapolate_vpi(&two, Hz(1.5e9)).is_none());
        // One measured frequency: held flat, the departure is zero.
        let (v, u, _, _) = extrapolate_vpi(&[Row(1e9, 4.0, 0.1)], Hz(3e9)).unwrap();
        assert_eq!((v.0, u.0), (4.0, 0.1));
    }
}
