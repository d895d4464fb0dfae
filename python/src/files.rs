//! `posgrid.scan` and `posgrid.resize`: the commands' jobs on checkpoint files, returning the
//! objects `--json` prints, with the GIL released while files are read and written.

use pyo3::prelude::*;
use serde::Serialize;

use posgrid::cli::{self, DiscoveryArgs, GridArg, ResizeArgs};
use posgrid::kinds::patch::Flatten;
use posgrid::kinds::{Channels, Hints};
use posgrid::resample::{Antialias, Coords, Edges, Kernel};

use crate::args::{self, choice, optional_choice};
use crate::errors::{from_library, usage};

/// A report as the Python objects its JSON text reads as (the same text `--json` prints).
pub fn to_python<'py>(py: Python<'py>, report: &impl Serialize) -> PyResult<Bound<'py, PyAny>> {
    let text = serde_json::to_string(report)
        .map_err(|e| pyo3::exceptions::PyRuntimeError::new_err(e.to_string()))?;
    py.import("json")?.call_method1("loads", (text,))
}

/// The discovery arguments every command takes, checked.
pub struct Discovery {
    pub source_grid: Option<GridArg>,
    pub slots: Option<usize>,
    pub patch: Option<usize>,
    pub tensors: Vec<String>,
    pub channels: Option<Channels>,
    /// A linear patch embedding's flattening order (`resize` only: kernels matter there).
    pub patch_order: Option<Flatten>,
}

impl Discovery {
    pub fn read(
        py: Python<'_>,
        source_grid: Option<&Bound<'_, PyAny>>,
        slots: Option<&Bound<'_, PyAny>>,
        patch: Option<&Bound<'_, PyAny>>,
        tensors: Option<&Bound<'_, PyAny>>,
        channels: Option<&str>,
    ) -> PyResult<Self> {
        Ok(Discovery {
            source_grid: grid_arg(py, source_grid, "source_grid")?,
            slots: args::optional_count(slots, "slots", 0)?,
            patch: args::optional_count(patch, "patch", 1)?,
            tensors: args::names(tensors, "tensors")?,
            channels: optional_choice(py, channels, "channels")?,
            patch_order: None,
        })
    }

    pub fn hints(&self) -> Hints {
        Hints {
            source_grid: self.source_grid.map(|g| (g.h, g.w)),
            source_frames: self.source_grid.and_then(|g| g.frames),
            slots: self.slots,
            patch: self.patch,
            tensors: self.tensors.clone(),
            channels: self.channels,
            patch_order: self.patch_order,
            new_patch: None,
            recorded_grid: None,
        }
    }

    fn into_args(self, py: Python<'_>) -> PyResult<DiscoveryArgs> {
        Ok(DiscoveryArgs {
            source_grid: self.source_grid,
            slots: self.slots,
            patch: self.patch.map(|p| small(py, p, "patch")).transpose()?,
            tensors: self.tensors,
            channels: self.channels,
            patch_order: self.patch_order,
        })
    }
}

/// A grid of 2 sides, or 3 with the frames of a video grid in front.
fn grid_arg(
    py: Python<'_>,
    value: Option<&Bound<'_, PyAny>>,
    name: &str,
) -> PyResult<Option<GridArg>> {
    let Some(sides) = args::optional_sides(value, name)? else {
        return Ok(None);
    };
    match sides[..] {
        [h, w] => Ok(Some(GridArg { frames: None, h, w })),
        [t, h, w] => Ok(Some(GridArg {
            frames: Some(t),
            h,
            w,
        })),
        _ => Err(usage(
            py,
            format!("{name} must have 2 sides (HxW) or 3 (TxHxW), got 1"),
        )),
    }
}

/// A count that the command line keeps in 32 bits.
fn small(py: Python<'_>, n: usize, name: &str) -> PyResult<u32> {
    u32::try_from(n).map_err(|_| usage(py, format!("{name} is too large")))
}

/// The position tables of a checkpoint, as `posgrid scan --json` prints them: a dict with
/// `file`, `format`, `tensor_count`, `file_size`, `tables`, `encodings`, `ambiguous`,
/// `skipped` and `warnings`.
///
/// `path` is a .safetensors, .npz or PyTorch file, a sharded set (its directory or index) or a
/// model directory; str or os.PathLike. The keyword arguments are the command line's
/// discovery flags: `source_grid` ("HxW", "TxHxW", a side or a tuple), `slots`, `patch`,
/// `tensors` (a name or a list of names) and `channels` ("first" or "last"). Where the command
/// line exits with code 4 after printing an inconclusive scan (no table, or an ambiguous
/// one), this returns the report: `tables` is empty or `ambiguous` is not.
///
/// Raises posgrid.InvalidInputError (exit code 3), posgrid.TableError (4: a named tensor is
/// missing) or posgrid.UsageError.
#[pyfunction]
#[pyo3(
    text_signature = "(path, *, source_grid=None, slots=None, patch=None, tensors=None, channels=None)"
)]
#[pyo3(signature = (path, *, source_grid=None, slots=None, patch=None, tensors=None, channels=None))]
pub fn scan<'py>(
    py: Python<'py>,
    path: &Bound<'py, PyAny>,
    source_grid: Option<&Bound<'py, PyAny>>,
    slots: Option<&Bound<'py, PyAny>>,
    patch: Option<&Bound<'py, PyAny>>,
    tensors: Option<&Bound<'py, PyAny>>,
    channels: Option<&str>,
) -> PyResult<Bound<'py, PyAny>> {
    let path = args::path(path, "path")?;
    let hints = Discovery::read(py, source_grid, slots, patch, tensors, channels)?.hints();
    let report = py
        .detach(|| cli::scan_report(&path, &hints))
        .map_err(|e| from_library(py, e))?;
    to_python(py, &report)
}

/// Write a copy of the checkpoint at `path` to `out` with its position tables resized, as
/// `posgrid resize --json` does, and return the same report (a dict with `input`, `output`,
/// `dry_run`, `nothing_to_do`, `tables`, `companions`, `copied`, `dropped`, `bytes_written`,
/// `output_size`, `warnings`, ...).
///
/// Give exactly one target: `grid` (the patch grid: a side, (h, w), (t, h, w) or "24x32") or
/// `image` (the input size in pixels; the grid is image / patch size). Every other keyword is
/// the command line's flag of the same name (`--no-sync` is sync=False). Nothing is written on
/// failure, and the output appears whole or not at all.
///
/// Raises posgrid.UsageError (exit code 2), posgrid.InvalidInputError (3), posgrid.TableError
/// (4), posgrid.WriteError (5) or posgrid.RefusedError (6), with the command line's message.
#[pyfunction]
#[pyo3(
    text_signature = "(path, out, *, grid=None, image=None, scale=None, frames=None, window=None, new_patch=None, patch_order=None, source_grid=None, slots=None, patch=None, tensors=None, channels=None, kernel=\"bicubic\", coords=\"half-pixel\", edges=\"clamp\", antialias=\"auto\", cubic_a=-0.75, relative=\"kernel\", rebuild_sincos=False, allow_nonfinite=False, dry_run=False, force=False, sync=True, format=None, state_dict=None, strip_prefix=None, model_only=False, keep_config=False, map=None, refs=16, memory_limit=\"4G\")"
)]
#[pyo3(signature = (path, out, *, grid=None, image=None, scale=None, frames=None, window=None, new_patch=None, patch_order=None, source_grid=None, slots=None, patch=None, tensors=None, channels=None, kernel="bicubic", coords="half-pixel", edges="clamp", antialias="auto", cubic_a=posgrid::resample::DEFAULT_CUBIC_A, relative="kernel", rebuild_sincos=false, allow_nonfinite=false, dry_run=false, force=false, sync=true, format=None, state_dict=None, strip_prefix=None, model_only=false, keep_config=false, map=None, refs=None, memory_limit=None))]
#[allow(clippy::too_many_arguments)]
pub fn resize<'py>(
    py: Python<'py>,
    path: &Bound<'py, PyAny>,
    out: &Bound<'py, PyAny>,
    grid: Option<&Bound<'py, PyAny>>,
    image: Option<&Bound<'py, PyAny>>,
    scale: Option<&Bound<'py, PyAny>>,
    frames: Option<&Bound<'py, PyAny>>,
    window: Option<&Bound<'py, PyAny>>,
    new_patch: Option<&Bound<'py, PyAny>>,
    patch_order: Option<&str>,
    source_grid: Option<&Bound<'py, PyAny>>,
    slots: Option<&Bound<'py, PyAny>>,
    patch: Option<&Bound<'py, PyAny>>,
    tensors: Option<&Bound<'py, PyAny>>,
    channels: Option<&str>,
    kernel: &str,
    coords: &str,
    edges: &str,
    antialias: &str,
    cubic_a: f64,
    relative: &str,
    rebuild_sincos: bool,
    allow_nonfinite: bool,
    dry_run: bool,
    force: bool,
    sync: bool,
    format: Option<&str>,
    state_dict: Option<String>,
    strip_prefix: Option<String>,
    model_only: bool,
    keep_config: bool,
    map: Option<&Bound<'py, PyAny>>,
    refs: Option<&Bound<'py, PyAny>>,
    memory_limit: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyAny>> {
    let mut discovery = Discovery::read(py, source_grid, slots, patch, tensors, channels)?;
    discovery.patch_order = optional_choice(py, patch_order, "patch_order")?;
    let frames = args::optional_count(frames, "frames", 1)?
        .map(|f| small(py, f, "frames"))
        .transpose()?;
    let resize_args = ResizeArgs {
        checkpoint: args::path(path, "path")?,
        output: args::path(out, "out")?,
        grid: grid_arg(py, grid, "grid")?,
        image: args::optional_plane(image, "image")?,
        scale: scale_arg(scale)?,
        new_patch: args::optional_plane(new_patch, "new_patch")?,
        keep_config,
        frames,
        discovery: discovery.into_args(py)?,
        kernel: choice::<Kernel>(py, kernel, "kernel")?,
        coords: choice::<Coords>(py, coords, "coords")?,
        edges: choice::<Edges>(py, edges, "edges")?,
        antialias: choice::<Antialias>(py, antialias, "antialias")?,
        cubic_a,
        dry_run,
        json: true,
        force,
        quiet: true,
        no_sync: !sync,
        window: args::optional_plane(window, "window")?,
        relative: choice(py, relative, "relative")?,
        rebuild_sincos,
        allow_nonfinite,
        format: optional_choice(py, format, "format")?,
        state_dict,
        strip_prefix,
        model_only,
        map: args::optional_path(map, "map")?,
        refs: args::refs(refs)?,
        memory_limit: args::memory_limit(memory_limit)?,
    };
    let job = cli::resize_job(&resize_args).map_err(|e| from_library(py, e))?;
    let report = py
        .detach(|| posgrid::resize::run(&job))
        .map_err(|e| from_library(py, e))?;
    to_python(py, &report)
}

/// A scale as the command line spells it (`"24.1/14"`, `"2x1.5"`), one number for both axes, or
/// a pair of numbers (rows, columns).
fn scale_arg(value: Option<&Bound<'_, PyAny>>) -> PyResult<Option<(f64, f64)>> {
    use pyo3::exceptions::PyValueError;
    let Some(v) = value.filter(|v| !v.is_none()) else {
        return Ok(None);
    };
    let checked = |s: f64| {
        (s.is_finite() && s > 0.0).then_some(s).ok_or_else(|| {
            PyValueError::new_err(format!("scale must be finite and above 0, not {s}"))
        })
    };
    if let Ok(text) = v.extract::<String>() {
        return cli::parse_scale(&text)
            .map(Some)
            .map_err(PyValueError::new_err);
    }
    if let Ok(s) = v.extract::<f64>() {
        let s = checked(s)?;
        return Ok(Some((s, s)));
    }
    let (sy, sx): (f64, f64) = v.extract().map_err(|_| {
        pyo3::exceptions::PyTypeError::new_err(
            "scale must be a number, a (rows, columns) pair of numbers, or text such as \"24.1/14\"",
        )
    })?;
    Ok(Some((checked(sy)?, checked(sx)?)))
}
