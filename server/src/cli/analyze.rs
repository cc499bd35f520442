//! `halfwave analyze`: the measurement core on files a user already has.
//!
//! Two inputs, told apart by the file name: a trace CSV (header `frequency_hz,power_dbm`, one
//! point per line) with `--modulation-frequency`, or a sweep JSON that lists traces taken at
//! several generator levels and the drive chain between generator and modulator. The result is
//! JSON on stdout. Reading and checking the files is done here, line by line, so that every
//! complaint names the file and the line; the numbers are left to [`crate::analysis`].

use super::CliError;
use crate::analysis::{
    analyze_trace, fit_v_pi, AnalysisError, AnalysisOptions, AnalysisWarning, ChainPoint,
    DriveChain, DrivePoint, ExcludedPoint, TraceAnalysis, VpiFit,
};
use halfwave_units::{Db, Dbm, Hz, Trace, VoltsPeak};
use serde::{Deserialize, Serialize};
use std::io::Write;
use std::path::{Path, PathBuf};

/// Header a trace CSV must start with.
pub const TRACE_HEADER: &str = "frequency_hz,power_dbm";

/// Arguments of `halfwave analyze`.
#[derive(Debug, clap::Args)]
pub struct AnalyzeArgs {
    /// A trace CSV (header `frequency_hz,power_dbm`) or a sweep description (`.json`).
    #[arg(value_name = "TRACE.csv|SWEEP.json")]
    pub input: PathBuf,
    /// RF drive frequency (hertz, or 7.5GHz), which is the line spacing of the comb; for a trace
    /// CSV it is read from the trace when left out, and a trace that shows another spacing is
    /// refused.
    #[arg(long, value_name = "HZ", allow_negative_numbers = true, value_parser = super::frequency_arg::parse_frequency_hz)]
    pub modulation_frequency: Option<f64>,
    /// A trace taken with the RF output off: the carrier position and the unmodulated power.
    #[arg(long, value_name = "OFF.csv")]
    pub reference: Option<PathBuf>,
    /// The analyzer's resolution bandwidth (hertz, or 20MHz); estimated from the line shape when
    /// left out.
    #[arg(long, value_name = "HZ", value_parser = super::frequency_arg::parse_frequency_hz)]
    pub resolution_bandwidth: Option<f64>,
}

/// Runs the command: prints the analysis as JSON.
pub fn run(args: AnalyzeArgs) -> Result<(), CliError> {
    // The command line's own values are refused as such, before any file is read (else the
    // message would name the file as if its data were wrong).
    for (flag, value) in [
        ("--modulation-frequency", args.modulation_frequency),
        ("--resolution-bandwidth", args.resolution_bandwidth),
    ] {
        if let Some(v) = value.filter(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(CliError::new(format!(
                "{flag} {v} is not a frequency; give hertz above zero, e.g. 7.5e9 for 7.5 GHz"
            )));
        }
    }
    let is_sweep = args
        .input
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("json"));
    // One line per warning, naming the trace file it is about.
    let lines = |trace: &Path, warnings: &[AnalysisWarning]| -> Vec<String> {
        let name = trace.display();
        warnings
            .iter()
            .map(|w| format!("{name}: {}", w.message))
            .collect()
    };
    let (json, warnings) = if is_sweep {
        let report = analyze_sweep_file(&args)?;
        let warnings = report
            .points
            .iter()
            .flat_map(|p| lines(&p.trace, &p.warnings))
            .collect();
        (serde_json::to_string_pretty(&report), warnings)
    } else {
        let report = analyze_trace_file(&args)?;
        let warnings = lines(&report.trace, &report.analysis.warnings);
        (serde_json::to_string_pretty(&report), warnings)
    };
    let json = json.map_err(|e| CliError::caused("could not write the result as JSON", e))?;
    outln!("{json}");
    // The result stands; what limits it goes to the person at the terminal (and is in the JSON).
    // (A closed stderr loses the line, not the result.)
    let mut stderr = std::io::stderr().lock();
    for warning in warnings {
        let _ = writeln!(stderr, "warning: {warning}");
    }
    Ok(())
}

/// A trace read from a CSV file, with the file line of its first and last point.
#[derive(Debug, Clone)]
pub struct TraceFile {
    pub path: PathBuf,
    pub trace: Trace,
    pub first_line: usize,
    pub last_line: usize,
}

impl TraceFile {
    /// Reads and checks a trace CSV.
    pub fn read(path: &Path) -> Result<TraceFile, CliError> {
        let name = path.display();
        let text = std::fs::read_to_string(path)
            .map_err(|e| CliError::caused(format!("{name}: cannot read the trace file"), e))?;
        TraceFile::parse(path, &text)
    }

    /// Parses the text of a trace CSV (`crate::csv_table`: BOM, `#` comments and blank lines
    /// allowed, header in any case); `path` is used in the messages.
    pub fn parse(path: &Path, text: &str) -> Result<TraceFile, CliError> {
        use crate::csv_table::{read_numeric, TableError};
        let name = path.display();
        let rows = read_numeric(text, &["frequency_hz", "power_dbm"]).map_err(|e| {
            CliError::new(match e {
                TableError::Empty => format!(
                    "{name}:1: the file is empty; a trace file starts with the header line `{TRACE_HEADER}` \
                     followed by one point per line"
                ),
                TableError::Header { line, found } => format!(
                    "{name}:{line}: expected the header `{TRACE_HEADER}`, found `{found}`; \
                     add the header line (frequency in hertz, power in dBm)"
                ),
                TableError::Malformed { line, detail } => {
                    format!("{name}:{line}: not a CSV file: {detail}")
                }
            })
        })?;
        let mut frequency = Vec::with_capacity(rows.len());
        let mut power = Vec::with_capacity(rows.len());
        let (mut first_line, mut last_line) = (0, 0);
        for row in rows {
            let number = row.line;
            let (f, p) = match row.values.as_deref() {
                Ok(&[f, p]) => (f, p),
                Ok(_) => {
                    return Err(CliError::new(format!(
                        "{name}:{number}: expected 2 values (`{TRACE_HEADER}`): `{}`",
                        row.text
                    )))
                }
                Err(problem) => {
                    return Err(CliError::new(format!(
                        "{name}:{number}: {problem} (the line reads `{}`)",
                        row.text
                    )))
                }
            };
            for (value, column) in [(f, "frequency_hz"), (p, "power_dbm")] {
                if !value.is_finite() {
                    return Err(CliError::new(format!(
                        "{name}:{number}: {column} {value} is not a finite number"
                    )));
                }
            }
            if let Some(previous) = frequency.last() {
                if f <= *previous {
                    return Err(CliError::new(format!(
                        "{name}:{number}: frequency {f} Hz is not above the previous point's {previous} Hz; \
                         points must be in strictly increasing frequency"
                    )));
                }
            } else {
                first_line = number;
            }
            last_line = number;
            frequency.push(f);
            power.push(p);
        }
        if frequency.is_empty() {
            return Err(CliError::new(format!(
                "{name}: the header is there but no points follow; add one `frequency,power` line per point"
            )));
        }
        let trace = Trace::new(frequency, power, None)
            .map_err(|e| CliError::caused(format!("{name} (lines {first_line}-{last_line})"), e))?;
        Ok(TraceFile {
            path: path.to_path_buf(),
            trace,
            first_line,
            last_line,
        })
    }

    /// An analysis error about this trace, naming the file and its data lines.
    fn error(&self, e: &AnalysisError) -> CliError {
        CliError::new(format!(
            "{} (data lines {}-{}): {e}",
            self.path.display(),
            self.first_line,
            self.last_line
        ))
    }
}

fn options(resolution_bandwidth: Option<f64>) -> AnalysisOptions {
    AnalysisOptions {
        resolution_bandwidth: resolution_bandwidth.map(Hz),
        ..AnalysisOptions::default()
    }
}

/// The JSON printed for one trace.
#[derive(Debug, Serialize)]
pub struct TraceReport {
    pub trace: PathBuf,
    pub reference: Option<PathBuf>,
    /// True when the modulation frequency was read from the trace (no --modulation-frequency).
    pub modulation_frequency_from_trace: bool,
    #[serde(flatten)]
    pub analysis: TraceAnalysis,
}

fn analyze_trace_file(args: &AnalyzeArgs) -> Result<TraceReport, CliError> {
    let trace = TraceFile::read(&args.input)?;
    let from_trace = args.modulation_frequency.is_none();
    let modulation = match args.modulation_frequency {
        Some(given) => given,
        None => crate::analysis::spacing::estimate_spacing(&trace.trace)
            .map(|s| s.spacing_hz.0)
            .ok_or_else(|| trace.error(&AnalysisError::NoSpacing))?,
    };
    let reference = args.reference.as_deref().map(TraceFile::read).transpose()?;
    let analysis = analyze_with_reference(
        &trace,
        Hz(modulation),
        reference.as_ref(),
        &options(args.resolution_bandwidth),
    )?;
    Ok(TraceReport {
        trace: trace.path,
        reference: reference.map(|r| r.path),
        modulation_frequency_from_trace: from_trace,
        analysis,
    })
}

fn analyze_with_reference(
    trace: &TraceFile,
    modulation: Hz,
    reference: Option<&TraceFile>,
    options: &AnalysisOptions,
) -> Result<TraceAnalysis, CliError> {
    analyze_trace(
        &trace.trace,
        modulation,
        reference.map(|r| &r.trace),
        options,
    )
    .map_err(|e| match (&e, reference) {
        (AnalysisError::BadReference(_), Some(r)) => r.error(&e),
        _ => trace.error(&e),
    })
}

/// A sweep description as written by the user.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct SweepFile {
    modulation_frequency_hz: f64,
    /// One loss for every frequency (positive lowers the level).
    chain_loss_db: Option<f64>,
    /// A net-gain table: `[{"frequency_hz": ..., "gain_db": ...}, ...]`.
    chain: Option<Vec<ChainPoint>>,
    points: Vec<SweepPointFile>,
    resolution_bandwidth_hz: Option<f64>,
    /// An RF-off trace, used for every point.
    reference: Option<PathBuf>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct SweepPointFile {
    generator_level_dbm: f64,
    trace: PathBuf,
}

/// One sweep point in the printed JSON.
#[derive(Debug, Serialize)]
pub struct SweepPointReport {
    pub trace: PathBuf,
    pub generator_level_dbm: Dbm,
    pub level_at_modulator_dbm: Dbm,
    pub v_peak_volts: VoltsPeak,
    pub modulation_index: Option<f64>,
    pub modulation_index_uncertainty: Option<f64>,
    /// Why the trace gave no modulation index, when it did not.
    pub error: Option<String>,
    /// Named conditions on the modulation index (see `analysis::precision`).
    pub warnings: Vec<AnalysisWarning>,
}

/// The JSON printed for a sweep.
#[derive(Debug, Serialize)]
pub struct SweepReport {
    pub sweep: PathBuf,
    pub modulation_frequency_hz: Hz,
    #[serde(flatten)]
    pub fit: VpiFit,
    pub points: Vec<SweepPointReport>,
}

fn analyze_sweep_file(args: &AnalyzeArgs) -> Result<SweepReport, CliError> {
    let path = &args.input;
    let name = path.display();
    let text = std::fs::read_to_string(path)
        .map_err(|e| CliError::caused(format!("{name}: cannot read the sweep file"), e))?;
    if text.trim().is_empty() {
        return Err(CliError::new(format!(
            "{name}:1: the file is empty; a sweep file is a JSON object with modulation_frequency_hz, \
             chain_loss_db or chain, and points"
        )));
    }
    let sweep: SweepFile = serde_json::from_str(&text)
        .map_err(|e| CliError::new(format!("{name}:{}:{}: {e}", e.line(), e.column())))?;
    if let Some(given) = args.modulation_frequency {
        if given != sweep.modulation_frequency_hz {
            return Err(CliError::new(format!(
                "{name}: --modulation-frequency {given} disagrees with the file's modulation_frequency_hz {}; \
                 leave the option out for a sweep",
                sweep.modulation_frequency_hz
            )));
        }
    }
    let chain = match (sweep.chain_loss_db, sweep.chain) {
        (Some(loss), None) if loss.is_finite() => DriveChain::flat_loss(Db(loss)),
        (None, Some(table)) => {
            DriveChain::new(table).map_err(|e| CliError::caused(name.to_string(), e))?
        }
        _ => {
            return Err(CliError::new(format!(
                "{name}: give exactly one of chain_loss_db (a finite number) or chain (a table of \
                 {{\"frequency_hz\", \"gain_db\"}})"
            )))
        }
    };
    if sweep.points.len() < 2 {
        return Err(CliError::new(format!(
            "{name}: the sweep lists {} point(s); V_pi needs at least two generator levels",
            sweep.points.len()
        )));
    }
    let base = path.parent().unwrap_or(Path::new("."));
    let resolve = |p: &Path| {
        if p.is_absolute() {
            p.to_path_buf()
        } else {
            base.join(p)
        }
    };
    let modulation = Hz(sweep.modulation_frequency_hz);
    let reference = sweep
        .reference
        .as_deref()
        .or(args.reference.as_deref())
        .map(|p| TraceFile::read(&resolve(p)))
        .transpose()?;
    let options = options(args.resolution_bandwidth.or(sweep.resolution_bandwidth_hz));

    let mut reports = Vec::with_capacity(sweep.points.len());
    let mut drive = Vec::with_capacity(sweep.points.len());
    let mut drive_index = Vec::with_capacity(sweep.points.len());
    for (i, point) in sweep.points.iter().enumerate() {
        if !point.generator_level_dbm.is_finite() {
            return Err(CliError::new(format!(
                "{name}: point {} has a generator level that is not a finite number",
                i + 1
            )));
        }
        let trace = TraceFile::read(&resolve(&point.trace))?;
        let generator = Dbm(point.generator_level_dbm);
        let at_modulator = chain.level_at_modulator(modulation, generator);
        let v_peak = at_modulator.to_volts_peak();
        let mut report = SweepPointReport {
            trace: trace.path.clone(),
            generator_level_dbm: generator,
            level_at_modulator_dbm: at_modulator,
            v_peak_volts: v_peak,
            modulation_index: None,
            modulation_index_uncertainty: None,
            error: None,
            warnings: Vec::new(),
        };
        match analyze_trace(
            &trace.trace,
            modulation,
            reference.as_ref().map(|r| &r.trace),
            &options,
        ) {
            Ok(analysis) => {
                let index = &analysis.modulation_index;
                report.modulation_index = Some(index.value);
                report.modulation_index_uncertainty = Some(index.uncertainty);
                report.warnings.clone_from(&analysis.warnings);
                drive.push(DrivePoint {
                    v_peak,
                    modulation_index: index.value,
                    uncertainty: index.uncertainty,
                });
                drive_index.push(i);
            }
            // A trace without a usable comb is a lost point, not a broken sweep.
            Err(e @ (AnalysisError::NoComb { .. } | AnalysisError::TooFewLines { .. })) => {
                report.error = Some(trace.error(&e).to_string());
            }
            Err(e) => return Err(trace.error(&e)),
        }
        reports.push(report);
    }
    let mut fit = fit_v_pi(&drive).map_err(|e| CliError::caused(name.to_string(), e))?;
    // Indices in the fit refer to the analysable points; report them as sweep point indices.
    let to_sweep = |i: usize| drive_index.get(i).copied().unwrap_or(i);
    fit.used = fit.used.iter().map(|&i| to_sweep(i)).collect();
    for e in fit.excluded.iter_mut() {
        e.index = to_sweep(e.index);
    }
    for (i, r) in reports.iter().enumerate() {
        if let Some(error) = &r.error {
            fit.excluded.push(ExcludedPoint {
                index: i,
                reason: format!("no modulation index: {error}"),
            });
        }
    }
    fit.excluded.sort_by_key(|e| e.index);
    Ok(SweepReport {
        sweep: path.clone(),
        modulation_frequency_hz: modulation,
        fit,
        points: reports,
    })
}
