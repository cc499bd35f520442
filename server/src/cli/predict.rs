//! `halfwave predict DRIVE.json`: the optical comb a periodic phase drive makes, computed here
//! (no daemon needed) by the same code as `POST /api/v1/spectrum-prediction`, from the same JSON.
//!
//! The file is `{"modulation_frequency_hz": F, "tones": [{"harmonic": 1, "modulation_index":
//! 1.3, "phase_deg": 0}, ...], "orders": N}`; every invalid field is named. Output: a table of
//! orders -N..N (offset from the carrier, power relative to the unmodulated carrier in dB and
//! linear), or with `--json` the API's `{"lines": [...]}` document.

use super::runs::to_json;
use super::CliError;
use crate::api::json_body::parse_json;
use crate::api::views::prediction::{invalid_drive, DriveSpectrumRequest};
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct PredictArgs {
    /// The drive, a JSON file: {"modulation_frequency_hz": F, "tones": [{"harmonic": 1,
    /// "modulation_index": 1.3, "phase_deg": 0}], "orders": N}.
    #[arg(value_name = "DRIVE.json")]
    pub drive: PathBuf,
    /// Print the prediction as JSON ({"lines": [{"order", "relative_power_db",
    /// "relative_power"}]}) instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// The problem document of an invalid drive as lines for the terminal.
fn refused(path: &std::path::Path, problem: &crate::api::problem::Problem) -> CliError {
    let fields: Vec<String> = problem
        .errors
        .iter()
        .map(|e| {
            // The route's parser calls the whole document `body`; here it is the file.
            if e.field == "body" {
                format!("  file: {}", e.message.replace("the body", "the file"))
            } else {
                format!("  {}: {}", e.field, e.message)
            }
        })
        .collect();
    CliError::new(format!(
        "the drive file {} cannot be predicted:\n{}",
        path.display(),
        if fields.is_empty() {
            format!("  {}", problem.detail)
        } else {
            fields.join("\n")
        }
    ))
}

/// `halfwave predict`.
pub fn run(args: PredictArgs) -> Result<(), CliError> {
    let path = &args.drive;
    let bytes = std::fs::read(path).map_err(|e| {
        CliError::new(format!(
            "cannot read the drive file {}: {e}; check the path",
            path.display()
        ))
    })?;
    let request: DriveSpectrumRequest = parse_json(&bytes).map_err(|p| refused(path, &p))?;
    let prediction = request
        .predict()
        .map_err(|problems| refused(path, &invalid_drive(problems)))?;
    if args.json {
        outln!("{}", to_json(&prediction)?);
        return Ok(());
    }
    let tones: Vec<String> = request
        .tones
        .iter()
        .map(|t| {
            format!(
                "harmonic {} beta {} rad phase {} deg",
                t.harmonic, t.modulation_index, t.phase_deg
            )
        })
        .collect();
    outln!(
        "drive at {} GHz: {}",
        request.modulation_frequency_hz / 1e9,
        tones.join("; ")
    );
    outln!(
        "{:>6}  {:>14}  {:>12}  {:>14}",
        "order",
        "offset (GHz)",
        "power (dB)",
        "power (linear)"
    );
    for line in &prediction.lines {
        let floor = prediction.resolution_floor;
        let (db, linear) = match line.relative_power_db {
            None => ("absent".to_string(), "0".to_string()),
            Some(_) if line.relative_power < floor => (
                format!("< {:.0}", 10.0 * floor.log10()),
                format!("< {floor:.0e}"),
            ),
            Some(db) => (format!("{db:.3}"), format!("{:.6e}", line.relative_power)),
        };
        outln!(
            "{:>6}  {:>14.6}  {:>12}  {:>14}",
            line.order,
            line.frequency_offset_hz / 1e9,
            db,
            linear
        );
    }
    let listed: f64 = prediction.lines.iter().map(|l| l.relative_power).sum();
    outln!(
        "powers relative to the unmodulated carrier; the listed orders hold {:.12} of it; lines below {:.1e} are not resolved",
        listed,
        prediction.resolution_floor
    );
    Ok(())
}
