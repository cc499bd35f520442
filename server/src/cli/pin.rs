//! `halfwave pin RUN` and `halfwave unpin SERIAL`: a device's reference calibration. Clients:
//! HTTP only, operator token.
//!
//! A pinned run answers every V_pi lookup of its device and is what the device's plots show, even
//! when newer runs exist; without a pin, a lookup uses the newest completed run that covers the
//! frequency. Both actions are written to the daemon's audit log with the token's name and the
//! note.

use super::client::ClientArgs;
use super::CliError;
use crate::api::views::pins::DevicePin;
use crate::api::views::runs::RunView;
use clap::{Args, Subcommand};

/// The two verbs, flattened into the top-level command list (`halfwave pin`, `halfwave unpin`).
#[derive(Debug, Subcommand)]
pub enum PinCommand {
    /// Pin a completed run as its device's reference calibration: V_pi lookups and the device's
    /// plots use it even when newer runs exist (operator token; audited).
    Pin(PinArgs),
    /// Release a device's pinned run: lookups use the newest completed run covering each
    /// frequency again (operator token; audited).
    Unpin(UnpinArgs),
}

/// Runs `pin` or `unpin`.
pub fn run(command: PinCommand) -> Result<(), CliError> {
    match command {
        PinCommand::Pin(args) => pin(args),
        PinCommand::Unpin(args) => unpin(args),
    }
}

#[derive(Debug, Args)]
pub struct PinArgs {
    /// The run to pin: a completed run with V_pi results; it becomes its device's reference
    /// calibration (replacing an earlier pin).
    pub run: i64,
    /// Why this run is the reference (kept with the pin and in the audit log).
    #[arg(long, default_value = "")]
    pub note: String,
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct UnpinArgs {
    /// The device (serial number) whose pinned run to release.
    pub serial: String,
    /// Why (kept in the audit log).
    #[arg(long, default_value = "")]
    pub note: String,
    #[command(flatten)]
    pub client: ClientArgs,
}

fn runtime() -> Result<tokio::runtime::Runtime, CliError> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| CliError::caused("cannot start the async runtime", e))
}

/// Percent-encodes a path segment (serial numbers may hold spaces or slashes).
fn encode_segment(segment: &str) -> String {
    form_urlencoded::byte_serialize(segment.as_bytes())
        .collect::<String>()
        .replace('+', "%20")
}

fn print_json(pin: &DevicePin) -> Result<(), CliError> {
    let text =
        serde_json::to_string_pretty(pin).map_err(|e| CliError::caused("cannot write JSON", e))?;
    println!("{text}");
    Ok(())
}

/// Pins a run as its device's reference calibration.
pub fn pin(args: PinArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let run: RunView = client
            .get_json(&format!("/api/v1/runs/{}", args.run))
            .await?;
        let serial = run.summary.device_serial;
        let pin: DevicePin = client
            .post_json(
                &format!("/api/v1/devices/{}/pin", encode_segment(&serial)),
                &serde_json::json!({ "run_id": args.run, "note": args.note }),
            )
            .await?;
        if args.client.json {
            return print_json(&pin);
        }
        let replaced = match pin.previous_run_id {
            Some(previous) if previous != args.run => format!(" (replacing run {previous})"),
            Some(_) => " (it already was)".to_string(),
            None => String::new(),
        };
        println!(
            "run {} is the reference calibration of {serial}{replaced}: V_pi lookups and plots of {serial} use it until `halfwave unpin {serial}`",
            args.run
        );
        Ok(())
    })
}

/// Releases a device's pinned run.
pub fn unpin(args: UnpinArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let pin: DevicePin = client
            .post_json(
                &format!("/api/v1/devices/{}/unpin", encode_segment(&args.serial)),
                &serde_json::json!({ "note": args.note }),
            )
            .await?;
        if args.client.json {
            return print_json(&pin);
        }
        let released = pin
            .previous_run_id
            .map_or_else(String::new, |id| format!("run {id} unpinned; "));
        println!(
            "{}: {released}V_pi lookups use the newest completed run covering each frequency again",
            args.serial
        );
        Ok(())
    })
}
