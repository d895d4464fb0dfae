//! The change of an absolute table: its target grid, the memory it needs, its new values
//! (class slots bit-exact, grid rows resampled or a sine-cosine table built anew) and the
//! position-id buffers rewritten with it.

use std::path::Path;

use serde::Serialize;

use super::{Layout, Table};
use crate::checkpoint::{Dtype, TensorEntry, TensorSource};
use crate::error::{Error, Result};
use crate::kinds::{Change, ChangeReport, Computed, Images, Kind};
use crate::plan::Request;
use crate::resample::{self, Options};
use crate::values;

/// One table to resample.
#[derive(Debug, Clone, Serialize)]
pub struct TableChange {
    #[serde(flatten)]
    pub table: Table,
    pub from: [usize; 2],
    pub to: [usize; 2],
    /// For a video table: its frames before and after.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub frames: Option<(usize, usize)>,
    /// Scale factors (rows, columns) the grid is sampled with, for `--scale`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub scale: Option<[f64; 2]>,
    /// The new shape, in the table's own layout.
    pub new_shape: Vec<usize>,
    pub options: Options,
    /// Whether antialiasing is applied on at least one axis.
    pub antialias_applied: bool,
    /// A sine-cosine table built anew on the target grid (not resampled).
    pub rebuild: bool,
    /// Position-id buffers rewritten as 0..N'-1.
    pub ids: Vec<IdsChange>,
    /// Bytes the resize of this table needs (what the memory guard checked).
    #[serde(skip)]
    pub needed_bytes: u64,
}

/// One position-id buffer to rewrite as 0..N'-1.
#[derive(Debug, Clone, Serialize)]
pub struct IdsChange {
    pub name: String,
    pub new_shape: Vec<usize>,
    pub rows: usize,
}

/// Plan the change of `table`: `None` when it is already at its target grid. Errors: an image
/// size the patch does not divide, a table over the memory guard, position ids too narrow.
pub fn plan(
    ckpt: &dyn TensorSource,
    table: &Table,
    request: &Request,
) -> Result<Option<TableChange>> {
    let path = ckpt.source_path();
    let to = request.grid_for(path, &table.name, table.grid, table.patch)?;
    let from = table.grid;
    let frames = match (table.frames, request.frames) {
        (Some(t), Some(f)) => Some((t, f.positions(&table.name, table.tubelet.unwrap_or(1))?)),
        (t, _) => t.map(|t| (t, t)),
    };
    if from == to && frames.is_none_or(|(t, t2)| t == t2) {
        return Ok(None);
    }
    resample::validate((from[0], from[1]), (to[0], to[1]), &request.options)
        .map_err(|e| Error::usage_in(path, format!("{}: {e}", table.name)))?;
    let (t_from, t_to) = frames.unwrap_or((1, 1));
    if t_to == 0 {
        return Err(Error::usage_in(
            path,
            format!("{}: frames must be at least 1", table.name),
        ));
    }
    let target = match frames {
        Some(_) => format!("{t_to}x{}x{}", to[0], to[1]),
        None => format!("{}x{}", to[0], to[1]),
    };
    let rows = t_to
        .checked_mul(to[0])
        .and_then(|n| n.checked_mul(to[1]))
        .and_then(|n| n.checked_add(table.slots))
        .ok_or_else(|| crate::kinds::too_large(path, &table.name, &target))?;
    let new_shape = match table.layout {
        Layout::BatchRows => vec![1, rows, table.dim],
        Layout::Rows => vec![rows, table.dim],
        Layout::Grid => vec![1, to[0], to[1], table.dim],
        Layout::GridChannelsFirst => vec![1, table.dim, to[0], to[1]],
    };
    let needed = needed_bytes(table, [t_from * from[0], from[1]], [t_to * to[0], to[1]]);
    crate::kinds::within_guard(
        path,
        &format!("resizing \"{}\" to {target}", table.name),
        needed,
        request.memory_limit,
    )?;
    let rebuild = request.rebuild_sincos && table.kind == Kind::Sincos;
    let scale = request.target.scale();
    if scale.is_some() && t_from != t_to {
        return Err(Error::Usage(format!(
            "{}: --scale samples the image axes; give the frames of a video grid with --grid TxHxW instead of changing them beside --scale",
            table.name
        )));
    }
    let o = &request.options;
    // With a scale, an axis shrinks when its factor is below 1 (not when its size drops).
    let shrinks = |axis: usize| match scale {
        Some(s) => o.antialias_applies_when(s[axis] < 1.0),
        None => o.antialias_applies(from[axis], to[axis]),
    };
    let antialias_applied = !rebuild
        && o.kernel != resample::Kernel::Nearest
        && o.kernel != resample::Kernel::Area
        && (shrinks(0) || shrinks(1) || o.antialias_applies(t_from, t_to));
    let ids = table
        .companions
        .iter()
        .map(|name| ids_change(ckpt, name, rows))
        .collect::<Result<_>>()?;
    Ok(Some(TableChange {
        table: table.clone(),
        from,
        to,
        frames,
        scale,
        new_shape,
        options: request.options,
        antialias_applied,
        rebuild,
        ids,
        needed_bytes: needed,
    }))
}

/// Output bytes plus the f32/f64 working copies of source, intermediate and output; a
/// channels-first table is transposed to rows and back: one more copy of each.
fn needed_bytes(table: &Table, from: [usize; 2], to: [usize; 2]) -> u64 {
    let elem = table.dtype.bitsize() as u64 / 8;
    let work = if table.dtype == Dtype::F64 { 8 } else { 4 };
    let rows = table.slots + to[0] * to[1];
    let cells = (rows as u64).saturating_mul(table.dim as u64);
    let source_cells = (table.slots + from[0] * from[1]) as u64 * table.dim as u64;
    let copies = u64::from(table.layout == Layout::GridChannelsFirst);
    cells
        .saturating_mul(elem + (3 + copies) * work)
        .saturating_add(source_cells.saturating_mul(elem + (1 + copies) * work))
}

fn ids_change(ckpt: &dyn TensorSource, name: &str, rows: usize) -> Result<IdsChange> {
    let entry = ckpt.find(name).expect("discovery names existing tensors");
    let new_shape = if entry.shape.len() == 2 {
        vec![1, rows]
    } else {
        vec![rows]
    };
    if !values::range_fits(entry.dtype, rows) {
        return Err(Error::refused(
            ckpt.source_path(),
            format!(
                "position ids \"{name}\" ({}) cannot hold {rows} positions",
                entry.dtype
            ),
        ));
    }
    Ok(IdsChange {
        name: name.to_string(),
        new_shape,
        rows,
    })
}

impl Change for TableChange {
    fn name(&self) -> &str {
        &self.table.name
    }

    fn shape(&self) -> &[usize] {
        &self.table.shape
    }

    fn rewrites(&self) -> Vec<(&str, &[usize])> {
        std::iter::once((self.table.name.as_str(), self.new_shape.as_slice()))
            .chain(
                self.ids
                    .iter()
                    .map(|c| (c.name.as_str(), c.new_shape.as_slice())),
            )
            .collect()
    }

    fn compute(&self, ckpt: &dyn TensorSource, allow_nonfinite: bool) -> Result<Computed> {
        let entry = ckpt.find(&self.table.name).expect("planned tables exist");
        let raw = ckpt.bytes(entry)?;
        let (bytes, before, after) =
            resized_table(ckpt.source_path(), entry, &raw, self, allow_nonfinite)?;
        let mut out = Computed {
            bytes: vec![(entry.name.clone(), bytes)],
            // A video grid has no 2-D similarity maps.
            images: self.frames.is_none().then_some(Images {
                before,
                after,
                from: self.from,
                to: self.to,
                width: self.table.dim,
                unscored: None,
            }),
        };
        for c in &self.ids {
            let entry = ckpt.find(&c.name).expect("planned companions exist");
            let bytes = values::encode_range(entry.dtype, c.rows)
                .map_err(|e| values::value_error(ckpt.source_path(), &c.name, e))?;
            out.bytes.push((c.name.clone(), bytes));
        }
        Ok(out)
    }

    fn report(&self) -> ChangeReport {
        let o = &self.options;
        ChangeReport {
            name: self.table.name.clone(),
            kind: self.table.kind,
            dtype: self.table.dtype.to_string(),
            slots: self.table.slots,
            from: self.sides().0,
            to: self.sides().1,
            shape: self.table.shape.clone(),
            new_shape: self.new_shape.clone(),
            kernel: Some(o.kernel),
            coords: Some(o.coords),
            edges: Some(o.edges),
            antialias: self.antialias_applied,
            cubic_a: (o.kernel == resample::Kernel::Bicubic && !self.rebuild).then_some(o.cubic_a),
            method: self.method(),
            scale: self.scale,
            companions: self.table.companions.clone(),
            fidelity: None,
        }
    }

    fn provenance(&self) -> serde_json::Value {
        let o = &self.options;
        serde_json::json!({
            "name": self.table.name,
            "kind": self.table.kind,
            "method": self.method(),
            "from": self.sides().0,
            "to": self.sides().1,
            "slots": self.table.slots,
            "kernel": o.kernel,
            "coords": o.coords,
            "edges": o.edges,
            "antialias": o.antialias,
            "antialias_applied": self.antialias_applied,
            "cubic_a": o.cubic_a,
            "scale": self.scale,
            "companions": self.table.companions,
        })
    }

    fn needed_bytes(&self) -> u64 {
        self.needed_bytes
    }

    fn absolute(&self) -> Option<&TableChange> {
        Some(self)
    }

    fn grid_change(&self) -> Option<([usize; 2], [usize; 2], usize)> {
        Some((self.from, self.to, self.table.patch?))
    }
}

impl TableChange {
    /// The grid's sides before and after: `[T, H, W]` for a video table, `[H, W]` otherwise.
    fn sides(&self) -> (Vec<usize>, Vec<usize>) {
        match self.frames {
            Some((t, t2)) => (
                vec![t, self.from[0], self.from[1]],
                vec![t2, self.to[0], self.to[1]],
            ),
            None => (self.from.to_vec(), self.to.to_vec()),
        }
    }

    fn method(&self) -> &'static str {
        if self.rebuild {
            "rebuilt"
        } else {
            "resampled"
        }
    }
}

/// Class slots copied byte for byte, grid rows resampled in f32 (f64 for F64 tables) and
/// rounded to the table's dtype, nearest even. Also returns the grid rows before and after.
/// Non-finite values are refused in the input (class rows included) and in the output, where
/// a kernel with negative lobes can overshoot past the dtype's largest value.
fn resized_table(
    path: &Path,
    entry: &TensorEntry,
    raw: &[u8],
    change: &TableChange,
    allow_nonfinite: bool,
) -> Result<(Vec<u8>, Vec<f32>, Vec<f32>)> {
    let t = &change.table;
    let elem = entry.dtype.bitsize() / 8;
    let slot_bytes = t.slots * t.dim * elem;
    let (slots, grid) = raw.split_at(slot_bytes);
    if !allow_nonfinite {
        refuse_nonfinite_input(path, t, entry.dtype, slots, grid)?;
    }
    let frames = change.frames.map_or(1, |f| f.1);
    let out_len = slot_bytes + frames * change.to[0] * change.to[1] * t.dim * elem;
    let oom = |e| values::out_of_memory(path, &format!("resizing \"{}\"", t.name), e);
    let mut bytes = values::try_with_capacity(out_len).map_err(oom)?;
    bytes.extend_from_slice(slots);
    let value_error = |e| values::value_error(path, &format!("resizing \"{}\"", t.name), e);
    // Computed in row order [H·W, D]; stored in the table's own layout.
    let (before, after) = if entry.dtype == Dtype::F64 {
        let v = values::decode_f64(entry.dtype, grid).map_err(value_error)?;
        let v = t.to_row_order(v).map_err(oom)?;
        let r = new_grid(&v, change).map_err(|e| resample_error(path, t, e))?;
        let stored = t.from_row_order(&r).map_err(oom)?;
        values::encode_f64_into(entry.dtype, &stored, &mut bytes).map_err(value_error)?;
        let narrow = |x: &[f64]| values::try_collect(x.len(), x.iter().map(|v| *v as f32));
        (narrow(&v).map_err(oom)?, narrow(&r).map_err(oom)?)
    } else {
        let v = values::decode_f32(entry.dtype, grid).map_err(value_error)?;
        let v = t.to_row_order(v).map_err(oom)?;
        let r = new_grid(&v, change).map_err(|e| resample_error(path, t, e))?;
        let stored = t.from_row_order(&r).map_err(oom)?;
        values::encode_f32_into(entry.dtype, &stored, &mut bytes).map_err(value_error)?;
        drop(stored);
        (v, r)
    };
    if !allow_nonfinite {
        refuse_nonfinite_output(path, change, entry.dtype, &bytes[slot_bytes..])?;
    }
    Ok((bytes, before, after))
}

/// The new grid rows: resampled, or for `--rebuild-sincos` built anew.
fn new_grid<T: resample::Sample>(
    v: &[T],
    change: &TableChange,
) -> std::result::Result<Vec<T>, resample::ResampleError> {
    let t = &change.table;
    let ([h, w], [h2, w2]) = (change.from, change.to);
    if let (true, Some(first), None) = (change.rebuild, t.sincos_first_axis, change.frames) {
        return Ok(crate::sincos::build(h2, w2, t.dim, first)
            .expect("a recognised sine-cosine table has a width divisible by 4")
            .into_iter()
            .map(T::from_f64)
            .collect());
    }
    let (t_from, t_to) = change.frames.unwrap_or((1, 1));
    let video = change.frames.is_some();
    // A video grid has the time axis in front; an image grid has none.
    let from: Vec<usize> = [t_from, h, w][usize::from(!video)..].to_vec();
    let to: Vec<usize> = [t_to, h2, w2][usize::from(!video)..].to_vec();
    match change.scale {
        Some([sy, sx]) => {
            let scales = [1.0, sy, sx][usize::from(!video)..].to_vec();
            resample::resample_grid_scaled(v, &from, t.dim, &scales, &change.options)
                .map(|(values, _)| values)
        }
        None => resample::resample_grid(v, &from, t.dim, &to, &change.options),
    }
}

fn resample_error(path: &Path, t: &Table, e: resample::ResampleError) -> Error {
    match e {
        resample::ResampleError::OutOfMemory { bytes } => values::out_of_memory(
            path,
            &format!("resizing \"{}\"", t.name),
            values::OutOfMemory { bytes },
        ),
        other => Error::usage_in(path, format!("{}: {other}", t.name)),
    }
}

fn refuse_nonfinite_input(
    path: &Path,
    t: &Table,
    dtype: Dtype,
    slots: &[u8],
    grid: &[u8],
) -> Result<()> {
    let (in_slots, in_grid) = (
        values::count_nonfinite(dtype, slots),
        values::count_nonfinite(dtype, grid),
    );
    if in_slots + in_grid == 0 {
        return Ok(());
    }
    let place = match (in_slots, in_grid) {
        (0, _) => "in its grid rows".to_string(),
        (_, 0) => "in its class rows".to_string(),
        (s, g) => format!("{s} in its class rows, {g} in its grid rows"),
    };
    Err(Error::refused(
        path,
        format!(
            "table \"{}\" holds {} NaN or infinite value(s) ({place}); pass --allow-nonfinite to resize it anyway",
            t.name,
            in_slots + in_grid
        ),
    ))
}

fn refuse_nonfinite_output(
    path: &Path,
    change: &TableChange,
    dtype: Dtype,
    grid: &[u8],
) -> Result<()> {
    let bad = values::count_nonfinite(dtype, grid);
    if bad == 0 {
        return Ok(());
    }
    Err(Error::refused(
        path,
        format!(
            "resizing table \"{}\" to {}x{} with the {} kernel gives {bad} infinite or NaN value(s) in {dtype} \
(the kernel overshoots values near the largest {dtype} can hold); use a kernel that cannot overshoot \
(--kernel bilinear, area or nearest), or pass --allow-nonfinite to write them anyway",
            change.table.name, change.to[0], change.to[1], change.options.kernel
        ),
    ))
}
