//! What a device's record says over time: its V_pi history, V_pi at any frequency, the run a
//! device plot shows, and two runs side by side.
//!
//! Only completed runs count: a failed, cancelled or interrupted run may have stopped half way and
//! must not stand as the device's calibration.
//!
//! **The lookup rule** ([`DeviceCalibrationSet::vpi_at`]): V_pi at a frequency comes from the
//! device's pinned reference calibration when one is pinned (and from nothing else: a frequency
//! outside its range is refused, naming a run that would cover it); otherwise from the newest
//! completed run whose measured range covers the frequency, so a quick narrow check never hides an
//! older wide calibration outside its own range. A caller may name a run instead.
//!
//! **The plot rule** ([`DeviceCalibrationSet::plotted_run`]): a device plot shows one run: the
//! pinned one; otherwise the newest completed run that covers every frequency the device was
//! calibrated at (the lookup rule applied to the whole calibrated range); otherwise, when no run
//! covers all of it, the newest completed run. The others are drawn lighter behind it.
//!
//! Both rules are pure functions; the interpolation between measured frequencies is analysis
//! (`analysis::vpi_lookup`), with its hand-worked checks there.

use super::{
    CalibrationRun, ComparisonRow, DeviceCalibrationSet, FrequencyResultRecord, InterpolatedVpi,
    RunComparison, RunSelection, RunState, Store, StoreError, VpiHistoryEntry,
};
use crate::analysis::agreement::agreement;
use crate::analysis::vpi_lookup::{extrapolate_vpi, interpolate_vpi, VpiSample};
use halfwave_units::{Hz, VoltsPeak};

impl VpiSample for FrequencyResultRecord {
    fn frequency_hz(&self) -> f64 {
        self.frequency_hz
    }
    fn v_pi_volts(&self) -> f64 {
        self.v_pi_volts
    }
    fn v_pi_uncertainty_volts(&self) -> f64 {
        self.v_pi_uncertainty_volts
    }
}

impl VpiSample for VpiHistoryEntry {
    fn frequency_hz(&self) -> f64 {
        self.frequency_hz
    }
    fn v_pi_volts(&self) -> f64 {
        self.v_pi_volts
    }
    fn v_pi_uncertainty_volts(&self) -> f64 {
        self.v_pi_uncertainty_volts
    }
}

/// How many runs an error message lists by their measured range.
const RANGES_LISTED: usize = 5;

/// Frequencies of two runs closer than this count as the same in a comparison. Plans set
/// generator frequencies at hertz resolution or coarser (common practice), so two runs of the same
/// plan agree far better than this, while no two distinct plan frequencies are this close.
pub const COMPARE_MATCH_TOLERANCE_HZ: f64 = 1.0;

/// Groups a device's history (newest run first, as [`Store::vpi_history`] returns it) into runs,
/// each ascending in frequency.
pub fn group_history(entries: Vec<VpiHistoryEntry>) -> Vec<CalibrationRun> {
    let mut runs: Vec<CalibrationRun> = Vec::new();
    for entry in entries {
        match runs.iter_mut().find(|c| c.run_id == entry.run_id) {
            Some(run) => run.values.push(entry),
            None => runs.push(CalibrationRun {
                run_id: entry.run_id,
                finished_at_unix_ms: entry.finished_at_unix_ms,
                values: vec![entry],
            }),
        }
    }
    for run in &mut runs {
        run.values
            .sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    }
    runs
}

impl DeviceCalibrationSet {
    /// The completed run with this id, if it is one of the device's calibrations.
    pub fn run(&self, run_id: i64) -> Option<&CalibrationRun> {
        self.runs.iter().find(|r| r.run_id == run_id)
    }

    /// The pinned run's id, when one is pinned.
    pub fn pinned_run_id(&self) -> Option<i64> {
        self.pinned.as_ref().map(|p| p.run_id)
    }

    /// The newest run that covers `frequency_hz`.
    pub fn newest_covering(&self, frequency_hz: f64) -> Option<&CalibrationRun> {
        self.runs.iter().find(|r| r.covers(frequency_hz))
    }

    /// The lowest and highest frequency any completed run measured.
    pub fn calibrated_range_hz(&self) -> Option<(f64, f64)> {
        self.runs
            .iter()
            .filter_map(CalibrationRun::range_hz)
            .reduce(|(lo, hi), (l, h)| (lo.min(l), hi.max(h)))
    }

    fn requested(&self, run_id: i64) -> Result<&CalibrationRun, StoreError> {
        self.run(run_id).ok_or_else(|| StoreError::NotACalibration {
            serial: self.serial.clone(),
            run_id,
        })
    }

    /// The pinned run, when it is one of the calibrations (always, as only completed runs with
    /// results can be pinned and completed runs never change).
    fn pinned_run(&self) -> Option<&CalibrationRun> {
        self.pinned_run_id().and_then(|id| self.run(id))
    }

    /// V_pi at `frequency` by the lookup rule (module documentation): the run `requested` if
    /// given, else the pinned run, else the newest completed run that covers the frequency.
    pub fn vpi_at(
        &self,
        frequency: Hz,
        requested: Option<i64>,
    ) -> Result<InterpolatedVpi, StoreError> {
        if self.runs.is_empty() {
            return Err(StoreError::NoCompletedRun {
                serial: self.serial.clone(),
            });
        }
        let f = frequency.value();
        let (run, selection) = match (requested, self.pinned_run()) {
            (Some(id), _) => (self.requested(id)?, RunSelection::Requested),
            (None, Some(pinned)) => (pinned, RunSelection::Pinned),
            (None, None) => match self.newest_covering(f) {
                Some(run) => (run, RunSelection::NewestCovering),
                None => {
                    return Err(StoreError::NotCovered {
                        serial: self.serial.clone(),
                        frequency_hz: f,
                        ranges: self.ranges_text(),
                    })
                }
            },
        };
        let Some((v_pi, uncertainty, lower, upper)) = interpolate_vpi(&run.values, frequency)
        else {
            let (min_hz, max_hz) = run.range_hz().unwrap_or((f64::NAN, f64::NAN));
            let other = self.newest_covering(f).map(|r| r.run_id);
            let hint = match (selection, other) {
                (RunSelection::Pinned, Some(other)) => format!(
                    "; run {} is the device's pinned reference calibration: run {other} covers {f} Hz (ask with run_id={other}, `--run {other}` on the command line, or unpin run {})",
                    run.run_id, run.run_id
                ),
                (RunSelection::Pinned, None) => format!(
                    "; run {} is the device's pinned reference calibration and no other completed run covers {f} Hz either",
                    run.run_id
                ),
                (_, Some(other)) => format!("; run {other} covers it"),
                (_, None) => String::new(),
            };
            return Err(StoreError::OutsideMeasuredRange {
                serial: self.serial.clone(),
                run_id: run.run_id,
                frequency_hz: f,
                min_hz,
                max_hz,
                hint,
            });
        };
        Ok(self.answer(run, selection, frequency, (v_pi, uncertainty, lower, upper)))
    }

    /// The answer from `run`: V_pi, its uncertainty and the two measured frequencies it comes
    /// from.
    fn answer(
        &self,
        run: &CalibrationRun,
        selection: RunSelection,
        frequency: Hz,
        (v_pi, uncertainty, lower, upper): (VoltsPeak, VoltsPeak, Hz, Hz),
    ) -> InterpolatedVpi {
        InterpolatedVpi {
            run_id: run.run_id,
            selection,
            pinned: self.pinned_run_id() == Some(run.run_id),
            frequency_hz: frequency,
            v_pi_volts: v_pi,
            v_pi_uncertainty_volts: uncertainty,
            lower_frequency_hz: lower,
            upper_frequency_hz: upper,
        }
    }

    /// V_pi at `frequency` for planning a drive: by the lookup rule ([`Self::vpi_at`]); when that
    /// finds the frequency outside the measured range and `extrapolate` is set, from the run the
    /// plot rule picks ([`Self::plotted_run`]: requested, pinned, newest covering every
    /// calibrated frequency, newest) by [`extrapolate_vpi`]. The flag says whether it
    /// extrapolated.
    pub fn vpi_for_drive(
        &self,
        frequency: Hz,
        requested: Option<i64>,
        extrapolate: bool,
    ) -> Result<(InterpolatedVpi, bool), StoreError> {
        let outside =
            match self.vpi_at(frequency, requested) {
                Ok(answer) => return Ok((answer, false)),
                Err(
                    e @ (StoreError::OutsideMeasuredRange { .. } | StoreError::NotCovered { .. }),
                ) if extrapolate => e,
                Err(e) => return Err(e),
            };
        let (run, selection) = self.plotted_run(requested)?;
        let Some(values) = extrapolate_vpi(&run.values, frequency) else {
            return Err(outside);
        };
        Ok((self.answer(run, selection, frequency, values), true))
    }

    /// The run a device plot shows, by the plot rule (module documentation): the run `requested`
    /// if given, else the pinned run, else the newest that covers every calibrated frequency,
    /// else the newest.
    pub fn plotted_run(
        &self,
        requested: Option<i64>,
    ) -> Result<(&CalibrationRun, RunSelection), StoreError> {
        if self.runs.is_empty() {
            return Err(StoreError::NoCompletedRun {
                serial: self.serial.clone(),
            });
        }
        if let Some(id) = requested {
            return Ok((self.requested(id)?, RunSelection::Requested));
        }
        if let Some(pinned) = self.pinned_run() {
            return Ok((pinned, RunSelection::Pinned));
        }
        let covering = self
            .calibrated_range_hz()
            .and_then(|(lo, hi)| self.runs.iter().find(|r| r.covers(lo) && r.covers(hi)));
        Ok(match covering {
            Some(run) => (run, RunSelection::NewestCovering),
            None => (&self.runs[0], RunSelection::Newest),
        })
    }

    /// "run 5: 1000000000 Hz to 5000000000 Hz; run 2: ..." for the newest few runs.
    fn ranges_text(&self) -> String {
        let mut parts: Vec<String> = self
            .runs
            .iter()
            .take(RANGES_LISTED)
            .filter_map(|r| {
                r.range_hz()
                    .map(|(lo, hi)| format!("run {}: {lo} Hz to {hi} Hz", r.run_id))
            })
            .collect();
        if self.runs.len() > RANGES_LISTED {
            parts.push(format!("{} older runs", self.runs.len() - RANGES_LISTED));
        }
        parts.join("; ")
    }
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
        on_pool!(&self.pool, pool => sqlx::query_as::<_, VpiHistoryEntry>(
            "SELECT fr.run_id, COALESCE(r.finished_at_unix_ms, r.created_at_unix_ms) AS finished_at_unix_ms, \
                 fr.frequency_hz, fr.v_pi_volts, fr.v_pi_uncertainty_volts \
             FROM frequency_results fr JOIN runs r ON r.id = fr.run_id \
             WHERE r.device_id = $1 AND r.state = $2 \
             ORDER BY finished_at_unix_ms DESC, r.id DESC, fr.frequency_hz",
        )
        .bind(device.id)
        .bind(RunState::Completed.as_str())
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading a device's V_pi history"))
    }

    /// The device's completed calibrations with V_pi results (newest first) and its pinned run:
    /// what lookups and plots choose from.
    pub async fn device_calibrations(
        &self,
        serial: &str,
    ) -> Result<DeviceCalibrationSet, StoreError> {
        let runs = group_history(self.vpi_history(serial).await?);
        let pinned = self.device_pin(serial).await?;
        Ok(DeviceCalibrationSet {
            serial: serial.to_string(),
            pinned,
            runs,
        })
    }

    /// V_pi of the device at `frequency` by the lookup rule (module documentation): from the run
    /// `requested` if given, else the pinned reference calibration, else the newest completed run
    /// that covers the frequency; interpolated linearly between the measured frequencies around
    /// it. Errors when the device has no completed run with results or the chosen run (or, with
    /// none pinned, every run) does not cover the frequency (no extrapolation).
    pub async fn vpi_at(
        &self,
        serial: &str,
        frequency: Hz,
        requested: Option<i64>,
    ) -> Result<InterpolatedVpi, StoreError> {
        self.device_calibrations(serial)
            .await?
            .vpi_at(frequency, requested)
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
