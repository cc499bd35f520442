//! Fault injection for the simulated SCPI instruments: the failures a real bench produces, on
//! demand, so that the client drivers and the engine can be tested against them.
//!
//! A [`FaultHandle`] belongs to one served instrument (get it from
//! [`super::server::SimServer::faults`]); tests switch faults on and off while clients are
//! connected. Faults apply to every connection of that instrument:
//! - [`FaultHandle::drop_after_commands`]: serve N more commands (message units) normally, then
//!   close the connection when a line arrives that would go past N, without executing any of it
//!   (one-shot, so a reconnect works);
//! - [`FaultHandle::delay_replies`]: wait before every reply;
//! - [`FaultHandle::garble_replies`]: replace the next N replies with bytes that parse as nothing;
//! - [`FaultHandle::push_error`]: put an error in the instrument's error queue;
//! - [`FaultHandle::stop_answering`]: read and log commands but neither execute nor answer them,
//!   until [`FaultHandle::resume`];
//! - [`FaultHandle::link_down`]: the network path is gone: every open connection is closed at once
//!   and new ones are accepted and closed straight away, until [`FaultHandle::link_up`] (a cable
//!   pulled, a switch rebooting, an instrument's LAN stack restarting).

use super::bench::{Role, SimBench};
use crate::sim::scpi_parser::ScpiError;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;
use tokio::sync::watch;

/// What a reply looks like when garbled: not a number, not a block, not valid text.
pub const GARBLED_REPLY: &[u8] = b"\x15?%\xfe garbled \xff~";

#[derive(Debug, Default)]
struct Faults {
    commands_before_drop: Option<u64>,
    reply_delay: Duration,
    garbled_replies_left: u32,
    silent: bool,
}

/// What the server does with one received line.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum LineAction {
    /// Close the connection without executing the line.
    Drop,
    /// Execute nothing, answer nothing.
    Ignore,
    /// Execute and answer, after `delay`, garbling the reply if asked.
    Serve { delay: Duration, garble: bool },
}

/// Switches faults of one simulated instrument on and off. Cheap to clone.
#[derive(Debug, Clone)]
pub struct FaultHandle {
    role: Role,
    bench: SimBench,
    faults: Arc<Mutex<Faults>>,
    /// `true` while the link is down; connections watch it to close at once.
    link_down: Arc<watch::Sender<bool>>,
}

impl FaultHandle {
    pub(crate) fn new(role: Role, bench: SimBench) -> FaultHandle {
        FaultHandle {
            role,
            bench,
            faults: Arc::new(Mutex::new(Faults::default())),
            link_down: Arc::new(watch::channel(false).0),
        }
    }

    fn lock(&self) -> MutexGuard<'_, Faults> {
        self.faults.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Which instrument these faults act on.
    pub fn role(&self) -> Role {
        self.role
    }

    /// Serves `commands` more commands (message units), then closes the connection when a line
    /// arrives that would go past them, without executing any of that line. Fires once.
    pub fn drop_after_commands(&self, commands: u64) {
        self.lock().commands_before_drop = Some(commands);
    }

    /// Waits `delay` before sending every reply (zero switches it off).
    pub fn delay_replies(&self, delay: Duration) {
        self.lock().reply_delay = delay;
    }

    /// Replaces the next `count` replies with [`GARBLED_REPLY`] (still newline-terminated).
    pub fn garble_replies(&self, count: u32) {
        self.lock().garbled_replies_left = count;
    }

    /// Puts an error into the instrument's error queue, as if the instrument had raised it.
    pub fn push_error(&self, code: i32, detail: &str) {
        self.bench
            .push_error(self.role, ScpiError::new(code, detail));
    }

    /// Reads and logs commands but neither executes nor answers them.
    pub fn stop_answering(&self) {
        self.lock().silent = true;
    }

    /// Ends [`FaultHandle::stop_answering`].
    pub fn resume(&self) {
        self.lock().silent = false;
    }

    /// Takes the link down: open connections close now, new ones are closed as soon as they
    /// are accepted, until [`FaultHandle::link_up`].
    pub fn link_down(&self) {
        self.link_down.send_replace(true);
    }

    /// Brings the link back: connections are served again.
    pub fn link_up(&self) {
        self.link_down.send_replace(false);
    }

    /// Whether the link is down.
    pub fn is_link_down(&self) -> bool {
        *self.link_down.borrow()
    }

    /// A receiver that sees the link go down and up (for the server's connections).
    pub(crate) fn link_watch(&self) -> watch::Receiver<bool> {
        self.link_down.subscribe()
    }

    /// Switches every fault off, the link included.
    pub fn clear(&self) {
        *self.lock() = Faults::default();
        self.link_up();
    }

    /// Decides what to do with a line of `units` commands, counting them towards a drop.
    pub(crate) fn on_line(&self, units: usize) -> LineAction {
        let mut faults = self.lock();
        if let Some(left) = faults.commands_before_drop {
            let units = units as u64;
            if units > left {
                faults.commands_before_drop = None;
                return LineAction::Drop;
            }
            faults.commands_before_drop = Some(left - units);
        }
        if faults.silent {
            return LineAction::Ignore;
        }
        LineAction::Serve {
            delay: faults.reply_delay,
            garble: faults.garbled_replies_left > 0,
        }
    }

    /// Counts one garbled reply as sent.
    pub(crate) fn reply_garbled(&self) {
        let mut faults = self.lock();
        faults.garbled_replies_left = faults.garbled_replies_left.saturating_sub(1);
    }
}
