//! The change of a window-relative table: its new window, the offset grid resampled (class
//! rows bit-exact), the index buffer rebuilt, the masks rebuilt for the new feature maps (or
//! left out where the window now covers the map).

use serde::Serialize;

use super::{mask_layout, Follows, WindowTable};
use crate::checkpoint::{Dtype, TensorSource};
use crate::error::{Error, Result};
use crate::kinds::{refuse_nonfinite, Change, ChangeReport, Computed, Images};
use crate::plan::{Relative, Request};
use crate::rebuild::relative_index::{self, IndexLayout};
use crate::rebuild::shift_mask::{self, MaskLayout};
use crate::rebuild::HARD_ELEMENT_LIMIT;
use crate::resample::{self, geometric, Options};
use crate::values;

/// The class-relation rows of a BEiT-style table.
const CLASS_ROWS: usize = 3;

/// One window-relative table to change.
#[derive(Debug, Clone, Serialize)]
pub struct WindowChange {
    #[serde(flatten)]
    pub table: WindowTable,
    pub to: [usize; 2],
    pub new_shape: Vec<usize>,
    pub options: Options,
    /// Resampled by the geometric-progression method instead of the kernel.
    pub geometric: bool,
    pub antialias_applied: bool,
    /// The index buffer's new shape.
    pub index_shape: Option<Vec<usize>>,
    pub masks: Vec<MaskChange>,
    #[serde(skip)]
    pub needed_bytes: u64,
}

/// A mask rebuilt for its stage's new feature map, or left out (`layout` none) where the
/// window covers the map and the block has no mask any more.
#[derive(Debug, Clone, Serialize)]
pub struct MaskChange {
    pub name: String,
    pub map: [usize; 2],
    #[serde(skip)]
    pub layout: Option<MaskLayout>,
    pub new_shape: Option<Vec<usize>>,
}

/// Plan the change of `table`: `None` when its window, and every mask's map, stay as they are.
pub fn plan(
    ckpt: &dyn TensorSource,
    table: &WindowTable,
    request: &Request,
) -> Result<Option<WindowChange>> {
    let path = ckpt.source_path();
    let to = target_window(path, table, request)?;
    refuse_unusable_masks(path, table, to)?;
    let masks = table
        .masks
        .iter()
        .map(|m| mask_change(path, table, m, to, request))
        .collect::<Result<Vec<_>>>()?;
    let masks_change = masks
        .iter()
        .zip(&table.masks)
        .any(|(c, m)| c.new_shape.as_ref() != Some(&m.shape));
    if to == table.window && !masks_change {
        return Ok(None);
    }
    let (from_side, to_side, geometric) = offset_sides(path, table, to, request)?;
    let (rows, index_shape) = new_sizes(path, table, to, to_side)?;
    refuse_narrow_index(ckpt, table, rows, to)?;
    let needed = needed_bytes(table, rows, &index_shape, &masks);
    crate::kinds::within_guard(
        path,
        &format!("resizing \"{}\" to window {}x{}", table.name, to[0], to[1]),
        needed,
        request.memory_limit,
    )?;
    let o = &request.options;
    let antialias_applied = !geometric
        && o.kernel != resample::Kernel::Nearest
        && o.kernel != resample::Kernel::Area
        && (o.antialias_applies(from_side[0], to_side[0])
            || o.antialias_applies(from_side[1], to_side[1]));
    Ok(Some(WindowChange {
        table: table.clone(),
        to,
        new_shape: vec![rows, table.heads],
        options: request.options,
        geometric,
        antialias_applied,
        index_shape,
        masks,
        needed_bytes: needed,
    }))
}

/// A mask of the block that cannot be rebuilt would not fit a new window if kept: refused.
fn refuse_unusable_masks(
    path: &std::path::Path,
    table: &WindowTable,
    to: [usize; 2],
) -> Result<()> {
    match (to != table.window, table.unusable_masks.first()) {
        (true, Some(m)) => Err(Error::refused(
            path,
            format!(
                "\"{}\" cannot change window: the mask \"{}\" of its block cannot be rebuilt ({}), and kept as it is it would not fit the new window",
                table.name, m.name, m.reason
            ),
        )),
        _ => Ok(()),
    }
}

/// The offset grids' sides before and after, checked for the method: whether the geometric
/// method applies (square windows only), and the kernel options fit the sizes.
fn offset_sides(
    path: &std::path::Path,
    table: &WindowTable,
    to: [usize; 2],
    request: &Request,
) -> Result<([usize; 2], [usize; 2], bool)> {
    let target = format!("window {}x{}", to[0], to[1]);
    let too_large = || crate::kinds::too_large(path, &table.name, &target);
    let (from_side, to_side) = (
        offsets_side(table.window).ok_or_else(too_large)?,
        offsets_side(to).ok_or_else(too_large)?,
    );
    let geometric = request.relative == Relative::Geometric && to != table.window;
    if geometric && (from_side[0] != from_side[1] || to_side[0] != to_side[1]) {
        return Err(Error::usage_in(
            path,
            format!(
                "{}: --relative geometric needs square windows ({}x{} -> {}x{})",
                table.name, table.window[0], table.window[1], to[0], to[1]
            ),
        ));
    }
    if geometric {
        // A window the bisection cannot reach is refused here, as a dry run would be, not
        // when the values are computed.
        geometric::ratio(from_side[0], to_side[0])
            .map_err(|e| Error::refused(path, format!("resizing \"{}\": {e}", table.name)))?;
    }
    resample::validate(
        (from_side[0], from_side[1]),
        (to_side[0], to_side[1]),
        &request.options,
    )
    .map_err(|e| Error::usage_in(path, format!("{}: {e}", table.name)))?;
    Ok((from_side, to_side, geometric))
}

/// The new table's row count (offsets, then the class rows) and the index buffer's new shape,
/// checked against overflow.
fn new_sizes(
    path: &std::path::Path,
    table: &WindowTable,
    to: [usize; 2],
    to_side: [usize; 2],
) -> Result<(usize, Option<Vec<usize>>)> {
    let target = format!("window {}x{}", to[0], to[1]);
    let too_large = || crate::kinds::too_large(path, &table.name, &target);
    let class = if table.class_rows { CLASS_ROWS } else { 0 };
    let rows = to_side[0]
        .checked_mul(to_side[1])
        .and_then(|n| n.checked_add(class))
        .ok_or_else(too_large)?;
    let index_shape = match table.index {
        Some(_) => {
            let n = to[0]
                .checked_mul(to[1])
                .and_then(|n| n.checked_add(usize::from(table.class_rows)))
                .ok_or_else(too_large)?;
            Some(vec![n, n])
        }
        None => None,
    };
    Ok((rows, index_shape))
}

/// The new window: the target grid for a table that spans it, `--window` for the others.
fn target_window(path: &std::path::Path, t: &WindowTable, request: &Request) -> Result<[usize; 2]> {
    match t.follows {
        Follows::Window => Ok(request.window.map_or(t.window, |(h, w)| [h, w])),
        Follows::Grid => request.grid_for(path, &t.name, t.window, t.patch),
    }
}

/// A mask's stage map scales with the patch grid; its new window is the table's.
fn mask_change(
    path: &std::path::Path,
    t: &WindowTable,
    m: &super::Mask,
    window: [usize; 2],
    request: &Request,
) -> Result<MaskChange> {
    let grid = t.model_grid.unwrap_or(m.map);
    let new_grid = request.grid_for(path, &m.name, grid, t.patch)?;
    let mut map = [0; 2];
    for axis in 0..2 {
        let (g, g2, side) = (grid[axis], new_grid[axis], m.map[axis]);
        let Some(scaled) = g2.checked_mul(side) else {
            return Err(crate::kinds::too_large(
                path,
                &m.name,
                &format!("patch grid {}x{}", new_grid[0], new_grid[1]),
            ));
        };
        if g % side != 0 || scaled % g != 0 {
            return Err(Error::table(
                path,
                format!(
                    "\"{}\": the stage's feature map {}x{} does not scale from patch grid {}x{} to {}x{} by a whole factor; pass --source-grid HxW if the patch grid is not {}x{}",
                    m.name, m.map[0], m.map[1], grid[0], grid[1], new_grid[0], new_grid[1], grid[0], grid[1]
                ),
            ));
        }
        map[axis] = scaled / g;
    }
    if map[0] % window[0] != 0 || map[1] % window[1] != 0 {
        return Err(Error::usage_in(path, format!(
            "\"{}\": the new {}x{} feature map does not split into {}x{} windows; choose a window that divides it",
            m.name, map[0], map[1], window[0], window[1]
        )));
    }
    let layout = mask_layout(map, window);
    let shifted = layout.effective_shift() != (0, 0);
    let new_shape = match shifted {
        true => Some(mask_shape(map, window).ok_or_else(|| {
            crate::kinds::too_large(path, &m.name, &format!("feature map {}x{}", map[0], map[1]))
        })?),
        false => None,
    };
    Ok(MaskChange {
        name: m.name.clone(),
        map,
        layout: shifted.then_some(layout),
        new_shape,
    })
}

/// The rebuilt index keeps its buffer's dtype, which must hold every row number of the new
/// table (a U8 index of window 7 cannot index the 529 rows of window 12).
fn refuse_narrow_index(
    ckpt: &dyn TensorSource,
    table: &WindowTable,
    rows: usize,
    to: [usize; 2],
) -> Result<()> {
    let Some(index) = table.index.as_deref().and_then(|name| ckpt.find(name)) else {
        return Ok(());
    };
    if values::range_fits(index.dtype, rows) {
        return Ok(());
    }
    Err(Error::refused(
        ckpt.source_path(),
        format!(
            "index buffer \"{}\" ({}) cannot hold the row numbers of \"{}\" at window {}x{} ({rows} rows); choose a smaller window",
            index.name, index.dtype, table.name, to[0], to[1]
        ),
    ))
}

/// The sides `[2Wh−1, 2Ww−1]` of a window's grid of offsets (`None` past a 64-bit count).
fn offsets_side(w: [usize; 2]) -> Option<[usize; 2]> {
    let side = |n: usize| n.checked_mul(2)?.checked_sub(1);
    Some([side(w[0])?, side(w[1])?])
}

/// `[nW, N, N]` of a mask of `window` over `map` (`None` past a 64-bit count).
fn mask_shape(map: [usize; 2], window: [usize; 2]) -> Option<Vec<usize>> {
    let windows = (map[0] / window[0]).checked_mul(map[1] / window[1])?;
    let cells = window[0].checked_mul(window[1])?;
    cells.checked_mul(cells)?.checked_mul(windows)?;
    Some(vec![windows, cells, cells])
}

/// The table's working copies (f32/f64) and output, the index buffer and masks.
fn needed_bytes(
    t: &WindowTable,
    rows: usize,
    index_shape: &Option<Vec<usize>>,
    masks: &[MaskChange],
) -> u64 {
    let elem = t.dtype.bitsize() as u64 / 8;
    let cells = |shape: &[usize]| shape.iter().fold(1u64, |a, &n| a.saturating_mul(n as u64));
    let table = (rows as u64)
        .saturating_mul(t.heads as u64)
        .saturating_mul(elem + 24);
    let source = cells(&t.shape).saturating_mul(elem + 16);
    let index = index_shape
        .as_deref()
        .map_or(0, |s| cells(s).saturating_mul(16));
    let mask: u64 = masks
        .iter()
        .filter_map(|m| m.new_shape.as_deref())
        .map(|s| cells(s).saturating_mul(8))
        .sum();
    table
        .saturating_add(source)
        .saturating_add(index)
        .saturating_add(mask)
}

impl WindowChange {
    fn sides(&self) -> ([usize; 2], [usize; 2]) {
        let side = |w: [usize; 2]| [2 * w[0] - 1, 2 * w[1] - 1];
        (side(self.table.window), side(self.to))
    }

    fn method(&self) -> &'static str {
        if self.geometric {
            "geometric"
        } else {
            "resampled"
        }
    }

    /// The offset grid resampled (in f64 for F64 tables and for the geometric method, else in
    /// f32), followed by the class rows as they are. Every buffer is allocated fallibly: the
    /// window, not the file, decides their size.
    fn new_offsets(
        &self,
        path: &std::path::Path,
        grid: &[u8],
        class: &[u8],
    ) -> Result<(Vec<u8>, Images)> {
        let (from, to) = self.sides();
        let dtype = self.table.dtype;
        let what = format!("resizing \"{}\"", self.table.name);
        let value_error = |e| values::value_error(path, &what, e);
        let oom = |e| values::out_of_memory(path, &what, e);
        let engine_error = |e| match e {
            resample::ResampleError::OutOfMemory { bytes } => oom(values::OutOfMemory { bytes }),
            other => Error::usage_in(path, format!("{what}: {other}")),
        };
        let narrow = |v: &[f64]| values::try_collect(v.len(), v.iter().map(|x| *x as f32));
        let (bytes, before, after) = if self.geometric || dtype == Dtype::F64 {
            let v = values::decode_f64(dtype, grid).map_err(value_error)?;
            let r = if self.geometric {
                geometric::resample(&v, from[0], self.table.heads, to[0], HARD_ELEMENT_LIMIT)
                    .map_err(|e| Error::refused(path, format!("{what}: {e}")))?
            } else {
                self.engine(&v, from, to).map_err(engine_error)?
            };
            let (before, after) = (narrow(&v).map_err(oom)?, narrow(&r).map_err(oom)?);
            let bytes = match dtype {
                Dtype::F64 => encode_with(dtype, &r, class, values::encode_f64_into),
                // Narrower dtypes round from f32, as every other table of theirs does.
                _ => encode_with(dtype, &after, class, values::encode_f32_into),
            };
            (bytes.map_err(value_error)?, before, after)
        } else {
            let v = values::decode_f32(dtype, grid).map_err(value_error)?;
            let r = self.engine(&v, from, to).map_err(engine_error)?;
            let bytes = encode_with(dtype, &r, class, values::encode_f32_into);
            (bytes.map_err(value_error)?, v, r)
        };
        Ok((bytes, self.images((before, after))))
    }

    fn engine<T: resample::Sample>(
        &self,
        v: &[T],
        from: [usize; 2],
        to: [usize; 2],
    ) -> std::result::Result<Vec<T>, resample::ResampleError> {
        let heads = self.table.heads;
        resample::resample(v, (from[0], from[1]), heads, (to[0], to[1]), &self.options)
    }

    fn images(&self, (before, after): (Vec<f32>, Vec<f32>)) -> Images {
        let (from, to) = self.sides();
        Images {
            before,
            after,
            from,
            to,
            width: self.table.heads,
            unscored: self.geometric.then_some(
                "the geometric method spaces the offsets unevenly, so an even stretch is no reference",
            ),
        }
    }
}

/// Appends values to a buffer as elements of a dtype (`values::encode_f32_into`, `…f64_into`).
type Encoder<T> = fn(Dtype, &[T], &mut Vec<u8>) -> std::result::Result<(), values::ValueError>;

/// `values` encoded in `dtype` and the class rows after them, in one buffer allocated fallibly.
fn encode_with<T>(
    dtype: Dtype,
    values: &[T],
    class: &[u8],
    encode: Encoder<T>,
) -> std::result::Result<Vec<u8>, values::ValueError> {
    let elem = dtype.bitsize() / 8;
    let mut bytes = values::try_with_capacity(values.len().saturating_mul(elem) + class.len())?;
    encode(dtype, values, &mut bytes)?;
    bytes.extend_from_slice(class);
    Ok(bytes)
}

impl Change for WindowChange {
    fn name(&self) -> &str {
        &self.table.name
    }

    fn shape(&self) -> &[usize] {
        &self.table.shape
    }

    fn rewrites(&self) -> Vec<(&str, &[usize])> {
        let mut out = vec![(self.table.name.as_str(), self.new_shape.as_slice())];
        if let (Some(name), Some(shape)) = (&self.table.index, &self.index_shape) {
            out.push((name.as_str(), shape.as_slice()));
        }
        for m in &self.masks {
            if let Some(shape) = &m.new_shape {
                out.push((m.name.as_str(), shape.as_slice()));
            }
        }
        out
    }

    fn grid_change(&self) -> Option<([usize; 2], [usize; 2], usize)> {
        let patch = self.table.patch?;
        (self.table.follows == Follows::Grid).then_some((self.table.window, self.to, patch))
    }

    fn window_change(&self) -> Option<crate::kinds::WindowSides> {
        let [h, w] = self.table.window;
        (self.table.follows == Follows::Window).then_some(([Some(h), Some(w)], self.to))
    }

    fn drops(&self) -> Vec<&str> {
        self.masks
            .iter()
            .filter(|m| m.layout.is_none())
            .map(|m| m.name.as_str())
            .collect()
    }

    fn compute(&self, ckpt: &dyn TensorSource, allow_nonfinite: bool) -> Result<Computed> {
        let path = ckpt.source_path();
        let entry = ckpt.find(&self.table.name).expect("planned tables exist");
        let raw = ckpt.bytes(entry)?;
        if !allow_nonfinite {
            refuse_nonfinite(path, &self.table.name, entry.dtype, &raw, "")?;
        }
        let elem = entry.dtype.bitsize() / 8;
        let (from, _) = self.sides();
        let (grid, class) = raw.split_at(from[0] * from[1] * self.table.heads * elem);
        let (bytes, images) = self.new_offsets(path, grid, class)?;
        if !allow_nonfinite {
            refuse_nonfinite(path, &self.table.name, entry.dtype, &bytes, " after resampling (the kernel overshoots; use --kernel bilinear or pass --allow-nonfinite)")?;
        }
        let mut out = Computed {
            bytes: vec![(entry.name.clone(), bytes)],
            images: Some(images),
        };
        let limit = HARD_ELEMENT_LIMIT;
        let rebuild_error = |name: &str, e: crate::rebuild::RebuildError| {
            Error::refused(path, format!("rebuilding \"{name}\": {e}"))
        };
        if let Some(name) = &self.table.index {
            let ix = ckpt.find(name).expect("discovered buffers exist");
            let layout = IndexLayout {
                window: (self.to[0], self.to[1]),
                class_rows: self.table.class_rows,
            };
            let v = relative_index::build(layout, limit).map_err(|e| rebuild_error(name, e))?;
            let bytes = values::encode_indices(ix.dtype, &v)
                .map_err(|e| values::value_error(path, name, e))?;
            out.bytes.push((name.clone(), bytes));
        }
        for m in &self.masks {
            let Some(layout) = m.layout else { continue };
            let entry = ckpt.find(&m.name).expect("discovered buffers exist");
            let v = shift_mask::build(layout, limit)
                .map_err(|e| rebuild_error(&m.name, e))?
                .unwrap_or_default();
            let bytes = values::encode_f32(entry.dtype, &v)
                .map_err(|e| values::value_error(path, &m.name, e))?;
            out.bytes.push((m.name.clone(), bytes));
        }
        Ok(out)
    }

    fn report(&self) -> ChangeReport {
        let o = &self.options;
        let engine = !self.geometric;
        ChangeReport {
            name: self.table.name.clone(),
            kind: self.table.kind,
            dtype: self.table.dtype.to_string(),
            slots: if self.table.class_rows { CLASS_ROWS } else { 0 },
            from: self.table.window.to_vec(),
            to: self.to.to_vec(),
            shape: self.table.shape.clone(),
            new_shape: self.new_shape.clone(),
            kernel: engine.then_some(o.kernel),
            coords: engine.then_some(o.coords),
            edges: engine.then_some(o.edges),
            antialias: self.antialias_applied,
            cubic_a: (engine && o.kernel == resample::Kernel::Bicubic).then_some(o.cubic_a),
            method: self.method(),
            scale: None,
            companions: self
                .rewrites()
                .into_iter()
                .skip(1)
                .map(|(n, _)| n.to_string())
                .collect(),
            fidelity: None,
        }
    }

    fn provenance(&self) -> serde_json::Value {
        let o = &self.options;
        serde_json::json!({
            "name": self.table.name,
            "kind": self.table.kind,
            "method": self.method(),
            "window_from": self.table.window,
            "window_to": self.to,
            "class_rows": self.table.class_rows,
            "kernel": (!self.geometric).then_some(o.kernel),
            "coords": o.coords,
            "edges": o.edges,
            "antialias": o.antialias,
            "antialias_applied": self.antialias_applied,
            "cubic_a": o.cubic_a,
            "index": self.table.index,
            "masks_rebuilt": self.masks.iter().filter(|m| m.layout.is_some()).map(|m| &m.name).collect::<Vec<_>>(),
            "masks_dropped": self.drops(),
        })
    }

    fn needed_bytes(&self) -> u64 {
        self.needed_bytes
    }
}
