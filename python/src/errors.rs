//! posgrid's errors as Python exceptions. The classes are written in Python
//! (`posgrid/_errors.py`), so that `UsageError` can also be a `ValueError`; each carries the
//! message the command line prints and its exit code.

use pyo3::exceptions::{PyMemoryError, PyTypeError};
use pyo3::prelude::*;
use pyo3::sync::PyOnceLock;
use pyo3::types::PyType;

use posgrid::error::{EXIT_REFUSED, EXIT_USAGE};
use posgrid::resample::ResampleError;
use posgrid::Error;

/// The exception classes of `posgrid._errors`.
#[derive(Clone, Copy)]
enum Class {
    Base,
    Usage,
    InvalidInput,
    Table,
    Write,
    Refused,
}

impl Class {
    const ALL: [Class; 6] = [
        Class::Base,
        Class::Usage,
        Class::InvalidInput,
        Class::Table,
        Class::Write,
        Class::Refused,
    ];

    fn python_name(self) -> &'static str {
        match self {
            Class::Base => "Error",
            Class::Usage => "UsageError",
            Class::InvalidInput => "InvalidInputError",
            Class::Table => "TableError",
            Class::Write => "WriteError",
            Class::Refused => "RefusedError",
        }
    }

    fn of(e: &Error) -> Self {
        match e {
            Error::Usage(_) => Class::Usage,
            Error::Read { .. } | Error::Invalid { .. } => Class::InvalidInput,
            Error::Table { .. } => Class::Table,
            Error::Refused { .. } => Class::Refused,
            Error::Write { .. } => Class::Write,
            Error::Interrupted { .. } => Class::Base,
        }
    }
}

/// The classes, imported once, in the order of [`Class::ALL`].
static CLASSES: PyOnceLock<Vec<Py<PyType>>> = PyOnceLock::new();

fn class(py: Python<'_>, which: Class) -> PyResult<&Bound<'_, PyType>> {
    let classes = CLASSES.get_or_try_init(py, || {
        let module = py.import("posgrid._errors")?;
        Class::ALL
            .iter()
            .map(|c| {
                Ok(module
                    .getattr(c.python_name())?
                    .cast_into::<PyType>()?
                    .unbind())
            })
            .collect::<PyResult<Vec<_>>>()
    })?;
    Ok(classes[which as usize].bind(py))
}

/// One of posgrid's exceptions: `class(message, path, exit_code)`.
fn raise(
    py: Python<'_>,
    which: Class,
    message: String,
    path: Option<String>,
    exit_code: i32,
) -> PyErr {
    match class(py, which).and_then(|c| c.call1((message, path, exit_code))) {
        Ok(instance) => PyErr::from_value(instance),
        Err(e) => e,
    }
}

/// A library error as the exception of its class, with the message the command line prints
/// (made safe for a terminal, as there) and its exit code.
pub fn from_library(py: Python<'_>, e: Error) -> PyErr {
    let message = posgrid::visible::visible(&e.to_string()).into_owned();
    let path = match &e {
        Error::Usage(_) => None,
        Error::Read { path, .. }
        | Error::Invalid { path, .. }
        | Error::Table { path, .. }
        | Error::Refused { path, .. }
        | Error::Write { path, .. }
        | Error::Interrupted { path } => Some(path.to_string_lossy().into_owned()),
    };
    raise(py, Class::of(&e), message, path, e.exit_code())
}

/// A bad argument value: `posgrid.UsageError`, which is also a `ValueError` (exit code 2, as
/// the command line's usage errors).
pub fn usage(py: Python<'_>, message: impl Into<String>) -> PyErr {
    raise(py, Class::Usage, message.into(), None, EXIT_USAGE)
}

/// A request refused for its size: `posgrid.RefusedError` (exit code 6).
pub fn refused(py: Python<'_>, message: impl Into<String>) -> PyErr {
    raise(py, Class::Refused, message.into(), None, EXIT_REFUSED)
}

/// An argument of the wrong type.
pub fn wrong_type(message: impl Into<String>) -> PyErr {
    PyTypeError::new_err(message.into())
}

/// An engine refusal: a failed allocation is a `MemoryError`, anything else a bad argument.
pub fn from_engine(py: Python<'_>, e: ResampleError) -> PyErr {
    match e {
        ResampleError::OutOfMemory { .. } => PyMemoryError::new_err(e.to_string()),
        other => usage(py, other.to_string()),
    }
}
