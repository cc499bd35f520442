//! `halfwave export <run-id> --format csv|json`: a run's measured points and V_pi, for other tools.
//!
//! CSV is one row per measured point with the V_pi fitted at its frequency repeated on each row,
//! so a spreadsheet or a plotting script needs no join; every column name carries its unit
//! (`frequency_hz`, `generator_level_dbm`, `v_peak_volts`, `v_pi_volts`), as the API's JSON
//! fields do. JSON is the run (plan, state, per-frequency results) with all its points, as the
//! API serves them, and V_pi's uncertainty budget (`v_pi_budget`, as `GET /runs/{id}/v-pi-budget`
//! answers; null with `v_pi_budget_unavailable` when its inputs are not known). Points are read page by page, so a run of any size exports.

use super::client::ClientArgs;
use super::output_file::OutputArgs;
use super::runs::{runtime, to_json};
use super::CliError;
use crate::api::views::budget::RunBudgetView;
use crate::api::views::runs::{PointList, PointView, RunView};
use clap::{Args, ValueEnum};

/// Points per request (the API's largest page).
const PAGE: u32 = 1000;

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ExportFormat {
    Csv,
    Json,
}

#[derive(Debug, Args)]
pub struct ExportArgs {
    /// The run to export.
    pub run_id: i64,
    /// csv: one row per point, units in the column names; json: the run with all its points.
    #[arg(long, value_enum, default_value_t = ExportFormat::Csv)]
    pub format: ExportFormat,
    #[command(flatten)]
    pub output: OutputArgs,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The CSV header; units in every name. The run's record (device, chain, instruments, and after
/// the measured values the operator, software, analysis method and how each instrument was
/// driven) is repeated on every row so that a row read alone still says what it is.
pub const CSV_HEADER: &str = "run_id,device_serial,chain_name,chain_version,source_identity,analyzer_identity,frequency_index,level_index,frequency_hz,generator_level_dbm,level_at_modulator_dbm,v_peak_volts,modulation_index,modulation_index_uncertainty,asymmetry_db,v_pi_volts,v_pi_uncertainty_volts,measured_at_unix_ms,submitted_by,submitted_by_token_id,software_version,analysis_method,source_connection,analyzer_connection,v_pi_combined_standard_uncertainty_volts,v_pi_coverage_factor,v_pi_expanded_uncertainty_volts";

/// The driver's choices for a run's instruments in one role, "item: value" joined by "; " (and
/// " then " between instruments, as [`identities`]).
fn connections(run: &RunView, role: &str) -> String {
    run.instruments
        .iter()
        .filter(|i| i.role == role)
        .map(|i| {
            i.connection
                .iter()
                .map(|n| format!("{}: {}", n.item, n.value))
                .collect::<Vec<_>>()
                .join("; ")
        })
        .collect::<Vec<_>>()
        .join(" then ")
}

/// The identities of a run's instruments in one role, joined by " then " (a run resumed on a
/// replaced instrument has two).
fn identities(run: &RunView, role: &str) -> String {
    run.instruments
        .iter()
        .filter(|i| i.role == role)
        .map(|i| i.identity_line())
        .collect::<Vec<_>>()
        .join(" then ")
}

/// The run and its points as CSV (`crate::csv_table::write_rows`: RFC 4180 quoting). The last
/// three columns are V_pi's uncertainty budget at the point's frequency (`budget`: combined
/// standard uncertainty, coverage factor, expanded uncertainty), empty when the budget is not
/// available (its inputs unknown) or has no row for that frequency.
pub fn points_csv(run: &RunView, points: &[PointView], budget: Option<&RunBudgetView>) -> String {
    let results = &run.results;
    let record = [
        run.summary.id.to_string(),
        run.summary.device_serial.clone(),
        run.summary.chain_name.clone(),
        run.summary.chain_version.to_string(),
        identities(run, "source"),
        identities(run, "analyzer"),
    ];
    let provenance = &run.provenance;
    let trailer = [
        run.summary.submitted_by.clone(),
        provenance
            .submitted_by_token_id
            .map(|id| id.to_string())
            .unwrap_or_default(),
        provenance.software_version.clone().unwrap_or_default(),
        provenance.analysis_method.clone().unwrap_or_default(),
        connections(run, "source"),
        connections(run, "analyzer"),
    ];
    let optional = |v: Option<f64>| v.map(|v| v.to_string()).unwrap_or_default();
    let header = CSV_HEADER
        .split(',')
        .map(str::to_string)
        .collect::<Vec<_>>();
    let rows = points.iter().map(|p| {
        let fit = results
            .iter()
            .find(|r| r.frequency_index == p.frequency_index);
        let mut row = record.to_vec();
        row.extend([
            p.frequency_index.to_string(),
            p.level_index.to_string(),
            p.frequency_hz.to_string(),
            p.generator_level_dbm.to_string(),
            p.level_at_modulator_dbm.to_string(),
            p.v_peak_volts.to_string(),
            optional(p.modulation_index),
            optional(p.modulation_index_uncertainty),
            optional(p.asymmetry_db),
            optional(fit.map(|r| r.v_pi_volts)),
            optional(fit.map(|r| r.v_pi_uncertainty_volts)),
            p.measured_at_unix_ms.to_string(),
        ]);
        row.extend(trailer.iter().cloned());
        let budget = budget.and_then(|b| {
            b.frequencies
                .iter()
                .find(|f| f.frequency_index == p.frequency_index)
        });
        row.extend([
            optional(budget.map(|b| b.combined_standard_uncertainty_volts)),
            optional(budget.map(|b| b.coverage_factor)),
            optional(budget.map(|b| b.expanded_uncertainty_volts)),
        ]);
        row
    });
    crate::csv_table::write_rows(std::iter::once(header).chain(rows))
}

/// Adds V_pi's uncertainty budget to an exported run: `v_pi_budget` (the API's table per
/// frequency) or null with `v_pi_budget_unavailable` saying why.
pub fn with_budget(
    value: &mut serde_json::Value,
    budget: Result<RunBudgetView, String>,
) -> Result<(), CliError> {
    match budget {
        Ok(b) => {
            value["v_pi_budget"] = serde_json::to_value(&b)
                .map_err(|e| CliError::new(format!("cannot encode the budget: {e}")))?;
        }
        Err(reason) => {
            value["v_pi_budget"] = serde_json::Value::Null;
            value["v_pi_budget_unavailable"] = serde_json::Value::String(reason);
        }
    }
    Ok(())
}

/// `halfwave export`.
pub fn run(args: ExportArgs) -> Result<(), CliError> {
    args.output.check_free()?;
    let client = args.client.client()?;
    let run_id = args.run_id;
    let (run, points, budget) = runtime()?.block_on(async {
        let run: RunView = client.get_json(&format!("/api/v1/runs/{run_id}")).await?;
        // The budget needs its inputs stored or configured; without them the export says why.
        let budget: Result<RunBudgetView, String> = client
            .get_json(&format!("/api/v1/runs/{run_id}/v-pi-budget"))
            .await
            .map_err(|e| e.to_string());
        let mut points: Vec<PointView> = Vec::new();
        for page in 1.. {
            let list: PointList = client
                .get_json(&format!(
                    "/api/v1/runs/{run_id}/points?page={page}&per_page={PAGE}"
                ))
                .await?;
            let got = list.points.len();
            points.extend(list.points);
            if got == 0 || points.len() >= list.total {
                break;
            }
        }
        Ok::<_, CliError>((run, points, budget))
    })?;
    let text = match args.format {
        ExportFormat::Csv => {
            if let Err(reason) = &budget {
                eprintln!("run {run_id}: the V_pi budget columns are left empty: {reason}");
            }
            points_csv(&run, &points, budget.as_ref().ok())
        }
        ExportFormat::Json => {
            let mut value = serde_json::to_value(&run)
                .map_err(|e| CliError::caused("cannot encode the run", e))?;
            value["points"] = serde_json::to_value(&points)
                .map_err(|e| CliError::caused("cannot encode the points", e))?;
            with_budget(&mut value, budget)?;
            to_json(&value)? + "\n"
        }
    };
    args.output.write(&text)?;
    if let Some(path) = &args.output.output {
        eprintln!(
            "run {run_id}: {} points written to {}",
            points.len(),
            path.display()
        );
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::views::runs::FrequencyResultView;

    fn point(frequency_index: u32, index: Option<f64>) -> PointView {
        PointView {
            id: 1,
            frequency_index,
            level_index: 0,
            frequency_hz: 2e9,
            generator_level_dbm: 10.0,
            level_at_modulator_dbm: 8.0,
            v_peak_volts: 0.7943,
            modulation_index: index,
            modulation_index_uncertainty: index.map(|_| 0.01),
            asymmetry_db: None,
            lines: crate::api::views::runs::null_json(),
            analysis: crate::api::views::runs::null_json(),
            measured_at_unix_ms: 5,
        }
    }

    fn run() -> RunView {
        let summary: crate::api::views::runs::RunSummary = serde_json::from_value(serde_json::json!({
            "id": 7, "device_serial": "EG-PM-0042", "bench": "bench-7", "chain_name": "bench-7 chain",
            "chain_version": 2, "state": "completed", "submitted_by": "op", "created_at_unix_ms": 1,
            "started_at_unix_ms": null, "finished_at_unix_ms": null, "cause": null
        }))
        .expect("a summary");
        let instrument = |role: &str, model: &str| crate::store::RunInstrument {
            role: role.into(),
            manufacturer: "Example Instruments".into(),
            model: model.into(),
            serial: "SN1".into(),
            firmware: "1.0".into(),
            resource: "TCPIP::192.0.2.7::5025::SOCKET".into(),
            connection: vec![crate::store::ConnectionNoteRecord {
                item: "frequency axis".into(),
                value: format!("{role} start_stop, hz"),
            }],
            connection_json: String::new(),
        };
        RunView {
            summary,
            plan: serde_json::Value::Null,
            measured_points: 2,
            analyzer_sweeps: 0,
            results: vec![FrequencyResultView {
                frequency_index: 0,
                frequency_hz: 2e9,
                v_pi_volts: 3.7,
                v_pi_uncertainty_volts: 0.02,
                excluded_points: serde_json::Value::Null,
                analyzer_sweeps: None,
            }],
            instruments: vec![
                instrument("source", "SG-1"),
                instrument("analyzer", "OSA-2"),
            ],
            provenance: crate::api::views::runs::ProvenanceView {
                software_version: Some("halfwave 0.1.0 (git 0123456789ab)".into()),
                analysis_method: Some("method v1".into()),
                submitted_by_token_id: Some(4),
                hard_limit_at_modulator_dbm: Some(27.0),
                planned_max_at_modulator_dbm: Some(20.0),
            },
        }
    }

    /// A budget with one row, at frequency index 0 (u = 0.05 V, k = 2, U = 0.1 V).
    fn budget_at_frequency_0() -> RunBudgetView {
        serde_json::from_value(serde_json::json!({
            "run_id": 7, "chain_uncertainty_from": "query", "source_level_accuracy_db": 0.5,
            "source_level_accuracy_from": "query", "frequencies": [{
                "frequency_index": 0, "frequency_hz": 2e9, "v_pi_volts": 3.7, "rows": [],
                "combined_standard_uncertainty_volts": 0.05, "coverage_factor": 2.0,
                "expanded_uncertainty_volts": 0.1
            }]
        }))
        .unwrap()
    }

    #[test]
    fn the_json_export_carries_the_budget_or_says_why_not() {
        let mut value = serde_json::json!({"summary": {}});
        with_budget(
            &mut value,
            Err("source_level_accuracy_db: not stated".into()),
        )
        .unwrap();
        assert!(value["v_pi_budget"].is_null());
        assert_eq!(
            value["v_pi_budget_unavailable"],
            "source_level_accuracy_db: not stated"
        );
        let budget = budget_at_frequency_0();
        let mut value = serde_json::json!({});
        with_budget(&mut value, Ok(budget)).unwrap();
        assert_eq!(
            value["v_pi_budget"]["frequencies"][0]["expanded_uncertainty_volts"],
            0.1
        );
        assert!(value.get("v_pi_budget_unavailable").is_none());
    }

    #[test]
    fn csv_rows_carry_the_record_their_frequency_v_pi_and_leave_missing_values_empty() {
        let csv = points_csv(&run(), &[point(0, Some(0.67)), point(1, None)], None);
        let lines: Vec<&str> = csv.lines().collect();
        assert_eq!(lines[0], CSV_HEADER);
        let record = "7,EG-PM-0042,bench-7 chain,2,Example Instruments / SG-1 / SN1 / 1.0 @ TCPIP::192.0.2.7::5025::SOCKET,Example Instruments / OSA-2 / SN1 / 1.0 @ TCPIP::192.0.2.7::5025::SOCKET";
        let trailer = "op,4,halfwave 0.1.0 (git 0123456789ab),method v1,\"frequency axis: source start_stop, hz\",\"frequency axis: analyzer start_stop, hz\"";
        assert_eq!(
            lines[1],
            format!("{record},0,0,2000000000,10,8,0.7943,0.67,0.01,,3.7,0.02,5,{trailer},,,")
        );
        // A point whose spectrum was not analysed, at a frequency without a V_pi fit.
        assert_eq!(
            lines[2],
            format!("{record},1,0,2000000000,10,8,0.7943,,,,,,5,{trailer},,,")
        );
        // A cell with a comma or a quote is quoted, inner quotes doubled (RFC 4180, section 2,
        // rules 6 and 7).
        let mut quoted = run();
        quoted.summary.chain_name = "bench-7, \"spare\" chain".into();
        let csv = points_csv(&quoted, &[point(0, None)], None);
        assert!(
            csv.lines()
                .nth(1)
                .unwrap()
                .starts_with("7,EG-PM-0042,\"bench-7, \"\"spare\"\" chain\",2,"),
            "{csv}"
        );
    }

    #[test]
    fn csv_rows_carry_the_budget_of_their_frequency_when_there_is_one() {
        let budget = budget_at_frequency_0();
        let csv = points_csv(
            &run(),
            &[point(0, Some(0.67)), point(1, None)],
            Some(&budget),
        );
        let lines: Vec<&str> = csv.lines().collect();
        assert!(lines[1].ends_with(",0.05,2,0.1"), "{}", lines[1]);
        // Frequency 1 has no budget row: its cells stay empty.
        assert!(
            lines[2].ends_with("analyzer start_stop, hz\",,,"),
            "{}",
            lines[2]
        );
    }
}
