//! `halfwave chain calibrate NAME`: a chain calibration with the bench's power sensor, through the
//! API (operator token). Submits the request, follows the run until it ends (reading it every
//! half second) and prints the stored gains with their uncertainty budget; `--no-wait` prints the
//! run's id and returns.

use super::client::ClientArgs;
use super::runs::{runtime, to_json};
use super::CliError;
use crate::api::views::chain_runs::{ChainRunView, SubmittedChainRun};
use crate::engine::chain_run::ChainCalibrationRequest;
use clap::Args;
use std::time::Duration;

#[derive(Debug, Args)]
pub struct CalibrateArgs {
    /// The chain calibration's name; the result is stored as its next version.
    pub name: String,
    /// The bench whose source and power sensor measure the chain.
    #[arg(long)]
    pub bench: String,
    /// Frequencies, ascending, comma-separated: hertz or with a unit (1e9,5GHz,10GHz).
    #[arg(long, value_delimiter = ',', required = true, value_name = "HZ", value_parser = super::frequency_arg::parse_frequency_hz)]
    pub frequencies_hz: Vec<f64>,
    /// One or two generator levels in dBm, comma-separated (write `--levels-dbm=-10,0` when
    /// the first is negative).
    #[arg(
        long,
        value_delimiter = ',',
        required = true,
        value_name = "DBM",
        allow_negative_numbers = true
    )]
    pub levels_dbm: Vec<f64>,
    /// Readings per frequency and level (2 to 100).
    #[arg(long, default_value_t = 5)]
    pub readings: u32,
    /// The largest gain the chain can have, dB (its amplifier's gain, or the least loss as a
    /// negative number); the interlock adds it to the highest level.
    #[arg(long, allow_negative_numbers = true)]
    pub max_expected_gain_db: f64,
    /// |Gamma| of the chain's output (0 to 0.99), for the mismatch uncertainty.
    #[arg(long)]
    pub source_reflection: f64,
    /// The sensor's accuracy, +/- percent; default: the bench's configuration.
    #[arg(long)]
    pub sensor_accuracy_percent: Option<f64>,
    /// |Gamma| of the sensor; default: the bench's configuration.
    #[arg(long)]
    pub sensor_reflection: Option<f64>,
    /// Print the run's id and return without following it.
    #[arg(long)]
    pub no_wait: bool,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The request's fields and the flags that set them, for the daemon's refusals.
const FLAGS: &[(&str, &str)] = &[
    ("bench", "--bench"),
    ("name", "NAME"),
    ("frequencies_hz", "--frequencies-hz"),
    ("levels_dbm", "--levels-dbm"),
    ("readings_per_level", "--readings"),
    ("max_expected_gain_db", "--max-expected-gain-db"),
    ("source_reflection_coefficient", "--source-reflection"),
    ("sensor_accuracy_percent", "--sensor-accuracy-percent"),
    ("sensor_reflection_coefficient", "--sensor-reflection"),
];

/// Runs `halfwave chain calibrate`.
pub fn run(args: CalibrateArgs) -> Result<(), CliError> {
    let client = args.client.client()?.naming_flags(FLAGS);
    let request = ChainCalibrationRequest {
        bench: args.bench.clone(),
        name: args.name.clone(),
        frequencies_hz: args.frequencies_hz.clone(),
        levels_dbm: args.levels_dbm.clone(),
        readings_per_level: args.readings,
        max_expected_gain_db: args.max_expected_gain_db,
        source_reflection_coefficient: args.source_reflection,
        sensor_accuracy_percent: args.sensor_accuracy_percent,
        sensor_reflection_coefficient: args.sensor_reflection,
    };
    let body = serde_json::to_value(&request)
        .map_err(|e| CliError::new(format!("the request could not be written as JSON: {e}")))?;
    let rt = runtime()?;
    let submitted: SubmittedChainRun =
        rt.block_on(client.post_json("/api/v1/chain-calibration-runs", &body))?;
    if args.no_wait {
        if args.client.json {
            outln!("{}", to_json(&submitted)?);
        } else {
            outln!(
                "chain calibration run {} queued ({})",
                submitted.chain_run_id,
                submitted.location
            );
        }
        return Ok(());
    }
    let view: ChainRunView = rt.block_on(async {
        loop {
            let view: ChainRunView = client.get_json(&submitted.location).await?;
            if !matches!(view.state.as_str(), "queued" | "running") {
                return Ok::<_, CliError>(view);
            }
            tokio::time::sleep(Duration::from_millis(500)).await;
        }
    })?;
    if args.client.json {
        outln!("{}", to_json(&view)?);
    } else {
        print_view(&view)?;
    }
    match view.state.as_str() {
        "completed" => Ok(()),
        state => Err(CliError::new(format!(
            "chain calibration run {} {state}: {}",
            view.id,
            view.cause.as_deref().unwrap_or("no cause recorded")
        ))),
    }
}

fn print_view(view: &ChainRunView) -> Result<(), CliError> {
    outln!(
        "chain calibration run {} on bench {}: {}",
        view.id,
        view.bench,
        view.state
    );
    let Some(result) = &view.result else {
        return Ok(());
    };
    outln!(
        "stored as {:?} (chain calibration id {}); sensor +/-{} % (rectangular), |Gamma| sensor {} and chain {} (mismatch, U-shaped)",
        view.name,
        view.chain_calibration_id.unwrap_or_default(),
        result.sensor_accuracy_percent,
        result.sensor_reflection_coefficient,
        result.source_reflection_coefficient
    );
    outln!(
        "{:>16}  {:>9}  {:>8}  {:>8}  {:>8}  {:>8}  {:>8}",
        "frequency_hz",
        "gain_db",
        "u_db",
        "U_k2_db",
        "sensor",
        "mismatch",
        "repeat"
    );
    for f in &result.frequencies {
        outln!(
            "{:>16.0}  {:>9.3}  {:>8.4}  {:>8.4}  {:>8.4}  {:>8.4}  {:>8.4}",
            f.frequency_hz,
            f.gain_db,
            f.gain_uncertainty_db,
            2.0 * f.gain_uncertainty_db,
            f.sensor_specification_db,
            f.mismatch_db,
            f.repeatability_db
        );
    }
    Ok(())
}
