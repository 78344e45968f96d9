//! `ballast._native`: the ballast library for Python, on numpy arrays (the `ballast` package wraps it).
//!
//! Every entry calls the library directly — the same functions the command line calls, with the same
//! checks and the same one-line error messages (keyword names in place of flag names). Failures raise
//! [`errors::InputError`] (a `ValueError`) or [`errors::FileError`] (an `OSError`); a panic never
//! crosses into Python (it becomes a `RuntimeError`); long runs release the interpreter lock and stop
//! on Ctrl-C ([`interrupt`]).
#![forbid(unsafe_code)]
#![warn(missing_docs)]

mod arrays;
mod attack;
mod certify;
mod errors;
mod interrupt;
mod model;
mod requirement;
mod retrain;

use pyo3::prelude::*;

/// The extension module.
#[pymodule]
fn _native(m: &Bound<'_, PyModule>) -> PyResult<()> {
    let py = m.py();
    m.add("InputError", py.get_type::<errors::InputError>())?;
    m.add("FileError", py.get_type::<errors::FileError>())?;
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    m.add_class::<model::PyModel>()?;
    m.add_class::<requirement::PyRequirement>()?;
    m.add_class::<certify::PyReport>()?;
    m.add_class::<retrain::PyRetrainResult>()?;
    m.add_function(wrap_pyfunction!(certify::certify, m)?)?;
    m.add_function(wrap_pyfunction!(attack::attack, m)?)?;
    m.add_function(wrap_pyfunction!(retrain::retrain, m)?)?;
    Ok(())
}
