//! The two exception types every failure becomes, and the conversion from the library's errors.
//!
//! A failure carries the same one-line message the command line prints after `error:` (the whole
//! context chain, `{:#}`). It is an [`FileError`] (a subclass of `OSError`) when the chain holds an
//! operating-system error (a file missing, unreadable or not writable) and an [`InputError`] (a subclass
//! of `ValueError`) otherwise: bad input, a bad setting, misuse. Per-sample outcomes are never errors.

use pyo3::create_exception;
use pyo3::exceptions::{PyOSError, PyValueError};
use pyo3::PyErr;

create_exception!(
    ballast,
    InputError,
    PyValueError,
    "Bad input or a bad setting (exit code 2 on the command line); the message is the command line's one line."
);
create_exception!(
    ballast,
    FileError,
    PyOSError,
    "A file could not be read or written (exit code 2 on the command line); the message names the file."
);

/// The exception for a library error, with the command line's message.
pub fn to_py(error: anyhow::Error) -> PyErr {
    let message = format!("{error:#}");
    if error.chain().any(|e| e.is::<std::io::Error>()) {
        FileError::new_err(message)
    } else {
        InputError::new_err(message)
    }
}

/// An [`InputError`] with `message`.
pub fn input(message: impl Into<String>) -> PyErr {
    InputError::new_err(message.into())
}

/// Converts any library result into a Python result.
pub trait OrPy<T> {
    /// The value, or the exception for the error.
    fn or_py(self) -> Result<T, PyErr>;
}

impl<T, E: Into<anyhow::Error>> OrPy<T> for Result<T, E> {
    fn or_py(self) -> Result<T, PyErr> {
        self.map_err(|e| to_py(e.into()))
    }
}

/// A [`FileError`] with `message` (an output the library reports as text).
pub fn file(message: impl Into<String>) -> PyErr {
    FileError::new_err(message.into())
}
