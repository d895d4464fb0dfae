//! Position tables held in numpy arrays: their dtype, their layout (`[N, D]`, `[1, N, D]`,
//! `[1, H, W, D]`), their class slots and grid, and their values without a copy where the
//! memory layout allows.

use std::borrow::Cow;

use numpy::{Element, PyArrayDyn, PyArrayMethods, PyReadonlyArrayDyn, PyUntypedArray};
use numpy::{PyUntypedArrayMethods, ToPyArray};
use pyo3::prelude::*;

use crate::args::type_name;
use crate::errors::{usage, wrong_type};

/// A table's values, borrowed from numpy, in one of the two dtypes the engine computes in.
pub enum Values<'py> {
    F32(PyReadonlyArrayDyn<'py, f32>),
    F64(PyReadonlyArrayDyn<'py, f64>),
}

impl<'py> Values<'py> {
    /// Borrow `table` for reading. Anything but a float32 or float64 numpy array is a
    /// `TypeError` that says what to do.
    pub fn of(table: &Bound<'py, PyAny>, name: &str) -> PyResult<Self> {
        let Ok(array) = table.cast::<PyUntypedArray>() else {
            return Err(wrong_type(format!(
                "{name} must be a numpy.ndarray of float32 or float64, not {}; a framework tensor converts with numpy.asarray(t) or t.numpy()",
                type_name(table)
            )));
        };
        if let Ok(a) = array.cast::<PyArrayDyn<f32>>() {
            return Ok(Values::F32(readonly(a, name)?));
        }
        if let Ok(a) = array.cast::<PyArrayDyn<f64>>() {
            return Ok(Values::F64(readonly(a, name)?));
        }
        let dtype = array
            .dtype()
            .str()
            .map_or_else(|_| "?".into(), |s| s.to_string());
        Err(wrong_type(format!(
            "{name} must hold float32 or float64 values in native byte order, not {dtype}; convert with {name}.astype(numpy.float32)"
        )))
    }

    pub fn shape(&self) -> &[usize] {
        match self {
            Values::F32(a) => a.shape(),
            Values::F64(a) => a.shape(),
        }
    }

    /// The dtype as posgrid names it.
    pub fn dtype_name(&self) -> &'static str {
        match self {
            Values::F32(_) => "F32",
            Values::F64(_) => "F64",
        }
    }

    /// The values as f32 in row-major order: borrowed from a C-contiguous float32 array,
    /// converted otherwise.
    pub fn f32_rows(&self) -> Cow<'_, [f32]> {
        match self {
            Values::F32(a) => row_major(a),
            Values::F64(a) => Cow::Owned(a.as_array().iter().map(|v| *v as f32).collect()),
        }
    }
}

fn readonly<'py, T: Element>(
    array: &Bound<'py, PyArrayDyn<T>>,
    name: &str,
) -> PyResult<PyReadonlyArrayDyn<'py, T>> {
    array
        .try_readonly()
        .map_err(|e| usage(array.py(), format!("{name} cannot be read: {e}")))
}

/// The values in row-major order: the array's own memory when it is C-contiguous (no copy),
/// else a copy in that order (strided, reversed or Fortran-ordered arrays).
pub fn row_major<'a, T: Element + Copy>(array: &'a PyReadonlyArrayDyn<'_, T>) -> Cow<'a, [T]> {
    if array.is_c_contiguous() {
        if let Ok(slice) = array.as_slice() {
            return Cow::Borrowed(slice);
        }
    }
    Cow::Owned(array.as_array().iter().copied().collect())
}

/// How a table's rows are laid out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Shape {
    /// `[N, D]`: class slots, then the grid's rows.
    Rows,
    /// `[1, N, D]`.
    BatchOfRows,
    /// `[1, H, W, D]`: the grid itself, no slots.
    Grid,
}

/// A table read against its layout: `slots` leading rows, then a grid of `grid` cells of
/// `d` values each.
#[derive(Debug, Clone)]
pub struct Layout {
    pub shape: Shape,
    pub slots: usize,
    pub grid: Vec<usize>,
    pub d: usize,
}

impl Layout {
    /// Read the layout of an array of `dims`, with `slots` class rows and the grid given or
    /// (for rows) inferred as the only square one.
    pub fn of(
        py: Python<'_>,
        name: &str,
        dims: &[usize],
        slots: usize,
        source_grid: Option<Vec<usize>>,
    ) -> PyResult<Self> {
        let (shape, rows, d) = match *dims {
            [n, d] => (Shape::Rows, n, d),
            [1, n, d] => (Shape::BatchOfRows, n, d),
            [1, h, w, d] => return Self::grid_shaped(py, name, (h, w, d), slots, source_grid),
            [b, _, _] | [b, _, _, _] => {
                return Err(usage(
                    py,
                    format!(
                    "{name} has a leading axis of {b}; one table at a time (a leading axis of 1)"
                ),
                ))
            }
            _ => {
                return Err(usage(
                    py,
                    format!(
                        "{name} has shape {dims:?}; expected [N, D], [1, N, D] or [1, H, W, D]"
                    ),
                ))
            }
        };
        if slots > rows {
            return Err(usage(
                py,
                format!("{name} has {rows} rows, fewer than its {slots} class slots"),
            ));
        }
        let grid_rows = rows - slots;
        let grid = match source_grid {
            Some(g) => g,
            None => vec![square_side(py, name, grid_rows, slots)?; 2],
        };
        if grid.iter().product::<usize>() != grid_rows {
            return Err(usage(
                py,
                format!(
                    "{name} has {grid_rows} grid rows after {slots} class slots, but source_grid {} holds {}",
                    sides_text(&grid),
                    grid.iter().product::<usize>()
                ),
            ));
        }
        Ok(Layout {
            shape,
            slots,
            grid,
            d,
        })
    }

    fn grid_shaped(
        py: Python<'_>,
        name: &str,
        (h, w, d): (usize, usize, usize),
        slots: usize,
        source_grid: Option<Vec<usize>>,
    ) -> PyResult<Self> {
        if slots != 0 {
            return Err(usage(
                py,
                format!(
                    "{name} is grid-shaped [1, H, W, D] and has no class slots; slots must be 0"
                ),
            ));
        }
        if let Some(g) = source_grid.filter(|g| g[..] != [h, w]) {
            return Err(usage(
                py,
                format!(
                    "{name} is a {h}x{w} grid by its shape, but source_grid is {}",
                    sides_text(&g)
                ),
            ));
        }
        Ok(Layout {
            shape: Shape::Grid,
            slots: 0,
            grid: vec![h, w],
            d,
        })
    }

    /// The grid's two sides, for the similarity maps (which are drawn on a plane).
    pub fn plane(&self, py: Python<'_>, name: &str) -> PyResult<(usize, usize)> {
        match self.grid[..] {
            [h, w] => Ok((h, w)),
            _ => Err(usage(
                py,
                format!(
                    "{name} has a {} grid; similarity maps need a 2-D grid",
                    sides_text(&self.grid)
                ),
            )),
        }
    }

    /// The shape of the same table on the grid `to`.
    pub fn shape_on(&self, to: &[usize]) -> Vec<usize> {
        let rows = self.slots + to.iter().product::<usize>();
        match self.shape {
            Shape::Rows => vec![rows, self.d],
            Shape::BatchOfRows => vec![1, rows, self.d],
            Shape::Grid => [1]
                .into_iter()
                .chain(to.iter().copied())
                .chain([self.d])
                .collect(),
        }
    }
}

/// The side of the square grid of `rows` rows, or a message naming the arguments that settle
/// a grid that is not square.
fn square_side(py: Python<'_>, name: &str, rows: usize, slots: usize) -> PyResult<usize> {
    let side = (rows as f64).sqrt().round() as usize;
    if side * side == rows {
        return Ok(side);
    }
    Err(usage(
        py,
        format!(
            "{name} has {rows} grid rows after {slots} class slots, which is not a square grid; pass source_grid=(h, w) or the right slots="
        ),
    ))
}

/// `24x32`, as the command line writes grids.
pub fn sides_text(sides: &[usize]) -> String {
    sides
        .iter()
        .map(usize::to_string)
        .collect::<Vec<_>>()
        .join("x")
}

/// A flat vector of values as a numpy array of `shape`, without a copy.
pub fn to_numpy<'py, T: Element>(
    py: Python<'py>,
    values: Vec<T>,
    shape: &[usize],
) -> PyResult<Bound<'py, PyAny>> {
    let flat = numpy::PyArray1::from_vec(py, values);
    Ok(flat.reshape(shape.to_vec())?.into_any())
}

/// A small slice as a new numpy array.
pub fn small_array<'py, T: Element>(py: Python<'py>, values: &[T]) -> Bound<'py, PyAny> {
    values.to_pyarray(py).into_any()
}
