//! `halfwave chain cascade` and `halfwave chain import`: a drive chain's gain from the Touchstone
//! files of its parts; `halfwave chain upload`: a gain table the lab already has, as CSV.
//!
//! Both read the chain's two-ports in signal order from the generator and, with `--load`, the
//! modulator's one-port, and compute the transducer gain from a matched source at the first
//! file's frequencies that every file covers (`analysis::cascade`; no file is extrapolated).
//! `cascade` prints the table and needs no daemon; `import NAME` stores it as a new version of
//! the chain calibration NAME through the API (admin token), with every file's name and the
//! SHA-256 of its bytes, so the stored table can be traced to the measurements; `list` shows
//! every version with those files. What the reader
//! skipped or converted (noise parameters, a reference impedance renormalised to 50 ohm,
//! frequencies outside another file's range) is said on stderr, so `--json` output stays clean.

use super::client::ClientArgs;
use super::runs::{runtime, to_json};
use super::CliError;
use crate::analysis::cascade::{chain_gain, ChainGain};
use crate::analysis::touchstone::{self, Touchstone};
use crate::analysis::ChainPoint;
use crate::api::tokens::sha256_hex;
use crate::api::views::chains::{ChainHeaderView, ChainSourceBody, ChainView, SourceRole};
use clap::{Args, Subcommand};
use serde::Serialize;
use std::path::{Path, PathBuf};

#[derive(Debug, Subcommand)]
pub enum ChainCommand {
    /// Cascade Touchstone files of the chain's parts and print its gain at their common
    /// frequencies (no daemon needed).
    Cascade(CascadeArgs),
    /// Cascade Touchstone files and store the gain as a new version of a chain calibration on a
    /// running daemon (admin token), with each file's name and SHA-256.
    Import(ImportArgs),
    /// Store a chain's gain table from a CSV file (header `frequency_hz,gain_db`, optionally
    /// `gain_uncertainty_db`) as a new version of a chain calibration on a running daemon
    /// (admin token).
    Upload(UploadArgs),
    /// List the chain calibration versions on a running daemon, with the files each was
    /// computed from.
    List(ListArgs),
    /// Measure the chain with the bench's power sensor on a running daemon (operator token) and
    /// store the gains with their uncertainties as a new version. Mind the sensor's damage level.
    Calibrate(super::chain_calibrate::CalibrateArgs),
}

#[derive(Debug, Args)]
pub struct ListArgs {
    #[command(flatten)]
    pub client: ClientArgs,
}

/// The files of a chain.
#[derive(Debug, Args)]
pub struct ChainFiles {
    /// The chain's two-ports (.s2p; Touchstone 1.x or 2.0) in signal order, generator first.
    #[arg(required = true, value_name = "FILE")]
    pub files: Vec<PathBuf>,
    /// The modulator's RF input as a one-port (.s1p) terminating the chain; without it the load
    /// is taken as matched (50 ohm).
    #[arg(long, value_name = "FILE")]
    pub load: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct CascadeArgs {
    #[command(flatten)]
    pub chain: ChainFiles,
    /// Print `{"points": [{"frequency_hz", "gain_db"}, ...]}` instead of a table.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
pub struct ImportArgs {
    /// The chain calibration's name (a new name starts at version 1).
    pub name: String,
    #[command(flatten)]
    pub chain: ChainFiles,
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct UploadArgs {
    /// The chain calibration's name (a new name starts at version 1; plans name it as
    /// `{"kind": "stored", "name": NAME}`).
    pub name: String,
    /// The CSV file: `frequency_hz,gain_db[,gain_uncertainty_db]`, one row per frequency, the
    /// net gain from the generator's output to the modulator's input in dB (a loss is negative).
    #[arg(value_name = "FILE.csv")]
    pub file: PathBuf,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// What `chain cascade --json` prints.
#[derive(Debug, Serialize)]
pub struct CascadeOutput<'a> {
    pub points: &'a [ChainPoint],
}

/// A file read for a cascade.
struct SourceFile {
    network: Touchstone,
    file_name: String,
    sha256: String,
}

/// Reads and parses one file; the SHA-256 is of the bytes as read.
fn read_file(path: &Path) -> Result<SourceFile, CliError> {
    let shown = path.display().to_string();
    let bytes = std::fs::read(path).map_err(|e| {
        CliError::new(format!(
            "cannot read the Touchstone file {shown}: {e}; check the path"
        ))
    })?;
    let sha256 = sha256_hex(&bytes);
    let text = String::from_utf8(bytes).map_err(|_| {
        CliError::new(format!(
            "{shown} is not a text file; Touchstone files are plain text: is it the right file?"
        ))
    })?;
    let network = touchstone::parse(&text, &shown).map_err(|e| CliError::new(e.to_string()))?;
    let file_name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or(shown);
    Ok(SourceFile {
        network,
        file_name,
        sha256,
    })
}

/// Reads every file and computes the chain's gain; returns it with the files read (two-ports
/// first, in order, then the load).
fn compute(chain: &ChainFiles) -> Result<(ChainGain, Vec<ChainSourceBody>), CliError> {
    let mut two_ports = Vec::with_capacity(chain.files.len());
    let mut sources = Vec::new();
    for path in &chain.files {
        let file = read_file(path)?;
        sources.push(ChainSourceBody {
            role: SourceRole::TwoPort,
            file_name: file.file_name,
            sha256: file.sha256,
        });
        two_ports.push(file.network);
    }
    let load = match &chain.load {
        Some(path) => {
            let file = read_file(path)?;
            sources.push(ChainSourceBody {
                role: SourceRole::Load,
                file_name: file.file_name,
                sha256: file.sha256,
            });
            Some(file.network)
        }
        None => None,
    };
    let gain = chain_gain(&two_ports, load.as_ref()).map_err(|e| CliError::new(e.to_string()))?;
    for note in &gain.notes {
        eprintln!("note: {note}");
    }
    Ok((gain, sources))
}

/// Runs a `chain` subcommand.
pub fn run(command: ChainCommand) -> Result<(), CliError> {
    match command {
        ChainCommand::Cascade(args) => cascade(args),
        ChainCommand::Import(args) => import(args),
        ChainCommand::Upload(args) => upload(args),
        ChainCommand::List(args) => list(args),
        ChainCommand::Calibrate(args) => super::chain_calibrate::run(args),
    }
}

fn cascade(args: CascadeArgs) -> Result<(), CliError> {
    let (gain, _) = compute(&args.chain)?;
    if args.json {
        outln!(
            "{}",
            to_json(&CascadeOutput {
                points: &gain.points
            })?
        );
        return Ok(());
    }
    let load = if args.chain.load.is_some() {
        "into the load given"
    } else {
        "into a matched load"
    };
    outln!("chain gain from a matched source {load}, at the files' common frequencies");
    print_table(&gain.points)?;
    Ok(())
}

fn print_table(points: &[ChainPoint]) -> Result<(), CliError> {
    outln!("{:>16}  {:>9}", "frequency_hz", "gain_db");
    for p in points {
        outln!("{:>16.0}  {:>9.3}", p.frequency.0, p.gain.0);
    }
    Ok(())
}

fn import(args: ImportArgs) -> Result<(), CliError> {
    let (gain, sources) = compute(&args.chain)?;
    let client = args.client.client()?;
    let body = serde_json::json!({
        "name": args.name,
        "points": gain.points,
        "sources": sources,
    });
    let created: ChainView = runtime()?
        .block_on(async { client.post_json("/api/v1/chain-calibrations", &body).await })?;
    if args.client.json {
        outln!("{}", to_json(&created)?);
        return Ok(());
    }
    outln!(
        "stored {:?} version {} ({} points) from:",
        created.name,
        created.version,
        created.points.len()
    );
    print_sources(&created.sources)?;
    Ok(())
}

fn upload(args: UploadArgs) -> Result<(), CliError> {
    let text = std::fs::read_to_string(&args.file).map_err(|e| {
        CliError::new(format!(
            "cannot read the chain CSV {}: {e}",
            args.file.display()
        ))
    })?;
    let client = args.client.client()?;
    let path = format!(
        "/api/v1/chain-calibrations?name={}",
        super::runs::encode_query_value(&args.name)
    );
    let created: ChainView =
        runtime()?.block_on(async { client.post_text(&path, "text/csv", text).await })?;
    if args.client.json {
        outln!("{}", to_json(&created)?);
        return Ok(());
    }
    let (first, last) = match (created.points.first(), created.points.last()) {
        (Some(first), Some(last)) => (first.frequency_hz, last.frequency_hz),
        _ => (f64::NAN, f64::NAN),
    };
    outln!(
        "stored {:?} version {} ({} points, {} to {} GHz) from {}; name it in a plan as {{\"kind\": \"stored\", \"name\": {:?}}}",
        created.name,
        created.version,
        created.points.len(),
        first / 1e9,
        last / 1e9,
        args.file.display(),
        created.name
    );
    Ok(())
}

fn print_sources(sources: &[ChainSourceBody]) -> Result<(), CliError> {
    for source in sources {
        let role = match source.role {
            SourceRole::TwoPort => "two-port",
            SourceRole::Load => "load",
        };
        outln!(
            "  {role:<8}  {}  sha256 {}",
            source.file_name,
            source.sha256
        );
    }
    Ok(())
}

fn list(args: ListArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    let versions: Vec<ChainHeaderView> =
        runtime()?.block_on(client.get_json("/api/v1/chain-calibrations"))?;
    if args.client.json {
        outln!("{}", to_json(&versions)?);
        return Ok(());
    }
    if versions.is_empty() {
        outln!("no chain calibrations yet");
    }
    for v in &versions {
        let made = if v.sources.is_empty() {
            "typed table"
        } else {
            "from files:"
        };
        outln!(
            "{:?} version {}  {}  by {}  {made}",
            v.name,
            v.version,
            super::report::utc_time(v.created_at_unix_ms),
            v.created_by
        );
        print_sources(&v.sources)?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn file_digests_are_the_standard_sha256_that_sha256sum_prints() {
        // FIPS 180-4's example "abc" (NIST's published SHA-256 example, appendix B.1 of FIPS
        // 180-2): the digest `sha256sum` prints for a file holding those three bytes.
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("pad.s2p");
        std::fs::write(&path, "# Hz S RI\n1 0 0 1 0 1 0 0 0\n").unwrap();
        let read = read_file(&path).unwrap();
        assert_eq!(read.file_name, "pad.s2p");
        assert_eq!(read.sha256, sha256_hex(b"# Hz S RI\n1 0 0 1 0 1 0 0 0\n"));
        std::fs::write(&path, [0xff, 0xfe, 0x00]).unwrap();
        let Err(e) = read_file(&path) else {
            panic!("binary accepted")
        };
        assert!(e.to_string().contains("is not a text file"), "{e}");
    }
}
