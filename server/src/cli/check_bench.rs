//! `halfwave check-bench --config FILE`: is every configured instrument there and answering right?
//!
//! For each bench in the configuration: connect to the source and the analyzer the way the daemon
//! would (the same [`crate::engine::bench::build`], profiles included), identify each (`*IDN?`),
//! and verify read-backs: the source's frequency and level, the analyzer's centre, span,
//! resolution bandwidth and points, then one analyzer sweep and a trace fetch. It never switches
//! an RF output on: the source is only told a frequency and a low level while its output stays
//! off, and if an output is found on (a run may be measuring) its settings are left alone
//! and the check says so. Simulated benches are checked the same way. Run it while the daemon is
//! stopped or idle: it changes instrument settings, which a running sweep would not expect.

use super::runs::{runtime, to_json};
use super::text_table::{Align, TextTable};
use super::CliError;
use crate::config::{BenchConfig, Config};
use crate::engine::bench::build;
use halfwave_drivers::{ConnectionNote, Identity, InstrumentError, RfSource, SpectrumAnalyzer};
use halfwave_units::{Dbm, Hz};
use serde::Serialize;
use std::path::PathBuf;

/// The frequency the source is set to for the read-back check (inside every RF source's range
/// that reaches microwaves; clamped to the source's own limits).
const CHECK_FREQUENCY_HZ: f64 = 1e9;

/// The level the source is set to for the read-back check, clamped to the source's limits: low
/// enough to be harmless even if someone switched the output on by hand, and inside the range of
/// any microwave signal generator (common practice: they reach from about -110 dBm or lower to
/// +10 dBm or higher). Not the profile's lowest level, which may lie outside the instrument's.
const CHECK_LEVEL_DBM: f64 = -20.0;

/// The analyzer's centre for the check: 193.4 THz (1550 nm, the C band the bench works in),
/// clamped to the analyzer's range. Not the middle of the profile's range, which may lie outside
/// the instrument's.
const CHECK_CENTER_HZ: f64 = 193.4e12;

/// The span of the analyzer check (clamped to the analyzer's limits).
const CHECK_SPAN_HZ: f64 = 10e9;

/// Trace points of the analyzer check (capped by the analyzer).
const CHECK_POINTS: usize = 1001;

/// A read-back counts as right within this relative difference (instruments round to their
/// resolution; the drivers check their own tolerance first).
const READ_BACK_TOLERANCE: f64 = 1e-3;

#[derive(Debug, clap::Args)]
#[command(
    after_help = "RF stays off: check-bench never switches an RF output on. It identifies each \
instrument (*IDN?) and sets the source's frequency and a low level (-20 dBm) with the output off, and \
the analyzer's centre, span, resolution bandwidth and points, then takes one sweep. Run it while \
the daemon is stopped or idle."
)]
pub struct CheckBenchArgs {
    /// The daemon's configuration file (its [[bench]] entries are checked); default:
    /// $HALFWAVE_CONFIG, else /etc/halfwave/halfwave.toml.
    #[arg(long, short)]
    pub config: Option<PathBuf>,
    /// Only this bench.
    #[arg(long)]
    pub bench: Option<String>,
    /// Print the result as JSON.
    #[arg(long)]
    pub json: bool,
    /// Instead of the check: probe each SCPI instrument for the standard commands a run uses
    /// and print the profile keys that make a non-conforming one work (RF stays off).
    #[arg(long)]
    pub suggest_profile: bool,
}

/// One verified setting.
#[derive(Debug, Serialize)]
pub struct ReadBack {
    pub setting: String,
    pub requested: f64,
    pub read_back: Option<f64>,
    pub ok: bool,
    pub error: Option<String>,
}

/// The check of one instrument.
#[derive(Debug, Serialize)]
pub struct InstrumentCheck {
    pub role: String,
    pub resource: String,
    pub identity: Option<Identity>,
    /// What the driver learned or chose at connect (the analyzer's axis queries and trace
    /// format, the source's ranges and where they came from).
    pub connection: Vec<ConnectionNote>,
    pub read_backs: Vec<ReadBack>,
    /// The source's output state before and after the check (always off after).
    pub rf_output_on_before: Option<bool>,
    pub rf_output_on_after: Option<bool>,
    /// Points of the trace fetched after one sweep (analyzer).
    pub trace_points: Option<usize>,
    pub problems: Vec<String>,
}

/// The check of one bench.
#[derive(Debug, Serialize)]
pub struct BenchCheck {
    pub bench: String,
    pub ok: bool,
    pub instruments: Vec<InstrumentCheck>,
    pub problems: Vec<String>,
}

/// What `--json` prints.
#[derive(Debug, Serialize)]
pub struct CheckReport {
    /// check-bench never switches RF on.
    pub rf_enabled_by_check: bool,
    pub benches: Vec<BenchCheck>,
}

/// Runs `halfwave check-bench`.
pub fn run(args: CheckBenchArgs) -> Result<(), CliError> {
    let path = crate::config::config_path(args.config.as_deref()).map_err(CliError::new)?;
    let config = Config::load(&path).map_err(|e| CliError::new(e.to_string()))?;
    let benches: Vec<&BenchConfig> = config
        .benches
        .iter()
        .filter(|b| args.bench.as_ref().is_none_or(|name| &b.name == name))
        .collect();
    if benches.is_empty() {
        return Err(CliError::new(match &args.bench {
            Some(name) if !config.benches.is_empty() => format!(
                "{} has no bench named {name:?}; its benches are: {}",
                path.display(),
                config
                    .benches
                    .iter()
                    .map(|b| format!("{:?}", b.name))
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
            Some(name) => format!(
                "{} has no bench named {name:?}, and no bench at all; add a [[bench]] table (see deploy/halfwave.toml)",
                path.display()
            ),
            None => format!(
                "{} configures no bench; add a [[bench]] table (see deploy/halfwave.toml)",
                path.display()
            ),
        }));
    }
    if args.suggest_profile {
        let all = runtime()?.block_on(super::suggest_profile::suggest(&config, &benches));
        if args.json {
            outln!("{}", to_json(&all)?);
        } else {
            out!("{}", super::suggest_profile::report_text(&all));
        }
        return match all.iter().find(|i| i.error.is_some()) {
            Some(i) => Err(CliError::new(format!(
                "could not probe the {} of bench {}; see above",
                i.role, i.bench
            ))),
            None => Ok(()),
        };
    }
    let report = runtime()?.block_on(async {
        let mut checks = Vec::new();
        for bench in benches {
            checks.push(check_bench(&config, bench).await);
        }
        CheckReport {
            rf_enabled_by_check: false,
            benches: checks,
        }
    });
    if args.json {
        outln!("{}", to_json(&report)?);
    } else {
        out!("{}", report_text(&report));
    }
    let failed: Vec<&str> = report
        .benches
        .iter()
        .filter(|b| !b.ok)
        .map(|b| b.bench.as_str())
        .collect();
    if failed.is_empty() {
        Ok(())
    } else {
        Err(CliError::new(format!(
            "bench check failed for {}; see the problems listed above",
            failed.join(", ")
        )))
    }
}

async fn check_bench(config: &Config, bench: &BenchConfig) -> BenchCheck {
    let mut instruments = match build(config, bench).await {
        Ok(instruments) => instruments,
        Err(e) => {
            return BenchCheck {
                bench: bench.name.clone(),
                ok: false,
                instruments: Vec::new(),
                problems: vec![e.to_string()],
            }
        }
    };
    let source = check_source(instruments.source.as_mut()).await;
    let analyzer = check_analyzer(instruments.analyzer.as_mut()).await;
    let ok = source.problems.is_empty() && analyzer.problems.is_empty();
    BenchCheck {
        bench: bench.name.clone(),
        ok,
        instruments: vec![source, analyzer],
        problems: Vec::new(),
    }
}

fn compare(setting: &str, requested: f64, result: Result<f64, InstrumentError>) -> ReadBack {
    match result {
        Ok(actual) => {
            let scale = requested.abs().max(1e-12);
            let ok = ((actual - requested) / scale).abs() <= READ_BACK_TOLERANCE
                || (actual - requested).abs() <= 1e-9;
            ReadBack {
                setting: setting.to_string(),
                requested,
                read_back: Some(actual),
                ok,
                error: None,
            }
        }
        Err(e) => ReadBack {
            setting: setting.to_string(),
            requested,
            read_back: None,
            ok: false,
            error: Some(e.to_string()),
        },
    }
}

async fn check_source(source: &mut dyn RfSource) -> InstrumentCheck {
    let mut check = InstrumentCheck {
        role: "source".into(),
        resource: source.resource().to_string(),
        identity: None,
        connection: source.connection_notes(),
        read_backs: Vec::new(),
        rf_output_on_before: None,
        rf_output_on_after: None,
        trace_points: None,
        problems: Vec::new(),
    };
    let limits = source.limits();
    check.connection.push(ConnectionNote::new(
        "plans are validated against",
        format!(
            "{} to {}, {} to {}",
            limits.min_frequency, limits.max_frequency, limits.min_level, limits.max_level
        ),
    ));
    match source.identify().await {
        Ok(identity) => check.identity = Some(identity),
        Err(e) => {
            check.problems.push(format!("*IDN? failed: {e}"));
            return check;
        }
    }
    match source.output_enabled().await {
        Ok(on) => check.rf_output_on_before = Some(on),
        Err(e) => {
            check
                .problems
                .push(format!("cannot read the RF output state: {e}"));
            return check;
        }
    }
    if check.rf_output_on_before == Some(true) {
        check.problems.push(
            "the RF output is ON, so a run may be measuring: settings were left untouched; wait for the run to end (or stop it and switch the output off) and check again".into(),
        );
        return check;
    }
    let limits = source.limits();
    let frequency = CHECK_FREQUENCY_HZ.clamp(limits.min_frequency.0, limits.max_frequency.0);
    let set = source.set_frequency(Hz(frequency)).await.map(|f| f.0);
    check
        .read_backs
        .push(compare("frequency_hz", frequency, set));
    let level = CHECK_LEVEL_DBM.clamp(limits.min_level.0, limits.max_level.0);
    let set = source.set_level(Dbm(level)).await.map(|l| l.0);
    check.read_backs.push(compare("level_dbm", level, set));
    match source.output_enabled().await {
        Ok(on) => {
            check.rf_output_on_after = Some(on);
            if on {
                check.problems.push(
                    "the RF output reads back ON after the check, which never switched it on; check the instrument front panel now".into(),
                );
            }
        }
        Err(e) => check.problems.push(format!(
            "cannot read the RF output state after the check: {e}"
        )),
    }
    collect_read_back_problems(&mut check);
    check
}

async fn check_analyzer(analyzer: &mut dyn SpectrumAnalyzer) -> InstrumentCheck {
    let mut check = InstrumentCheck {
        role: "analyzer".into(),
        resource: analyzer.resource().to_string(),
        identity: None,
        connection: analyzer.connection_notes(),
        read_backs: Vec::new(),
        rf_output_on_before: None,
        rf_output_on_after: None,
        trace_points: None,
        problems: Vec::new(),
    };
    match analyzer.identify().await {
        Ok(identity) => check.identity = Some(identity),
        Err(e) => {
            check.problems.push(format!("*IDN? failed: {e}"));
            return check;
        }
    }
    let caps = analyzer.capabilities();
    let center = CHECK_CENTER_HZ.clamp(caps.min_frequency.0, caps.max_frequency.0);
    let span = CHECK_SPAN_HZ.clamp(caps.min_span.0, caps.max_span.0);
    // The widest offered resolution that still leaves a hundred of them in the span.
    let rbw = caps
        .resolution_bandwidths
        .iter()
        .map(|r| r.0)
        .filter(|r| *r <= span / 100.0)
        .fold(None, |best: Option<f64>, r| {
            Some(best.map_or(r, |b| b.max(r)))
        })
        .or_else(|| caps.resolution_bandwidths.first().map(|r| r.0));
    let points = CHECK_POINTS.min(caps.max_points.max(1));
    let points_set = analyzer.set_points(points).await.map(|p| p as f64);
    check
        .read_backs
        .push(compare("points", points as f64, points_set));
    if let Some(rbw) = rbw {
        let set = analyzer
            .set_resolution_bandwidth(Hz(rbw))
            .await
            .map(|r| r.0);
        check
            .read_backs
            .push(compare("resolution_bandwidth_hz", rbw, set));
    } else {
        check
            .problems
            .push("the analyzer offers no resolution bandwidth; check its profile".into());
    }
    let set = analyzer.set_span(Hz(span)).await.map(|s| s.0);
    check.read_backs.push(compare("span_hz", span, set));
    let set = analyzer.set_center(Hz(center)).await.map(|c| c.0);
    check.read_backs.push(compare("center_hz", center, set));
    match analyzer.sweep().await {
        Ok(()) => match analyzer.fetch_trace().await {
            Ok(trace) => {
                check.trace_points = Some(trace.len());
                if trace.is_empty() {
                    check
                        .problems
                        .push("the analyzer returned an empty trace".into());
                }
            }
            Err(e) => check
                .problems
                .push(format!("fetching the trace failed: {e}")),
        },
        Err(e) => check.problems.push(format!("the sweep failed: {e}")),
    }
    collect_read_back_problems(&mut check);
    check
}

fn collect_read_back_problems(check: &mut InstrumentCheck) {
    for r in &check.read_backs {
        if r.ok {
            continue;
        }
        check.problems.push(match (&r.error, r.read_back) {
            (Some(e), _) => format!("setting {} to {} failed: {e}", r.setting, r.requested),
            (None, Some(actual)) => format!(
                "{} was set to {} but reads back {actual}; check the instrument's resolution or its command profile",
                r.setting, r.requested
            ),
            (None, None) => format!("{} did not read back", r.setting),
        });
    }
}

fn report_text(report: &CheckReport) -> String {
    let mut out = String::from(
        "check-bench never switches an RF output on; sources are set with their output off.\n",
    );
    for bench in &report.benches {
        out.push_str(&format!(
            "\nbench {}: {}\n",
            bench.bench,
            if bench.ok { "ok" } else { "PROBLEMS" }
        ));
        for problem in &bench.problems {
            out.push_str(&format!("  problem: {problem}\n"));
        }
        for inst in &bench.instruments {
            out.push_str(&format!("  {} at {}\n", inst.role, inst.resource));
            if let Some(id) = &inst.identity {
                out.push_str(&format!(
                    "    identity: {}, {}, serial {}, firmware {}\n",
                    id.manufacturer, id.model, id.serial, id.firmware
                ));
            }
            for note in &inst.connection {
                out.push_str(&format!("    {}: {}\n", note.item, note.value));
            }
            if let Some(on) = inst.rf_output_on_before {
                out.push_str(&format!(
                    "    RF output before: {}\n",
                    if on { "ON" } else { "off" }
                ));
            }
            if !inst.read_backs.is_empty() {
                let mut table = TextTable::new(&[
                    ("setting", Align::Left),
                    ("set", Align::Right),
                    ("read back", Align::Right),
                    ("check", Align::Left),
                ]);
                for r in &inst.read_backs {
                    let actual = r
                        .read_back
                        .map(|v| v.to_string())
                        .unwrap_or_else(|| "-".into());
                    table.row(vec![
                        r.setting.to_string(),
                        r.requested.to_string(),
                        actual,
                        if r.ok { "ok" } else { "WRONG" }.to_string(),
                    ]);
                }
                for line in table.render().lines() {
                    out.push_str(&format!("    {line}\n"));
                }
            }
            if let Some(n) = inst.trace_points {
                out.push_str(&format!(
                    "    one sweep (*OPC?) and a trace of {n} points fetched; error queue empty\n"
                ));
            }
            if let Some(on) = inst.rf_output_on_after {
                out.push_str(&format!(
                    "    RF output after: {}\n",
                    if on { "ON" } else { "off" }
                ));
            }
            for problem in &inst.problems {
                out.push_str(&format!("    problem: {problem}\n"));
            }
        }
    }
    out
}
