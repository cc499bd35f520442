//! The printable calibration report of one run: a single self-contained HTML document (styles
//! inline in one `<style>` element, plots as inline SVG, no scripts, no external resources) that
//! can be archived, mailed or printed to PDF and still says, months later, what was measured,
//! with what, by whom and under which limits.
//!
//! It is built from the run's API view ([`RunView`], the same data `GET /runs/{id}` serves), so
//! the report and the JSON never disagree. The plots are the server's own
//! ([`plots::vpi_svg`], [`plots::response_svg`]); the -3 dB / -6 dB frequencies come from
//! [`plots::response_of`], i.e. [`crate::analysis::response_curve`] on exactly the points the
//! response plot draws. Every stored string (serials, notes, reasons, instrument replies, token
//! names) is user or instrument input and goes through [`escape_html`]; plot text holds only
//! numbers and run ids. Pure: no I/O, the caller passes the time it was made.

use super::plots::{self, VpiCurve, VpiPoint};
use crate::api::views::budget::RunBudgetView;
use crate::api::views::runs::{ExcludedPointView, RunView};
use crate::calendar::utc_time;
use std::fmt::Write as _;

/// The caution printed in every report: what the numbers may be used for, and that the local
/// rules come first.
pub const SAFETY_CAUTION: &str = "Caution: V_pi values from this report are used to set RF drive \
levels. Approach any level from below and check it against the modulator's rated maximum RF and \
optical input and the drive chain actually connected. Laser light at 1550 nm is invisible; never \
look into a fibre end or connector. Switch RF off before connecting or disconnecting anything; \
attenuators and amplifiers get hot. This report does not replace your laboratory's laser and RF \
safety rules, local codes or licensed practice, which take precedence.";

/// Escapes text for HTML element content and quoted attribute values: `&`, `<`, `>`, `"`, `'`.
pub fn escape_html(text: &str) -> String {
    let mut out = String::with_capacity(text.len() + text.len() / 8);
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            other => out.push(other),
        }
    }
    out
}

/// The neutral print styling (our own: black on white, thin rules, one accent-free table style).
const STYLE: &str = "\
@page { size: A4; margin: 16mm 14mm; }
body { font-family: sans-serif; font-size: 10.5pt; color: #111; margin: 0 auto; max-width: 190mm; line-height: 1.35; }
h1 { font-size: 17pt; margin: 0 0 2mm 0; }
h2 { font-size: 12.5pt; margin: 6mm 0 2mm 0; border-bottom: 1px solid #888; padding-bottom: 1mm; }
table { border-collapse: collapse; margin: 1mm 0 2mm 0; page-break-inside: avoid; }
th, td { border: 1px solid #bbb; padding: 1mm 2mm; text-align: left; vertical-align: top; }
th { background: #eee; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
dl { display: grid; grid-template-columns: max-content auto; gap: 0.6mm 4mm; margin: 0; }
dt { font-weight: 600; }
dd { margin: 0; }
figure { margin: 2mm 0; page-break-inside: avoid; }
figure svg { width: 100%; height: auto; }
p.caution { border: 1px solid #444; padding: 2mm 3mm; }
p.muted, footer { color: #555; font-size: 9pt; }
";

/// The whole report of `run` as one HTML document; `generated_at_unix_ms` is printed in its
/// footer.
pub fn report_html(run: &RunView, generated_at_unix_ms: i64) -> String {
    let s = &run.summary;
    let p = &run.provenance;
    let e = escape_html;
    let plan_text = |pointer: &str| run.plan.pointer(pointer).and_then(|v| v.as_str());
    let plan_number = |pointer: &str| run.plan.pointer(pointer).and_then(|v| v.as_f64());
    let not_recorded = "<em>not recorded</em>".to_string();
    let dbm = |v: Option<f64>| v.map_or(not_recorded.clone(), |v| format!("{v:.2} dBm"));
    let time = |t: Option<i64>| t.map_or("&mdash;".to_string(), |t| e(&utc_time(t)));

    let mut html = String::with_capacity(64 * 1024);
    let _ = write!(
        html,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <title>Calibration report: run {} of device {}</title>\n<style>\n{STYLE}</style>\n\
         </head>\n<body>\n<h1>Phase-modulator calibration report</h1>\n\
         <p class=\"muted\">Run {} &middot; device {} &middot; state {}</p>\n",
        s.id,
        e(&s.device_serial),
        s.id,
        e(&s.device_serial),
        e(&s.state)
    );

    // Device and run.
    html.push_str("<h2>Device and run</h2>\n<dl>\n");
    let mut item = |label: &str, value: String| {
        let _ = writeln!(html, "<dt>{label}</dt><dd>{value}</dd>");
    };
    item("Device serial", e(&s.device_serial));
    item(
        "Device model",
        plan_text("/device/model")
            .filter(|m| !m.is_empty())
            .map_or(not_recorded.clone(), e),
    );
    item(
        "Optical wavelength",
        plan_number("/device/wavelength_nm").map_or(not_recorded.clone(), |w| format!("{w} nm")),
    );
    item("Bench", e(&s.bench));
    item("Queued", time(Some(s.created_at_unix_ms)));
    item("Started", time(s.started_at_unix_ms));
    item("Finished", time(s.finished_at_unix_ms));
    item(
        "Operator",
        match p.submitted_by_token_id {
            Some(id) => format!("{} (API token id {id})", e(&s.submitted_by)),
            None => e(&s.submitted_by),
        },
    );
    if let Some(cause) = &s.cause {
        item("Cause", e(cause));
    }
    if let Some(note) = plan_text("/note").filter(|n| !n.is_empty()) {
        item("Note", e(note));
    }
    item(
        "Measured points",
        format!(
            "{} ({} analyzer sweeps)",
            run.measured_points, run.analyzer_sweeps
        ),
    );
    html.push_str("</dl>\n");

    // Instruments.
    html.push_str("<h2>Instruments</h2>\n");
    if run.instruments.is_empty() {
        html.push_str("<p>No instrument identity was recorded for this run.</p>\n");
    } else {
        html.push_str(
            "<table>\n<tr><th>Role</th><th>Manufacturer</th><th>Model</th><th>Serial</th>\
             <th>Firmware</th><th>Resource</th><th>Driver choices at connect</th></tr>\n",
        );
        for i in &run.instruments {
            let notes: Vec<String> = i
                .connection
                .iter()
                .map(|n| format!("{}: {}", e(&n.item), e(&n.value)))
                .collect();
            let _ = writeln!(
                html,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                e(&i.role),
                e(&i.manufacturer),
                e(&i.model),
                e(&i.serial),
                e(&i.firmware),
                e(&i.resource),
                if notes.is_empty() {
                    "&mdash;".to_string()
                } else {
                    notes.join("<br>")
                }
            );
        }
        html.push_str("</table>\n<p class=\"muted\">Identities as answered to *IDN? (IEEE 488.2) when the run started and at every resumption.</p>\n");
    }

    // Chain, method, software.
    html.push_str("<h2>Drive chain, method and software</h2>\n<dl>\n");
    let mut item = |label: &str, value: String| {
        let _ = writeln!(html, "<dt>{label}</dt><dd>{value}</dd>");
    };
    item(
        "Chain calibration",
        format!("{} version {}", e(&s.chain_name), s.chain_version),
    );
    item(
        "Analysis method",
        p.analysis_method.as_deref().map_or(not_recorded.clone(), e),
    );
    item(
        "Software",
        p.software_version
            .as_deref()
            .map_or(not_recorded.clone(), e),
    );
    item(
        "Drive levels",
        plan_text("/levels/kind").map_or(not_recorded.clone(), e),
    );
    item(
        "Averages per point",
        plan_number("/averages").map_or(not_recorded.clone(), |a| format!("{a}")),
    );
    html.push_str("</dl>\n");

    // Safety and limits.
    html.push_str("<h2>Safety and limit settings in force</h2>\n<dl>\n");
    let mut item = |label: &str, value: String| {
        let _ = writeln!(html, "<dt>{label}</dt><dd>{value}</dd>");
    };
    item(
        "Device RF input limit (plan)",
        dbm(plan_number("/device/rf_input_limit_dbm")),
    );
    item(
        "Daemon ceiling at the modulator",
        dbm(p.hard_limit_at_modulator_dbm),
    );
    item(
        "Highest planned level at the modulator",
        dbm(p.planned_max_at_modulator_dbm),
    );
    html.push_str("</dl>\n<p class=\"muted\">Plans that would exceed either limit at any frequency and level are refused before any instrument command; levels are ramped upwards and the RF output is switched off whenever a run stops.</p>\n");

    // V_pi table.
    html.push_str("<h2>Half-wave voltage</h2>\n");
    let mut results: Vec<_> = run.results.iter().collect();
    results.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    if results.is_empty() {
        html.push_str("<p>No V_pi was fitted in this run.</p>\n");
    } else {
        html.push_str(
            "<table>\n<tr><th>Frequency (GHz)</th><th>V_pi (V)</th>\
             <th>Standard uncertainty (V)</th><th>Relative (%)</th><th>Points excluded</th></tr>\n",
        );
        for r in &results {
            let _ = writeln!(
                html,
                "<tr><td class=\"num\">{:.6}</td><td class=\"num\">{:.4}</td><td class=\"num\">{:.4}</td><td class=\"num\">{:.2}</td><td class=\"num\">{}</td></tr>",
                r.frequency_hz / 1e9,
                r.v_pi_volts,
                r.v_pi_uncertainty_volts,
                100.0 * r.v_pi_uncertainty_volts / r.v_pi_volts,
                excluded(&r.excluded_points).len()
            );
        }
        html.push_str("</table>\n<p class=\"muted\">Uncertainties are standard uncertainties (k = 1) of the fit, as stored with the run.</p>\n");
    }

    // Plots and the response points.
    let curve = VpiCurve {
        label: format!("run {}", s.id),
        points: results
            .iter()
            .map(|r| VpiPoint {
                frequency_hz: r.frequency_hz,
                v_pi_volts: r.v_pi_volts,
                v_pi_uncertainty_volts: r.v_pi_uncertainty_volts,
            })
            .collect(),
    };
    if !results.is_empty() {
        let subtitle = format!("run {}, standard uncertainty bars", s.id);
        html.push_str("<h2>V_pi and electro-optic response</h2>\n");
        for svg in [
            plots::vpi_svg(&curve, &[], &subtitle),
            plots::response_svg(&curve, &subtitle),
        ]
        .into_iter()
        .flatten()
        {
            let _ = writeln!(html, "<figure>\n{}\n</figure>", strip_xml_declaration(&svg));
        }
        match plots::response_of(&curve) {
            Ok(response) => {
                let highest = results.last().map_or(0.0, |r| r.frequency_hz);
                let point = |label: &str, f: Option<halfwave_units::Hz>| match f {
                    Some(f) => format!("<dt>{label}</dt><dd>{:.3} GHz</dd>\n", f.0 / 1e9),
                    None => format!(
                        "<dt>{label}</dt><dd>not reached up to {:.3} GHz</dd>\n",
                        highest / 1e9
                    ),
                };
                let _ = write!(
                    html,
                    "<dl>\n<dt>Reference frequency</dt><dd>{:.3} GHz</dd>\n{}{}</dl>\n",
                    response.reference_frequency_hz.0 / 1e9,
                    point("-3 dB response", response.f_3db_hz),
                    point("-6 dB response", response.f_6db_hz)
                );
            }
            Err(err) => {
                let _ = writeln!(
                    html,
                    "<p>The response could not be computed: {}</p>",
                    e(&err.to_string())
                );
            }
        }
    }

    // Excluded points.
    html.push_str("<h2>Points excluded from the fit</h2>\n");
    let rows: Vec<String> = results
        .iter()
        .flat_map(|r| {
            excluded(&r.excluded_points).into_iter().map(move |x| {
                format!(
                    "<tr><td class=\"num\">{:.6}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td>{}</td></tr>",
                    r.frequency_hz / 1e9,
                    x.level_index,
                    x.generator_level_dbm
                        .map_or("&mdash;".to_string(), |l| format!("{l:.2}")),
                    escape_html(&x.reason)
                )
            })
        })
        .collect();
    if rows.is_empty() {
        html.push_str("<p>None.</p>\n");
    } else {
        html.push_str("<table>\n<tr><th>Frequency (GHz)</th><th>Level index</th><th>Generator level (dBm)</th><th>Reason</th></tr>\n");
        for row in rows {
            html.push_str(&row);
            html.push('\n');
        }
        html.push_str("</table>\n");
    }

    let _ = write!(
        html,
        "<h2>Caution</h2>\n<p class=\"caution\">{}</p>\n<footer>Made {} by {}.</footer>\n</body>\n</html>\n",
        e(SAFETY_CAUTION),
        e(&utc_time(generated_at_unix_ms)),
        e(&crate::version::software_version())
    );
    html
}

/// The report with V_pi's uncertainty budget (`GET /runs/{id}/v-pi-budget` with no overrides)
/// before the cautions, or, when the budget's inputs are not known, a line saying which.
pub fn report_html_with_budget(
    run: &RunView,
    budget: Result<&RunBudgetView, &str>,
    generated_at_unix_ms: i64,
) -> String {
    let html = report_html(run, generated_at_unix_ms);
    let section = budget_section(budget);
    match html.find("<h2>Caution</h2>") {
        Some(at) => format!("{}{section}{}", &html[..at], &html[at..]),
        None => html + &section,
    }
}

/// The budget tables, one per frequency (GUM, JCGM 100:2008), every string escaped.
pub fn budget_section(budget: Result<&RunBudgetView, &str>) -> String {
    let e = escape_html;
    let mut html = String::from("<h2>Uncertainty budget of V_pi</h2>\n");
    let budget = match budget {
        Ok(b) => b,
        Err(reason) => {
            let _ = writeln!(html, "<p>Not available: {}</p>", e(reason));
            return html;
        }
    };
    let _ = writeln!(
        html,
        "<p>GUM (JCGM 100:2008): inputs combined in quadrature, expanded with k = {}. Drive chain from {}; generator level accuracy &plusmn;{} dB from {} (rectangular).</p>",
        budget.frequencies.first().map_or(2.0, |f| f.coverage_factor),
        e(&budget.chain_uncertainty_from),
        budget.source_level_accuracy_db,
        e(&budget.source_level_accuracy_from)
    );
    for f in &budget.frequencies {
        let _ = writeln!(
            html,
            "<h3>{:.6} GHz: V_pi {:.4} V, u<sub>c</sub> {:.4} V, U {:.4} V</h3>",
            f.frequency_hz / 1e9,
            f.v_pi_volts,
            f.combined_standard_uncertainty_volts,
            f.expanded_uncertainty_volts
        );
        html.push_str("<table>\n<tr><th>Quantity</th><th>Type</th><th>Distribution</th><th>Standard uncertainty</th><th>Sensitivity (V per unit)</th><th>Contribution (V)</th></tr>\n");
        for r in &f.rows {
            let _ = writeln!(
                html,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td class=\"num\">{:.4} {}</td><td class=\"num\">{:.4}</td><td class=\"num\">{:.4}</td></tr>",
                e(&r.quantity),
                e(&r.evaluation),
                e(&r.distribution),
                r.standard_uncertainty,
                e(&r.unit),
                r.sensitivity_volts_per_unit,
                r.contribution_volts
            );
        }
        html.push_str("</table>\n");
    }
    html
}

/// The excluded points of one frequency as stored; entries of another shape are skipped.
fn excluded(value: &serde_json::Value) -> Vec<ExcludedPointView> {
    value
        .as_array()
        .map(|items| {
            items
                .iter()
                .filter_map(|v| serde_json::from_value(v.clone()).ok())
                .collect()
        })
        .unwrap_or_default()
}

/// An SVG document without a leading `<?xml ...?>` declaration, for inline use in HTML.
fn strip_xml_declaration(svg: &str) -> &str {
    let trimmed = svg.trim_start();
    if trimmed.starts_with("<?xml") {
        if let Some(end) = trimmed.find("?>") {
            return trimmed[end + 2..].trim_start();
        }
    }
    trimmed
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn markup_characters_are_escaped() {
        // The five characters HTML 5 (WHATWG, "Serializing HTML fragments", escaping a string)
        // gives meaning in text and attribute values; common practice escapes all five.
        assert_eq!(
            escape_html(r#"<b onload="x">Tom & 'Jerry'</b>"#),
            "&lt;b onload=&quot;x&quot;&gt;Tom &amp; &#39;Jerry&#39;&lt;/b&gt;"
        );
        assert_eq!(escape_html("EG-PM-0042"), "EG-PM-0042");
    }

    #[test]
    fn an_xml_declaration_is_removed_and_anything_else_kept() {
        assert_eq!(
            strip_xml_declaration("<?xml version=\"1.0\"?>\n<svg></svg>"),
            "<svg></svg>"
        );
        assert_eq!(strip_xml_declaration("<svg></svg>"), "<svg></svg>");
    }
}
