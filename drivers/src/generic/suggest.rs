//! Profile suggestions: probe an instrument for the standard commands a run uses and, for each
//! one it refuses, try the standard alternatives and say which profile key makes it work.
//!
//! Used by `halfwave check-bench --suggest-profile`. It sends only set-up commands and queries
//! (never an output switch): the single-sweep mode, the trace format and byte order, the axis
//! queries and the source's range queries. Each probe is one attempt; a refusal is read from the
//! error queue (on a fresh connection when the instrument sent no reply) and cleared, so the
//! instrument is left with an empty queue.

use super::session::ScpiSession;
use crate::profile::{AnalyzerProfile, SourceProfile};
use crate::InstrumentError;
use serde::Serialize;
use std::time::Duration;

/// Longest wait for a probe's reply (an instrument answers a known query within milliseconds).
const PROBE_TIMEOUT: Duration = Duration::from_millis(1500);

/// One suggested profile line.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Suggestion {
    /// The TOML table, e.g. `commands` (empty for a top-level key).
    pub table: String,
    /// The key and its value as TOML, e.g. `single_sweep_mode = ""`.
    pub line: String,
    /// Why: what was refused and what worked instead.
    pub reason: String,
}

impl Suggestion {
    fn new(table: &str, line: String, reason: String) -> Suggestion {
        Suggestion {
            table: table.into(),
            line,
            reason,
        }
    }
}

/// Renders suggestions as a profile fragment (a TOML table per group, comments giving reasons).
pub fn as_toml(kind: &str, suggestions: &[Suggestion]) -> String {
    let mut out = format!("kind = \"{kind}\"\n");
    let mut tables: Vec<&str> = suggestions.iter().map(|s| s.table.as_str()).collect();
    tables.dedup();
    for table in tables {
        if !table.is_empty() {
            out.push_str(&format!("\n[{table}]\n"));
        }
        for s in suggestions.iter().filter(|s| s.table == table) {
            out.push_str(&format!("# {}\n{}\n", s.reason, s.line));
        }
    }
    out
}

/// What a probe's outcome says: `None` when it worked, the refusal's text when the instrument
/// refused (a SCPI error, silence with an empty queue, a reply that is not a number), and an
/// error for a lost link, which ends the probing.
fn refused(result: Result<(), InstrumentError>) -> Result<Option<String>, InstrumentError> {
    match result {
        Ok(()) => Ok(None),
        Err(e @ (InstrumentError::Connection { .. } | InstrumentError::Timeout { .. })) => Err(e),
        Err(e) => Ok(Some(e.to_string())),
    }
}

async fn try_write(session: &mut ScpiSession, command: &str) -> Result<(), InstrumentError> {
    session.write(command).await
}

async fn try_queries(session: &mut ScpiSession, queries: &[&str]) -> Result<(), InstrumentError> {
    for query in queries {
        let reply = session.probe(query, PROBE_TIMEOUT).await?;
        crate::scpi::response::parse_number(&reply).map_err(|e| session.parse_error(query, e))?;
    }
    session
        .check_errors(queries.last().copied().unwrap_or(""))
        .await
}

/// How a profile given to the probing is named in its errors.
const ORIGIN: &str = "(given to --suggest-profile)";

/// A session without set-up commands (the probing sends them one by one).
async fn open(
    resource: &str,
    check: Result<(), crate::profile::ProfileError>,
    connection: &crate::profile::ConnectionProfile,
    common: &crate::profile::CommonCommands,
) -> Result<ScpiSession, InstrumentError> {
    ScpiSession::open(resource, check, connection, common, &[]).await
}

/// Probes an analyzer at `resource` with `profile` (the standard tree when it has no file).
pub async fn suggest_analyzer(
    resource: &str,
    profile: &AnalyzerProfile,
) -> Result<Vec<Suggestion>, InstrumentError> {
    let check = profile.validate(ORIGIN);
    let mut session = open(resource, check, &profile.connection, &profile.common).await?;
    let c = &profile.commands;
    let mut out = Vec::new();
    if !c.single_sweep_mode.is_empty() {
        let r = try_write(&mut session, &c.single_sweep_mode).await;
        if let Some(why) = refused(r)? {
            out.push(Suggestion::new(
                "commands",
                "single_sweep_mode = \"\"".into(),
                format!(
                    "{:?} was refused ({why}); an analyzer without it sweeps once per INITiate",
                    c.single_sweep_mode
                ),
            ));
        }
    }
    // The trace format: the configured one, else ASCII (which every SCPI analyzer has).
    let format = match profile.data.format {
        crate::scpi::DataFormat::Ascii => &c.format_ascii,
        crate::scpi::DataFormat::Real32 => &c.format_real32,
        crate::scpi::DataFormat::Real64 => &c.format_real64,
    };
    let r = try_write(&mut session, format).await;
    if let Some(why) = refused(r)? {
        let ascii = try_write(&mut session, &c.format_ascii).await;
        if refused(ascii)?.is_none() {
            out.push(Suggestion::new(
                "data",
                "format = \"ascii\"".into(),
                format!("{format:?} was refused ({why}); {:?} works", c.format_ascii),
            ));
        }
    } else if profile.data.format != crate::scpi::DataFormat::Ascii {
        let order = match profile.data.byte_order {
            crate::scpi::ByteOrder::Normal => ("byte_order_normal", &c.byte_order_normal),
            crate::scpi::ByteOrder::Swapped => ("byte_order_swapped", &c.byte_order_swapped),
        };
        if !order.1.is_empty() {
            let r = try_write(&mut session, order.1).await;
            if let Some(why) = refused(r)? {
                out.push(Suggestion::new(
                    "commands",
                    format!("{} = \"\"", order.0),
                    format!(
                        "{:?} was refused ({why}); check which byte order the instrument sends (data.byte_order)",
                        order.1
                    ),
                ));
            }
        }
    }
    // The axis: probing at connect finds it anyway; naming it saves the wait on a refusal.
    let start_stop = try_queries(&mut session, &[&c.query_start, &c.query_stop]).await;
    if let Some(why) = refused(start_stop)? {
        let center_span = try_queries(&mut session, &[&c.query_center, &c.query_span]).await;
        match refused(center_span)? {
            None => out.push(Suggestion::new(
                "axis",
                "method = \"center_span\"".into(),
                format!(
                    "{} was refused ({why}); {} / {} answer (probing finds this too, naming it saves a wait at connect)",
                    c.query_start, c.query_center, c.query_span
                ),
            )),
            Some(why_too) => out.push(Suggestion::new(
                "axis",
                "method = \"query\"".into(),
                format!(
                    "neither {} / {} ({why}) nor {} / {} ({why_too}) answer: set commands.query_axis to the instrument's query for the frequency of every point",
                    c.query_start, c.query_stop, c.query_center, c.query_span
                ),
            )),
        }
    }
    Ok(out)
}

/// Probes an RF source at `resource` with `profile` (the output is never switched).
pub async fn suggest_source(
    resource: &str,
    profile: &SourceProfile,
) -> Result<Vec<Suggestion>, InstrumentError> {
    let check = profile.validate(ORIGIN);
    let mut session = open(resource, check, &profile.connection, &profile.common).await?;
    let c = &profile.commands;
    let mut out = Vec::new();
    for (min_key, min_query, max_key, max_query, limit_keys) in [
        (
            "query_min_frequency",
            &c.query_min_frequency,
            "query_max_frequency",
            &c.query_max_frequency,
            "min_frequency_hz / max_frequency_hz",
        ),
        (
            "query_min_level",
            &c.query_min_level,
            "query_max_level",
            &c.query_max_level,
            "min_level_dbm / max_level_dbm",
        ),
    ] {
        if min_query.is_empty() || max_query.is_empty() {
            continue;
        }
        let r = try_queries(&mut session, &[min_query, max_query]).await;
        if let Some(why) = refused(r)? {
            for key in [min_key, max_key] {
                out.push(Suggestion::new(
                    "commands",
                    format!("{key} = \"\""),
                    format!(
                        "the range query was refused ({why}); skip it and state the range under [limits] ({limit_keys}) from the instrument's data sheet"
                    ),
                ));
            }
        }
    }
    Ok(out)
}
