//! `halfwave check-bench --suggest-profile`: which profile keys would make a non-conforming
//! instrument work?
//!
//! For every SCPI instrument of the selected benches it loads the configured profile (or the
//! standard tree), probes the set-up commands and queries a run uses
//! ([`halfwave_drivers::generic::suggest`]) and prints, per instrument, a profile fragment with
//! the keys to add and why. It never switches an RF output on. Simulated instruments need no
//! profile and are skipped.

use crate::config::{BenchConfig, Config, InstrumentConfig};
use halfwave_drivers::generic::suggest::{as_toml, suggest_analyzer, suggest_source, Suggestion};
use halfwave_drivers::profile::{AnalyzerProfile, SourceProfile};
use serde::Serialize;

/// The suggestions for one instrument.
#[derive(Debug, Serialize)]
pub struct InstrumentSuggestions {
    pub bench: String,
    pub role: String,
    pub resource: String,
    /// The profile file in use, if any.
    pub profile: Option<String>,
    pub suggestions: Vec<Suggestion>,
    /// Set when the probing could not be done (the instrument unreachable, a profile unusable).
    pub error: Option<String>,
}

/// Probes every SCPI instrument of `benches`.
pub async fn suggest(config: &Config, benches: &[&BenchConfig]) -> Vec<InstrumentSuggestions> {
    let mut out = Vec::new();
    for bench in benches {
        for (role, instrument) in [("source", &bench.source), ("analyzer", &bench.analyzer)] {
            let InstrumentConfig::Scpi { resource, profile } = instrument else {
                continue;
            };
            let path = profile.as_ref().map(|p| config.resolve(p));
            let path = path.as_deref();
            let outcome = match role {
                "source" => match SourceProfile::from_optional_file(path) {
                    Ok(p) => suggest_source(resource, &p)
                        .await
                        .map_err(|e| e.to_string()),
                    Err(e) => Err(e.to_string()),
                },
                _ => match AnalyzerProfile::from_optional_file(path) {
                    Ok(p) => suggest_analyzer(resource, &p)
                        .await
                        .map_err(|e| e.to_string()),
                    Err(e) => Err(e.to_string()),
                },
            };
            let (suggestions, error) = match outcome {
                Ok(s) => (s, None),
                Err(e) => (Vec::new(), Some(e)),
            };
            out.push(InstrumentSuggestions {
                bench: bench.name.clone(),
                role: role.into(),
                resource: resource.clone(),
                profile: path.map(|p| p.display().to_string()),
                suggestions,
                error,
            });
        }
    }
    out
}

/// The suggestions as text for the terminal.
pub fn report_text(all: &[InstrumentSuggestions]) -> String {
    let mut out = String::from(
        "--suggest-profile probes set-up commands and queries only; RF outputs are never switched on.\n",
    );
    if all.is_empty() {
        out.push_str(
            "\nno SCPI instrument in the selected benches (simulated ones need no profile)\n",
        );
    }
    for i in all {
        out.push_str(&format!(
            "\nbench {}, {} at {} (profile: {})\n",
            i.bench,
            i.role,
            i.resource,
            i.profile.as_deref().unwrap_or("none, the standard tree")
        ));
        if let Some(e) = &i.error {
            out.push_str(&format!("  could not probe: {e}\n"));
        } else if i.suggestions.is_empty() {
            out.push_str("  every probed command works as configured; no key to add\n");
        } else {
            let kind = if i.role == "source" {
                "rf_source"
            } else {
                "spectrum_analyzer"
            };
            out.push_str("  add to its profile (merge with the file in use):\n");
            for line in as_toml(kind, &i.suggestions).lines() {
                out.push_str(&format!("    {line}\n"));
            }
        }
    }
    out
}
