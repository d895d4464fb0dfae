//! Absolute position tables (kinds `learned` and `sincos`): one row per patch of the grid after
//! leading class slots, as `[1, N, D]`, `[N, D]`, `[1, H, W, D]` or `[1, D, H, W]`. Recognised by
//! name and row arithmetic (the values settle a sine-cosine table); resampled on the grid with
//! the engine (or a sine-cosine table built anew); integer position-id buffers follow them.

mod change;
mod tokens;

use serde::Serialize;

use super::names::{common_prefix_len, integer_sqrt, normalized, parent, without_first_component};
use super::{
    serialize_dtype, value_tolerance, Ambiguous, Channels, Discovery, Hints, Kind, Skipped,
    MAX_VALUE_READ,
};
use crate::checkpoint::{Dtype, TensorEntry, TensorSource};
use crate::error::Result;
use crate::sincos::{self, FirstAxis};
use crate::values::{self, OutOfMemory};

pub use change::{plan, IdsChange, TableChange};

/// The most leading class-like slots a table may have.
pub const MAX_SLOTS: usize = 8;

/// How the table's rows are laid out in the tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Layout {
    /// `[1, N, D]`
    BatchRows,
    /// `[N, D]`
    Rows,
    /// `[1, H, W, D]` (no class slots)
    Grid,
    /// `[1, D, H, W]`: channels first (no class slots)
    GridChannelsFirst,
}

/// What decided a table's class slots.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum SlotsFrom {
    Tokens,
    /// The image and patch sizes a configuration file beside the checkpoint records.
    Config,
    Rows,
    Values,
    Flag,
    Shape,
}

/// A position table on a 2-D patch grid.
#[derive(Debug, Clone, Serialize)]
pub struct Table {
    pub name: String,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    pub layout: Layout,
    /// Leading class-like rows, kept as they are when resampling.
    pub slots: usize,
    /// The patch grid as (rows, columns).
    pub grid: [usize; 2],
    /// Embedding width.
    pub dim: usize,
    /// Patch size in pixels, when a patch-projection kernel (or the user) tells it.
    pub patch: Option<usize>,
    /// Where the patch size came from.
    pub patch_source: Option<String>,
    pub kind: Kind,
    /// For `sincos`: which axis the first half of the channels encodes.
    pub sincos_first_axis: Option<FirstAxis>,
    /// For a video table: the positions T along time of its `T × H × W` grid (rows are
    /// time-major).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub frames: Option<usize>,
    /// For a video table: input frames per tubelet (the 5-D patch kernel's t).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub tubelet: Option<usize>,
    /// Integer position-id buffers that must change with the table.
    pub companions: Vec<String>,
    /// Another table this one duplicates under a different prefix (EMA or averaged copies).
    pub copy_of: Option<String>,
    /// What decided the slots: `tokens` (the class and distillation token tensors beside the
    /// table, with the row count), `rows` (the row count alone), `values` (the sine-cosine
    /// values), `flag` (`--slots`/`--source-grid`) or `shape` (a grid-shaped table has none).
    pub slots_from: SlotsFrom,
    /// How the slots and grid were decided, when it was not the only explanation.
    pub notes: Vec<String>,
}

impl Table {
    /// Grid values (class slots excluded) in row order `[H·W, D]`: a channels-first table's
    /// `[D, H·W]` transposed, any other as it is.
    pub fn to_row_order<T: Copy>(&self, v: Vec<T>) -> std::result::Result<Vec<T>, OutOfMemory> {
        match self.layout {
            Layout::GridChannelsFirst => values::transpose(&v, self.dim, v.len() / self.dim.max(1)),
            _ => Ok(v),
        }
    }

    /// New grid values in row order `[H'·W', D]` back in the table's own layout.
    pub fn from_row_order<'a, T: Copy>(
        &self,
        v: &'a [T],
    ) -> std::result::Result<std::borrow::Cow<'a, [T]>, OutOfMemory> {
        match self.layout {
            Layout::GridChannelsFirst => Ok(std::borrow::Cow::Owned(values::transpose(
                v,
                v.len() / self.dim.max(1),
                self.dim,
            )?)),
            _ => Ok(std::borrow::Cow::Borrowed(v)),
        }
    }
}

/// Names of position tables in released checkpoints (common practice): `pos_embed`,
/// `position_embedding(s)`, `positional_embedding`, `posembed_input`, `pos_embedding`; a
/// video model's temporal table is a kind of its own.
fn is_position_name(name: &str) -> bool {
    let n = normalized(name);
    ["posemb", "positionemb", "positionalemb"]
        .iter()
        .any(|k| n.contains(k))
        && !super::temporal::is_temporal_name(name)
}

fn is_position_id_name(name: &str) -> bool {
    let n = normalized(name);
    n.contains("positionids") || n.contains("posids") || n.contains("positionid")
}

/// Find every absolute position table in `source`, with its patch size, companions and copies.
pub(super) fn find(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    let entries = source.entries();
    let kernel_widths: Vec<usize> = patch_kernels(entries).iter().map(|k| k.1).collect();
    let tubelet_widths: Vec<(usize, usize)> = tubelet_kernels(entries)
        .iter()
        .map(|k| (k.dim, k.frames))
        .collect();
    for entry in entries {
        // `--tensor` names a tensor to change; it forces the absolute reading only on a name
        // no other kind recognises.
        let forced =
            hints.tensors.iter().any(|n| n == &entry.name) && !super::other_kind_name(&entry.name);
        if !forced && !is_position_name(&entry.name) {
            continue;
        }
        let kernels = Kernels {
            flat: &kernel_widths,
            tubelet: &tubelet_widths,
        };
        match examine(source, entry, hints, forced, kernels)? {
            Verdict::Table(t, warning) => {
                found.warnings.extend(warning);
                found.tables.push(*t)
            }
            Verdict::Ambiguous(a) => found.ambiguous.push(a),
            Verdict::Skip(reason) => {
                found.skipped.push(Skipped {
                    name: entry.name.clone(),
                    reason,
                });
            }
            Verdict::Ignore => {}
        }
    }
    infer_patches(entries, found, hints);
    find_companions(source, found)?;
    mark_copies(&mut found.tables);
    Ok(())
}

/// The embedding widths of the model's patch-projection kernels: 2-D ones and video ones.
#[derive(Clone, Copy)]
struct Kernels<'a> {
    flat: &'a [usize],
    /// (width, frames per tubelet) of each 5-D kernel.
    tubelet: &'a [(usize, usize)],
}

enum Verdict {
    /// A table, and a warning when its reading rests on a default.
    Table(Box<Table>, Option<String>),
    Ambiguous(Ambiguous),
    Skip(String),
    Ignore,
}

/// Read `entry` as an absolute table, stage by stage: its shape, its dtype, the candidate
/// (slots, grid) explanations from the strongest evidence at hand, the values to settle
/// between them, and the kind. Each stage may end with a verdict other than a table.
fn examine(
    source: &dyn TensorSource,
    entry: &TensorEntry,
    hints: &Hints,
    forced: bool,
    kernels: Kernels,
) -> Result<Verdict> {
    let mut notes = Vec::new();
    let shape = match read_shape(entry, hints, forced, kernels.flat, &mut notes) {
        Flow::Continue(s) => s,
        Flow::Break(verdict) => return Ok(verdict),
    };
    if let Some(reason) = unreadable(entry, &shape) {
        return Ok(Verdict::Skip(reason));
    }
    let tubelet = kernels
        .tubelet
        .iter()
        .find(|(width, _)| *width == shape.dim)
        .map(|k| k.1);
    let found = match candidates(source, entry, hints, &shape, tubelet, &mut notes) {
        Flow::Continue(c) => c,
        Flow::Break(verdict) => return Ok(verdict),
    };
    let mut values = TableValues::new(source, entry, &shape, &mut notes);
    let ((slots, grid), slots_from) = match settle(entry, &found, &mut values, &mut notes)? {
        Flow::Continue(c) => c,
        Flow::Break(verdict) => return Ok(verdict),
    };
    let v = values.get()?;
    let first_axis = values.sincos_fit(&v, slots, grid);
    let kind = if first_axis.is_some() {
        Kind::Sincos
    } else {
        Kind::Learned
    };
    if kind == Kind::Sincos && slots > 0 {
        let class_zero = v[..slots * shape.dim].iter().all(|x| *x == 0.0);
        notes.push(if class_zero {
            "class rows are zero".to_string()
        } else {
            "class rows are not part of the sine-cosine construction".to_string()
        });
    }
    Ok(Verdict::Table(
        Box::new(Table {
            name: entry.name.clone(),
            dtype: entry.dtype,
            shape: entry.shape.clone(),
            layout: shape.layout,
            slots,
            grid: [grid.0, grid.1],
            dim: shape.dim,
            patch: None,
            patch_source: None,
            kind,
            sincos_first_axis: first_axis,
            tubelet: found.frames.and(tubelet),
            slots_from,
            frames: found.frames,
            companions: Vec::new(),
            copy_of: None,
            notes,
        }),
        shape.warning,
    ))
}

/// A stage's outcome: go on with a value, or stop with a verdict.
type Flow<T> = std::ops::ControlFlow<Verdict, T>;

/// One (slots, grid) explanation of a table's rows.
type Explanation = (usize, (usize, usize));

/// What the shape says: the layout, the row count, the width, and the grid when the shape
/// holds it (a `[1, H, W, D]` or `[1, D, H, W]` table).
struct Shape {
    layout: Layout,
    rows: usize,
    dim: usize,
    grid: Option<(usize, usize)>,
    /// Set when the reading rests on a default (a 4-D shape that reads the same either way).
    warning: Option<String>,
}

fn read_shape(
    entry: &TensorEntry,
    hints: &Hints,
    forced: bool,
    kernel_widths: &[usize],
    notes: &mut Vec<String>,
) -> Flow<Shape> {
    let four_d = match entry.shape.as_slice() {
        [1, a, b, c] => channel_order(*a, *b, *c, hints, kernel_widths),
        _ => Reading::Neither,
    };
    let plain = |layout, rows, dim, grid| Shape {
        layout,
        rows,
        dim,
        grid,
        warning: None,
    };
    Flow::Continue(match (entry.shape.as_slice(), four_d) {
        ([1, n, d], _) => plain(Layout::BatchRows, *n, *d, None),
        ([n, d], _) => plain(Layout::Rows, *n, *d, None),
        ([1, h, w, d], Reading::Only(Channels::Last, why)) => {
            notes.extend(why);
            plain(Layout::Grid, h * w, *d, Some((*h, *w)))
        }
        ([1, d, h, w], Reading::Only(Channels::First, why)) => {
            notes.extend(why);
            plain(Layout::GridChannelsFirst, h * w, *d, Some((*h, *w)))
        }
        ([1, h, w, d], Reading::Default) => {
            let text = format!(
                "{}: shape [1, {h}, {w}, {d}] reads the same either way; taken as channels last [1, H, W, D] (pass --channels first if it is [1, D, H, W])",
                entry.name
            );
            notes.push(text.clone());
            Shape {
                warning: Some(text),
                ..plain(Layout::Grid, h * w, *d, Some((*h, *w)))
            }
        }
        ([1, a, b, c], Reading::Ambiguous) => {
            return Flow::Break(Verdict::Ambiguous(Ambiguous {
                name: entry.name.clone(),
                rows: a * b * c,
                candidates: vec![(0, vec![*a, *b]), (0, vec![*b, *c])],
                resolve_with:
                    "--channels last (for [1, H, W, D]) or --channels first (for [1, D, H, W])"
                        .into(),
            }))
        }
        (other, _) => {
            // Biases, scalars, conv kernels named like tables are not tables; say so only when
            // the user asked for this tensor or it is plausibly a table.
            return Flow::Break(if forced || other.len() >= 2 {
                Verdict::Skip(format!(
                    "shape {other:?} is not [1, N, D], [N, D] or [1, H, W, D]"
                ))
            } else {
                Verdict::Ignore
            });
        }
    })
}

/// Why a table of this dtype or size cannot be resampled, if it cannot.
fn unreadable(entry: &TensorEntry, shape: &Shape) -> Option<String> {
    if values::is_integer(entry.dtype) || entry.dtype == Dtype::BOOL {
        return Some(format!(
            "dtype {} holds integers; a position table holds floats",
            entry.dtype
        ));
    }
    if !values::is_float(entry.dtype) {
        return Some(format!(
            "dtype {} is not one posgrid resamples (F16, BF16, F32, F64)",
            entry.dtype
        ));
    }
    (shape.dim == 0 || shape.rows == 0).then(|| "the table is empty".into())
}

/// The explanations the evidence allows, what decided them, and the frames of a video grid.
struct Candidates {
    list: Vec<Explanation>,
    from: SlotsFrom,
    frames: Option<usize>,
}

/// The candidate explanations, from the strongest evidence at hand: the shape, the flags, a
/// video model's kernel, a configuration beside the checkpoint, then the row count with the
/// token tensors beside the table.
fn candidates(
    source: &dyn TensorSource,
    entry: &TensorEntry,
    hints: &Hints,
    shape: &Shape,
    tubelet: Option<usize>,
    notes: &mut Vec<String>,
) -> Flow<Candidates> {
    let rows = shape.rows;
    let flag = |one| Candidates {
        list: vec![one],
        from: SlotsFrom::Flag,
        frames: None,
    };
    if let Some(g) = shape.grid {
        if let Some(s) = hints.slots.filter(|&s| s != 0) {
            notes.push(format!(
                "--slots {s} ignored: a grid-shaped table has no class slots"
            ));
        }
        return Flow::Continue(Candidates {
            list: vec![(0, g)],
            from: SlotsFrom::Shape,
            frames: None,
        });
    }
    match (hints.source_grid, hints.source_frames) {
        (Some(grid), Some(t)) => video_flag(rows, grid, t, hints.slots),
        (None, _) if tubelet.is_some() => Flow::Break(video_rows(entry, rows, hints.slots)),
        (Some(grid), None) => grid_flag(rows, grid, hints.slots).map_continue(flag),
        (None, _) => match hints.slots {
            Some(s) => slots_flag(rows, s).map_continue(flag),
            None => by_evidence(source, entry, hints, shape, notes),
        },
    }
}

/// `--source-grid TxHxW`: the rows after the slots are T·H·W.
fn video_flag(
    rows: usize,
    (h, w): (usize, usize),
    t: usize,
    slots: Option<usize>,
) -> Flow<Candidates> {
    // A product past a 64-bit count explains no table (wrapped, it could seem to).
    match t
        .checked_mul(h)
        .and_then(|n| n.checked_mul(w))
        .and_then(|n| rows.checked_sub(n))
    {
        Some(s) if s <= MAX_SLOTS && slots.is_none_or(|hs| hs == s) => Flow::Continue(Candidates {
            list: vec![(s, (h, w))],
            from: SlotsFrom::Flag,
            frames: Some(t),
        }),
        _ => Flow::Break(Verdict::Skip(format!(
            "{rows} rows do not fit --source-grid {t}x{h}x{w}"
        ))),
    }
}

/// A video model (a 5-D kernel of the table's width) without `--source-grid`: the row count
/// alone cannot tell T from H·W, so the verdict names the explanations and the flag.
fn video_rows(entry: &TensorEntry, rows: usize, slots: Option<usize>) -> Verdict {
    let fits = video_explanations(rows, slots);
    match fits[..] {
        [(s, t, k)] => Verdict::Skip(format!("{rows} rows of a video model fit only {s} slot(s) + {t}x{k}x{k}; pass --source-grid {t}x{k}x{k} to take it")),
        [] => Verdict::Skip(format!("{rows} rows of a video model (a 5-D patch kernel beside it) fit no T x H x H grid; pass --source-grid TxHxW")),
        _ => Verdict::Ambiguous(Ambiguous {
            name: entry.name.clone(),
            rows,
            candidates: fits.iter().map(|&(s, t, k)| (s, vec![t, k, k])).collect(),
            resolve_with: "--source-grid TxHxW".into(),
        }),
    }
}

/// `--source-grid HxW` (with `--slots` when given): the slots are what the grid leaves.
fn grid_flag(rows: usize, (h, w): (usize, usize), slots: Option<usize>) -> Flow<Explanation> {
    match h.checked_mul(w).and_then(|n| rows.checked_sub(n)) {
        Some(s) if s <= MAX_SLOTS && slots.is_none_or(|hs| hs == s) => Flow::Continue((s, (h, w))),
        _ => Flow::Break(Verdict::Skip(format!(
            "{rows} rows do not fit --source-grid {h}x{w}{}",
            slots
                .map(|s| format!(" with --slots {s}"))
                .unwrap_or_default()
        ))),
    }
}

/// `--slots N` alone: the rest must be a square grid.
fn slots_flag(rows: usize, s: usize) -> Flow<Explanation> {
    match rows.checked_sub(s).and_then(integer_sqrt) {
        Some(k) if k >= 2 => Flow::Continue((s, (k, k))),
        _ => Flow::Break(Verdict::Skip(format!(
            "{rows} rows with --slots {s} leave no square grid; pass --source-grid HxW"
        ))),
    }
}

/// No flag: a configuration's recorded grid where the rows leave a choice, else the square
/// explanations of the rows, narrowed by the token tensors beside the table.
fn by_evidence(
    source: &dyn TensorSource,
    entry: &TensorEntry,
    hints: &Hints,
    shape: &Shape,
    notes: &mut Vec<String>,
) -> Flow<Candidates> {
    let take = |list, from| {
        Flow::Continue(Candidates {
            list,
            from,
            frames: None,
        })
    };
    if let Some(c) = recorded_fit(shape.rows, hints) {
        let file = hints.recorded_grid.as_ref().map_or("", |r| r.1.as_str());
        notes.push(format!(
            "grid {}x{} from the image and patch sizes {file} records",
            c.1 .0, c.1 .1
        ));
        return take(vec![c], SlotsFrom::Config);
    }
    let by_rows = square_explanations(shape.rows);
    let beside = tokens::beside(source.entries(), &entry.name, shape.dim);
    match tokens::decide(&by_rows, &beside) {
        tokens::Decision::Rows => take(by_rows, SlotsFrom::Rows),
        tokens::Decision::Take(c, from, note) => {
            notes.push(note);
            take(vec![c], from)
        }
        tokens::Decision::Disagree(why) => Flow::Break(Verdict::Ambiguous(Ambiguous {
            name: entry.name.clone(),
            rows: shape.rows,
            candidates: by_rows.iter().map(|&(s, (h, w))| (s, vec![h, w])).collect(),
            resolve_with: format!("--slots N ({why})"),
        })),
    }
}

/// The table's values, read once when a stage needs them (a table over [`MAX_VALUE_READ`] is
/// not read: its kind stays learned), with the sine-cosine check against them.
struct TableValues<'a> {
    source: &'a dyn TensorSource,
    entry: &'a TensorEntry,
    layout: Layout,
    rows: usize,
    dim: usize,
    readable: bool,
    loaded: Option<Vec<f64>>,
}

impl<'a> TableValues<'a> {
    fn new(
        source: &'a dyn TensorSource,
        entry: &'a TensorEntry,
        shape: &Shape,
        notes: &mut Vec<String>,
    ) -> Self {
        let readable = entry.byte_len() <= MAX_VALUE_READ;
        if !readable {
            notes.push(format!(
                "values not read (over {} MiB): the sine-cosine check was skipped",
                MAX_VALUE_READ >> 20
            ));
        }
        TableValues {
            source,
            entry,
            layout: shape.layout,
            rows: shape.rows,
            dim: shape.dim,
            readable,
            loaded: None,
        }
    }

    /// The values, row-major `[rows, dim]` (empty when not read).
    fn get(&mut self) -> Result<Vec<f64>> {
        if let Some(v) = self.loaded.take() {
            return Ok(v);
        }
        if !self.readable {
            return Ok(Vec::new());
        }
        let (path, name) = (self.source.source_path(), &self.entry.name);
        let bytes = self.source.bytes(self.entry)?;
        let v = values::decode_f64(self.entry.dtype, &bytes)
            .map_err(|e| values::value_error(path, name, e))?;
        if self.layout != Layout::GridChannelsFirst {
            return Ok(v);
        }
        // Channels first: rows of the grid are the columns of a [D, H·W] matrix.
        values::transpose(&v, self.dim, self.rows).map_err(|e| values::out_of_memory(path, name, e))
    }

    /// The first axis of the sine-cosine construction when rows after `s` slots follow it.
    fn sincos_fit(&self, v: &[f64], s: usize, (h, w): (usize, usize)) -> Option<FirstAxis> {
        let tol = value_tolerance(self.entry.dtype);
        sincos::matches(v.get(s * self.dim..)?, h, w, self.dim, tol)
    }

    /// The explanations among `list` whose rows follow the sine-cosine construction.
    /// The values are kept for the next [`TableValues::get`].
    fn sincos_fits(&mut self, list: &[Explanation]) -> Result<Vec<Explanation>> {
        if self.loaded.is_none() {
            self.loaded = Some(self.get()?);
        }
        let v = self.loaded.as_deref().unwrap_or_default();
        if v.is_empty() {
            return Ok(Vec::new());
        }
        Ok(list
            .iter()
            .copied()
            .filter(|&(s, g)| self.sincos_fit(v, s, g).is_some())
            .collect())
    }
}

/// One explanation out of the candidates: the only one; else the one the sine-cosine values
/// follow; else, among several, the smallest common slot count with a note.
fn settle(
    entry: &TensorEntry,
    found: &Candidates,
    values: &mut TableValues,
    notes: &mut Vec<String>,
) -> Result<Flow<(Explanation, SlotsFrom)>> {
    let rows = values.rows;
    match found.list[..] {
        [one] => Ok(Flow::Continue((one, found.from))),
        [] => {
            // No square grid: only a sine-cosine table can tell a non-square one.
            let fits = values.sincos_fits(&all_explanations(rows))?;
            if let [(s, g)] = fits[..] {
                notes.push(format!(
                    "grid {}x{} read from the sine-cosine values (no square grid fits {rows} rows)",
                    g.0, g.1
                ));
                return Ok(Flow::Continue(((s, g), SlotsFrom::Values)));
            }
            Ok(Flow::Break(Verdict::Skip(format!(
                "{rows} rows have no square-grid explanation with 0-{MAX_SLOTS} class slots (a 1-D sequence table?); pass --source-grid HxW if it is a grid"
            ))))
        }
        _ => {
            if let [one] = values.sincos_fits(&found.list)?[..] {
                notes.push("slots and grid read from the sine-cosine values".into());
                return Ok(Flow::Continue((one, SlotsFrom::Values)));
            }
            Ok(common_slots(entry, rows, &found.list, notes).map_continue(|c| (c, found.from)))
        }
    }
}

/// Several explanations and no values to settle them: 0, 1 or 2 slots is what released models
/// use (common practice); a larger count that also fits is named so the user can override.
fn common_slots(
    entry: &TensorEntry,
    rows: usize,
    list: &[Explanation],
    notes: &mut Vec<String>,
) -> Flow<Explanation> {
    let Some(&c) = list.iter().find(|(s, _)| *s <= 2) else {
        return Flow::Break(Verdict::Ambiguous(Ambiguous {
            name: entry.name.clone(),
            rows,
            candidates: list.iter().map(|&(s, (h, w))| (s, vec![h, w])).collect(),
            resolve_with: "--slots N or --source-grid HxW".into(),
        }));
    };
    let others: Vec<String> = list
        .iter()
        .filter(|x| **x != c)
        .map(|(s, (h, w))| format!("{s} slots + {h}x{w}"))
        .collect();
    notes.push(format!(
        "took {} slot(s) + {}x{}; {rows} rows also fit {} (pass --slots to choose)",
        c.0,
        c.1 .0,
        c.1 .1,
        others.join(", ")
    ));
    Flow::Continue(c)
}

/// How a 4-D `[1, a, b, c]` tensor reads.
enum Reading {
    /// As one order only; with the reason when it was not the only possible one.
    Only(Channels, Option<String>),
    /// Either way, with the same grid and width: channels last, with a warning.
    Default,
    /// Two readings that differ, and nothing to choose between them.
    Ambiguous,
    /// Not a grid either way.
    Neither,
}

/// Decide whether `[1, a, b, c]` is `[1, H, W, D]` or `[1, D, H, W]`: the `--channels` flag,
/// then `--source-grid`, a patch-projection kernel of the same width, a square grid, and an
/// embedding width larger than both grid sides, in that order; each only when it tells the
/// two readings apart.
fn channel_order(a: usize, b: usize, c: usize, hints: &Hints, kernel_widths: &[usize]) -> Reading {
    use Channels::{First, Last};
    let (last_ok, first_ok) = (a >= 2 && b >= 2, b >= 2 && c >= 2);
    match (last_ok, first_ok) {
        (false, false) => return Reading::Neither,
        (true, false) => return Reading::Only(Last, None),
        (false, true) => return Reading::Only(First, None),
        (true, true) => {}
    }
    if let Some(ch) = hints.channels {
        return Reading::Only(
            ch,
            Some(format!("channel order from --channels {ch:?}").to_lowercase()),
        );
    }
    let tests: [(bool, bool, &str); 4] = [
        (
            hints.source_grid == Some((a, b)),
            hints.source_grid == Some((b, c)),
            "--source-grid",
        ),
        (
            kernel_widths.contains(&c),
            kernel_widths.contains(&a),
            "the width of the patch-projection kernel",
        ),
        (a == b, b == c, "the only square grid of the two readings"),
        (
            c > a && c > b,
            a > b && a > c,
            "the only reading whose width exceeds both grid sides",
        ),
    ];
    for (last, first, why) in tests {
        if last != first {
            let order = if last { Last } else { First };
            let text = match order {
                Last => format!("channels last [1, H, W, D], from {why}"),
                First => format!("channels first [1, D, H, W], from {why}"),
            };
            return Reading::Only(order, Some(text));
        }
    }
    if a == b && b == c {
        Reading::Default
    } else {
        Reading::Ambiguous
    }
}

/// The explanation of `rows` by the grid a configuration file records, when the row count
/// alone does not settle it (several square grids, or a non-square grid): a few leading slots
/// (at most 2, common practice) in front of the recorded grid.
fn recorded_fit(rows: usize, hints: &Hints) -> Option<(usize, (usize, usize))> {
    let ((h, w), _) = hints.recorded_grid.as_ref()?;
    if square_explanations(rows).len() == 1 {
        return None;
    }
    let slots = rows.checked_sub(h.checked_mul(*w)?)?;
    (slots <= 2 && hints.slots.is_none_or(|s| s == slots)).then_some((slots, (*h, *w)))
}

/// The `T × K × K` video grids (T ≥ 2, K ≥ 2, at most 0 or 1 slot unless `--slots` says)
/// that explain `rows`, as (slots, T, K).
fn video_explanations(rows: usize, slots: Option<usize>) -> Vec<(usize, usize, usize)> {
    let counts = slots.map_or(0..=1, |s| s..=s);
    let mut out = Vec::new();
    for s in counts {
        let Some(n) = rows.checked_sub(s) else {
            continue;
        };
        for t in 2..=64.min(n) {
            if n % t == 0 {
                if let Some(k) = integer_sqrt(n / t).filter(|&k| k >= 2) {
                    out.push((s, t, k));
                }
            }
        }
    }
    out
}

/// Square grids (side ≥ 2) that explain `rows` with 0..=MAX_SLOTS leading slots.
fn square_explanations(rows: usize) -> Vec<(usize, (usize, usize))> {
    (0..=MAX_SLOTS.min(rows))
        .filter_map(|s| {
            integer_sqrt(rows - s)
                .filter(|&k| k >= 2)
                .map(|k| (s, (k, k)))
        })
        .collect()
}

/// Every grid (both sides ≥ 2) that explains `rows` with 0..=MAX_SLOTS leading slots.
fn all_explanations(rows: usize) -> Vec<(usize, (usize, usize))> {
    let mut out = Vec::new();
    for s in 0..=MAX_SLOTS.min(rows) {
        let n = rows - s;
        // Divisors in pairs up to the square root: time grows with √rows, not rows.
        let mut pairs = Vec::new();
        let mut h = 2;
        while h * h <= n {
            if n % h == 0 {
                pairs.push((h, n / h));
                if h != n / h {
                    pairs.push((n / h, h));
                }
            }
            h += 1;
        }
        pairs.sort_unstable();
        out.extend(pairs.into_iter().map(|g| (s, g)));
    }
    out
}

/// Patch-projection kernels `[D, C, p, p]` or `[p, p, C, D]` as (entry, D, p); tensors named
/// like position tables are not kernels, nor is a kernel of empty patches (it would make every
/// image a grid of zero-pixel patches).
fn patch_kernels(entries: &[TensorEntry]) -> Vec<(&TensorEntry, usize, usize)> {
    entries
        .iter()
        .filter(|e| values::is_float(e.dtype) && !is_position_name(&e.name))
        .filter_map(|e| match e.shape.as_slice() {
            [d, c, p, q] if p == q && *p > 0 && *c <= 64 => Some((e, *d, *p)),
            [p, q, c, d] if p == q && *p > 0 && *c <= 64 => Some((e, *d, *p)),
            _ => None,
        })
        .collect()
}

/// Patch size from the patch-projection kernel: `[D, C, p, p]` (channels-first) or
/// `[p, p, C, D]` (channels-last), whose output width D matches the table's.
/// How much a kernel's name says "patch projection" (common names in released checkpoints).
fn name_score(name: &str) -> usize {
    let n = normalized(name);
    ["patchemb", "patchify", "conv1", "stem", "embedding", "proj"]
        .iter()
        .filter(|k| n.contains(*k))
        .count()
}

/// The model's patch size and where it came from, for kinds without an embedding width to
/// match a kernel by: `--patch`, else the best-named patch-projection kernel (2-D or the
/// spatial sides of a 5-D tubelet kernel), when no equally named kernel disagrees.
pub(crate) fn model_patch(entries: &[TensorEntry], hints: &Hints) -> Option<(usize, String)> {
    if let Some(p) = hints.patch {
        return Some((p, "--patch".into()));
    }
    let mut kernels: Vec<(&TensorEntry, usize)> = patch_kernels(entries)
        .into_iter()
        .map(|(e, _, p)| (e, p))
        .chain(
            tubelet_kernels(entries)
                .into_iter()
                .map(|k| (k.entry, k.patch)),
        )
        .collect();
    kernels.sort_by_key(|(e, _)| std::cmp::Reverse(name_score(&e.name)));
    let (best, p) = kernels.first()?;
    let rival = kernels
        .iter()
        .any(|(e, q)| q != p && name_score(&e.name) == name_score(&best.name));
    (!rival).then(|| (*p, best.name.clone()))
}

/// A 5-D video patch kernel `[D, C, t, p, p]`: its width and spatial patch size.
pub(crate) struct Tubelet<'a> {
    pub entry: &'a TensorEntry,
    pub dim: usize,
    /// Input frames per tubelet (t).
    pub frames: usize,
    pub patch: usize,
}

/// Video patch-projection kernels `[D, C, t, p, p]` (channels-first 3-D convolutions).
pub(crate) fn tubelet_kernels(entries: &[TensorEntry]) -> Vec<Tubelet<'_>> {
    entries
        .iter()
        .filter(|e| values::is_float(e.dtype) && !is_position_name(&e.name))
        .filter_map(|e| match e.shape.as_slice() {
            [d, c, t, p, q] if p == q && *p > 0 && *c <= 64 && *t >= 1 => Some(Tubelet {
                entry: e,
                dim: *d,
                frames: *t,
                patch: *p,
            }),
            _ => None,
        })
        .collect()
}

fn infer_patches(entries: &[TensorEntry], found: &mut Discovery, hints: &Hints) {
    let kernels: Vec<(&TensorEntry, usize, usize)> = patch_kernels(entries)
        .into_iter()
        .chain(
            tubelet_kernels(entries)
                .into_iter()
                .map(|k| (k.entry, k.dim, k.patch)),
        )
        .collect();
    for table in &mut found.tables {
        if let Some(p) = hints.patch {
            table.patch = Some(p);
            table.patch_source = Some("--patch".into());
            continue;
        }
        let mut matching: Vec<&(&TensorEntry, usize, usize)> =
            kernels.iter().filter(|(_, d, _)| *d == table.dim).collect();
        matching.sort_by_key(|(e, _, _)| {
            std::cmp::Reverse((common_prefix_len(&e.name, &table.name), name_score(&e.name)))
        });
        if let Some((best, _, p)) = matching.first() {
            let best_key = (
                common_prefix_len(&best.name, &table.name),
                name_score(&best.name),
            );
            let rival = matching.iter().skip(1).find(|(e, _, q)| {
                q != p && (common_prefix_len(&e.name, &table.name), name_score(&e.name)) == best_key
            });
            if let Some((other, _, q)) = rival {
                found.warnings.push(format!(
                    "{}: patch size unclear ({} says {p}, {} says {q}); pass --patch P",
                    table.name, best.name, other.name
                ));
            } else {
                table.patch = Some(*p);
                table.patch_source = Some(best.name.clone());
            }
        }
    }
    // A table without its own kernel (a decoder table) shares the patch of a table on the
    // same grid: the same image split into the same patches.
    let known: Vec<([usize; 2], usize, String)> = found
        .tables
        .iter()
        .filter_map(|t| t.patch.map(|p| (t.grid, p, t.name.clone())))
        .collect();
    for table in found.tables.iter_mut().filter(|t| t.patch.is_none()) {
        if let Some((_, p, from)) = known.iter().find(|(g, _, _)| *g == table.grid) {
            table.patch = Some(*p);
            table.patch_source = Some(format!("same grid as {from}"));
        }
    }
}

/// Integer position-id buffers next to a table: `[1, N]` or `[N]` holding 0..N-1, named like
/// position ids, in a module that contains the table.
fn find_companions(source: &dyn TensorSource, found: &mut Discovery) -> Result<()> {
    for entry in source.entries() {
        if !values::is_integer(entry.dtype) || !is_position_id_name(&entry.name) {
            continue;
        }
        let n = match entry.shape.as_slice() {
            [1, n] | [n] => *n,
            _ => continue,
        };
        let home = parent(&entry.name);
        let owners: Vec<usize> = found
            .tables
            .iter()
            .enumerate()
            .filter(|(_, t)| t.slots + t.grid[0] * t.grid[1] == n && t.name.starts_with(home))
            .map(|(i, _)| i)
            .collect();
        if owners.is_empty() {
            continue;
        }
        let ids = values::decode_ints(entry.dtype, &source.bytes(entry)?)
            .map_err(|e| values::value_error(source.source_path(), &entry.name, e))?;
        if !ids.iter().enumerate().all(|(i, v)| *v == i as i64) {
            found.warnings.push(format!(
                "{}: looks like a position-id buffer but does not hold 0..{}; left unchanged",
                entry.name,
                n - 1
            ));
            continue;
        }
        // The closest module wins when several tables share the prefix.
        let best = owners
            .iter()
            .copied()
            .max_by_key(|&i| common_prefix_len(&found.tables[i].name, &entry.name))
            .expect("non-empty");
        found.tables[best].companions.push(entry.name.clone());
    }
    Ok(())
}

/// Mark tables that repeat another under a different leading prefix (EMA or averaged copies).
fn mark_copies(tables: &mut [Table]) {
    let keys: Vec<(String, Vec<usize>)> = tables
        .iter()
        .map(|t| {
            (
                without_first_component(&t.name).to_string(),
                t.shape.clone(),
            )
        })
        .collect();
    for i in 0..tables.len() {
        // The copy is the one with the longer name (the extra prefix); between equal lengths,
        // the later one in the file.
        let original = (0..tables.len()).find(|&j| {
            let (ni, nj) = (tables[i].name.len(), tables[j].name.len());
            j != i
                && (nj < ni || (nj == ni && j < i))
                && keys[j].1 == keys[i].1
                && (keys[j].0 == keys[i].0
                    || tables[j].name == keys[i].0
                    || keys[j].0 == tables[i].name)
        });
        if let Some(j) = original {
            tables[i].copy_of = Some(tables[j].name.clone());
        }
    }
}
