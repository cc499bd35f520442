//! The RF-off interlock: every way a run can stop leaves the source's output off.
//!
//! The normal paths (end of a frequency, end of a run, cancel, error) call
//! [`RfOffGuard::release`], which switches the output off and confirms it, and returns the error
//! if that failed so the run records it. A path that never reaches that call (a panic unwinding
//! the run task, a task dropped at shutdown) still drops the guard, and the guard's `Drop`
//! spawns the same safe-off on the runtime. The daemon also switches every configured source off
//! at start-up and after a shutdown signal (see `engine::Engine`), so a SIGKILL, which no code can
//! catch, is covered by the next start.

use halfwave_drivers::{InstrumentError, RfSource};
use std::sync::Arc;
use tokio::sync::Mutex;
use tokio::time::Instant;

/// A source shared between the run that drives it and the interlocks that may switch it off.
pub type SharedSource = Arc<Mutex<Box<dyn RfSource>>>;

/// How long a stop path spends on switching the output off before it gives up and hands the
/// bench to the keeper (`engine::rf_safety`), which goes on trying for as long as the daemon runs.
pub const SWITCH_OFF_BUDGET: std::time::Duration = std::time::Duration::from_millis(1500);

/// The longest a level change (with its settling `*OPC?`) may take on the source while the
/// output may be on, in a measurement run and in a chain calibration alike; a source that stops
/// answering is given up on after this, so the stop path switches the output off without waiting
/// for the transport's own timeout. Sources settle in milliseconds to a few hundred (common
/// practice), so this leaves a wide margin.
pub const SOURCE_STEP_LIMIT: std::time::Duration = std::time::Duration::from_secs(2);

/// What a stop says when `source` overran [`SOURCE_STEP_LIMIT`] on a level change.
pub fn level_change_overran(source: &str) -> String {
    format!(
        "{source} did not complete a level change within {:.1} s with the output on",
        SOURCE_STEP_LIMIT.as_secs_f64()
    )
}

/// Switches a shared source's output off and confirms it, retrying (the driver reconnects
/// between attempts) within [`SWITCH_OFF_BUDGET`], the wait for the source's lock included;
/// returns the last error if it could not be confirmed. The caller then flags the bench
/// (`BenchSafety::output_unconfirmed`).
pub async fn switch_off(source: &SharedSource) -> Result<(), InstrumentError> {
    let deadline = Instant::now() + SWITCH_OFF_BUDGET;
    match tokio::time::timeout_at(deadline, source.lock()).await {
        Ok(mut src) => switch_off_until(src.as_mut(), deadline).await,
        Err(_) => Err(budget_spent("the RF source (its lock was held)".into())),
    }
}

/// The cause of a stop whose instrument overran its watch with the output on (`what` says which
/// and how), after switching the output off first: `what`, then whether that worked.
pub async fn switch_off_first(source: &SharedSource, what: String) -> String {
    match switch_off(source).await {
        Ok(()) => format!("{what}; the RF output was switched off first"),
        Err(e) => format!("{what}; switching the RF output off failed too ({e})"),
    }
}

/// [`switch_off`] for a source not shared yet (the start-up interlock).
pub async fn switch_off_source(source: &mut dyn RfSource) -> Result<(), InstrumentError> {
    switch_off_until(source, Instant::now() + SWITCH_OFF_BUDGET).await
}

async fn switch_off_until(
    source: &mut dyn RfSource,
    deadline: Instant,
) -> Result<(), InstrumentError> {
    let resource = source.resource().to_string();
    let mut last = None;
    let mut attempt = 0u64;
    loop {
        attempt += 1;
        match tokio::time::timeout_at(deadline, source.safe_off()).await {
            Ok(Ok(())) => {
                tracing::debug!(resource, "RF output confirmed off");
                return Ok(());
            }
            Ok(Err(e)) => {
                tracing::warn!(resource, attempt, error = %e, "RF safe-off failed; retrying");
                last = Some(e);
            }
            Err(_) => break,
        }
        let pause = std::time::Duration::from_millis(100 * attempt.min(5));
        if Instant::now() + pause >= deadline {
            break;
        }
        tokio::time::sleep(pause).await;
    }
    Err(last.unwrap_or_else(|| budget_spent(resource)))
}

fn budget_spent(resource: String) -> InstrumentError {
    InstrumentError::Timeout {
        resource,
        operation: "switching the output off and reading it back".into(),
        after: SWITCH_OFF_BUDGET,
    }
}

/// Armed while a run may have RF on; switches the output off when released or dropped.
pub struct RfOffGuard {
    source: SharedSource,
    armed: bool,
}

impl RfOffGuard {
    /// Arms the interlock for this source.
    pub fn arm(source: SharedSource) -> RfOffGuard {
        RfOffGuard {
            source,
            armed: true,
        }
    }

    /// Switches the output off now and disarms; the error, if any, is the run's to record.
    pub async fn release(mut self) -> Result<(), InstrumentError> {
        self.armed = false;
        switch_off(&self.source).await
    }
}

impl Drop for RfOffGuard {
    fn drop(&mut self) {
        if !self.armed {
            return;
        }
        let source = self.source.clone();
        match tokio::runtime::Handle::try_current() {
            Ok(handle) => {
                tracing::warn!(
                    "run ended without a clean stop; switching RF off from the interlock"
                );
                handle.spawn(async move {
                    if let Err(e) = switch_off(&source).await {
                        tracing::error!(error = %e, "the interlock could not switch the RF output off; switch it off by hand");
                    }
                });
            }
            Err(_) => tracing::error!(
                "the interlock has no runtime to switch the RF output off; switch it off by hand"
            ),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use halfwave_drivers::sim::{Scenario, SimBench};
    use std::time::Duration;

    /// A simulated source with its output on, as a run in progress has it.
    async fn source_left_on() -> (SimBench, SharedSource) {
        let sim = SimBench::new(Scenario::builtin().expect("built-in scenario"), 1);
        let mut source: Box<dyn RfSource> = Box::new(sim.rf_source());
        source.set_output(true).await.expect("output on");
        assert!(sim.rf_output_on());
        (sim, Arc::new(Mutex::new(source)))
    }

    /// Waits up to one second for the simulated output to go off.
    async fn goes_off_within_a_second(sim: &SimBench) -> bool {
        for _ in 0..100 {
            if !sim.rf_output_on() {
                return true;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        false
    }

    #[tokio::test]
    async fn release_switches_off_and_reports_success() {
        let (sim, source) = source_left_on().await;
        RfOffGuard::arm(source).release().await.expect("safe-off");
        assert!(!sim.rf_output_on());
    }

    #[tokio::test]
    async fn a_panicking_run_task_leaves_the_output_off() {
        let (sim, source) = source_left_on().await;
        let run = tokio::spawn(async move {
            let _guard = RfOffGuard::arm(source);
            panic!("a bug in the middle of a point");
        });
        let joined = run.await;
        assert!(joined.is_err_and(|e| e.is_panic()));
        assert!(
            goes_off_within_a_second(&sim).await,
            "the guard's drop must switch the output off"
        );
    }

    #[tokio::test]
    async fn a_run_task_aborted_mid_point_leaves_the_output_off() {
        let (sim, source) = source_left_on().await;
        let (armed_tx, armed) = tokio::sync::oneshot::channel();
        let run = tokio::spawn(async move {
            let _guard = RfOffGuard::arm(source);
            let _ = armed_tx.send(());
            std::future::pending::<()>().await;
        });
        armed.await.expect("the run task armed its guard");
        run.abort();
        assert!(run.await.is_err_and(|e| e.is_cancelled()));
        assert!(goes_off_within_a_second(&sim).await);
    }
}
