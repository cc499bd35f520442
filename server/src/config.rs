//! The daemon's configuration: one TOML file, with environment overrides.
//!
//! The file names the benches (a source and an analyzer each, as SCPI resources with an optional
//! command profile, or simulated), the safety limits, the data directory, the bind address and
//! the database URL, and the receivers of event notifications (`[[webhook]]`, checked by
//! `notify::settings`). Environment variables `HALFWAVE_BIND`, `HALFWAVE_DATA_DIR`,
//! `HALFWAVE_DATABASE_URL` and `HALFWAVE_MAX_LEVEL_AT_MODULATOR_DBM` override the file (a
//! container or systemd unit sets them without editing the file). An invalid file is refused at
//! start-up with the line and the reason; nothing starts half-configured.

use crate::notify::settings::WebhookConfig;
use halfwave_units::{Db, Dbm};
use serde::{Deserialize, Serialize};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

/// The hard ceiling at the modulator input when the file sets none (dBm). Lower it in the file to
/// suit your devices; no API call can raise it.
pub const DEFAULT_MAX_LEVEL_AT_MODULATOR_DBM: Dbm = Dbm(24.0);

/// Where the configuration file is looked for when no `--config` is given: the environment
/// variable [`CONFIG_ENV`] if set, else this path (where `deploy/` installs it).
pub const SYSTEM_CONFIG_PATH: &str = "/etc/halfwave/halfwave.toml";

/// The environment variable naming the configuration file when `--config` is absent.
pub const CONFIG_ENV: &str = "HALFWAVE_CONFIG";

/// The configuration file to use: the one given, else `$HALFWAVE_CONFIG`, else
/// [`SYSTEM_CONFIG_PATH`] if it exists. The error says how to name one.
pub fn config_path(given: Option<&Path>) -> Result<PathBuf, String> {
    if let Some(path) = given {
        return Ok(path.to_path_buf());
    }
    if let Some(path) = std::env::var_os(CONFIG_ENV).filter(|v| !v.is_empty()) {
        return Ok(PathBuf::from(path));
    }
    let system = Path::new(SYSTEM_CONFIG_PATH);
    if system.is_file() {
        return Ok(system.to_path_buf());
    }
    Err(format!(
        "no configuration file: give --config FILE, set {CONFIG_ENV}, or install one at \
         {SYSTEM_CONFIG_PATH} (deploy/halfwave.toml is a commented example)"
    ))
}

/// Why the configuration was refused.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read configuration file {path}: {source}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("configuration file {path}, line {line}: {message}")]
    Syntax {
        path: PathBuf,
        line: usize,
        message: String,
    },
    #[error("configuration {origin}: {field}: {message}")]
    Invalid {
        origin: String,
        field: String,
        message: String,
    },
    /// Several values are wrong: each on a line of its own, `field: message`.
    #[error("configuration {origin}: {} values are wrong:{}", .problems.len(), .problems.iter().map(|(field, message)| format!("\n  {field}: {message}")).collect::<String>())]
    InvalidMany {
        origin: String,
        problems: Vec<(String, String)>,
    },
}

impl ConfigError {
    /// Nothing wrong, one wrong value ([`ConfigError::Invalid`]) or several
    /// ([`ConfigError::InvalidMany`]), from the `(field, message)` pairs of a check.
    fn from_problems(origin: &str, mut problems: Vec<(String, String)>) -> Result<(), ConfigError> {
        match problems.len() {
            0 => Ok(()),
            1 => {
                let (field, message) = problems.remove(0);
                Err(ConfigError::Invalid {
                    origin: origin.to_string(),
                    field,
                    message,
                })
            }
            _ => Err(ConfigError::InvalidMany {
                origin: origin.to_string(),
                problems,
            }),
        }
    }
}

/// Safety limits set by the lab; plans are refused if they would exceed them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Limits {
    /// The hard ceiling of the RF level at any modulator input, after the drive chain.
    #[serde(default = "default_max_level")]
    pub max_level_at_modulator_dbm: Dbm,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_level_at_modulator_dbm: DEFAULT_MAX_LEVEL_AT_MODULATOR_DBM,
        }
    }
}

fn default_max_level() -> Dbm {
    DEFAULT_MAX_LEVEL_AT_MODULATOR_DBM
}

/// How to reach one instrument.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum InstrumentConfig {
    /// A SCPI instrument over TCP.
    Scpi {
        /// VISA-style resource string, e.g. `TCPIP::192.0.2.10::5025::SOCKET`.
        resource: String,
        /// A command profile (TOML) for instruments that deviate from standard SCPI; relative
        /// paths are relative to the configuration file.
        /// Terminators, timeouts and reconnection also live in the profile.
        #[serde(default)]
        profile: Option<PathBuf>,
    },
    /// The in-process simulated instrument of the bench's scenario.
    Simulated,
}

/// The simulated bench behind a bench whose instruments are `simulated`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SimulationConfig {
    /// Scenario file; the built-in default when absent.
    #[serde(default)]
    pub scenario: Option<PathBuf>,
    #[serde(default)]
    pub seed: u64,
    /// Scale of simulated instrument times (1 = realistic, 0 = instant).
    #[serde(default = "default_time_factor")]
    pub time_factor: f64,
}

fn default_time_factor() -> f64 {
    1.0
}

/// One bench: the instruments that measure one modulator at a time.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BenchConfig {
    pub name: String,
    pub source: InstrumentConfig,
    pub analyzer: InstrumentConfig,
    #[serde(default)]
    pub simulation: Option<SimulationConfig>,
    /// The generator's level accuracy, +/- dB, as its data sheet states it over the bench's
    /// frequencies (0 to 10); V_pi's uncertainty budget reads it as a rectangular distribution.
    #[serde(default)]
    pub source_level_accuracy_db: Option<Db>,
    /// Optional RF power sensor for calibrating the drive chain (`halfwave chain calibrate`),
    /// like `source`: `{ kind = "scpi", resource = "...", profile = "..." }` or
    /// `{ kind = "simulated" }`.
    #[serde(default)]
    pub sensor: Option<InstrumentConfig>,
    /// The sensor's stated accuracy, +/- percent of the reading (its data sheet's figure,
    /// calibration factor included; 0 to 50), read as a rectangular distribution. A chain
    /// calibration request may give its own.
    #[serde(default)]
    pub sensor_accuracy_percent: Option<f64>,
    /// The magnitude of the sensor's input reflection coefficient |Gamma| (its data sheet's
    /// worst case, 0 to 1), for the mismatch uncertainty. A request may give its own.
    #[serde(default)]
    pub sensor_reflection_coefficient: Option<f64>,
}

/// The whole configuration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    /// Where the daemon listens; loopback unless you mean to expose it.
    #[serde(default = "default_bind")]
    pub bind: SocketAddr,
    /// Where the database, exported plots and backups live.
    #[serde(default = "default_data_dir")]
    pub data_dir: PathBuf,
    /// `sqlite://PATH` (default `<data_dir>/halfwave.db`), or `postgres://USER@HOST/DB` for a
    /// database shared by the daemons of several bench PCs (each holds its benches by a lease).
    #[serde(default)]
    pub database_url: Option<String>,
    /// PostgreSQL only: how long a bench lease outlives its holder's last heartbeat, in seconds
    /// (the holder renews it every third of this). A daemon killed without a clean shutdown
    /// keeps its benches this long before another daemon may take them over.
    #[serde(default = "default_bench_lease_expiry_s")]
    pub bench_lease_expiry_s: f64,
    #[serde(default)]
    pub limits: Limits,
    #[serde(default, rename = "bench")]
    pub benches: Vec<BenchConfig>,
    /// Receivers of signed event notifications (`[[webhook]]`, see `crate::notify`).
    #[serde(default, rename = "webhook")]
    pub webhooks: Vec<WebhookConfig>,
    /// The directory relative paths are resolved against (the file's directory).
    #[serde(skip)]
    pub base_dir: PathBuf,
}

fn default_bind() -> SocketAddr {
    SocketAddr::from(([127, 0, 0, 1], 8440))
}

fn default_bench_lease_expiry_s() -> f64 {
    30.0
}

fn default_data_dir() -> PathBuf {
    PathBuf::from("halfwave-data")
}

impl Config {
    /// Reads and checks a configuration file, then applies environment overrides.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        let base = path
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_else(|| PathBuf::from("."));
        Self::from_toml(&text, path, base)?.with_env_overrides(std::env::vars())
    }

    /// Parses configuration text; `path` is only used in messages.
    pub fn from_toml(text: &str, path: &Path, base_dir: PathBuf) -> Result<Config, ConfigError> {
        let mut config: Config = toml::from_str(text).map_err(|e| {
            let line = e.span().map(|s| line_of(text, s.start)).unwrap_or(0);
            ConfigError::Syntax {
                path: path.to_path_buf(),
                line,
                message: e.message().to_string(),
            }
        })?;
        config.base_dir = base_dir;
        config.check(&path.display().to_string())?;
        Ok(config)
    }

    /// A configuration with one simulated bench and defaults everywhere (for `demo` and tests).
    pub fn simulated(data_dir: PathBuf, time_factor: f64, seed: u64) -> Config {
        Config {
            bind: default_bind(),
            data_dir,
            database_url: None,
            bench_lease_expiry_s: default_bench_lease_expiry_s(),
            limits: Limits::default(),
            benches: vec![BenchConfig {
                name: "sim-bench".into(),
                source: InstrumentConfig::Simulated,
                analyzer: InstrumentConfig::Simulated,
                simulation: Some(SimulationConfig {
                    scenario: None,
                    seed,
                    time_factor,
                }),
                source_level_accuracy_db: None,
                sensor: Some(InstrumentConfig::Simulated),
                sensor_accuracy_percent: None,
                sensor_reflection_coefficient: None,
            }],
            webhooks: Vec::new(),
            base_dir: PathBuf::from("."),
        }
    }

    /// Applies `HALFWAVE_*` overrides from the given environment.
    pub fn with_env_overrides(
        mut self,
        env: impl IntoIterator<Item = (String, String)>,
    ) -> Result<Config, ConfigError> {
        for (key, value) in env {
            let invalid = |message: String| ConfigError::Invalid {
                origin: "environment".into(),
                field: key.clone(),
                message,
            };
            match key.as_str() {
                "HALFWAVE_BIND" => {
                    self.bind = value.parse().map_err(|_| {
                        invalid(format!(
                            "{value:?} is not an address:port such as 127.0.0.1:8440"
                        ))
                    })?
                }
                "HALFWAVE_DATA_DIR" => self.data_dir = PathBuf::from(value),
                "HALFWAVE_DATABASE_URL" => self.database_url = Some(value),
                "HALFWAVE_MAX_LEVEL_AT_MODULATOR_DBM" => {
                    self.limits.max_level_at_modulator_dbm = value
                        .parse()
                        .map(Dbm)
                        .map_err(|_| invalid(format!("{value:?} is not a number of dBm")))?
                }
                _ => {}
            }
        }
        self.check("after environment overrides")?;
        Ok(self)
    }

    fn check(&self, origin: &str) -> Result<(), ConfigError> {
        // Every wrong value is collected, so that one start names them all.
        let mut problems: Vec<(String, String)> = Vec::new();
        let mut invalid =
            |field: &str, message: String| problems.push((field.to_string(), message));
        let max = self.limits.max_level_at_modulator_dbm.value();
        if !max.is_finite() || !(-30.0..=40.0).contains(&max) {
            invalid(
                "limits.max_level_at_modulator_dbm",
                format!("must be a level in dBm from -30 to 40, got {max}"),
            );
        }
        let expiry = self.bench_lease_expiry_s;
        if !expiry.is_finite() || !(1.0..=3600.0).contains(&expiry) {
            invalid(
                "bench_lease_expiry_s",
                format!("must be a time in seconds from 1 to 3600, got {expiry}"),
            );
        }
        let mut names = std::collections::HashSet::new();
        for (i, bench) in self.benches.iter().enumerate() {
            let field = format!("bench[{i}]");
            if bench.name.trim().is_empty() {
                invalid(&format!("{field}.name"), "give the bench a name".into());
            }
            if !names.insert(bench.name.as_str()) {
                invalid(
                    &format!("{field}.name"),
                    format!("the bench name {:?} is used twice", bench.name),
                );
            }
            let simulated = matches!(bench.source, InstrumentConfig::Simulated)
                || matches!(bench.analyzer, InstrumentConfig::Simulated)
                || matches!(bench.sensor, Some(InstrumentConfig::Simulated));
            if simulated && bench.simulation.is_none() {
                invalid(
                    &format!("{field}.simulation"),
                    "a bench with simulated instruments needs a [bench.simulation] table (it may be empty)".into(),
                );
            }
            for (role, inst) in [
                ("source", Some(&bench.source)),
                ("analyzer", Some(&bench.analyzer)),
                ("sensor", bench.sensor.as_ref()),
            ]
            .into_iter()
            .filter_map(|(role, inst)| Some((role, inst?)))
            {
                if let InstrumentConfig::Scpi { resource, .. } = inst {
                    if let Err(e) = halfwave_drivers::resource::Resource::parse(resource) {
                        invalid(&format!("{field}.{role}.resource"), e.to_string());
                    }
                }
            }
            if let Some(Db(accuracy)) = bench.source_level_accuracy_db {
                if !accuracy.is_finite() || !(0.0..=10.0).contains(&accuracy) {
                    invalid(
                        &format!("{field}.source_level_accuracy_db"),
                        format!(
                            "must be the generator's level accuracy in dB, 0 to 10 (the +/- value of its data sheet), got {accuracy}"
                        ),
                    );
                }
            }
            for (key, value, max, what) in [
                (
                    "sensor_accuracy_percent",
                    bench.sensor_accuracy_percent,
                    50.0,
                    "the sensor's +/- accuracy in percent of the reading, 0 to 50",
                ),
                (
                    "sensor_reflection_coefficient",
                    bench.sensor_reflection_coefficient,
                    0.99,
                    "the magnitude of the sensor's reflection coefficient, 0 to 0.99",
                ),
            ] {
                if let Some(v) = value.filter(|v| !(v.is_finite() && (0.0..=max).contains(v))) {
                    invalid(
                        &format!("{field}.{key}"),
                        format!("must be {what}, got {v}"),
                    );
                }
            }
            if let Some(sim) = &bench.simulation {
                if !sim.time_factor.is_finite() || sim.time_factor < 0.0 {
                    invalid(
                        &format!("{field}.simulation.time_factor"),
                        format!("must be 0 or more, got {}", sim.time_factor),
                    );
                }
            }
        }
        let mut urls = std::collections::HashSet::new();
        for (i, hook) in self.webhooks.iter().enumerate() {
            if let Err((field, message)) = hook.check(i) {
                invalid(&field, message);
            }
            if !urls.insert(hook.url.as_str()) {
                invalid(
                    &format!("webhook[{i}].url"),
                    format!("the receiver {:?} is listed twice; list each URL once (with the union of its events)", hook.url),
                );
            }
        }
        ConfigError::from_problems(origin, problems)
    }

    /// For a message about a database file that is not there: when the database is the default
    /// one under a relative `data_dir`, that it was read against this working directory (run
    /// from another one, the same configuration, read from `config_path`, names another file),
    /// starting with " ("; `None` otherwise.
    pub fn relative_data_dir_note(&self, config_path: &Path) -> Option<String> {
        if self.database_url.is_some() || !self.data_dir.is_relative() {
            return None;
        }
        let here = std::env::current_dir().map_or_else(
            |_| "the working directory".into(),
            |d| d.display().to_string(),
        );
        Some(format!(
            " (`data_dir = {:?}` of {} is relative to the working directory, {here}: run from the directory the daemon runs in, or make it absolute)",
            self.data_dir.display().to_string(),
            config_path.display()
        ))
    }

    /// The database URL to open.
    pub fn database_url(&self) -> String {
        self.database_url
            .clone()
            .unwrap_or_else(|| format!("sqlite://{}", self.data_dir.join("halfwave.db").display()))
    }

    /// Creates the data directory (with its parents) if it is not there yet; the error names it.
    pub fn create_data_dir(&self) -> Result<(), String> {
        std::fs::create_dir_all(&self.data_dir).map_err(|e| {
            format!(
                "cannot create the data directory {}: {e}; check the path and its permissions",
                self.data_dir.display()
            )
        })
    }

    /// Resolves a path from the file against the file's directory.
    pub fn resolve(&self, path: &Path) -> PathBuf {
        if path.is_absolute() {
            path.to_path_buf()
        } else {
            self.base_dir.join(path)
        }
    }
}

/// The 1-based line of byte offset `offset` in `text`: one more than the line breaks before it
/// (counting lines of the text before the offset is one short when the offset starts a line).
fn line_of(text: &str, offset: usize) -> usize {
    let end = offset.min(text.len());
    text.as_bytes()[..end]
        .iter()
        .filter(|&&b| b == b'\n')
        .count()
        + 1
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Config, ConfigError> {
        Config::from_toml(text, Path::new("test.toml"), PathBuf::from("."))
    }

    /// The configuration `deploy/NAME` as shipped.
    fn shipped(name: &str) -> Result<Config, ConfigError> {
        let deploy = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy");
        let path = deploy.join(name);
        let text = std::fs::read_to_string(&path).unwrap();
        Config::from_toml(&text, &path, deploy)
    }

    /// The configurations shipped in `deploy/` load as they are, so a new user's first
    /// `serve --config` does not start with an error of ours.
    #[test]
    fn the_shipped_configurations_load() {
        for name in ["halfwave.toml", "simulated.toml"] {
            if let Err(e) = shipped(name) {
                panic!("{name}: {e}");
            }
        }
    }

    /// The simulated bench states a level accuracy (so `budget` and `export` work on it out of
    /// the box) that covers what its simulated generator really does.
    #[test]
    fn the_simulated_bench_states_a_level_accuracy_that_covers_its_generator() {
        let config = shipped("simulated.toml").unwrap();
        let Db(stated) = config.benches[0]
            .source_level_accuracy_db
            .expect("deploy/simulated.toml states source_level_accuracy_db");
        let scenario = halfwave_drivers::sim::Scenario::builtin().unwrap();
        for i in 0..=400 {
            let f = halfwave_units::Hz(1e8 * 400f64.powf(f64::from(i) / 400.0));
            let error = scenario.level_error_at(f).0.abs();
            assert!(
                error <= stated,
                "{error} dB at {f:?} exceeds the stated {stated} dB"
            );
        }
    }

    #[test]
    fn defaults_bind_to_loopback() {
        let c = parse("").unwrap();
        assert!(c.bind.ip().is_loopback());
        assert_eq!(
            c.limits.max_level_at_modulator_dbm,
            DEFAULT_MAX_LEVEL_AT_MODULATOR_DBM
        );
    }

    #[test]
    fn bad_value_names_the_line() {
        let err =
            parse("bind = \"127.0.0.1:8440\"\n\n[limits]\nmax_level_at_modulator_dbm = \"hot\"\n")
                .unwrap_err();
        match err {
            ConfigError::Syntax { line, .. } => assert_eq!(line, 4),
            other => panic!("expected a syntax error, got {other}"),
        }
    }

    #[test]
    fn an_unknown_key_on_line_three_is_reported_on_line_three() {
        // The case a user met: a misspelt key at the start of line 3 was reported on line 2.
        let err = parse("bind = \"127.0.0.1:8440\"\n\nbnd = 1\n").unwrap_err();
        match err {
            ConfigError::Syntax { line, .. } => assert_eq!(line, 3, "{err}"),
            other => panic!("expected a syntax error, got {other}"),
        }
        assert_eq!(line_of("a\nb\nc", 4), 3);
        assert_eq!(line_of("a\nb\nc", 0), 1);
    }

    #[test]
    fn unknown_key_is_refused() {
        let err = parse("bnd = \"127.0.0.1:1\"\n").unwrap_err();
        assert!(err.to_string().contains("line 1"), "{err}");
        assert!(err.to_string().contains("bnd"), "{err}");
    }

    #[test]
    fn a_level_accuracy_out_of_range_is_refused_by_name() {
        let bench = "[[bench]]\nname = \"b\"\nsource = { kind = \"simulated\" }\nanalyzer = { kind = \"simulated\" }\n[bench.simulation]\n";
        let good = parse(&format!("{bench}\n[[bench]]\nname = \"c\"\nsource_level_accuracy_db = 0.5\nsource = {{ kind = \"simulated\" }}\nanalyzer = {{ kind = \"simulated\" }}\n[bench.simulation]\n")).unwrap();
        assert_eq!(good.benches[0].source_level_accuracy_db, None);
        assert_eq!(good.benches[1].source_level_accuracy_db, Some(Db(0.5)));
        let err = parse("[[bench]]\nname = \"b\"\nsource_level_accuracy_db = -0.5\nsource = { kind = \"simulated\" }\nanalyzer = { kind = \"simulated\" }\n[bench.simulation]\n").unwrap_err();
        assert!(
            err.to_string()
                .contains("bench[0].source_level_accuracy_db"),
            "{err}"
        );
    }

    #[test]
    fn limit_out_of_range_is_refused() {
        let err = parse("[limits]\nmax_level_at_modulator_dbm = 90\n").unwrap_err();
        assert!(
            err.to_string().contains("max_level_at_modulator_dbm"),
            "{err}"
        );
    }

    /// Three wrong values in one file: one start names all three, each with its key (a lab
    /// fixing them one restart at a time was the complaint).
    #[test]
    fn every_wrong_value_is_named_at_once() {
        let err = parse(
            "bench_lease_expiry_s = 0
[limits]
max_level_at_modulator_dbm = 90
[[bench]]
name = \"a\"
sensor_accuracy_percent = 80
source = { kind = \"simulated\" }
analyzer = { kind = \"simulated\" }
[bench.simulation]
",
        )
        .unwrap_err();
        let text = err.to_string();
        assert!(text.contains("3 values are wrong"), "{text}");
        for key in [
            "limits.max_level_at_modulator_dbm: must be",
            "bench_lease_expiry_s: must be",
            "bench[0].sensor_accuracy_percent: must be",
        ] {
            assert_eq!(text.matches(key).count(), 1, "{key} in {text}");
        }
        assert_eq!(text.lines().count(), 4, "{text}");
    }

    #[test]
    fn simulated_bench_needs_simulation_table() {
        let err = parse(
            "[[bench]]\nname = \"a\"\nsource = { kind = \"simulated\" }\nanalyzer = { kind = \"simulated\" }\n",
        )
        .unwrap_err();
        assert!(err.to_string().contains("simulation"), "{err}");
    }

    #[test]
    fn webhook_tables_are_read_and_checked_by_key() {
        let c = parse(
            "[[webhook]]\nurl = \"http://192.0.2.7:9000/hook\"\nsecret_env = \"HOOK\"\nevents = [\"run.completed\"]\n",
        )
        .unwrap();
        assert_eq!(c.webhooks.len(), 1);
        assert_eq!(c.webhooks[0].max_attempts, 10);
        let err = parse("[[webhook]]\nurl = \"http://192.0.2.7/\"\n").unwrap_err();
        assert!(err.to_string().contains("webhook[0].secret_env"), "{err}");
        let twice = "[[webhook]]\nurl = \"http://192.0.2.7/\"\nsecret_env = \"A\"\n";
        let err = parse(&format!("{twice}{twice}")).unwrap_err();
        assert!(err.to_string().contains("webhook[1].url"), "{err}");
        let err =
            parse("[[webhook]]\nurl = \"http://192.0.2.7/\"\nsecret_env = \"A\"\nsecret = \"x\"\n")
                .unwrap_err();
        assert!(err.to_string().contains("line 4"), "{err}");
    }

    #[test]
    fn environment_overrides_apply_and_are_checked() {
        let c = parse("").unwrap();
        let c = c
            .with_env_overrides([("HALFWAVE_BIND".to_string(), "0.0.0.0:9000".to_string())])
            .unwrap();
        assert_eq!(c.bind.port(), 9000);
        let err = c
            .with_env_overrides([(
                "HALFWAVE_MAX_LEVEL_AT_MODULATOR_DBM".to_string(),
                "loud".to_string(),
            )])
            .unwrap_err();
        assert!(err.to_string().contains("HALFWAVE_MAX_LEVEL"), "{err}");
        // Every override README names takes effect (its "Configuration" table's keys).
        let c = parse("")
            .unwrap()
            .with_env_overrides([
                ("HALFWAVE_DATA_DIR".to_string(), "/srv/halfwave".to_string()),
                (
                    "HALFWAVE_DATABASE_URL".to_string(),
                    "postgres://halfwave@db.lab.example/halfwave".to_string(),
                ),
                (
                    "HALFWAVE_MAX_LEVEL_AT_MODULATOR_DBM".to_string(),
                    "12.5".to_string(),
                ),
            ])
            .unwrap();
        assert_eq!(c.data_dir, PathBuf::from("/srv/halfwave"));
        assert_eq!(
            c.database_url.as_deref(),
            Some("postgres://halfwave@db.lab.example/halfwave")
        );
        assert_eq!(c.limits.max_level_at_modulator_dbm, Dbm(12.5));
        // An override is checked like the file's value.
        let err = c
            .with_env_overrides([(
                "HALFWAVE_MAX_LEVEL_AT_MODULATOR_DBM".to_string(),
                "55".to_string(),
            )])
            .unwrap_err();
        assert!(
            err.to_string()
                .contains("limits.max_level_at_modulator_dbm"),
            "{err}"
        );
    }

    #[test]
    fn the_defaults_are_those_readme_states() {
        // README, "Configuration": bind 127.0.0.1:8440, data_dir halfwave-data, the database a
        // SQLite file in it, a bench lease of 30 s (1 to 3600 s accepted).
        let c = parse("").unwrap();
        assert_eq!(c.bind, "127.0.0.1:8440".parse().unwrap());
        assert_eq!(c.data_dir, PathBuf::from("halfwave-data"));
        assert_eq!(c.database_url, None);
        assert_eq!(c.database_url(), "sqlite://halfwave-data/halfwave.db");
        assert_eq!(c.bench_lease_expiry_s, 30.0);
        for bad in ["0.5", "3601"] {
            let err = parse(&format!("bench_lease_expiry_s = {bad}\n")).unwrap_err();
            assert!(err.to_string().contains("bench_lease_expiry_s"), "{err}");
        }
        assert!(parse("bench_lease_expiry_s = 3600\n").is_ok());
        assert!(parse("bench_lease_expiry_s = 1\n").is_ok());
    }

    /// Bad configuration gets an error that names the file, never a panic: the shipped
    /// configurations with seeded random changes (a number replaced by an odd one, a line dropped
    /// or doubled, a byte changed), and odd values for the environment overrides.
    #[test]
    fn mutated_configurations_are_refused_by_name_never_with_a_panic() {
        use rand::{rngs::StdRng, Rng, SeedableRng};
        const ODD_NUMBERS: [&str; 10] = [
            "-1",
            "0",
            "1e309",
            "-1e309",
            "nan",
            "inf",
            "99999999999999999999",
            "1e-320",
            "-0.0",
            "\"12\"",
        ];
        let deploy = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy");
        let texts: Vec<String> = ["halfwave.toml", "rehearsal.toml", "drill-example.toml"]
            .iter()
            .map(|name| std::fs::read_to_string(deploy.join(name)).unwrap())
            .collect();
        let mut rng = StdRng::seed_from_u64(1204);
        let (mut loaded, mut refused) = (0, 0);
        for case in 0..1500 {
            let mut lines: Vec<String> = texts[case % texts.len()]
                .lines()
                .map(str::to_string)
                .collect();
            for _ in 0..rng.random_range(1..4) {
                let at = rng.random_range(0..lines.len());
                match rng.random_range(0..4) {
                    0 => {
                        // The first number on the line replaced by an odd one.
                        let line = &lines[at];
                        if let Some(start) = line.find(|c: char| c.is_ascii_digit()) {
                            let end = line[start..]
                                .find(|c: char| !(c.is_ascii_digit() || c == '.' || c == 'e'))
                                .map_or(line.len(), |e| start + e);
                            let odd = ODD_NUMBERS[rng.random_range(0..ODD_NUMBERS.len())];
                            lines[at] = format!("{}{odd}{}", &line[..start], &line[end..]);
                        }
                    }
                    1 => {
                        lines.remove(at);
                    }
                    2 => {
                        let copy = lines[at].clone();
                        lines.insert(at, copy);
                    }
                    _ => {
                        let mut bytes = lines[at].clone().into_bytes();
                        if !bytes.is_empty() {
                            let i = rng.random_range(0..bytes.len());
                            bytes[i] = rng.random_range(b' '..=b'~');
                        }
                        lines[at] = String::from_utf8(bytes).unwrap();
                    }
                }
                if lines.is_empty() {
                    break;
                }
            }
            let text = lines.join("\n");
            let path = Path::new("mutated.toml");
            let outcome = std::panic::catch_unwind(|| {
                Config::from_toml(&text, path, PathBuf::from(".")).and_then(|config| {
                    // Every third case also meets odd environment overrides.
                    let odd = ODD_NUMBERS[(case * 7) % ODD_NUMBERS.len()];
                    let env = [
                        (
                            "HALFWAVE_MAX_LEVEL_AT_MODULATOR_DBM".to_string(),
                            odd.to_string(),
                        ),
                        ("HALFWAVE_BIND".to_string(), odd.to_string()),
                    ];
                    config.with_env_overrides(env.into_iter().filter(|_| case % 3 == 0))
                })
            });
            match outcome {
                Err(_) => panic!("the configuration panicked the loader:\n{text}"),
                Ok(Ok(config)) => {
                    loaded += 1;
                    // What loaded holds numbers the daemon can compare against.
                    let max = config.limits.max_level_at_modulator_dbm.0;
                    assert!(max.is_finite(), "limit {max} loaded from:\n{text}");
                    assert!(config.bench_lease_expiry_s.is_finite(), "{text}");
                    for bench in &config.benches {
                        let sim = bench.simulation.as_ref().map_or(0.0, |s| s.time_factor);
                        assert!(sim.is_finite(), "time factor {sim} loaded from:\n{text}");
                    }
                }
                Ok(Err(e)) => {
                    refused += 1;
                    let message = e.to_string();
                    assert!(
                        message.contains("mutated.toml") || message.contains("environment"),
                        "the error does not name the file or the variable: {message}"
                    );
                }
            }
        }
        println!("mutated configurations: {loaded} loaded, {refused} refused");
        assert!(refused > 0);
    }
}
