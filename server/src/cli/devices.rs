//! `halfwave devices` and `halfwave v-pi SERIAL --frequency HZ`: a lab's modulators and their
//! calibrated V_pi, from a running daemon.
//!
//! `devices` lists every modulator with its newest calibration (date, frequency range, number of
//! frequencies). `v-pi` answers the question the record is kept for: V_pi at one frequency, with
//! its standard uncertainty, from the calibration the daemon's lookup rule picks (the pinned
//! reference calibration, else the newest completed run covering the frequency), or from the run
//! given with `--run`; it says which run answered, why, and whether the value is interpolated.

use super::client::ClientArgs;
use super::report::utc_time;
use super::runs::{encode_query_value, runtime, to_json};
use super::text_table::{Align, TextTable};
use super::CliError;
use crate::api::views::devices::{Calibration, DeviceView, VpiAnswer};
use clap::Args;
use serde::Serialize;

#[derive(Debug, Args)]
pub struct DevicesArgs {
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct VpiArgs {
    /// The modulator's serial number.
    pub serial: String,
    /// The RF frequency: hertz (7.5e9) or with a unit (7.5GHz, 750MHz).
    #[arg(long, value_name = "HZ", allow_negative_numbers = true, value_parser = super::frequency_arg::parse_frequency_hz)]
    pub frequency: f64,
    /// Answer from this run (a completed calibration of the device) instead of the one the
    /// lookup rule picks.
    #[arg(long, value_name = "RUN")]
    pub run: Option<i64>,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// A device with its newest calibration, as `devices --json` prints it.
#[derive(Debug, Serialize)]
pub struct DeviceSummary {
    #[serde(flatten)]
    pub device: DeviceView,
    /// The newest completed calibration run, if any.
    pub last_calibration_run_id: Option<i64>,
    pub last_calibrated_at_unix_ms: Option<i64>,
    pub lowest_frequency_hz: Option<f64>,
    pub highest_frequency_hz: Option<f64>,
    pub frequencies: usize,
    /// Completed calibrations on record.
    pub calibrations: usize,
    /// The device's pinned reference calibration (the run V_pi lookups answer from), if one is
    /// pinned; otherwise lookups use the newest completed run covering the frequency.
    pub pinned_run_id: Option<i64>,
}

/// The summary of a device from its calibration history (newest first).
pub fn summarize(device: DeviceView, history: &[Calibration]) -> DeviceSummary {
    let newest = history.first();
    let frequencies = || {
        newest
            .into_iter()
            .flat_map(|c| c.points.iter().map(|p| p.frequency_hz))
    };
    DeviceSummary {
        device,
        last_calibration_run_id: newest.map(|c| c.run_id),
        last_calibrated_at_unix_ms: newest.map(|c| c.finished_at_unix_ms),
        lowest_frequency_hz: frequencies().reduce(f64::min),
        highest_frequency_hz: frequencies().reduce(f64::max),
        frequencies: newest.map_or(0, |c| c.points.len()),
        calibrations: history.len(),
        pinned_run_id: history.iter().find(|c| c.pinned).map(|c| c.run_id),
    }
}

/// `halfwave devices`.
pub fn list(args: DevicesArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let devices: Vec<DeviceView> = client.get_json("/api/v1/devices").await?;
        let mut summaries = Vec::with_capacity(devices.len());
        for device in devices {
            let history: Vec<Calibration> = client
                .get_json(&format!(
                    "/api/v1/devices/{}/calibrations",
                    encode_query_value(&device.serial)
                ))
                .await?;
            summaries.push(summarize(device, &history));
        }
        if args.client.json {
            outln!("{}", to_json(&summaries)?);
            return Ok(());
        }
        if summaries.is_empty() {
            outln!("no devices yet: a device is recorded when a run for it is submitted");
            return Ok(());
        }
        let mut table = TextTable::new(&[
            ("serial", Align::Left),
            ("model", Align::Left),
            ("last calibrated", Align::Left),
            ("run", Align::Right),
            ("frequency range", Align::Left),
            ("calibrations", Align::Right),
            ("pinned", Align::Right),
        ]);
        for s in &summaries {
            let (when, run, range) = match (
                s.last_calibrated_at_unix_ms,
                s.last_calibration_run_id,
                s.lowest_frequency_hz.zip(s.highest_frequency_hz),
            ) {
                (Some(at), Some(run), Some((low, high))) => (
                    utc_time(at),
                    run.to_string(),
                    format!("{:.3}-{:.3} GHz", low / 1e9, high / 1e9),
                ),
                _ => ("never".to_string(), "-".to_string(), "-".to_string()),
            };
            table.row(vec![
                s.device.serial.clone(),
                s.device.model.clone(),
                when,
                run,
                range,
                s.calibrations.to_string(),
                s.pinned_run_id
                    .map_or_else(|| "-".to_string(), |run| format!("run {run}")),
            ]);
        }
        out!("{}", table.render());
        Ok(())
    })
}

/// How a V_pi value was obtained, for the text output: interpolated between two measured
/// frequencies, or measured at the one asked for.
pub fn how_obtained(interpolated: bool, lower_hz: f64, upper_hz: f64) -> String {
    if interpolated {
        format!(
            "interpolated between {:.3} and {:.3} GHz",
            lower_hz / 1e9,
            upper_hz / 1e9
        )
    } else {
        "measured at this frequency".to_string()
    }
}

/// `halfwave v-pi`.
pub fn v_pi(args: VpiArgs) -> Result<(), CliError> {
    if !args.frequency.is_finite() || args.frequency <= 0.0 {
        return Err(CliError::new(format!(
            "--frequency {} is not a frequency; give hertz above zero, e.g. 7.5e9 for 7.5 GHz",
            args.frequency
        )));
    }
    let client = args.client.client()?;
    let mut path = format!(
        "/api/v1/devices/{}/v-pi?frequency_hz={}",
        encode_query_value(&args.serial),
        args.frequency
    );
    if let Some(run) = args.run {
        path.push_str(&format!("&run_id={run}"));
    }
    runtime()?.block_on(async {
        let answer: VpiAnswer = client.get_json(&path).await?;
        if args.client.json {
            outln!("{}", to_json(&answer)?);
            return Ok(());
        }
        let how = how_obtained(
            answer.interpolated,
            answer.lower_frequency_hz,
            answer.upper_frequency_hz,
        );
        let which = if answer.pinned {
            " (the device's pinned reference calibration)"
        } else if args.run.is_some() {
            " (as asked)"
        } else {
            " (the newest completed run that covers this frequency)"
        };
        outln!(
            "{} at {:.4} GHz: V_pi = {:.4} V +- {:.4} V (1 sigma), {how}, from run {}{which}",
            answer.serial,
            answer.frequency_hz / 1e9,
            answer.v_pi_volts,
            answer.v_pi_uncertainty_volts,
            answer.run_id
        );
        Ok(())
    })
}
