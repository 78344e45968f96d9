//! Long runs without the interpreter lock, stopped by Ctrl-C, with no panic crossing into Python.
//!
//! [`run_detached`] runs the work on a worker thread while the calling thread releases the interpreter
//! lock and, every [`POLL`], takes it back briefly to run Python's pending signal handlers. When a
//! handler raises (Ctrl-C raises `KeyboardInterrupt`), the cancel flag is set: the certify pipeline stops
//! before its next sample, and the retraining observer stops at the end of the epoch in progress (by
//! unwinding with [`Cancelled`]). The work's result is then dropped and the exception is raised; nothing
//! is written, because every writing step runs only after the work returned. A panic in the work
//! becomes a `RuntimeError` naming it.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc;
use std::time::Duration;

use pyo3::exceptions::PyRuntimeError;
use pyo3::{PyErr, PyResult, Python};

/// How often the waiting thread looks for pending signals.
pub const POLL: Duration = Duration::from_millis(100);

/// The unwinding payload of a run stopped on request (not a bug).
pub struct Cancelled;

/// Stops the current work by unwinding when `cancel` is raised; call it where the work may stop.
pub fn stop_if_cancelled(cancel: &AtomicBool) {
    if cancel.load(Ordering::SeqCst) {
        std::panic::resume_unwind(Box::new(Cancelled));
    }
}

/// Runs a short `work` on the calling thread, turning a panic into a `RuntimeError`.
pub fn guarded<T>(work: impl FnOnce() -> T) -> PyResult<T> {
    catch_unwind(AssertUnwindSafe(work)).map_err(|payload| panic_error(payload.as_ref()))
}

/// The exception for a panic's payload.
fn panic_error(payload: &(dyn std::any::Any + Send)) -> PyErr {
    if payload.is::<Cancelled>() {
        return PyRuntimeError::new_err("the run was cancelled");
    }
    let text = payload
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| payload.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "unknown panic".into());
    PyRuntimeError::new_err(format!("internal error (please report it): {text}"))
}

/// Runs `work(cancel)` with the interpreter lock released; see the module documentation.
pub fn run_detached<T, F>(py: Python<'_>, work: F) -> PyResult<T>
where
    T: Send,
    F: FnOnce(&AtomicBool) -> T + Send,
{
    let cancel = AtomicBool::new(false);
    let (outcome, interrupt) = py.detach(|| {
        std::thread::scope(|scope| {
            let (sender, receiver) = mpsc::channel();
            let cancel = &cancel;
            scope.spawn(move || {
                let result = catch_unwind(AssertUnwindSafe(|| work(cancel)));
                let _ = sender.send(result);
            });
            let mut interrupt: Option<PyErr> = None;
            loop {
                match receiver.recv_timeout(POLL) {
                    Ok(result) => return (result, interrupt),
                    Err(mpsc::RecvTimeoutError::Timeout) => {
                        if interrupt.is_none() {
                            if let Err(e) = Python::attach(|py| py.check_signals()) {
                                cancel.store(true, Ordering::SeqCst);
                                interrupt = Some(e);
                            }
                        }
                    }
                    Err(mpsc::RecvTimeoutError::Disconnected) => {
                        let lost: Box<dyn std::any::Any + Send> =
                            Box::new("the worker thread ended without a result");
                        return (Err(lost), interrupt);
                    }
                }
            }
        })
    });
    if let Some(e) = interrupt {
        return Err(e);
    }
    outcome.map_err(|payload| panic_error(payload.as_ref()))
}
