//! `posgrid.similarity`, `posgrid.fidelity` and `posgrid.draw_maps`: cosine-similarity maps of
//! tables held in numpy arrays (or, for the figure, read from checkpoints as `posgrid map`
//! does), the fidelity score, and the PNG figure.

use std::borrow::Cow;
use std::path::{Path, PathBuf};

use pyo3::exceptions::PyMemoryError;
use pyo3::prelude::*;
use pyo3::types::PyDict;
use serde_json::json;

use posgrid::figure::{self, Caption, Drawn};
use posgrid::similarity::{self as core_maps, Budget, Fidelity, Grid, MapsError, Profile};

use crate::args;
use crate::errors::{from_library, refused, usage, wrong_type};
use crate::files::{to_python, Discovery};
use crate::tables::{small_array, to_numpy, Layout, Values};

/// A table's grid rows as f32, row-major, with their grid.
struct Rows<'a> {
    values: Cow<'a, [f32]>,
    slots: usize,
    h: usize,
    w: usize,
    d: usize,
}

impl Rows<'_> {
    fn grid(&self) -> Grid<'_> {
        Grid {
            rows: &self.values[self.slots * self.d..],
            h: self.h,
            w: self.w,
            d: self.d,
        }
    }
}

/// Read `values` as a table on a 2-D grid.
fn rows<'a>(
    py: Python<'_>,
    values: &'a Values<'_>,
    name: &str,
    slots: Option<usize>,
    source_grid: Option<Vec<usize>>,
) -> PyResult<Rows<'a>> {
    let layout = Layout::of(py, name, values.shape(), slots.unwrap_or(0), source_grid)?;
    let (h, w) = layout.plane(py, name)?;
    Ok(Rows {
        values: values.f32_rows(),
        slots: layout.slots,
        h,
        w,
        d: layout.d,
    })
}

/// A maps failure: over the memory guard is a refusal (exit code 6), as on the command line.
fn maps_error(py: Python<'_>, e: MapsError) -> PyErr {
    match e {
        MapsError::OverBudget { .. } => refused(py, e.to_string()),
        MapsError::OutOfMemory(m) => PyMemoryError::new_err(format!(
            "cannot allocate {} MiB for the similarity maps",
            m.bytes >> 20
        )),
    }
}

/// The cosine-similarity maps of a position table held in a numpy array: for reference
/// positions spread evenly over the grid (`refs` per axis, 1 to 64; fewer on large grids), the
/// similarity of that position's row to every row of the grid. The table's layout, slots and
/// grid are read as by `resample`.
///
/// Returns a dict: `maps` (float32 array [len(ref_rows), len(ref_cols), H, W], values in
/// [-1, 1], 0 against a zero row), `ref_rows` and `ref_cols` (lists of grid indices),
/// `profile_distance` and `profile_mean` (float64 arrays: the mean similarity against distance
/// from the reference, in fractions of the image side; NaN where no cell falls in a bin) and
/// `note` (str when fewer references were used than asked for, else None).
#[pyfunction]
#[pyo3(text_signature = "(table, *, slots=0, source_grid=None, refs=16, memory_limit=\"4G\")")]
#[pyo3(signature = (table, *, slots=None, source_grid=None, refs=None, memory_limit=None))]
pub fn similarity<'py>(
    py: Python<'py>,
    table: &Bound<'py, PyAny>,
    slots: Option<&Bound<'py, PyAny>>,
    source_grid: Option<&Bound<'py, PyAny>>,
    refs: Option<&Bound<'py, PyAny>>,
    memory_limit: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyDict>> {
    let values = Values::of(table, "table")?;
    let slots = args::optional_count(slots, "slots", 0)?;
    let source_grid = args::optional_sides(source_grid, "source_grid")?;
    let refs = args::refs(refs)?;
    let budget = Budget::memory(args::memory_limit(memory_limit)?);
    let rows = rows(py, &values, "table", slots, source_grid)?;
    let grid = rows.grid();
    let sets = py
        .detach(|| core_maps::map_sets(grid, None, refs, budget))
        .map_err(|e| maps_error(py, e))?;
    let set = sets.before;
    let shape = [set.ref_rows.len(), set.ref_cols.len(), set.h, set.w];
    let flat: Vec<f32> = set.maps.concat();
    let out = PyDict::new(py);
    out.set_item("maps", to_numpy(py, flat, &shape)?)?;
    out.set_item("ref_rows", set.ref_rows)?;
    out.set_item("ref_cols", set.ref_cols)?;
    put_profile(py, &out, &set.profile)?;
    out.set_item("note", sets.note)?;
    Ok(out)
}

fn put_profile(py: Python<'_>, out: &Bound<'_, PyDict>, p: &Profile) -> PyResult<()> {
    let mean: Vec<f64> = p.mean.iter().map(|m| m.unwrap_or(f64::NAN)).collect();
    out.set_item("profile_distance", small_array(py, &p.distance))?;
    out.set_item("profile_mean", small_array(py, &mean))
}

/// How well the spatial structure of a table survived resampling: for reference positions
/// spread over the `before` grid, the Pearson correlation between its similarity map (moved
/// bilinearly to the `after` grid) and the map of the matching position of `after`; the
/// score `resize` reports. `after_slots` defaults to `slots`; `after_grid` is inferred as
/// square like `source_grid`. Both tables must have the same width.
///
/// Returns a dict: `score` (mean correlation, or None where undefined at every reference:
/// zero or non-finite rows), `min`, `worst` ((row, column) on the before grid, or None),
/// `refs` ((rows, columns) of references), `undefined` (references left out) and `note`.
#[pyfunction]
#[pyo3(
    text_signature = "(before, after, *, slots=0, source_grid=None, after_slots=None, after_grid=None, refs=16, memory_limit=\"4G\")"
)]
#[pyo3(signature = (before, after, *, slots=None, source_grid=None, after_slots=None, after_grid=None, refs=None, memory_limit=None))]
#[allow(clippy::too_many_arguments)]
pub fn fidelity<'py>(
    py: Python<'py>,
    before: &Bound<'py, PyAny>,
    after: &Bound<'py, PyAny>,
    slots: Option<&Bound<'py, PyAny>>,
    source_grid: Option<&Bound<'py, PyAny>>,
    after_slots: Option<&Bound<'py, PyAny>>,
    after_grid: Option<&Bound<'py, PyAny>>,
    refs: Option<&Bound<'py, PyAny>>,
    memory_limit: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyDict>> {
    let (b_values, a_values) = (Values::of(before, "before")?, Values::of(after, "after")?);
    let slots = args::optional_count(slots, "slots", 0)?;
    let after_slots = args::optional_count(after_slots, "after_slots", 0)?.or(slots);
    let source_grid = args::optional_sides(source_grid, "source_grid")?;
    let after_grid = args::optional_sides(after_grid, "after_grid")?;
    let refs = args::refs(refs)?;
    let budget = Budget::memory(args::memory_limit(memory_limit)?);
    let b = rows(py, &b_values, "before", slots, source_grid)?;
    let a = rows(py, &a_values, "after", after_slots, after_grid)?;
    same_width(py, &b, &a)?;
    let grids = (b.grid(), a.grid());
    let (score, fewer) = py
        .detach(|| core_maps::score(grids.0, grids.1, refs, budget))
        .map_err(|e| maps_error(py, e))?;
    let notes: Vec<String> = fewer.into_iter().chain(score.note("before")).collect();
    let note = (!notes.is_empty()).then(|| notes.join("; "));
    fidelity_dict(py, &score, note)
}

fn same_width(py: Python<'_>, b: &Rows, a: &Rows) -> PyResult<()> {
    if b.d != a.d {
        return Err(usage(
            py,
            format!(
                "before has width {} but after has {}; the maps of tables of different widths cannot be compared",
                b.d, a.d
            ),
        ));
    }
    Ok(())
}

fn fidelity_dict<'py>(
    py: Python<'py>,
    f: &Fidelity,
    note: Option<String>,
) -> PyResult<Bound<'py, PyDict>> {
    let out = PyDict::new(py);
    out.set_item("score", f.score)?;
    out.set_item("min", f.min)?;
    out.set_item("worst", f.worst.map(|[r, c]| (r, c)))?;
    out.set_item("refs", (f.refs[0], f.refs[1]))?;
    out.set_item("undefined", f.undefined)?;
    out.set_item("note", note)?;
    Ok(out)
}

/// Draw the cosine-similarity maps of a table (before and after side by side, with the
/// fidelity score, when `after` is given) to the PNG file `path`, written atomically; an
/// existing file is replaced only with force=True.
///
/// `before` and `after` are either numpy arrays (read as by `resample`: `slots` default 0,
/// `after_slots` default `slots`, grids square or given by `source_grid` / `after_grid`;
/// `name` labels the figure) or checkpoint paths (str or os.PathLike), read as `posgrid map`
/// reads them (`slots`, `source_grid`, `patch`, `channels` and `tensor` are its discovery
/// flags). Returns the report `posgrid map --json` prints (a dict with `tensor`, `grid`,
/// `after_grid`, `refs`, `fidelity`, `profile`, `after_profile`, `output`, `width`, `height`,
/// `warnings`; `file` and `after_file` are None for arrays).
#[pyfunction]
#[pyo3(
    text_signature = "(before, after=None, *, path, slots=None, source_grid=None, after_slots=None, after_grid=None, refs=16, force=False, name=\"table\", tensor=None, patch=None, channels=None, memory_limit=\"4G\")"
)]
#[pyo3(signature = (before, after=None, *, path, slots=None, source_grid=None, after_slots=None, after_grid=None, refs=None, force=false, name="table", tensor=None, patch=None, channels=None, memory_limit=None))]
#[allow(clippy::too_many_arguments)]
pub fn draw_maps<'py>(
    py: Python<'py>,
    before: &Bound<'py, PyAny>,
    after: Option<&Bound<'py, PyAny>>,
    path: &Bound<'py, PyAny>,
    slots: Option<&Bound<'py, PyAny>>,
    source_grid: Option<&Bound<'py, PyAny>>,
    after_slots: Option<&Bound<'py, PyAny>>,
    after_grid: Option<&Bound<'py, PyAny>>,
    refs: Option<&Bound<'py, PyAny>>,
    force: bool,
    name: &str,
    tensor: Option<&Bound<'py, PyAny>>,
    patch: Option<&Bound<'py, PyAny>>,
    channels: Option<&str>,
    memory_limit: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let output = args::path(path, "path")?;
    let refs = args::refs(refs)?;
    let limit = args::memory_limit(memory_limit)?;
    let after = after.filter(|a| !a.is_none());
    if args::is_path(before) {
        if let Some(a) = after.filter(|a| !args::is_path(a)) {
            return Err(wrong_type(format!(
                "after must be a checkpoint path like before, not {}",
                args::type_name(a)
            )));
        }
        if after_slots.is_some_and(|v| !v.is_none()) || after_grid.is_some_and(|v| !v.is_none()) {
            return Err(usage(
                py,
                "after_slots and after_grid are for arrays; a resized checkpoint's table is read from the file",
            ));
        }
        let discovery = Discovery::read(py, source_grid, slots, patch, tensor, channels)?;
        let files = FilesFigure {
            before: args::path(before, "before")?,
            after: args::optional_path(after, "after")?,
            output,
            force,
            refs,
            limit,
        };
        return files.draw(py, &discovery);
    }
    if [tensor, patch]
        .iter()
        .any(|v| v.is_some_and(|v| !v.is_none()))
        || channels.is_some()
    {
        return Err(usage(
            py,
            "tensor, patch and channels are for checkpoint files; arrays are read by their layout",
        ));
    }
    let b_values = Values::of(before, "before")?;
    let a_values = after.map(|a| Values::of(a, "after")).transpose()?;
    let slots = args::optional_count(slots, "slots", 0)?;
    let after_slots = args::optional_count(after_slots, "after_slots", 0)?.or(slots);
    let b = rows(
        py,
        &b_values,
        "before",
        slots,
        args::optional_sides(source_grid, "source_grid")?,
    )?;
    let a = match &a_values {
        Some(v) => {
            let grid = args::optional_sides(after_grid, "after_grid")?;
            Some(rows(py, v, "after", after_slots, grid)?)
        }
        None => None,
    };
    if let Some(a) = &a {
        same_width(py, &b, a)?;
    }
    let caption = Caption {
        name,
        dtype: b_values.dtype_name(),
    };
    let figure = ArrayFigure {
        caption: &caption,
        before: &b,
        after: a.as_ref(),
        output: &output,
        force,
        refs,
        limit,
    };
    figure.draw(py)
}

/// A figure of two checkpoints: the `map` command's job.
struct FilesFigure {
    before: PathBuf,
    after: Option<PathBuf>,
    output: PathBuf,
    force: bool,
    refs: usize,
    limit: u64,
}

impl FilesFigure {
    fn draw<'py>(&self, py: Python<'py>, discovery: &Discovery) -> PyResult<Bound<'py, PyAny>> {
        let hints = discovery.hints();
        let report = py
            .detach(|| {
                figure::run(
                    &self.before,
                    self.after.as_deref(),
                    &hints,
                    self.refs,
                    &self.output,
                    self.force,
                    self.limit,
                )
            })
            .map_err(|e| from_library(py, e))?;
        to_python(py, &report)
    }
}

/// A figure of tables held in arrays.
struct ArrayFigure<'a> {
    caption: &'a Caption<'a>,
    before: &'a Rows<'a>,
    after: Option<&'a Rows<'a>>,
    output: &'a Path,
    force: bool,
    refs: usize,
    limit: u64,
}

impl ArrayFigure<'_> {
    fn draw<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyAny>> {
        let grids = (self.before.grid(), self.after.map(Rows::grid));
        let budget = Budget::memory(self.limit);
        let drawn = py
            .detach(|| -> posgrid::Result<Drawn> {
                let drawn =
                    figure::figure_of_grids(self.output, self.caption, grids, self.refs, budget)?;
                figure::write_png_alone(self.output, &drawn.png, self.force)?;
                Ok(drawn)
            })
            .map_err(|e| from_library(py, e))?;
        to_python(py, &self.report(&drawn))
    }

    /// The fields of `posgrid map --json`, for tables that come from no file.
    fn report(&self, drawn: &Drawn) -> serde_json::Value {
        let grid = |r: &Rows| [r.h, r.w];
        json!({
            "file": null,
            "after_file": null,
            "tensor": self.caption.name,
            "dtype": self.caption.dtype,
            "grid": grid(self.before),
            "after_grid": self.after.map(grid),
            "refs": [drawn.before.ref_rows.len(), drawn.before.ref_cols.len()],
            "fidelity": drawn.after.as_ref().map(|(_, f)| f),
            "profile": drawn.before.profile,
            "after_profile": drawn.after.as_ref().map(|(s, _)| &s.profile),
            "output": self.output.to_string_lossy(),
            "width": drawn.width,
            "height": drawn.height,
            "warnings": drawn.notes,
        })
    }
}
