//! `posgrid.resample`: a table held in a numpy array to a new grid, by the engine, with the
//! GIL released while it computes.

use numpy::{Element, PyReadonlyArrayDyn};
use pyo3::prelude::*;

use posgrid::resample::{resample_grid_after, Options, Sample};

use crate::args::{self, OptionTexts};
use crate::errors::{from_engine, refused, usage};
use crate::tables::{row_major, sides_text, to_numpy, Layout, Values};

/// Resample a position table held in a numpy array to the grid `to`.
///
/// `table` is float32 or float64, laid out `[N, D]` or `[1, N, D]` (`slots` class rows, then
/// the grid's rows, row-major) or `[1, H, W, D]` (the grid itself). The grid of a table of
/// rows is `source_grid`, or the only square one. `to` is a side (a square), a tuple of sides
/// (1 to 3 axes, as many as the source grid) or text such as "24x32". Returns a new array of
/// the same layout and dtype: class rows copied exactly, grid rows resampled with the ONNX
/// Resize conventions the options name (as the command line's --kernel, --coords, --edges,
/// --antialias and --cubic-a). The input is read in place when it is C-contiguous; the GIL is
/// released while the engine runs, so threads can resample side by side.
///
/// Raises TypeError (not a float32/float64 array), posgrid.UsageError (a ValueError: a bad
/// layout, size or option), posgrid.RefusedError (an output over memory_limit) or
/// MemoryError.
#[pyfunction]
#[pyo3(
    text_signature = "(table, to, *, slots=0, source_grid=None, kernel=\"bicubic\", coords=\"half-pixel\", edges=\"clamp\", antialias=\"auto\", cubic_a=-0.75, memory_limit=\"4G\")"
)]
#[pyo3(signature = (table, to, *, slots=None, source_grid=None, kernel="bicubic", coords="half-pixel", edges="clamp", antialias="auto", cubic_a=posgrid::resample::DEFAULT_CUBIC_A, memory_limit=None))]
#[allow(clippy::too_many_arguments)]
pub fn resample<'py>(
    py: Python<'py>,
    table: &Bound<'py, PyAny>,
    to: &Bound<'py, PyAny>,
    slots: Option<&Bound<'py, PyAny>>,
    source_grid: Option<&Bound<'py, PyAny>>,
    kernel: &str,
    coords: &str,
    edges: &str,
    antialias: &str,
    cubic_a: f64,
    memory_limit: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let values = Values::of(table, "table")?;
    let slots = args::optional_count(slots, "slots", 0)?.unwrap_or(0);
    let source_grid = args::optional_sides(source_grid, "source_grid")?;
    let layout = Layout::of(py, "table", values.shape(), slots, source_grid)?;
    let to = target(py, to, &layout)?;
    let options = OptionTexts {
        kernel,
        coords,
        edges,
        antialias,
        cubic_a,
    }
    .options(py)?;
    let limit = args::memory_limit(memory_limit)?;
    match values {
        Values::F32(a) => resample_as(py, &a, &layout, &to, &options, limit),
        Values::F64(a) => resample_as(py, &a, &layout, &to, &options, limit),
    }
}

/// The target grid, with as many axes as the source's (a single side is a square).
fn target(py: Python<'_>, to: &Bound<'_, PyAny>, layout: &Layout) -> PyResult<Vec<usize>> {
    let sides = args::sides(to, "to")?;
    if sides.len() != layout.grid.len() {
        return Err(usage(
            py,
            format!(
                "to has {} sides but the table's grid {} has {}",
                sides.len(),
                sides_text(&layout.grid),
                layout.grid.len()
            ),
        ));
    }
    Ok(sides)
}

fn resample_as<'py, T: Sample + Element>(
    py: Python<'py>,
    array: &PyReadonlyArrayDyn<'py, T>,
    layout: &Layout,
    to: &[usize],
    options: &Options,
    limit: u64,
) -> PyResult<Bound<'py, PyAny>> {
    check_memory(py, layout, to, std::mem::size_of::<T>(), limit)?;
    let values = row_major(array);
    // The class rows go first in the engine's own output buffer: no copy of the result.
    let (slot_rows, grid_rows) = values.split_at(layout.slots * layout.d);
    let out = py
        .detach(|| resample_grid_after(slot_rows, grid_rows, &layout.grid, layout.d, to, options))
        .map_err(|e| from_engine(py, e))?;
    drop(values);
    to_numpy(py, out, &layout.shape_on(to))
}

/// Refuse before any allocation an output whose buffers would pass `limit`: the output and
/// the largest intermediate pass, each at most the larger side of every axis.
fn check_memory(
    py: Python<'_>,
    layout: &Layout,
    to: &[usize],
    elem: usize,
    limit: u64,
) -> PyResult<()> {
    let cells = |sizes: &mut dyn Iterator<Item = usize>| {
        sizes.fold(1u64, |n, s| n.saturating_mul(s as u64))
    };
    let output = cells(&mut to.iter().copied()).saturating_add(layout.slots as u64);
    let widest = cells(&mut layout.grid.iter().zip(to).map(|(a, b)| *a.max(b)));
    let needed = output
        .saturating_add(widest)
        .saturating_mul(layout.d as u64)
        .saturating_mul(elem as u64);
    if needed > limit {
        return Err(refused(
            py,
            format!(
                "resampling a {} grid of width {} to {} needs about {} MiB, over the {} MiB guard; raise it with memory_limit=",
                sides_text(&layout.grid),
                layout.d,
                sides_text(to),
                needed >> 20,
                limit >> 20
            ),
        ));
    }
    Ok(())
}
