//! Progress of long work (an intake, the reading of a version by a step, a replay), reported by
//! the engine to a listener the binary installs. The engine never draws and never reads the
//! clock for it: it says what it is doing and how far it is, and the listener (the command
//! line's terminal bar) decides whether and when anything is shown.
//!
//! One listener per process, installed once with [`listen`]; without one, reporting costs a
//! load of a static and an addition. A process-wide listener rather than a parameter, so that
//! every engine call keeps its signature and work started deep inside another (the steps of a
//! replay, the table a `map` takes in) reports without being handed anything.

use std::sync::OnceLock;

/// What a count counts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unit {
    Bytes,
    Steps,
}

/// Receives progress. Tasks nest (a replay's steps read versions) and may run side by side on
/// threads (a diff reads both versions at once), so each is named by the id `begin` returns.
pub trait Listener: Send + Sync {
    /// A task starts: what it does, in words for a person, and its total when known.
    fn begin(&self, what: &str, total: Option<u64>, unit: Unit) -> u64;
    /// Task `id` has done `done` of its total.
    fn update(&self, id: u64, done: u64);
    /// Task `id` ended (finished or failed).
    fn end(&self, id: u64);
}

static LISTENER: OnceLock<Box<dyn Listener>> = OnceLock::new();

/// Installs the process's listener; false if one was installed already.
pub fn listen(listener: Box<dyn Listener>) -> bool {
    LISTENER.set(listener).is_ok()
}

/// Bytes between two updates: often enough for a bar, rare enough to cost nothing.
const BYTES_PER_UPDATE: u64 = 1 << 20;

/// One task being reported; ends when dropped.
pub struct Task {
    done: u64,
    reported: u64,
    unit: Unit,
    /// The listener's id for this task, when someone listens.
    id: Option<u64>,
}

impl Task {
    /// Starts a task; `what` is only called when someone listens.
    pub fn begin(what: impl FnOnce() -> String, total: Option<u64>, unit: Unit) -> Task {
        Task {
            done: 0,
            reported: 0,
            unit,
            id: LISTENER.get().map(|l| l.begin(&what(), total, unit)),
        }
    }

    /// `n` more done.
    pub fn add(&mut self, n: u64) {
        self.done += n;
        let Some(id) = self.id else { return };
        let due = match self.unit {
            Unit::Bytes => self.done - self.reported >= BYTES_PER_UPDATE,
            Unit::Steps => true,
        };
        if due {
            self.reported = self.done;
            if let Some(l) = LISTENER.get() {
                l.update(id, self.done);
            }
        }
    }
}

impl Drop for Task {
    fn drop(&mut self) {
        if let (Some(id), Some(l)) = (self.id, LISTENER.get()) {
            l.end(id);
        }
    }
}
