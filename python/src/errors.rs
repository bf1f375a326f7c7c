//! The package's exceptions: one base class and one class per kind of library error, with
//! the context an input error carries (file, row or line, column) as attributes.

use dovetail::{Error, ErrorKind};
use pyo3::exceptions::{PyException, PyKeyboardInterrupt};
use pyo3::prelude::*;

pyo3::create_exception!(
    _dovetail,
    DovetailError,
    PyException,
    "Base class of the errors dovetail raises. `str(e)` is the CLI's one-line message."
);
pyo3::create_exception!(
    _dovetail,
    ConfigError,
    DovetailError,
    "The config is invalid: an unknown key (with the nearest valid key suggested), a bad value, a missing section."
);
pyo3::create_exception!(
    _dovetail,
    InputError,
    DovetailError,
    "A table cannot be read or holds a bad value. Attributes: `file` (the path, or `<left table>` / `<right table>` for a data frame), `row` (the 1-based line of a CSV file, counting the header as line 1, or the 1-based row of a Parquet file or data frame; None when the error is about the whole table), `place` (\"line\" or \"row\", what `row` counts) and `column`."
);
pyo3::create_exception!(
    _dovetail,
    OutputError,
    DovetailError,
    "An output folder or file could not be written; nothing was left half-written."
);
pyo3::create_exception!(
    _dovetail,
    InfeasibleError,
    DovetailError,
    "The linkage is infeasible and the config's `stop_if_infeasible` is set: no links were made."
);
pyo3::create_exception!(
    _dovetail,
    MemoryBudgetError,
    DovetailError,
    "The run's estimated peak memory is over its memory budget; it stopped before making any candidate pair. The message names the pass with the most pairs."
);

/// Adds the exception classes to the module.
pub fn register(m: &Bound<'_, PyModule>) -> PyResult<()> {
    let py = m.py();
    m.add("DovetailError", py.get_type::<DovetailError>())?;
    m.add("ConfigError", py.get_type::<ConfigError>())?;
    m.add("InputError", py.get_type::<InputError>())?;
    m.add("OutputError", py.get_type::<OutputError>())?;
    m.add("InfeasibleError", py.get_type::<InfeasibleError>())?;
    m.add("MemoryBudgetError", py.get_type::<MemoryBudgetError>())?;
    Ok(())
}

/// A library error as a Python exception of its kind, with its context as attributes.
pub fn to_py(e: Error) -> PyErr {
    let text = e.to_string();
    let err = match e.kind() {
        ErrorKind::Config => ConfigError::new_err(text),
        ErrorKind::Input => InputError::new_err(text),
        ErrorKind::Output => OutputError::new_err(text),
        ErrorKind::Infeasible => InfeasibleError::new_err(text),
        ErrorKind::OverBudget => MemoryBudgetError::new_err(text),
        ErrorKind::Cancelled => PyKeyboardInterrupt::new_err(text),
    };
    Python::attach(|py| {
        let value = err.value(py);
        let file = e.file().map(|f| f.display().to_string());
        // Attributes are best effort: the message already says everything.
        let _ = value.setattr("file", file);
        let _ = value.setattr("row", e.line());
        let _ = value.setattr("place", e.line().map(|_| e.place()));
        let _ = value.setattr("column", e.column());
        let _ = value.setattr("message", e.message());
    });
    err
}
