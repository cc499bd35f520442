//! What the CLI prints about a run: the V_pi table, the 3 dB / 6 dB response frequencies, dates.
//!
//! Shared by `show`, `submit`, `watch` and `demo`, so a run reads the same whichever command
//! printed it. The response frequencies come from [`crate::analysis::response_curve`] (the same
//! function the daemon's response plot uses), never recomputed here. Human output is plain text
//! tables; the JSON forms carry units in their field names.

use crate::analysis::{response_curve, VpiAtFrequency};
use crate::api::views::runs::{FrequencyResultView, RunView};
use halfwave_units::{Hz, VoltsPeak};
use serde::Serialize;

/// The electro-optic response summary of one run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ResponseSummary {
    pub reference_frequency_hz: f64,
    /// Where the response first falls by 3 dB; `None` when it does not within the measured range.
    pub f_3db_hz: Option<f64>,
    /// Where the response first falls by 6 dB; `None` when it does not within the measured range.
    pub f_6db_hz: Option<f64>,
    pub highest_frequency_hz: f64,
}

/// The response summary of a run's results; `None` when no frequency has a V_pi.
pub fn response_summary(results: &[FrequencyResultView]) -> Option<ResponseSummary> {
    let points: Vec<VpiAtFrequency> = results
        .iter()
        .map(|r| VpiAtFrequency {
            frequency: Hz(r.frequency_hz),
            v_pi: VoltsPeak(r.v_pi_volts),
            uncertainty: VoltsPeak(r.v_pi_uncertainty_volts),
        })
        .collect();
    let curve = response_curve(&points).ok()?;
    let highest = points
        .iter()
        .map(|p| p.frequency.0)
        .fold(f64::NEG_INFINITY, f64::max);
    Some(ResponseSummary {
        reference_frequency_hz: curve.reference_frequency_hz.0,
        f_3db_hz: curve.f_3db_hz.map(|f| f.0),
        f_6db_hz: curve.f_6db_hz.map(|f| f.0),
        highest_frequency_hz: highest,
    })
}

/// The V_pi table of a run, one line per frequency, with a header.
pub fn vpi_table(results: &[FrequencyResultView]) -> String {
    let mut out = String::from("  frequency       V_pi   uncertainty (1 sigma)\n");
    let mut sorted: Vec<&FrequencyResultView> = results.iter().collect();
    sorted.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    for r in sorted {
        out.push_str(&format!(
            "{:>8.3} GHz  {:>7.4} V   {:>7.4} V\n",
            r.frequency_hz / 1e9,
            r.v_pi_volts,
            r.v_pi_uncertainty_volts
        ));
    }
    out
}

/// Two lines naming the 3 dB and 6 dB response frequencies (or that they were not reached).
pub fn response_lines(summary: &ResponseSummary) -> String {
    let line = |label: &str, value: Option<f64>| {
        match value {
        Some(f) => format!("{label} response frequency: {:.2} GHz\n", f / 1e9),
        None => format!(
            "{label} response frequency: not reached up to {:.2} GHz (the response stays within {label} of its value at {:.2} GHz)\n",
            summary.highest_frequency_hz / 1e9,
            summary.reference_frequency_hz / 1e9
        ),
    }
    };
    format!(
        "{}{}",
        line("3 dB", summary.f_3db_hz),
        line("6 dB", summary.f_6db_hz)
    )
}

/// A run described for the terminal: state, device, bench, times, V_pi table and response.
pub fn run_text(run: &RunView) -> String {
    let s = &run.summary;
    let mut out = format!(
        "run {}: {} — device {}, bench {}, submitted by {}\n",
        s.id, s.state, s.device_serial, s.bench, s.submitted_by
    );
    out.push_str(&format!("created  {}\n", utc_time(s.created_at_unix_ms)));
    if let Some(t) = s.started_at_unix_ms {
        out.push_str(&format!("started  {}\n", utc_time(t)));
    }
    if let Some(t) = s.finished_at_unix_ms {
        out.push_str(&format!("finished {}\n", utc_time(t)));
    }
    if let Some(cause) = &s.cause {
        out.push_str(&format!("cause: {cause}\n"));
    }
    for instrument in &run.instruments {
        out.push_str(&format!(
            "{:<8} {}\n",
            instrument.role,
            instrument.identity_line()
        ));
        for note in &instrument.connection {
            out.push_str(&format!("         {}: {}\n", note.item, note.value));
        }
    }
    out.push_str(&provenance_text(run));
    out.push_str(&format!("measured points: {}\n", run.measured_points));
    if run.analyzer_sweeps > 0 {
        out.push_str(&format!("analyzer sweeps: {}\n", run.analyzer_sweeps));
    }
    if run.results.is_empty() {
        out.push_str("no V_pi yet\n");
        return out;
    }
    out.push_str(&vpi_table(&run.results));
    if let Some(summary) = response_summary(&run.results) {
        out.push_str(&response_lines(&summary));
    }
    out
}

/// The record's other lines: operator token, chain, software, analysis method and the limits in
/// force ("not recorded" for runs queued before these were kept).
pub fn provenance_text(run: &RunView) -> String {
    let s = &run.summary;
    let p = &run.provenance;
    let unknown = "not recorded";
    let operator = match p.submitted_by_token_id {
        Some(id) => format!("{} (token id {id})", s.submitted_by),
        None => s.submitted_by.clone(),
    };
    let level = |v: Option<f64>| v.map_or(unknown.to_string(), |v| format!("{v:.2} dBm"));
    let device_limit = run
        .plan
        .pointer("/device/rf_input_limit_dbm")
        .and_then(serde_json::Value::as_f64);
    format!(
        "operator: {operator}\nchain:    {} version {}\nsoftware: {}\nmethod:   {}\n\
         limits:   device RF input {}, daemon ceiling {}, plan's highest at the modulator {}\n",
        s.chain_name,
        s.chain_version,
        p.software_version.as_deref().unwrap_or(unknown),
        p.analysis_method.as_deref().unwrap_or(unknown),
        level(device_limit),
        level(p.hard_limit_at_modulator_dbm),
        level(p.planned_max_at_modulator_dbm),
    )
}

pub use crate::calendar::utc_time;

#[cfg(test)]
mod tests {
    use super::*;

    fn result(f: f64, v: f64) -> FrequencyResultView {
        FrequencyResultView {
            frequency_index: 0,
            frequency_hz: f,
            v_pi_volts: v,
            v_pi_uncertainty_volts: 0.01,
            excluded_points: serde_json::Value::Null,
            analyzer_sweeps: None,
        }
    }

    #[test]
    fn the_record_says_not_recorded_for_what_an_old_run_lacks() {
        let run: RunView = serde_json::from_value(serde_json::json!({
            "id": 3, "device_serial": "EG-PM-0042", "bench": "b", "chain_name": "c",
            "chain_version": 2, "state": "completed", "submitted_by": "op", "created_at_unix_ms": 0,
            "started_at_unix_ms": null, "finished_at_unix_ms": null, "cause": null,
            "plan": {"device": {"rf_input_limit_dbm": 27.0}}, "measured_points": 0, "results": []
        }))
        .expect("a run from before provenance was recorded still reads");
        let text = provenance_text(&run);
        assert!(text.contains("operator: op\n"), "{text}");
        assert!(text.contains("chain:    c version 2"), "{text}");
        assert!(text.contains("software: not recorded"), "{text}");
        assert!(text.contains("method:   not recorded"), "{text}");
        assert!(
            text.contains("device RF input 27.00 dBm, daemon ceiling not recorded"),
            "{text}"
        );
    }

    #[test]
    fn response_frequencies_come_from_the_response_curve() {
        // V_pi doubles from 1 to 3 GHz: 20 log10(2) = 6.02 dB, so the -6 dB point lies just
        // below 3 GHz and the -3 dB point where V_pi = sqrt(2) x 3 V (linear interpolation).
        let results = [result(1e9, 3.0), result(2e9, 4.5), result(3e9, 6.0)];
        let summary = response_summary(&results).expect("a curve");
        let f3 = summary.f_3db_hz.expect("3 dB reached");
        assert!(f3 > 1e9 && f3 < 2e9, "{f3}");
        assert!(summary.f_6db_hz.is_some());
        let text = response_lines(&summary);
        assert!(text.contains("3 dB response frequency"), "{text}");
        let flat = response_summary(&[result(1e9, 3.0), result(2e9, 3.1)]).expect("a curve");
        assert!(response_lines(&flat).contains("not reached up to 2.00 GHz"));
    }
}
