//! `halfwave drive SERIAL --frequency HZ --modulation-index B (--chain NAME | --chain-loss-db DB)`:
//! the generator level for a wanted modulation index on a calibrated modulator, from a running
//! daemon (`GET /api/v1/devices/{serial}/drive`). With `--generator-level-dbm L` instead of
//! `--modulation-index`, the index that level gives. It prints the level, its uncertainty, the
//! level and peak voltage at the modulator, the V_pi used and the run it came from (flagged when
//! extrapolated), and the limits it was checked against; the daemon refuses a level over a limit.

use super::client::ClientArgs;
use super::devices::how_obtained;
use super::runs::{encode_query_value, runtime, to_json};
use super::CliError;
use crate::api::views::drive::{DriveAnswer, SolvedFor};
use crate::store::RunSelection;
use clap::Args;

#[derive(Debug, Args)]
#[command(group(clap::ArgGroup::new("drive_chain").required(true).multiple(false)))]
pub struct DriveArgs {
    /// The modulator's serial number.
    pub serial: String,
    /// The RF frequency: hertz (7.5e9) or with a unit (7.5GHz, 750MHz).
    #[arg(long, value_name = "HZ", allow_negative_numbers = true, value_parser = super::frequency_arg::parse_frequency_hz)]
    pub frequency: f64,
    /// The modulation index wanted (peak phase deviation, rad): prints the generator level.
    #[arg(
        long,
        value_name = "BETA",
        allow_hyphen_values = true,
        required_unless_present = "generator_level_dbm",
        conflicts_with = "generator_level_dbm"
    )]
    pub modulation_index: Option<f64>,
    /// A generator level, dBm: prints the modulation index it gives (the inverse question).
    #[arg(long, value_name = "DBM", allow_hyphen_values = true)]
    pub generator_level_dbm: Option<f64>,
    /// A stored drive-chain calibration by name (newest version unless --chain-version).
    #[arg(long, value_name = "NAME", group = "drive_chain")]
    pub chain: Option<String>,
    /// The version of --chain.
    #[arg(long, value_name = "VERSION", requires = "chain")]
    pub chain_version: Option<i64>,
    /// A flat loss from generator to modulator, dB (negative for a net gain).
    #[arg(
        long,
        value_name = "DB",
        allow_hyphen_values = true,
        group = "drive_chain"
    )]
    pub chain_loss_db: Option<f64>,
    /// Standard uncertainty of the chain's gain, dB (default: a stored chain's own at the
    /// frequency, from its `gain_uncertainty_db` column; else 0).
    #[arg(long, value_name = "DB", allow_hyphen_values = true)]
    pub chain_uncertainty_db: Option<f64>,
    /// Take V_pi from this run (a completed calibration of the device).
    #[arg(long, value_name = "RUN")]
    pub run: Option<i64>,
    /// Extrapolate V_pi outside the measured range (the answer is flagged).
    #[arg(long)]
    pub extrapolate: bool,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The request path for these arguments.
fn path(args: &DriveArgs) -> Result<String, CliError> {
    if !args.frequency.is_finite() || args.frequency <= 0.0 {
        return Err(CliError::new(format!(
            "--frequency {} is not a frequency; give hertz above zero, e.g. 7.5e9 for 7.5 GHz",
            args.frequency
        )));
    }
    let mut path = format!(
        "/api/v1/devices/{}/drive?frequency_hz={}",
        encode_query_value(&args.serial),
        args.frequency
    );
    let mut add = |name: &str, value: String| path.push_str(&format!("&{name}={value}"));
    if let Some(beta) = args.modulation_index {
        add("modulation_index", beta.to_string());
    }
    if let Some(level) = args.generator_level_dbm {
        add("generator_level_dbm", level.to_string());
    }
    if let Some(chain) = &args.chain {
        add("chain", encode_query_value(chain));
    }
    if let Some(version) = args.chain_version {
        add("chain_version", version.to_string());
    }
    if let Some(loss) = args.chain_loss_db {
        add("chain_loss_db", loss.to_string());
    }
    if let Some(u) = args.chain_uncertainty_db {
        add("chain_uncertainty_db", u.to_string());
    }
    if let Some(run) = args.run {
        add("run_id", run.to_string());
    }
    if args.extrapolate {
        add("extrapolate", "true".to_string());
    }
    Ok(path)
}

/// The answer as text for the person at the bench.
pub fn drive_text(a: &DriveAnswer) -> String {
    let mut text = String::new();
    let ghz = a.frequency_hz / 1e9;
    text.push_str(&match a.solved_for {
        SolvedFor::GeneratorLevel => format!(
            "{} at {ghz:.4} GHz: set the generator to {:.2} dBm (+- {:.2} dB, 1 sigma) for beta = {:.4}\n",
            a.serial, a.generator_level_dbm, a.level_uncertainty_db, a.modulation_index
        ),
        SolvedFor::ModulationIndex => format!(
            "{} at {ghz:.4} GHz: a generator level of {:.2} dBm gives beta = {:.4} +- {:.4} (1 sigma)\n",
            a.serial, a.generator_level_dbm, a.modulation_index, a.modulation_index_uncertainty
        ),
    });
    let chain = match (&a.chain.name, a.chain.version, a.chain.loss_db) {
        (Some(name), Some(version), _) => format!("chain {name:?} version {version}"),
        (_, _, Some(loss)) => format!("flat loss {loss} dB"),
        _ => "chain".to_string(),
    };
    text.push_str(&format!(
        "  at the modulator: {:.2} dBm, {:.4} V peak into 50 ohm ({chain}, gain {:.2} dB +- {:.2} dB{})\n",
        a.level_at_modulator_dbm,
        a.v_peak_volts,
        a.chain.gain_db,
        a.chain.gain_uncertainty_db,
        if a.chain.outside_table {
            "; outside the calibration's table, its end value held"
        } else {
            ""
        }
    ));
    let v = &a.v_pi;
    let how = if v.extrapolated {
        format!(
            "EXTRAPOLATED outside the measured range from {:.3} and {:.3} GHz",
            v.lower_frequency_hz / 1e9,
            v.upper_frequency_hz / 1e9
        )
    } else {
        how_obtained(v.interpolated, v.lower_frequency_hz, v.upper_frequency_hz)
    };
    let which = match v.selection {
        RunSelection::Pinned => "the device's pinned reference calibration",
        RunSelection::Requested => "as asked",
        RunSelection::NewestCovering => "the newest completed run that covers this frequency",
        RunSelection::Newest => "the newest completed run",
    };
    text.push_str(&format!(
        "  V_pi = {:.4} V +- {:.4} V (1 sigma), {how}, from run {} ({which})\n",
        v.v_pi_volts, v.v_pi_uncertainty_volts, v.run_id
    ));
    text.push_str(&format!(
        "  limits at the modulator: device {:.2} dBm, daemon {:.2} dBm; margin {:.2} dB\n",
        a.limits.device_limit_dbm, a.limits.daemon_limit_dbm, a.limits.margin_db
    ));
    text.push_str(
        "  A suggestion, not a setting: check it against the modulator's rated RF input power and your local practice before switching RF on.\n",
    );
    text
}

/// `halfwave drive`.
pub fn run(args: DriveArgs) -> Result<(), CliError> {
    let path = path(&args)?;
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let answer: DriveAnswer = client.get_json(&path).await?;
        if args.client.json {
            outln!("{}", to_json(&answer)?);
        } else {
            out!("{}", drive_text(&answer));
        }
        Ok(())
    })
}
