//! Window-relative bias tables (kind `window_relative`): `[(2Wh−1)(2Ww−1), heads]`, one row per
//! offset between two positions of a `Wh×Ww` window, row offset outer (common practice in
//! window-attention models); BEiT-style tables append 3 class-relation rows. Beside them sit an
//! integer index buffer (`relative_position_index`, `[N, N]` or `[N+1, N+1]`) and, in
//! shifted-window blocks, an attention mask (`attn_mask`, `[nW, N, N]`).
//!
//! The offsets form a `[2Wh−1, 2Ww−1]` grid of per-head values: it is resampled like any grid
//! (or by the geometric-progression method), the class rows kept bit-exact. Index buffers and
//! masks are rebuilt by their constructions for the new window and feature map. A table with
//! class rows spans the whole patch grid and follows `--grid`/`--image`; one without follows
//! `--window`.

use std::collections::HashMap;

use serde::Serialize;

use super::names::{integer_sqrt, normalized, parent};
use super::{serialize_dtype, Discovery, Encoding, Hints, Kind};
use crate::checkpoint::{Dtype, TensorEntry, TensorSource};
use crate::error::Result;
use crate::rebuild::relative_index::{self, IndexLayout};
use crate::rebuild::shift_mask::{self, MaskLayout};
use crate::values;

mod change;

pub use change::{plan, WindowChange};

/// The largest head count a bias table may have (wider tables are not bias tables).
const MAX_HEADS: usize = 256;

/// Index and mask buffers larger than this are not read (bounded memory).
const MAX_BUFFER_READ: u64 = 256 << 20;

/// What a table follows when the request changes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Follows {
    /// The window spans the patch grid: `--grid`/`--image` decide.
    Grid,
    /// `--window` decides.
    Window,
}

/// A window-relative bias table and the buffers that follow it.
#[derive(Debug, Clone, Serialize)]
pub struct WindowTable {
    pub name: String,
    pub kind: Kind,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    /// The window `[Wh, Ww]`.
    pub window: [usize; 2],
    pub heads: usize,
    /// The 3 class-relation rows at the end (BEiT-style).
    pub class_rows: bool,
    pub follows: Follows,
    /// The model's patch size (from a patch-projection kernel or `--patch`).
    pub patch: Option<usize>,
    /// The model's patch grid: `--source-grid`, else the largest feature map of the masks.
    pub model_grid: Option<[usize; 2]>,
    /// The index buffer rebuilt with it.
    pub index: Option<String>,
    /// The attention masks of its block, rebuilt for the new feature map.
    pub masks: Vec<Mask>,
    /// Tensors named like masks in its block that cannot be read back to a map and shift, with
    /// the reason: the table cannot change window without them.
    pub unusable_masks: Vec<super::Skipped>,
    /// Buffers rewritten with it (index and masks), for the report.
    pub companions: Vec<String>,
    pub notes: Vec<String>,
}

/// A shifted-window attention mask and the feature map it was built for.
#[derive(Debug, Clone, Serialize)]
pub struct Mask {
    pub name: String,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    /// The stage's feature map `[H, W]`.
    pub map: [usize; 2],
    pub shift: [usize; 2],
}

/// Names of bias tables in released checkpoints (common practice).
fn is_table_name(name: &str) -> bool {
    let n = normalized(name);
    n.ends_with("relativepositionbiastable") || n.ends_with("relposbiastable")
}

fn is_index_name(name: &str) -> bool {
    let n = normalized(name);
    n.ends_with("relativepositionindex") || n.ends_with("relposindex")
}

/// Names this kind recognises: bias tables, their index buffers and masks.
pub(crate) fn claims(name: &str) -> bool {
    is_table_name(name) || is_index_name(name) || is_mask_name(name)
}

fn is_mask_name(name: &str) -> bool {
    normalized(name).ends_with("attnmask")
}

/// The windows `(Wh, Ww)` and class-row flag whose tables hold `rows` rows: square windows
/// only (the index buffer settles non-square ones).
fn square_readings(rows: usize) -> Vec<(usize, bool)> {
    let side = |n: usize| integer_sqrt(n).filter(|s| s % 2 == 1 && *s >= 3);
    let mut out = Vec::new();
    if let Some(s) = side(rows) {
        out.push((s.div_ceil(2), false));
    }
    if let Some(s) = rows.checked_sub(3).and_then(side) {
        out.push((s.div_ceil(2), true));
    }
    out
}

/// Find every window-relative table, its index buffer and its masks.
pub(super) fn find(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    let entries = source.entries();
    let patch = super::absolute::model_patch(entries, hints);
    let buffers = Buffers::of(entries);
    let mut tables = Vec::new();
    for entry in entries {
        let forced = hints.tensors.contains(&entry.name);
        if !is_table_name(&entry.name) {
            continue;
        }
        match examine(source, &buffers, entry, patch.clone())? {
            Ok(mut table) => {
                attach_masks(source, &buffers, &mut table)?;
                found.warnings.extend(table.unusable_masks.iter().map(|m| {
                    format!(
                        "{}: in the block of {} but not a mask posgrid can rebuild ({}); a resize that changes the table's window is refused",
                        m.name, table.name, m.reason
                    )
                }));
                table.companions = table.index.iter().cloned().collect();
                table
                    .companions
                    .extend(table.masks.iter().map(|m| m.name.clone()));
                tables.push(table);
            }
            Err(reason) => {
                if forced || entry.shape.len() == 2 {
                    found.skipped.push(super::Skipped {
                        name: entry.name.clone(),
                        reason,
                    });
                }
            }
        }
    }
    // Stage maps shrink from the patch grid by whole factors: the largest mask's map is the
    // grid itself when the first stage has shifted blocks (common practice).
    let largest = tables
        .iter()
        .flat_map(|t| t.masks.iter().map(|m| m.map))
        .max_by_key(|m| m[0] * m[1]);
    let model_grid = hints.source_grid.map(|(h, w)| [h, w]).or(largest);
    // Index buffers and masks no table claimed still depend on the window: say so.
    let claimed: Vec<&String> = tables.iter().flat_map(|t| &t.companions).collect();
    for entry in entries {
        if (is_index_name(&entry.name) || is_mask_name(&entry.name))
            && !claimed.contains(&&entry.name)
        {
            found.skipped.push(super::Skipped {
                name: entry.name.clone(),
                reason: "a window-relative index buffer or attention mask with no bias table of its window beside it (a continuous position bias?); left unchanged".into(),
            });
        }
    }
    for mut table in tables {
        table.model_grid = model_grid;
        found.encodings.push(Encoding::Window(table));
    }
    Ok(())
}

/// The index buffers and masks of the file by the module that holds them, gathered in one
/// pass, so that each table finds its own without a pass over every tensor (a hostile file
/// may hold many thousands of tables).
struct Buffers<'a> {
    /// Index buffers by their module, in file order.
    indexes: HashMap<&'a str, Vec<&'a TensorEntry>>,
    /// Masks by their block (module), with their place in the file.
    masks: HashMap<&'a str, Vec<(usize, &'a TensorEntry)>>,
}

impl<'a> Buffers<'a> {
    fn of(entries: &'a [TensorEntry]) -> Self {
        let mut buffers = Buffers {
            indexes: HashMap::new(),
            masks: HashMap::new(),
        };
        for (at, e) in entries.iter().enumerate() {
            if is_index_name(&e.name) {
                buffers.indexes.entry(parent(&e.name)).or_default().push(e);
            } else if is_mask_name(&e.name) {
                buffers
                    .masks
                    .entry(parent(&e.name))
                    .or_default()
                    .push((at, e));
            }
        }
        buffers
    }

    /// The first index buffer beside `table` (`a.b.relative_position_index` for
    /// `a.b.relative_position_bias_table`).
    fn index_of(&self, table: &str) -> Option<&'a TensorEntry> {
        self.indexes.get(parent(table))?.first().copied()
    }

    /// Masks of the blocks that hold `table` — `B.attn_mask` beside `B.….table`, not beside
    /// a block whose name only starts the same (`blocks.1` is not `blocks.10`) — in file order.
    fn masks_of(&self, table: &str) -> Vec<&'a TensorEntry> {
        let mut found: Vec<(usize, &TensorEntry)> = table
            .match_indices(['.', '/'])
            .filter_map(|(i, _)| self.masks.get(&table[..i]))
            .flatten()
            .copied()
            .collect();
        found.sort_by_key(|(at, _)| *at);
        found.into_iter().map(|(_, e)| e).collect()
    }
}

/// Read a table's window (cross-checked against its index buffer when there is one).
fn examine(
    source: &dyn TensorSource,
    buffers: &Buffers,
    entry: &TensorEntry,
    patch: Option<(usize, String)>,
) -> Result<std::result::Result<WindowTable, String>> {
    let [rows, heads] = entry.shape[..] else {
        return Ok(Err(format!(
            "shape {:?} is not [offsets, heads]",
            entry.shape
        )));
    };
    if !values::is_float(entry.dtype) {
        return Ok(Err(format!(
            "dtype {} is not one posgrid resamples (F16, BF16, F32, F64)",
            entry.dtype
        )));
    }
    if heads == 0 || heads > MAX_HEADS {
        return Ok(Err(format!(
            "{heads} columns is not a head count (1-{MAX_HEADS})"
        )));
    }
    let mut notes = Vec::new();
    let index = buffers.index_of(&entry.name);
    let reading = match index {
        Some(ix) => match index_layout(source, ix, rows)? {
            Ok(layout) => {
                notes.push(format!("window read from the index buffer {}", ix.name));
                layout
            }
            Err(why) => return Ok(Err(format!("its index buffer {}: {why}", ix.name))),
        },
        None => match square_readings(rows)[..] {
            [(w, class_rows)] => IndexLayout {
                window: (w, w),
                class_rows,
            },
            [] => {
                return Ok(Err(format!(
                    "{rows} rows are not (2W-1)^2 (+3 class rows) for a square window, and no index buffer tells the window"
                )))
            }
            _ => {
                return Ok(Err(format!(
                    "{rows} rows fit more than one window and no index buffer tells which"
                )))
            }
        },
    };
    let follows = if reading.class_rows {
        Follows::Grid
    } else {
        Follows::Window
    };
    Ok(Ok(WindowTable {
        name: entry.name.clone(),
        kind: Kind::WindowRelative,
        dtype: entry.dtype,
        shape: entry.shape.clone(),
        window: [reading.window.0, reading.window.1],
        heads,
        class_rows: reading.class_rows,
        follows,
        patch: patch.map(|(p, _)| p),
        model_grid: None,
        index: index.map(|e| e.name.clone()),
        masks: Vec::new(),
        unusable_masks: Vec::new(),
        companions: Vec::new(),
        notes,
    }))
}

/// The window of an index buffer that indexes a table of `rows` rows, checked value by value.
fn index_layout(
    source: &dyn TensorSource,
    ix: &TensorEntry,
    rows: usize,
) -> Result<std::result::Result<IndexLayout, String>> {
    let side = match ix.shape[..] {
        [a, b] if a == b => a,
        _ => return Ok(Err(format!("shape {:?} is not square", ix.shape))),
    };
    if !values::is_integer(ix.dtype) {
        return Ok(Err(format!("dtype {} does not hold integers", ix.dtype)));
    }
    if ix.byte_len() > MAX_BUFFER_READ {
        return Ok(Err("too large to read".into()));
    }
    let v = values::decode_ints(ix.dtype, &source.bytes(ix)?)
        .map_err(|e| values::value_error(source.source_path(), &ix.name, e))?;
    let layouts: Vec<IndexLayout> = relative_index::layouts_of(&v, side)
        .into_iter()
        .filter(|l| l.table_rows() == Some(rows))
        .collect();
    Ok(match layouts[..] {
        [one] => Ok(one),
        [] => Err(format!(
            "does not follow the window-relative construction for a table of {rows} rows"
        )),
        _ => Err("fits more than one window".into()),
    })
}

/// Masks in the table's block: `[nW, N, N]` with N the window's cells, read back to their
/// feature map and shift by their values. A tensor named like a mask in the block that is no
/// such mask is kept in `unusable_masks` with the reason.
fn attach_masks(
    source: &dyn TensorSource,
    buffers: &Buffers,
    table: &mut WindowTable,
) -> Result<()> {
    if table.class_rows {
        return Ok(());
    }
    for entry in buffers.masks_of(&table.name) {
        match read_mask(source, entry, table.window)? {
            Ok(mask) => table.masks.push(mask),
            Err(reason) => table.unusable_masks.push(super::Skipped {
                name: entry.name.clone(),
                reason,
            }),
        }
    }
    Ok(())
}

/// The map and shift of a mask for `window`, or why it is none.
fn read_mask(
    source: &dyn TensorSource,
    entry: &TensorEntry,
    window: [usize; 2],
) -> Result<std::result::Result<Mask, String>> {
    let cells = window[0] * window[1];
    if !values::is_float(entry.dtype) {
        return Ok(Err(format!(
            "dtype {} does not hold a float mask",
            entry.dtype
        )));
    }
    let [windows, a, b] = entry.shape[..] else {
        return Ok(Err(format!(
            "shape {:?} is not [windows, cells, cells]",
            entry.shape
        )));
    };
    if a != cells || b != cells {
        return Ok(Err(format!(
            "its windows hold {a}x{b} pairs of cells; window {}x{} holds {cells} cells",
            window[0], window[1]
        )));
    }
    if entry.byte_len() > MAX_BUFFER_READ {
        return Ok(Err("too large to read".into()));
    }
    let bytes = source.bytes(entry)?;
    let bad = values::count_nonfinite(entry.dtype, &bytes);
    if bad > 0 {
        return Ok(Err(format!("it holds {bad} NaN or infinite value(s)")));
    }
    let v = values::decode_f32(entry.dtype, &bytes)
        .map_err(|e| values::value_error(source.source_path(), &entry.name, e))?;
    let layout = shift_mask::layouts_of(&v, windows, cells)
        .into_iter()
        .find(|l| l.window == (window[0], window[1]));
    Ok(match layout {
        Some(l) => Ok(Mask {
            name: entry.name.clone(),
            dtype: entry.dtype,
            shape: entry.shape.clone(),
            map: [l.map.0, l.map.1],
            shift: [l.shift.0, l.shift.1],
        }),
        None => Err(format!(
            "its values are not a shifted-window mask of window {}x{}",
            window[0], window[1]
        )),
    })
}

/// The mask layout a map and window give: shift half the window (common practice), none
/// where the window covers the map.
pub(crate) fn mask_layout(map: [usize; 2], window: [usize; 2]) -> MaskLayout {
    MaskLayout {
        map: (map[0], map[1]),
        window: (window[0], window[1]),
        shift: (window[0] / 2, window[1] / 2),
    }
}
