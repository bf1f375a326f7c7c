//! Running the stages off the Python thread: the GIL is released while they run, progress
//! reaches a Python callback on the calling thread, and Ctrl-C stops the run.
//!
//! The job runs on a worker thread (in a pool of `threads` workers when given, else on the
//! process's shared pool). The calling thread waits in slices of [`POLL`] without the GIL;
//! between slices it hands the stage names gathered so far to the callback and asks Python
//! whether a signal arrived. On Ctrl-C it sets the run's stop flag, which the pipeline reads
//! before each stage and each round of the fit ([`dovetail::pipeline::Progress::cancelled`]),
//! waits up to [`GRACE`] for the worker to end, and raises `KeyboardInterrupt`; a worker still
//! inside a long stage then ends at that stage's (or round's) end, writes nothing and frees
//! what it holds.

use crate::errors;
use dovetail::pipeline::Progress;
use dovetail::{Error, Result};
use pyo3::prelude::*;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{self, RecvTimeoutError};
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// How often the waiting thread looks for signals and progress.
const POLL: Duration = Duration::from_millis(100);
/// How long Ctrl-C waits for the worker to stop before returning.
const GRACE: Duration = Duration::from_secs(2);

/// The worker's side of the run: the events for the callback and the stop flag.
#[derive(Default)]
pub struct Relay {
    stop: AtomicBool,
    events: Mutex<Vec<(&'static str, String)>>,
}

impl Relay {
    fn take_events(&self) -> Vec<(&'static str, String)> {
        self.events
            .lock()
            .map(|mut e| std::mem::take(&mut *e))
            .unwrap_or_default()
    }

    fn push(&self, kind: &'static str, text: &str) {
        if let Ok(mut e) = self.events.lock() {
            e.push((kind, text.to_string()));
        }
    }
}

impl Progress for Relay {
    fn stage(&self, name: &str) {
        self.push("stage", name);
    }
    fn note(&self, text: &str) {
        self.push("note", text);
    }
    fn cancelled(&self) -> bool {
        self.stop.load(Ordering::Relaxed)
    }
}

/// Runs `job` on a worker thread with the GIL released; see the module notes.
pub fn detached<T, F>(
    py: Python<'_>,
    threads: Option<usize>,
    progress: Option<Py<PyAny>>,
    job: F,
) -> PyResult<T>
where
    T: Send + 'static,
    F: FnOnce(&Relay) -> Result<T> + Send + 'static,
{
    let pool = match threads {
        Some(0) | None => None,
        Some(n) => Some(
            rayon::ThreadPoolBuilder::new()
                .num_threads(n)
                .build()
                .map_err(|e| {
                    errors::to_py(Error::config(format!("cannot start {n} threads: {e}")))
                })?,
        ),
    };
    let relay = Arc::new(Relay::default());
    let worker_relay = Arc::clone(&relay);
    let (tx, rx) = mpsc::channel();
    std::thread::Builder::new()
        .name("dovetail".into())
        .spawn(move || {
            let relay = worker_relay;
            let run = || match &pool {
                Some(p) => p.install(|| job(&relay)),
                None => job(&relay),
            };
            let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(run));
            let _ = tx.send(outcome);
        })
        .map_err(|e| errors::to_py(Error::config(format!("cannot start a thread: {e}"))))?;
    // A Receiver is not Sync; the lock lets the wait run with the GIL released.
    let rx = std::sync::Mutex::new(rx);
    let wait = |py: Python<'_>, d| {
        py.detach(|| match rx.lock() {
            Ok(rx) => rx.recv_timeout(d),
            Err(_) => Err(RecvTimeoutError::Disconnected),
        })
    };
    // Stops the worker at its next stage and gives it a moment to get there.
    let stop = |py: Python<'_>, e: PyErr| {
        relay.stop.store(true, Ordering::Relaxed);
        let _ = wait(py, GRACE);
        e
    };
    loop {
        let got = wait(py, POLL);
        if let Err(e) = deliver(py, progress.as_ref(), relay.take_events()) {
            return Err(stop(py, e));
        }
        match got {
            Ok(Ok(result)) => return result.map_err(errors::to_py),
            Ok(Err(panic)) => {
                let what = panic
                    .downcast_ref::<String>()
                    .map(String::as_str)
                    .or_else(|| panic.downcast_ref::<&str>().copied())
                    .unwrap_or("unknown cause");
                return Err(crate::errors::DovetailError::new_err(format!(
                    "internal error (please report it with the command that led to it): {what}"
                )));
            }
            Err(RecvTimeoutError::Timeout) => {
                if let Err(interrupt) = py.check_signals() {
                    return Err(stop(py, interrupt));
                }
            }
            Err(RecvTimeoutError::Disconnected) => {
                return Err(crate::errors::DovetailError::new_err(
                    "internal error: the worker thread ended without an answer",
                ))
            }
        }
    }
}

/// Hands progress events to the callback: `callback(kind, text)` with kind "stage" or "note".
fn deliver(
    py: Python<'_>,
    callback: Option<&Py<PyAny>>,
    events: Vec<(&'static str, String)>,
) -> PyResult<()> {
    if let Some(cb) = callback {
        for (kind, text) in events {
            cb.call1(py, (kind, text))?;
        }
    }
    Ok(())
}
