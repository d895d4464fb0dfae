//! Per-axis relative tables (kind `axial_relative`): `…rel_pos_h` and `…rel_pos_w`, each
//! `[2S−1, c]`, one row per offset along one axis, in backbones with decomposed relative
//! positions. S is the window for windowed blocks and the whole patch grid for global blocks
//! (common practice). Runtime code stretches them with 1-D linear interpolation, half-pixel, no
//! antialiasing; posgrid does the same offline, so offline and online results agree.

use serde::Serialize;

use super::names::normalized;
use super::{serialize_dtype, Change, ChangeReport, Computed, Discovery};
use super::{Encoding, Hints, Kind};
use crate::checkpoint::{Dtype, TensorSource};
use crate::error::{Error, Result};
use crate::plan::Request;
use crate::resample::{self, Antialias, Coords, Edges, Kernel, Options};
use crate::values;

/// The runtime convention for per-axis tables (common practice): linear, half-pixel, no
/// antialiasing, border taps clamped.
pub const AXIAL_OPTIONS: Options = Options {
    kernel: Kernel::Bilinear,
    coords: Coords::HalfPixel,
    edges: Edges::Clamp,
    antialias: Antialias::Off,
    cubic_a: resample::DEFAULT_CUBIC_A,
};

/// Which grid axis a table covers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Axis {
    /// Rows (`…_h`).
    Height,
    /// Columns (`…_w`).
    Width,
}

impl Axis {
    fn index(self) -> usize {
        match self {
            Axis::Height => 0,
            Axis::Width => 1,
        }
    }
}

/// What a per-axis table's span follows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Span {
    /// A global block: the whole patch grid (`--grid`/`--image`).
    Grid,
    /// A windowed block: `--window`.
    Window,
}

/// A per-axis relative table.
#[derive(Debug, Clone, Serialize)]
pub struct AxialTable {
    pub name: String,
    pub kind: Kind,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    pub axis: Axis,
    /// S: positions along the axis the offsets span (rows = 2S−1).
    pub span: usize,
    pub follows: Span,
    pub channels: usize,
    /// The model's patch size, for `--image`.
    pub patch: Option<usize>,
    pub notes: Vec<String>,
}

/// Names this kind recognises.
pub(crate) fn claims(name: &str) -> bool {
    axis_of(name).is_some()
}

fn axis_of(name: &str) -> Option<Axis> {
    let n = normalized(name);
    if n.ends_with("relposh") {
        Some(Axis::Height)
    } else if n.ends_with("relposw") {
        Some(Axis::Width)
    } else {
        None
    }
}

/// Find every per-axis table; a span equal to the patch grid's side is a global block's.
pub(super) fn find(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    let mut candidates = Vec::new();
    for entry in source.entries() {
        let Some(axis) = axis_of(&entry.name) else {
            continue;
        };
        let reason = match entry.shape[..] {
            [rows, c] if rows % 2 == 1 && rows >= 3 && c >= 1 && values::is_float(entry.dtype) => {
                candidates.push((entry, axis, rows.div_ceil(2), c));
                continue;
            }
            [_, _] if !values::is_float(entry.dtype) => {
                format!("dtype {} is not one posgrid resamples", entry.dtype)
            }
            _ => format!("shape {:?} is not [2S-1, channels]", entry.shape),
        };
        found.skipped.push(super::Skipped {
            name: entry.name.clone(),
            reason,
        });
    }
    if candidates.is_empty() {
        return Ok(());
    }
    let grid = model_grid(found, hints, candidates.iter().map(|c| (c.1, c.2)));
    let patch = found
        .tables
        .iter()
        .find_map(|t| t.patch)
        .or_else(|| super::absolute::model_patch(source.entries(), hints).map(|p| p.0));
    for (entry, axis, span, channels) in candidates {
        let (follows, notes) = match grid {
            Some(g) if g[axis.index()] == span => (Span::Grid, Vec::new()),
            Some(_) => (Span::Window, Vec::new()),
            None => {
                found.skipped.push(super::Skipped {
                    name: entry.name.clone(),
                    reason: "cannot tell a global block's table from a windowed one (no patch grid known); pass --source-grid HxW".into(),
                });
                continue;
            }
        };
        found.encodings.push(Encoding::Axial(AxialTable {
            name: entry.name.clone(),
            kind: Kind::AxialRelative,
            dtype: entry.dtype,
            shape: entry.shape.clone(),
            axis,
            span,
            follows,
            channels,
            patch,
            notes,
        }));
    }
    Ok(())
}

/// The patch grid: `--source-grid`, an absolute table's grid, or — with tables of two spans
/// per axis — the larger span (global blocks see the whole grid, windowed ones less).
fn model_grid(
    found: &Discovery,
    hints: &Hints,
    spans: impl Iterator<Item = (Axis, usize)>,
) -> Option<[usize; 2]> {
    if let Some((h, w)) = hints.source_grid {
        return Some([h, w]);
    }
    if let Some(t) = found.tables.first() {
        return Some(t.grid);
    }
    let mut seen: [Vec<usize>; 2] = [Vec::new(), Vec::new()];
    for (axis, span) in spans {
        let list = &mut seen[axis.index()];
        if !list.contains(&span) {
            list.push(span);
        }
    }
    let largest = |l: &Vec<usize>| (l.len() >= 2).then(|| *l.iter().max().expect("two spans"));
    Some([largest(&seen[0])?, largest(&seen[1])?])
}

/// One per-axis table to stretch.
#[derive(Debug, Clone, Serialize)]
pub struct AxialChange {
    #[serde(flatten)]
    pub table: AxialTable,
    pub to: usize,
    pub new_shape: Vec<usize>,
    /// The new attention window `[rows, columns]` of a windowed block's table (`--window`).
    #[serde(skip)]
    pub window: Option<[usize; 2]>,
}

/// Plan the change of `table`: `None` when its span stays.
pub fn plan(
    ckpt: &dyn TensorSource,
    table: &AxialTable,
    request: &Request,
) -> Result<Option<AxialChange>> {
    let path = ckpt.source_path();
    let axis = table.axis.index();
    let to = match table.follows {
        Span::Window => request.window.map_or(table.span, |(h, w)| [h, w][axis]),
        Span::Grid => {
            let grid =
                request.grid_for(path, &table.name, [table.span, table.span], table.patch)?;
            grid[axis]
        }
    };
    if to == table.span {
        return Ok(None);
    }
    if to == 0 {
        return Err(Error::usage_in(
            path,
            format!("\"{}\": a span must be at least 1", table.name),
        ));
    }
    let rows = to
        .checked_mul(2)
        .map(|n| n - 1)
        .ok_or_else(|| super::too_large(path, &table.name, &format!("span {to}")))?;
    let needed = (rows as u64)
        .saturating_mul(table.channels as u64)
        .saturating_mul(32);
    crate::kinds::within_guard(
        path,
        &format!("resizing \"{}\" to {rows} rows", table.name),
        needed,
        request.memory_limit,
    )?;
    Ok(Some(AxialChange {
        table: table.clone(),
        to,
        new_shape: vec![rows, table.channels],
        window: request
            .window
            .filter(|_| table.follows == Span::Window)
            .map(|(h, w)| [h, w]),
    }))
}

impl Change for AxialChange {
    fn name(&self) -> &str {
        &self.table.name
    }

    fn shape(&self) -> &[usize] {
        &self.table.shape
    }

    fn rewrites(&self) -> Vec<(&str, &[usize])> {
        vec![(self.table.name.as_str(), self.new_shape.as_slice())]
    }

    fn window_change(&self) -> Option<super::WindowSides> {
        let mut from = [None; 2];
        from[self.table.axis.index()] = Some(self.table.span);
        self.window.map(|to| (from, to))
    }

    fn compute(&self, ckpt: &dyn TensorSource, allow_nonfinite: bool) -> Result<Computed> {
        let to = self.new_shape[0];
        super::stretched(ckpt, &self.table.name, to, &AXIAL_OPTIONS, allow_nonfinite)
    }

    fn report(&self) -> ChangeReport {
        let o = &AXIAL_OPTIONS;
        ChangeReport {
            name: self.table.name.clone(),
            kind: self.table.kind,
            dtype: self.table.dtype.to_string(),
            slots: 0,
            from: vec![self.table.span],
            to: vec![self.to],
            shape: self.table.shape.clone(),
            new_shape: self.new_shape.clone(),
            kernel: Some(o.kernel),
            coords: Some(o.coords),
            edges: Some(o.edges),
            antialias: false,
            cubic_a: None,
            method: "resampled",
            scale: None,
            companions: Vec::new(),
            fidelity: None,
        }
    }

    fn provenance(&self) -> serde_json::Value {
        serde_json::json!({
            "name": self.table.name,
            "kind": self.table.kind,
            "method": "resampled",
            "axis": self.table.axis,
            "from": self.table.shape[0],
            "to": self.new_shape[0],
            "kernel": AXIAL_OPTIONS.kernel,
            "coords": AXIAL_OPTIONS.coords,
            "antialias": false,
        })
    }

    fn needed_bytes(&self) -> u64 {
        (self.new_shape[0] as u64)
            .saturating_mul(self.table.channels as u64)
            .saturating_mul(32)
    }
}
