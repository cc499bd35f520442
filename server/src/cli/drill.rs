//! Fault drills for `halfwave sim --drill FILE`: a schedule of instrument faults, so a lab can
//! rehearse the daemon's interlocks (RF off after a lost link, a hung analyzer, garbled replies)
//! on the simulator before trusting it with a modulator overnight.
//!
//! A drill file is TOML of our own design:
//!
//! ```toml
//! # The clock starts when the simulator is ready ("ready", the default), or when the simulated
//! # source first switches its RF output on ("rf_on"), i.e. when a run starts measuring.
//! start = "rf_on"
//!
//! [[fault]]
//! at_s = 5.0                # seconds after the start
//! instrument = "rf_source"  # or "analyzer", "power_sensor" (with --sensor-port)
//! kind = "link_down"        # connections closed, new ones reset, for for_s seconds
//! for_s = 3.0
//!
//! [[fault]]
//! at_s = 30.0
//! instrument = "analyzer"
//! kind = "silent"           # commands read but never answered, for for_s seconds
//! for_s = 45.0
//! ```
//!
//! Kinds: `link_down` and `silent` (with `for_s`), `slow_replies` (`for_s` and `delay_ms`: every
//! reply waits that long), `garble_replies` (`count` replies replaced by bytes that parse as
//! nothing), `push_error` (`code` and `message` put in the instrument's SCPI error queue).
//! Unknown keys, keys that do not belong to the kind and two windows of the same kind on the same
//! instrument that overlap are refused, each error naming the fault (1-based) and the key.
//!
//! While it runs, the drill prints one line per change on stderr (`drill +25.00 s rf-source:
//! link down for 3 s`, times since the simulator was ready), together with every change of the
//! simulated RF output on the same clock, so the operator sees when the daemon switched RF off
//! relative to the fault.

use halfwave_drivers::sim::{FaultHandle, Role, SimBench};
use serde::Deserialize;
use std::path::Path;
use std::time::Duration;
use tokio::time::Instant;

/// The longest a drill may wait before a fault, and the longest window (one week).
pub const MAX_DRILL_SECONDS: f64 = 7.0 * 24.0 * 3600.0;
/// Most replies one `garble_replies` fault may garble.
pub const MAX_GARBLED_REPLIES: u32 = 10_000;
/// Longest reply delay of `slow_replies` (ten minutes, past any driver timeout).
pub const MAX_REPLY_DELAY_MS: u64 = 600_000;
/// How often the drill looks at the simulated RF output (for the start and the log).
const RF_WATCH_INTERVAL: Duration = Duration::from_millis(20);

/// When the drill's clock starts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DrillStart {
    /// When the simulator has printed its resource strings.
    #[default]
    Ready,
    /// When the simulated source's RF output is first switched on.
    RfOn,
}

/// One fault of a drill, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct DrillFault {
    /// Seconds after the drill's start.
    pub at: Duration,
    pub instrument: Role,
    pub action: FaultAction,
}

/// What goes wrong.
#[derive(Debug, Clone, PartialEq)]
pub enum FaultAction {
    /// Connections closed and new ones reset, for this long.
    LinkDown { duration: Duration },
    /// Commands read but never answered, for this long.
    Silent { duration: Duration },
    /// Every reply waits `delay`, for `duration`.
    SlowReplies { duration: Duration, delay: Duration },
    /// The next `count` replies garbled.
    GarbleReplies { count: u32 },
    /// An entry in the instrument's error queue.
    PushError { code: i32, message: String },
}

impl FaultAction {
    /// How long the fault lasts (zero for the one-shot ones).
    fn duration(&self) -> Duration {
        match self {
            FaultAction::LinkDown { duration }
            | FaultAction::Silent { duration }
            | FaultAction::SlowReplies { duration, .. } => *duration,
            FaultAction::GarbleReplies { .. } | FaultAction::PushError { .. } => Duration::ZERO,
        }
    }

    fn kind(&self) -> &'static str {
        match self {
            FaultAction::LinkDown { .. } => "link_down",
            FaultAction::Silent { .. } => "silent",
            FaultAction::SlowReplies { .. } => "slow_replies",
            FaultAction::GarbleReplies { .. } => "garble_replies",
            FaultAction::PushError { .. } => "push_error",
        }
    }
}

/// A checked drill: when it starts and its faults, ordered by start time.
#[derive(Debug, Clone, PartialEq)]
pub struct Drill {
    pub start: DrillStart,
    pub faults: Vec<DrillFault>,
}

/// The file as written, before checking.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct DrillFile {
    #[serde(default)]
    start: DrillStart,
    #[serde(default)]
    fault: Vec<FaultEntry>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct FaultEntry {
    at_s: f64,
    instrument: String,
    kind: String,
    for_s: Option<f64>,
    delay_ms: Option<u64>,
    count: Option<u32>,
    code: Option<i32>,
    message: Option<String>,
}

impl Drill {
    /// Reads and checks a drill file; the error says what to fix, and where.
    pub fn from_file(path: &Path) -> Result<Drill, String> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| format!("cannot read the drill file {}: {e}", path.display()))?;
        Drill::from_toml_str(&text).map_err(|e| format!("drill file {}: {e}", path.display()))
    }

    /// Parses and checks a drill.
    pub fn from_toml_str(text: &str) -> Result<Drill, String> {
        let file: DrillFile = toml::from_str(text).map_err(|e| e.to_string())?;
        if file.fault.is_empty() {
            return Err(
                "no [[fault]] entries; add at least one (see `halfwave sim --help`)".into(),
            );
        }
        let mut faults = file
            .fault
            .iter()
            .enumerate()
            .map(|(i, entry)| entry.check().map_err(|e| format!("fault {}: {e}", i + 1)))
            .collect::<Result<Vec<_>, _>>()?;
        check_overlaps(&faults)?;
        faults.sort_by_key(|f| f.at);
        Ok(Drill {
            start: file.start,
            faults,
        })
    }
}

impl FaultEntry {
    fn check(&self) -> Result<DrillFault, String> {
        let at = seconds("at_s", self.at_s, true)?;
        let instrument = match self.instrument.as_str() {
            "rf_source" => Role::RfSource,
            "analyzer" => Role::Analyzer,
            "power_sensor" => Role::PowerSensor,
            other => {
                return Err(format!(
                    "`instrument` must be \"rf_source\", \"analyzer\" or \"power_sensor\", got {other:?}"
                ))
            }
        };
        // Which keys each kind takes; any other optional key given is a mistake worth naming.
        let (action, takes): (FaultAction, &[&str]) = match self.kind.as_str() {
            "link_down" => (
                FaultAction::LinkDown {
                    duration: self.window()?,
                },
                &["for_s"],
            ),
            "silent" => (
                FaultAction::Silent {
                    duration: self.window()?,
                },
                &["for_s"],
            ),
            "slow_replies" => {
                let delay_ms = self
                    .delay_ms
                    .ok_or("`delay_ms` is required for slow_replies")?;
                if delay_ms == 0 || delay_ms > MAX_REPLY_DELAY_MS {
                    return Err(format!(
                        "`delay_ms` must be from 1 to {MAX_REPLY_DELAY_MS}, got {delay_ms}"
                    ));
                }
                (
                    FaultAction::SlowReplies {
                        duration: self.window()?,
                        delay: Duration::from_millis(delay_ms),
                    },
                    &["for_s", "delay_ms"],
                )
            }
            "garble_replies" => {
                let count = self
                    .count
                    .ok_or("`count` is required for garble_replies")?;
                if count == 0 || count > MAX_GARBLED_REPLIES {
                    return Err(format!(
                        "`count` must be from 1 to {MAX_GARBLED_REPLIES}, got {count}"
                    ));
                }
                (FaultAction::GarbleReplies { count }, &["count"])
            }
            "push_error" => {
                let code = self.code.ok_or("`code` is required for push_error")?;
                if code == 0 || !(-32768..=32767).contains(&code) {
                    return Err(format!(
                        "`code` must be a SCPI error code (e.g. -222 data out of range; 0 means no error), got {code}"
                    ));
                }
                let message = self
                    .message
                    .clone()
                    .ok_or("`message` is required for push_error")?;
                if message.trim().is_empty()
                    || message.len() > 200
                    || message.chars().any(char::is_control)
                {
                    return Err(
                        "`message` must be 1 to 200 characters on one line".to_string(),
                    );
                }
                (FaultAction::PushError { code, message }, &["code", "message"])
            }
            other => {
                return Err(format!(
                    "`kind` must be one of link_down, silent, slow_replies, garble_replies, push_error; got {other:?}"
                ))
            }
        };
        let given = [
            ("for_s", self.for_s.is_some()),
            ("delay_ms", self.delay_ms.is_some()),
            ("count", self.count.is_some()),
            ("code", self.code.is_some()),
            ("message", self.message.is_some()),
        ];
        if let Some((key, _)) = given
            .iter()
            .find(|(key, present)| *present && !takes.contains(key))
        {
            return Err(format!(
                "`{key}` does not apply to {}; it takes {}",
                self.kind,
                takes
                    .iter()
                    .map(|k| format!("`{k}`"))
                    .collect::<Vec<_>>()
                    .join(" and ")
            ));
        }
        Ok(DrillFault {
            at,
            instrument,
            action,
        })
    }

    fn window(&self) -> Result<Duration, String> {
        let for_s = self
            .for_s
            .ok_or_else(|| format!("`for_s` is required for {}", self.kind))?;
        seconds("for_s", for_s, false)
    }
}

/// A duration from seconds in a drill file: finite, within [`MAX_DRILL_SECONDS`], positive
/// unless `zero_allowed`.
fn seconds(key: &str, value: f64, zero_allowed: bool) -> Result<Duration, String> {
    let low_ok = if zero_allowed {
        value >= 0.0
    } else {
        value > 0.0
    };
    if !value.is_finite() || !low_ok || value > MAX_DRILL_SECONDS {
        let low = if zero_allowed { "from 0" } else { "above 0" };
        return Err(format!(
            "`{key}` must be a number of seconds {low} up to {MAX_DRILL_SECONDS}, got {value}"
        ));
    }
    Ok(Duration::from_secs_f64(value))
}

/// Two windows of the same kind on the same instrument must not overlap: the first one's end
/// would clear the second one early.
fn check_overlaps(faults: &[DrillFault]) -> Result<(), String> {
    for (i, a) in faults.iter().enumerate() {
        for (j, b) in faults.iter().enumerate().skip(i + 1) {
            if a.instrument != b.instrument
                || a.action.kind() != b.action.kind()
                || a.action.duration().is_zero()
            {
                continue;
            }
            let (a_end, b_end) = (a.at + a.action.duration(), b.at + b.action.duration());
            if a.at < b_end && b.at < a_end {
                return Err(format!(
                    "faults {} and {} are both {} on the {} and overlap in time; merge them into one window",
                    i + 1,
                    j + 1,
                    a.action.kind(),
                    a.instrument.name()
                ));
            }
        }
    }
    Ok(())
}

/// One change the drill makes at a moment: a fault begins or ends.
#[derive(Debug)]
struct Change<'a> {
    at: Duration,
    fault: &'a DrillFault,
    begins: bool,
}

/// Runs `drill` against the served instruments until its last fault has ended, printing each
/// change on stderr with the time since `ready` (the simulator's clock, shared with
/// [`watch_rf_output`]). `faults` gives the handle of each instrument.
pub async fn run(
    drill: Drill,
    bench: SimBench,
    faults: impl Fn(Role) -> FaultHandle,
    ready: Instant,
) {
    let origin = match drill.start {
        DrillStart::Ready => Instant::now(),
        DrillStart::RfOn => {
            eprintln!("drill: waiting for the simulated RF output to switch on");
            while !bench.rf_output_on() {
                tokio::time::sleep(RF_WATCH_INTERVAL).await;
            }
            Instant::now()
        }
    };
    eprintln!(
        "drill +{:.2} s: started, {} fault(s) scheduled",
        ready.elapsed().as_secs_f64(),
        drill.faults.len()
    );
    let mut changes: Vec<Change<'_>> = Vec::new();
    for fault in &drill.faults {
        changes.push(Change {
            at: fault.at,
            fault,
            begins: true,
        });
        if !fault.action.duration().is_zero() {
            changes.push(Change {
                at: fault.at + fault.action.duration(),
                fault,
                begins: false,
            });
        }
    }
    // Stable: at equal times, a window's end comes before the next window's begin only if it
    // was scheduled first; windows of one kind never overlap (checked), so order is safe.
    changes.sort_by_key(|c| c.at);
    for change in changes {
        tokio::time::sleep_until(origin + change.at).await;
        let handle = faults(change.fault.instrument);
        let text = apply(&handle, &change.fault.action, change.begins);
        eprintln!(
            "drill +{:.2} s {}: {text}",
            ready.elapsed().as_secs_f64(),
            change.fault.instrument.name()
        );
    }
    eprintln!(
        "drill +{:.2} s: finished, every fault cleared",
        ready.elapsed().as_secs_f64()
    );
}

/// Starts or ends one fault; returns what was done, for the log.
fn apply(handle: &FaultHandle, action: &FaultAction, begins: bool) -> String {
    match (action, begins) {
        (FaultAction::LinkDown { duration }, true) => {
            handle.link_down();
            format!("link down for {} s", duration.as_secs_f64())
        }
        (FaultAction::LinkDown { .. }, false) => {
            handle.link_up();
            "link up".to_string()
        }
        (FaultAction::Silent { duration }, true) => {
            handle.stop_answering();
            format!("silent for {} s", duration.as_secs_f64())
        }
        (FaultAction::Silent { .. }, false) => {
            handle.resume();
            "answering again".to_string()
        }
        (FaultAction::SlowReplies { duration, delay }, true) => {
            handle.delay_replies(*delay);
            format!(
                "every reply delayed by {} ms for {} s",
                delay.as_millis(),
                duration.as_secs_f64()
            )
        }
        (FaultAction::SlowReplies { .. }, false) => {
            handle.delay_replies(Duration::ZERO);
            "replies at normal speed".to_string()
        }
        (FaultAction::GarbleReplies { count }, _) => {
            handle.garble_replies(*count);
            format!("next {count} replies garbled")
        }
        (FaultAction::PushError { code, message }, _) => {
            handle.push_error(*code, message);
            format!("error {code} ({message}) put in the error queue")
        }
    }
}

/// Prints every change of the simulated RF output on stderr, with the time since `ready`, until
/// the process ends. Runs with or without a drill: the operator watches it to see when the
/// daemon switched RF off.
pub async fn watch_rf_output(bench: SimBench, ready: Instant) {
    let mut was_on = bench.rf_output_on();
    loop {
        tokio::time::sleep(RF_WATCH_INTERVAL).await;
        let on = bench.rf_output_on();
        if on != was_on {
            let (frequency, level) = bench.rf_setting();
            eprintln!(
                "sim +{:.2} s rf-source: output {} ({:.6} GHz, {:.2})",
                ready.elapsed().as_secs_f64(),
                if on { "ON" } else { "OFF" },
                frequency.ghz(),
                level
            );
            was_on = on;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_drill_with_every_kind_parses_in_time_order() {
        let drill = Drill::from_toml_str(
            r#"
            start = "rf_on"
            [[fault]]
            at_s = 30
            instrument = "analyzer"
            kind = "silent"
            for_s = 45
            [[fault]]
            at_s = 5.5
            instrument = "rf_source"
            kind = "link_down"
            for_s = 3
            [[fault]]
            at_s = 1
            instrument = "rf_source"
            kind = "slow_replies"
            for_s = 2
            delay_ms = 1500
            [[fault]]
            at_s = 0
            instrument = "analyzer"
            kind = "garble_replies"
            count = 2
            [[fault]]
            at_s = 2
            instrument = "rf_source"
            kind = "push_error"
            code = -222
            message = "Data out of range"
            "#,
        )
        .unwrap();
        assert_eq!(drill.start, DrillStart::RfOn);
        let at: Vec<f64> = drill.faults.iter().map(|f| f.at.as_secs_f64()).collect();
        assert_eq!(at, vec![0.0, 1.0, 2.0, 5.5, 30.0]);
        assert_eq!(
            drill.faults[3].action,
            FaultAction::LinkDown {
                duration: Duration::from_secs(3)
            }
        );
        assert_eq!(drill.faults[3].instrument, Role::RfSource);
        assert_eq!(
            drill.faults[1].action,
            FaultAction::SlowReplies {
                duration: Duration::from_secs(2),
                delay: Duration::from_millis(1500)
            }
        );
    }

    fn refused(text: &str) -> String {
        Drill::from_toml_str(text).expect_err("the drill must be refused")
    }

    #[test]
    fn mistakes_are_named_with_the_fault_and_the_key() {
        let one = |body: &str| format!("[[fault]]\n{body}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"rf_source\"\nkind = \"link_down\"",
        ));
        assert!(e.contains("fault 1") && e.contains("for_s"), "{e}");
        let e = refused(&one(
            "at_s = -1\ninstrument = \"rf_source\"\nkind = \"link_down\"\nfor_s = 1",
        ));
        assert!(e.contains("at_s"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"laser\"\nkind = \"link_down\"\nfor_s = 1",
        ));
        assert!(e.contains("instrument"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"analyzer\"\nkind = \"explode\"",
        ));
        assert!(e.contains("kind"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"analyzer\"\nkind = \"garble_replies\"\ncount = 2\nfor_s = 3",
        ));
        assert!(e.contains("`for_s` does not apply"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"analyzer\"\nkind = \"push_error\"\ncode = 0\nmessage = \"x\"",
        ));
        assert!(e.contains("code"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"analyzer\"\nkind = \"push_error\"\ncode = -222\nmessage = \"a\\nb\"",
        ));
        assert!(e.contains("message"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"analyzer\"\nkind = \"silent\"\nfor_s = 1\ncolour = 3",
        ));
        assert!(e.contains("colour"), "{e}");
        let e = refused(&one(
            "at_s = 1\ninstrument = \"analyzer\"\nkind = \"silent\"\nfor_s = inf",
        ));
        assert!(e.contains("for_s"), "{e}");
        assert!(refused("start = \"ready\"\n").contains("no [[fault]]"));
    }

    #[test]
    fn overlapping_windows_of_one_kind_on_one_instrument_are_refused() {
        let text = |second_at: f64, instrument: &str| {
            format!(
                "[[fault]]\nat_s = 10\ninstrument = \"rf_source\"\nkind = \"link_down\"\nfor_s = 5\n\
                 [[fault]]\nat_s = {second_at}\ninstrument = \"{instrument}\"\nkind = \"link_down\"\nfor_s = 5\n"
            )
        };
        let e = refused(&text(14.0, "rf_source"));
        assert!(e.contains("faults 1 and 2") && e.contains("overlap"), "{e}");
        // Back to back, or on the other instrument, is fine.
        assert!(Drill::from_toml_str(&text(15.0, "rf_source")).is_ok());
        assert!(Drill::from_toml_str(&text(12.0, "analyzer")).is_ok());
    }

    #[test]
    fn the_shipped_rehearsal_files_load() {
        let drill = Drill::from_toml_str(include_str!("../../../deploy/drill-example.toml"))
            .expect("deploy/drill-example.toml is a valid drill");
        assert_eq!(drill.start, DrillStart::RfOn);
        assert!(drill
            .faults
            .iter()
            .any(|f| matches!(f.action, FaultAction::LinkDown { .. })
                && f.instrument == Role::RfSource));
        let path = Path::new("deploy/rehearsal.toml");
        let config = crate::config::Config::from_toml(
            include_str!("../../../deploy/rehearsal.toml"),
            path,
            std::env::temp_dir(),
        )
        .expect("deploy/rehearsal.toml is a valid configuration");
        assert_eq!(config.bind.port(), 8441);
    }
}
