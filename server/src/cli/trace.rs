//! `halfwave trace RUN POINT [--reference] [--output FILE]`: one stored analyzer trace (or the
//! RF-off reference trace taken at its frequency) as the CSV that `halfwave analyze` reads (`frequency_hz,power_dbm`, every value written so it reads back to
//! the same f64), so a point can be analysed again offline or in another tool.
//!
//! POINT counts the run's points from 1 in the order the API lists them (frequency, then level:
//! the order of the plan and of the progress bar), not the database's point id.

use super::client::ClientArgs;
use super::output_file::OutputArgs;
use super::runs::runtime;
use super::CliError;
use crate::api::views::runs::PointList;
use clap::Args;

#[derive(Debug, Args)]
pub struct TraceArgs {
    /// The run.
    pub run_id: i64,
    /// The point's number in the run, from 1 (frequency, then level, as the plan orders them).
    pub point: u32,
    /// Export the RF-off reference trace the run took at the point's frequency instead (for
    /// `halfwave analyze --reference`).
    #[arg(long)]
    pub reference: bool,
    #[command(flatten)]
    pub output: OutputArgs,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// `halfwave trace`.
pub fn run(args: TraceArgs) -> Result<(), CliError> {
    if args.point == 0 {
        return Err(CliError::new(
            "points are numbered from 1 (the first point of the run is 1)",
        ));
    }
    args.output.check_free()?;
    let client = args.client.client()?;
    let run_id = args.run_id;
    let (csv, description, drive_frequency_hz) = runtime()?.block_on(async {
        let page: PointList = client
            .get_json(&format!(
                "/api/v1/runs/{run_id}/points?page={}&per_page=1",
                args.point
            ))
            .await?;
        let Some(point) = page.points.first() else {
            return Err(CliError::new(format!(
                "run {run_id} has {} points; give a POINT from 1 to {}",
                page.total, page.total
            )));
        };
        let kind = if args.reference {
            "reference"
        } else {
            "measured"
        };
        let csv = client
            .get_text(&format!(
                "/api/v1/runs/{run_id}/points/{}/trace?format=csv&kind={kind}",
                point.id
            ))
            .await?;
        let description = if args.reference {
            format!(
                "run {run_id}: the RF-off reference at {:.6} GHz (point {}'s frequency)",
                point.frequency_hz / 1e9,
                args.point
            )
        } else {
            format!(
                "run {run_id}, point {} of {}: {:.6} GHz at {:.2} dBm{}",
                args.point,
                page.total,
                point.frequency_hz / 1e9,
                point.generator_level_dbm,
                point
                    .modulation_index
                    .map(|b| format!(", stored modulation index {b:.5}"))
                    .unwrap_or_default()
            )
        };
        Ok((csv, description, point.frequency_hz))
    })?;
    args.output.write(&csv)?;
    if let (Some(path), true) = (&args.output.output, args.reference) {
        eprintln!(
            "{description}; written to {} (give it to `halfwave analyze --reference {}` with the point's trace)",
            path.display(),
            path.display()
        );
    } else if let Some(path) = &args.output.output {
        // The point's drive frequency is the comb's line spacing: the command is ready to run.
        eprintln!(
            "{description}; trace written to {} (analyse it with `halfwave analyze {} --modulation-frequency {}`)",
            path.display(),
            path.display(),
            drive_frequency_hz
        );
    }
    Ok(())
}
