//! Arguments from Python, checked with messages that name the argument: counts, grid sizes,
//! option names, paths. A wrong type is a `TypeError`, a wrong value a `posgrid.UsageError`
//! (a `ValueError`).

use std::path::PathBuf;
use std::str::FromStr;

use pyo3::exceptions::PyOverflowError;
use pyo3::prelude::*;
use pyo3::types::{PyBool, PyInt, PyList, PyString, PyTuple};

use posgrid::cli::{parse_grid_frames, parse_size};
use posgrid::resample::{Antialias, Coords, Edges, Kernel, Options};

use crate::errors::{usage, wrong_type};

/// The name of a value's type, for messages.
pub fn type_name(value: &Bound<'_, PyAny>) -> String {
    value
        .get_type()
        .name()
        .map_or_else(|_| "?".to_string(), |n| n.to_string())
}

/// An integer of at least `min` (bools are refused: `True` is not a size).
pub fn count(value: &Bound<'_, PyAny>, name: &str, min: usize) -> PyResult<usize> {
    let py = value.py();
    if value.is_instance_of::<PyBool>() || value.is_instance_of::<PyString>() {
        return Err(wrong_type(format!(
            "{name} must be an integer, not {}",
            type_name(value)
        )));
    }
    let n: i128 = match value.extract() {
        Ok(n) => n,
        Err(e) if e.is_instance_of::<PyOverflowError>(py) => {
            return Err(usage(py, format!("{name} is too large")))
        }
        Err(_) => {
            return Err(wrong_type(format!(
                "{name} must be an integer, not {}",
                type_name(value)
            )))
        }
    };
    if n < min as i128 {
        return Err(usage(py, format!("{name} must be at least {min}, got {n}")));
    }
    usize::try_from(n).map_err(|_| usage(py, format!("{name} is too large")))
}

/// An optional count; `None` stays `None`.
pub fn optional_count(
    value: Option<&Bound<'_, PyAny>>,
    name: &str,
    min: usize,
) -> PyResult<Option<usize>> {
    match value {
        Some(v) if !v.is_none() => count(v, name, min).map(Some),
        _ => Ok(None),
    }
}

/// Grid sides: an integer `n` (a square `n x n`), a tuple or list of 1 to 3 sides, or the
/// command line's text (`"24x32"`, `"8x14x14"`). Every side is at least 1.
pub fn sides(value: &Bound<'_, PyAny>, name: &str) -> PyResult<Vec<usize>> {
    let py = value.py();
    if let Ok(text) = value.cast::<PyString>() {
        let text = text.to_cow()?;
        let g = parse_grid_frames(&text).map_err(|e| usage(py, format!("{name}: {e}")))?;
        return Ok(g.frames.into_iter().chain([g.h, g.w]).collect());
    }
    if value.is_instance_of::<PyInt>() && !value.is_instance_of::<PyBool>() {
        let n = count(value, name, 1)?;
        return Ok(vec![n, n]);
    }
    let items: Vec<Bound<'_, PyAny>> = if let Ok(t) = value.cast::<PyTuple>() {
        t.iter().collect()
    } else if let Ok(l) = value.cast::<PyList>() {
        l.iter().collect()
    } else if value.hasattr("__index__")? {
        // A numpy integer.
        let n = count(value, name, 1)?;
        return Ok(vec![n, n]);
    } else {
        return Err(wrong_type(format!(
            "{name} must be an integer, a tuple of sizes or text such as \"24x32\", not {}",
            type_name(value)
        )));
    };
    if items.is_empty() || items.len() > 3 {
        return Err(usage(
            py,
            format!("{name} must have 1 to 3 sides, got {}", items.len()),
        ));
    }
    items
        .iter()
        .enumerate()
        .map(|(i, v)| count(v, &format!("{name}[{i}]"), 1))
        .collect()
}

/// Grid sides, or `None`.
pub fn optional_sides(
    value: Option<&Bound<'_, PyAny>>,
    name: &str,
) -> PyResult<Option<Vec<usize>>> {
    match value {
        Some(v) if !v.is_none() => sides(v, name).map(Some),
        _ => Ok(None),
    }
}

/// Exactly two sides `(h, w)` (an integer is a square).
pub fn plane(value: &Bound<'_, PyAny>, name: &str) -> PyResult<(usize, usize)> {
    match sides(value, name)?.as_slice() {
        [h, w] => Ok((*h, *w)),
        other => Err(usage(
            value.py(),
            format!(
                "{name} must have 2 sides (height, width), got {}",
                other.len()
            ),
        )),
    }
}

/// Two sides, or `None`.
pub fn optional_plane(
    value: Option<&Bound<'_, PyAny>>,
    name: &str,
) -> PyResult<Option<(usize, usize)>> {
    match value {
        Some(v) if !v.is_none() => plane(v, name).map(Some),
        _ => Ok(None),
    }
}

/// A value spelled as on the command line (`"bicubic"`, `"half-pixel"`, ...).
pub fn choice<T: FromStr<Err = String>>(py: Python<'_>, text: &str, name: &str) -> PyResult<T> {
    text.parse()
        .map_err(|e: String| usage(py, format!("{name}: {e}")))
}

/// An optional value spelled as on the command line.
pub fn optional_choice<T: FromStr<Err = String>>(
    py: Python<'_>,
    text: Option<&str>,
    name: &str,
) -> PyResult<Option<T>> {
    text.map(|t| choice(py, t, name)).transpose()
}

/// A byte count: an integer, or text such as `"512M"` or `"4G"`.
pub fn bytes(value: &Bound<'_, PyAny>, name: &str) -> PyResult<u64> {
    let py = value.py();
    if let Ok(text) = value.cast::<PyString>() {
        return parse_size(&text.to_cow()?).map_err(|e| usage(py, format!("{name}: {e}")));
    }
    let n = count(value, name, 0)?;
    u64::try_from(n).map_err(|_| usage(py, format!("{name} is too large")))
}

/// The default memory guard of the command line (4 GiB), or the one given.
pub fn memory_limit(value: Option<&Bound<'_, PyAny>>) -> PyResult<u64> {
    match value {
        Some(v) if !v.is_none() => bytes(v, "memory_limit"),
        _ => Ok(posgrid::plan::DEFAULT_MEMORY_LIMIT),
    }
}

/// Reference positions per axis: 1 to 64, as on the command line.
pub fn refs(value: Option<&Bound<'_, PyAny>>) -> PyResult<usize> {
    let Some(v) = value.filter(|v| !v.is_none()) else {
        return Ok(posgrid::similarity::DEFAULT_REFS);
    };
    let n = count(v, "refs", 1)?;
    if n > 64 {
        return Err(usage(v.py(), format!("refs must be from 1 to 64, got {n}")));
    }
    Ok(n)
}

/// Tensor names: one name or a sequence of names.
pub fn names(value: Option<&Bound<'_, PyAny>>, name: &str) -> PyResult<Vec<String>> {
    let Some(v) = value.filter(|v| !v.is_none()) else {
        return Ok(Vec::new());
    };
    if let Ok(s) = v.cast::<PyString>() {
        return Ok(vec![s.to_cow()?.into_owned()]);
    }
    let items = v.try_iter().map_err(|_| {
        wrong_type(format!(
            "{name} must be a name or a sequence of names, not {}",
            type_name(v)
        ))
    })?;
    items
        .map(|item| {
            let item = item?;
            item.extract::<String>().map_err(|_| {
                wrong_type(format!(
                    "{name} must hold names (str), not {}",
                    type_name(&item)
                ))
            })
        })
        .collect()
}

/// A file path: `str` or any `os.PathLike`.
pub fn path(value: &Bound<'_, PyAny>, name: &str) -> PyResult<PathBuf> {
    value.extract::<PathBuf>().map_err(|_| {
        wrong_type(format!(
            "{name} must be a path (str or os.PathLike), not {}",
            type_name(value)
        ))
    })
}

/// A path, or `None`.
pub fn optional_path(value: Option<&Bound<'_, PyAny>>, name: &str) -> PyResult<Option<PathBuf>> {
    match value {
        Some(v) if !v.is_none() => path(v, name).map(Some),
        _ => Ok(None),
    }
}

/// Whether a value is a path (`str` or `os.PathLike`) rather than an array.
pub fn is_path(value: &Bound<'_, PyAny>) -> bool {
    value.is_instance_of::<PyString>() || value.hasattr("__fspath__").unwrap_or(false)
}

/// The resampling options, spelled as on the command line.
pub struct OptionTexts<'a> {
    pub kernel: &'a str,
    pub coords: &'a str,
    pub edges: &'a str,
    pub antialias: &'a str,
    pub cubic_a: f64,
}

impl OptionTexts<'_> {
    pub fn options(&self, py: Python<'_>) -> PyResult<Options> {
        if !self.cubic_a.is_finite() {
            return Err(usage(py, "cubic_a must be a finite number"));
        }
        Ok(Options {
            kernel: choice::<Kernel>(py, self.kernel, "kernel")?,
            coords: choice::<Coords>(py, self.coords, "coords")?,
            edges: choice::<Edges>(py, self.edges, "edges")?,
            antialias: choice::<Antialias>(py, self.antialias, "antialias")?,
            cubic_a: self.cubic_a,
        })
    }
}
