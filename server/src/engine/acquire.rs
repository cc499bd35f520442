//! Acquisition steps on the analyzer: find the laser, take (averaged) traces.
//!
//! These are the only engine steps that talk to the analyzer, kept apart from the run loop so
//! that each is small and testable against the simulated bench. Averaging is done in linear power
//! (averaging dB values would bias weak, noisy lines low).

use halfwave_drivers::{AnalyzerCapabilities, AnalyzerSettings, InstrumentError, SpectrumAnalyzer};
use halfwave_units::{Hz, Trace};

/// The widest span used to look for the laser before a frequency's measurements.
pub const LOCATE_SPAN_MAX: Hz = Hz(200e9);

/// Takes `averages` sweeps and returns their linear-power average.
pub async fn measure(
    analyzer: &mut dyn SpectrumAnalyzer,
    averages: u32,
) -> Result<Trace, InstrumentError> {
    analyzer.sweep().await?;
    let first = analyzer.fetch_trace().await?;
    if averages <= 1 {
        return Ok(first);
    }
    let mut sum: Vec<f64> = first.power_dbm().iter().map(|p| dbm_to_mw(*p)).collect();
    // Every sweep must show the first one's axis, to a thousandth of a point spacing: another
    // client of a shared analyzer may have moved the span in between, and powers of other
    // frequencies must not be averaged together.
    let axis = first.frequency_hz();
    let tolerance = 1e-3 * (axis[axis.len() - 1] - axis[0]) / (axis.len() - 1) as f64;
    for _ in 1..averages {
        analyzer.sweep().await?;
        let next = analyzer.fetch_trace().await?;
        if next.len() != sum.len() {
            return Err(InstrumentError::Parse {
                resource: analyzer.resource().to_string(),
                operation: "trace fetch while averaging".into(),
                detail: format!(
                    "the trace length changed between sweeps ({} then {} points)",
                    sum.len(),
                    next.len()
                ),
            });
        }
        let next_axis = next.frequency_hz();
        if let Some(i) = (0..axis.len()).find(|&i| (axis[i] - next_axis[i]).abs() > tolerance) {
            return Err(InstrumentError::Parse {
                resource: analyzer.resource().to_string(),
                operation: "trace fetch while averaging".into(),
                detail: format!(
                    "the frequency axis changed between sweeps (point {i}: {} then {}); is another client changing the analyzer's settings?",
                    Hz(axis[i]),
                    Hz(next_axis[i])
                ),
            });
        }
        for (s, p) in sum.iter_mut().zip(next.power_dbm()) {
            *s += dbm_to_mw(*p);
        }
    }
    let n = averages as f64;
    let power: Vec<f64> = sum.iter().map(|s| 10.0 * (s / n).log10()).collect();
    let rbw = first.resolution_bandwidth();
    let (freq, _, _) = first.into_parts();
    Trace::new(freq, power, rbw).map_err(|e| InstrumentError::Parse {
        resource: analyzer.resource().to_string(),
        operation: "averaging traces".into(),
        detail: e.to_string(),
    })
}

fn dbm_to_mw(p: f64) -> f64 {
    10f64.powf(p / 10.0)
}

/// Finds the laser line with a wide sweep around `nominal` (RF must be off) and returns its
/// optical frequency. The analyzer is left at the wide settings; the caller configures the
/// measurement settings next.
pub async fn locate_laser(
    analyzer: &mut dyn SpectrumAnalyzer,
    caps: &AnalyzerCapabilities,
    nominal: Hz,
    wanted_span: Hz,
) -> Result<Hz, InstrumentError> {
    // At least the measurement span, normally LOCATE_SPAN_MAX, never more than the analyzer offers.
    let span = Hz(wanted_span.0.max(LOCATE_SPAN_MAX.0).min(caps.max_span.0));
    let points = caps.max_points.min(20_001);
    // The widest resolution that still separates the laser from the floor: coarse is fine here.
    let rbw = caps
        .resolution_bandwidths
        .iter()
        .copied()
        .filter(|r| r.0 <= span.0 / points as f64 * 4.0)
        .fold(None::<Hz>, |best, r| match best {
            Some(b) if b.0 >= r.0 => Some(b),
            _ => Some(r),
        })
        .or_else(|| caps.resolution_bandwidths.last().copied())
        .unwrap_or(Hz(span.0 / points as f64 * 2.0));
    analyzer
        .configure(&AnalyzerSettings {
            center: nominal,
            span,
            resolution_bandwidth: rbw,
            points,
        })
        .await?;
    analyzer.sweep().await?;
    let trace = analyzer.fetch_trace().await?;
    Ok(peak_frequency(&trace))
}

/// Frequency of the strongest point of a trace, refined by a parabola through its neighbours.
pub fn peak_frequency(trace: &Trace) -> Hz {
    let p = trace.power_dbm();
    let f = trace.frequency_hz();
    let mut best = 0;
    for i in 1..p.len() {
        if p[i] > p[best] {
            best = i;
        }
    }
    if best == 0 || best + 1 >= p.len() {
        return Hz(f[best]);
    }
    let (a, b, c) = (p[best - 1], p[best], p[best + 1]);
    let denom = a - 2.0 * b + c;
    let shift = if denom.abs() > 1e-12 {
        (0.5 * (a - c) / denom).clamp(-0.5, 0.5)
    } else {
        0.0
    };
    let step = (f[best + 1] - f[best - 1]) / 2.0;
    Hz(f[best] + shift * step)
}

#[cfg(test)]
mod tests {
    use super::*;
    use halfwave_drivers::sim::{Scenario, SimAnalyzer, SimBench};
    use halfwave_drivers::Identity;

    /// The simulated analyzer, with the axis of every trace after the first moved by `shift_hz`
    /// (as if another client had moved the centre between sweeps).
    struct MovingAxis {
        inner: SimAnalyzer,
        fetched: usize,
        shift_hz: f64,
    }

    #[async_trait::async_trait]
    impl SpectrumAnalyzer for MovingAxis {
        fn resource(&self) -> &str {
            self.inner.resource()
        }
        async fn identify(&mut self) -> Result<Identity, InstrumentError> {
            self.inner.identify().await
        }
        fn capabilities(&self) -> AnalyzerCapabilities {
            self.inner.capabilities()
        }
        async fn set_center(&mut self, center: Hz) -> Result<Hz, InstrumentError> {
            self.inner.set_center(center).await
        }
        async fn set_span(&mut self, span: Hz) -> Result<Hz, InstrumentError> {
            self.inner.set_span(span).await
        }
        async fn set_resolution_bandwidth(&mut self, rbw: Hz) -> Result<Hz, InstrumentError> {
            self.inner.set_resolution_bandwidth(rbw).await
        }
        async fn set_points(&mut self, points: usize) -> Result<usize, InstrumentError> {
            self.inner.set_points(points).await
        }
        async fn sweep(&mut self) -> Result<(), InstrumentError> {
            self.inner.sweep().await
        }
        async fn fetch_trace(&mut self) -> Result<Trace, InstrumentError> {
            let trace = self.inner.fetch_trace().await?;
            self.fetched += 1;
            if self.fetched == 1 {
                return Ok(trace);
            }
            let rbw = trace.resolution_bandwidth();
            let (freq, power, _) = trace.into_parts();
            let freq = freq.into_iter().map(|f| f + self.shift_hz).collect();
            Ok(Trace::new(freq, power, rbw).unwrap())
        }
    }

    #[tokio::test]
    async fn averaging_refuses_sweeps_on_different_axes() {
        let sim = SimBench::new(Scenario::builtin().unwrap(), 5).with_time_factor(0.0);
        for (shift_hz, refused) in [(0.0, false), (2e9, true)] {
            let mut analyzer = MovingAxis {
                inner: sim.analyzer(),
                fetched: 0,
                shift_hz,
            };
            let outcome = measure(&mut analyzer, 3).await;
            assert_eq!(outcome.is_err(), refused, "{outcome:?}");
            if let Err(e) = outcome {
                assert!(e.to_string().contains("frequency axis changed"), "{e}");
            }
        }
    }

    #[test]
    fn peak_refines_between_points() {
        // A symmetric parabola in dB centred between two samples: the vertex formula of a
        // parabola through three points (elementary algebra) puts it exactly at 2.5.
        let f = vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0];
        let p: Vec<f64> = f.iter().map(|x: &f64| -(x - 2.5) * (x - 2.5)).collect();
        let t = Trace::new(f, p, None).unwrap();
        assert!((peak_frequency(&t).0 - 2.5).abs() < 1e-9);
    }
}
