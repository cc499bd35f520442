//! What a device's record says over time: its V_pi history, the latest V_pi at any frequency, and
//! two runs side by side.
//!
//! Only completed runs count: a failed, cancelled or interrupted run may have stopped half way and
//! must not stand as the device's calibration. The interpolation is a pure function
//! ([`interpolate_vpi`]) so it can be checked against hand-worked numbers without a database.

use super::{
    ComparisonRow, FrequencyResultRecord, InterpolatedVpi, RunComparison, RunState, Store,
    StoreError, VpiHistoryEntry,
};
use crate::analysis::agreement::agreement;
use halfwave_units::{Hz, Volts};

/// Frequencies of two runs closer than this count as the same in a comparison. Plans set
/// generator frequencies at hertz resolution or coarser (common practice), so two runs of the same
/// plan agree far better than this, while no two distinct plan frequencies are this close.
pub const COMPARE_MATCH_TOLERANCE_HZ: f64 = 1.0;

/// V_pi at `frequency` from one run's results, sorted or not: the measured value at a measured
/// frequency, otherwise linear interpolation between the nearest measured frequencies below and
/// above. The uncertainty is interpolated with the same weights (treating the two neighbours'
/// uncertainties as fully correlated, the cautious choice: it never comes out smaller than the
/// smaller of the two). `None` when the frequency is outside the measured range or there are no
/// results.
pub fn interpolate_vpi(
    results: &[FrequencyResultRecord],
    frequency: Hz,
) -> Option<(Volts, Volts, Hz, Hz)> {
    let f = frequency.value();
    if !f.is_finite() {
        return None;
    }
    let below = results
        .iter()
        .filter(|r| r.frequency_hz <= f)
        .max_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz))?;
    let above = results
        .iter()
        .filter(|r| r.frequency_hz >= f)
        .min_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz))?;
    let span = above.frequency_hz - below.frequency_hz;
    if span <= 0.0 {
        // `f` is a measured frequency.
        return Some((
            below.v_pi(),
            below.v_pi_uncertainty(),
            below.frequency(),
            above.frequency(),
        ));
    }
    let t = (f - below.frequency_hz) / span;
    let v_pi = below.v_pi_volts + t * (above.v_pi_volts - below.v_pi_volts);
    let uncertainty = below.v_pi_uncertainty_volts
        + t * (above.v_pi_uncertainty_volts - below.v_pi_uncertainty_volts);
    Some((
        Volts(v_pi),
        Volts(uncertainty),
        below.frequency(),
        above.frequency(),
    ))
}

/// A comparison row with only the frequency filled in.
fn one_side(frequency_hz: f64) -> ComparisonRow {
    ComparisonRow {
        frequency_hz,
        v_pi_a_volts: None,
        v_pi_b_volts: None,
        v_pi_a_uncertainty_volts: None,
        v_pi_b_uncertainty_volts: None,
        difference_percent: None,
        difference_volts: None,
        difference_uncertainty_volts: None,
        normalized_error: None,
        significant: None,
    }
}

/// Pairs two runs' results by frequency (ascending), matching within
/// [`COMPARE_MATCH_TOLERANCE_HZ`]; the difference is 100 * (b - a) / a.
pub fn compare_results(
    a: &[FrequencyResultRecord],
    b: &[FrequencyResultRecord],
) -> Vec<ComparisonRow> {
    let mut a: Vec<&FrequencyResultRecord> = a.iter().collect();
    let mut b: Vec<&FrequencyResultRecord> = b.iter().collect();
    a.sort_by(|x, y| x.frequency_hz.total_cmp(&y.frequency_hz));
    b.sort_by(|x, y| x.frequency_hz.total_cmp(&y.frequency_hz));
    let only_a = |r: &FrequencyResultRecord| ComparisonRow {
        v_pi_a_volts: Some(r.v_pi_volts),
        v_pi_a_uncertainty_volts: Some(r.v_pi_uncertainty_volts),
        ..one_side(r.frequency_hz)
    };
    let only_b = |r: &FrequencyResultRecord| ComparisonRow {
        v_pi_b_volts: Some(r.v_pi_volts),
        v_pi_b_uncertainty_volts: Some(r.v_pi_uncertainty_volts),
        ..one_side(r.frequency_hz)
    };
    let (mut i, mut j) = (0, 0);
    let mut rows = Vec::with_capacity(a.len().max(b.len()));
    loop {
        match (a.get(i), b.get(j)) {
            (None, None) => break,
            (Some(ra), Some(rb))
                if (ra.frequency_hz - rb.frequency_hz).abs() <= COMPARE_MATCH_TOLERANCE_HZ =>
            {
                let agreement = agreement(
                    ra.v_pi_volts,
                    ra.v_pi_uncertainty_volts,
                    rb.v_pi_volts,
                    rb.v_pi_uncertainty_volts,
                );
                rows.push(ComparisonRow {
                    frequency_hz: ra.frequency_hz,
                    v_pi_a_volts: Some(ra.v_pi_volts),
                    v_pi_b_volts: Some(rb.v_pi_volts),
                    v_pi_a_uncertainty_volts: Some(ra.v_pi_uncertainty_volts),
                    v_pi_b_uncertainty_volts: Some(rb.v_pi_uncertainty_volts),
                    difference_percent: Some(
                        100.0 * (rb.v_pi_volts - ra.v_pi_volts) / ra.v_pi_volts,
                    ),
                    difference_volts: Some(rb.v_pi_volts - ra.v_pi_volts),
                    difference_uncertainty_volts: agreement
                        .map(|a| a.combined_standard_uncertainty),
                    normalized_error: agreement.map(|a| a.normalized_error),
                    significant: agreement.map(|a| a.significant),
                });
                i += 1;
                j += 1;
            }
            (Some(ra), Some(rb)) if ra.frequency_hz < rb.frequency_hz => {
                rows.push(only_a(ra));
                i += 1;
            }
            (Some(ra), None) => {
                rows.push(only_a(ra));
                i += 1;
            }
            (_, Some(rb)) => {
                rows.push(only_b(rb));
                j += 1;
            }
        }
    }
    rows
}

impl Store {
    /// V_pi per frequency of every completed run of the device, newest run first, each run's
    /// frequencies ascending.
    pub async fn vpi_history(&self, serial: &str) -> Result<Vec<VpiHistoryEntry>, StoreError> {
        let device = self.device_by_serial(serial).await?;
        sqlx::query_as::<_, VpiHistoryEntry>(
            "SELECT fr.run_id, COALESCE(r.finished_at_unix_ms, r.created_at_unix_ms) AS finished_at_unix_ms, \
                 fr.frequency_hz, fr.v_pi_volts, fr.v_pi_uncertainty_volts \
             FROM frequency_results fr JOIN runs r ON r.id = fr.run_id \
             WHERE r.device_id = $1 AND r.state = $2 \
             ORDER BY finished_at_unix_ms DESC, r.id DESC, fr.frequency_hz",
        )
        .bind(device.id)
        .bind(RunState::Completed.as_str())
        .fetch_all(&self.pool)
        .await
        .map_err(StoreError::database("reading a device's V_pi history"))
    }

    /// V_pi of the device at `frequency` from its newest completed run with results, interpolated
    /// linearly between the measured frequencies around it. Errors when the device has no such
    /// run or the frequency is outside the run's measured range (no extrapolation).
    pub async fn latest_vpi_at(
        &self,
        serial: &str,
        frequency: Hz,
    ) -> Result<InterpolatedVpi, StoreError> {
        let device = self.device_by_serial(serial).await?;
        let run_id: Option<i64> = sqlx::query_scalar(
            "SELECT r.id FROM runs r WHERE r.device_id = $1 AND r.state = $2 \
                 AND EXISTS (SELECT 1 FROM frequency_results fr WHERE fr.run_id = r.id) \
             ORDER BY COALESCE(r.finished_at_unix_ms, r.created_at_unix_ms) DESC, r.id DESC LIMIT 1",
        )
        .bind(device.id)
        .bind(RunState::Completed.as_str())
        .fetch_optional(&self.pool)
        .await
        .map_err(StoreError::database("finding a device's newest completed run"))?;
        let run_id = run_id.ok_or_else(|| StoreError::NoCompletedRun {
            serial: device.serial.clone(),
        })?;
        let results = self.frequency_results(run_id).await?;
        match interpolate_vpi(&results, frequency) {
            Some((v_pi, uncertainty, lower, upper)) => Ok(InterpolatedVpi {
                run_id,
                frequency_hz: frequency,
                v_pi_volts: v_pi,
                v_pi_uncertainty_volts: uncertainty,
                lower_frequency_hz: lower,
                upper_frequency_hz: upper,
            }),
            None => {
                let min_hz = results
                    .iter()
                    .map(|r| r.frequency_hz)
                    .fold(f64::INFINITY, f64::min);
                let max_hz = results
                    .iter()
                    .map(|r| r.frequency_hz)
                    .fold(f64::NEG_INFINITY, f64::max);
                Err(StoreError::OutsideMeasuredRange {
                    serial: device.serial,
                    run_id,
                    frequency_hz: frequency.value(),
                    min_hz,
                    max_hz,
                })
            }
        }
    }

    /// Two runs' V_pi per frequency, with the difference of run B from run A in percent where both
    /// measured the same frequency.
    pub async fn compare_runs(&self, run_a: i64, run_b: i64) -> Result<RunComparison, StoreError> {
        self.run(run_a).await?;
        self.run(run_b).await?;
        let a = self.frequency_results(run_a).await?;
        let b = self.frequency_results(run_b).await?;
        Ok(RunComparison {
            run_a,
            run_b,
            rows: compare_results(&a, &b),
        })
    }
}
