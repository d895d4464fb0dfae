//! Discovery: from a checkpoint's tensor list (and the values of a few candidates) to the
//! position tables that sit on a 2-D patch grid, with their class slots, grid, patch size,
//! kind and companion tensors. Nothing here writes; ambiguity is reported, never guessed away.

use serde::Serialize;

use crate::checkpoint::{Dtype, TensorEntry, TensorSource};
use crate::error::Result;
use crate::sincos::{self, FirstAxis};
use crate::values;

/// Candidate tables larger than this are not read for the sine-cosine check (bounded memory).
pub const MAX_VALUE_READ: u64 = 256 << 20;

/// The most leading class-like slots a table may have.
pub const MAX_SLOTS: usize = 8;

/// What the user told discovery; each `None` means "infer it".
#[derive(Debug, Clone, Default)]
pub struct Hints {
    /// The source grid (rows, columns), for tables whose grid cannot be inferred.
    pub source_grid: Option<(usize, usize)>,
    /// The number of leading class slots.
    pub slots: Option<usize>,
    /// The patch size in pixels.
    pub patch: Option<usize>,
    /// Consider these tensors position tables whatever their names.
    pub tensors: Vec<String>,
}

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
}

/// Whether the table was learned or follows the fixed sine-cosine construction.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Kind {
    Learned,
    Sincos,
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
    /// Integer position-id buffers that must change with the table.
    pub companions: Vec<String>,
    /// Another table this one duplicates under a different prefix (EMA or averaged copies).
    pub copy_of: Option<String>,
    /// How the slots and grid were decided, when it was not the only explanation.
    pub notes: Vec<String>,
}

/// A tensor that looked like a position table by name but was not taken, with the reason.
#[derive(Debug, Clone, Serialize)]
pub struct Skipped {
    pub name: String,
    pub reason: String,
}

/// A table whose class slots or grid have more than one explanation.
#[derive(Debug, Clone, Serialize)]
pub struct Ambiguous {
    pub name: String,
    pub rows: usize,
    /// Each explanation as (slots, [rows, columns]).
    pub candidates: Vec<(usize, [usize; 2])>,
    /// What to pass to settle it.
    pub resolve_with: String,
}

/// Everything discovery found.
#[derive(Debug, Clone, Serialize, Default)]
pub struct Discovery {
    pub tables: Vec<Table>,
    pub ambiguous: Vec<Ambiguous>,
    pub skipped: Vec<Skipped>,
    pub warnings: Vec<String>,
}

impl Discovery {
    /// The table with this name.
    pub fn table(&self, name: &str) -> Option<&Table> {
        self.tables.iter().find(|t| t.name == name)
    }
}

fn serialize_dtype<S: serde::Serializer>(d: &Dtype, s: S) -> std::result::Result<S::Ok, S::Error> {
    s.collect_str(d)
}

/// Lower-case letters and digits only, so `pos_embed`, `posEmbed` and `pos-embed` compare equal.
fn normalized(name: &str) -> String {
    name.chars()
        .filter(|c| c.is_ascii_alphanumeric())
        .map(|c| c.to_ascii_lowercase())
        .collect()
}

/// Names of position tables in released checkpoints (common practice): `pos_embed`,
/// `position_embedding(s)`, `positional_embedding`, `posembed_input`, `pos_embedding`.
fn is_position_name(name: &str) -> bool {
    let n = normalized(name);
    ["posemb", "positionemb", "positionalemb"]
        .iter()
        .any(|k| n.contains(k))
}

fn is_position_id_name(name: &str) -> bool {
    let n = normalized(name);
    n.contains("positionids") || n.contains("posids") || n.contains("positionid")
}

/// The module path a tensor sits in: everything before its last `.` or `/`.
fn parent(name: &str) -> &str {
    name.rfind(['.', '/']).map_or("", |i| &name[..i])
}

/// Name with its first path component removed (`model_ema.pos_embed` → `pos_embed`).
fn without_first_component(name: &str) -> &str {
    name.find(['.', '/']).map_or(name, |i| &name[i + 1..])
}

fn common_prefix_len(a: &str, b: &str) -> usize {
    a.bytes().zip(b.bytes()).take_while(|(x, y)| x == y).count()
}

fn integer_sqrt(n: usize) -> Option<usize> {
    let r = (n as f64).sqrt().round() as usize;
    (r * r == n).then_some(r)
}

/// Tolerance for recognising the sine-cosine construction: 1e-4, plus the rounding step of
/// the storage dtype near 1.0 (half an ulp of F16/BF16).
fn sincos_tolerance(dtype: Dtype) -> f64 {
    1e-4 + match dtype {
        Dtype::F16 => 2f64.powi(-11),
        Dtype::BF16 => 2f64.powi(-8),
        _ => 0.0,
    }
}

/// Find every position table in `source`.
pub fn discover(source: &dyn TensorSource, hints: &Hints) -> Result<Discovery> {
    let entries = source.entries();
    let mut found = Discovery::default();
    for name in &hints.tensors {
        if !entries.iter().any(|t| &t.name == name) {
            found.warnings.push(format!(
                "--tensor {name}: no tensor of that name in the file"
            ));
        }
    }
    for entry in entries {
        let forced = hints.tensors.iter().any(|n| n == &entry.name);
        if !forced && !is_position_name(&entry.name) {
            continue;
        }
        match examine(source, entry, hints, forced)? {
            Verdict::Table(t) => found.tables.push(*t),
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
    infer_patches(entries, &mut found, hints);
    find_companions(source, &mut found)?;
    mark_copies(&mut found.tables);
    for a in &found.ambiguous {
        let options: Vec<String> = a
            .candidates
            .iter()
            .map(|(s, [h, w])| format!("{s} slot(s) + {h}x{w}"))
            .collect();
        found.warnings.push(format!(
            "{}: {} rows fit {}; pass {} to choose",
            a.name,
            a.rows,
            options.join(" or "),
            a.resolve_with
        ));
    }
    Ok(found)
}

enum Verdict {
    Table(Box<Table>),
    Ambiguous(Ambiguous),
    Skip(String),
    Ignore,
}

fn examine(
    source: &dyn TensorSource,
    entry: &TensorEntry,
    hints: &Hints,
    forced: bool,
) -> Result<Verdict> {
    let (layout, rows, dim, grid_from_shape) = match entry.shape.as_slice() {
        [1, n, d] => (Layout::BatchRows, *n, *d, None),
        [n, d] => (Layout::Rows, *n, *d, None),
        [1, h, w, d] if *h >= 2 && *w >= 2 => (Layout::Grid, h * w, *d, Some((*h, *w))),
        other => {
            // Biases, scalars, conv kernels named like tables are not tables; say so only when
            // the user asked for this tensor or it is plausibly a table.
            return Ok(if forced || other.len() >= 2 {
                Verdict::Skip(format!(
                    "shape {other:?} is not [1, N, D], [N, D] or [1, H, W, D]"
                ))
            } else {
                Verdict::Ignore
            });
        }
    };
    if values::is_integer(entry.dtype) || entry.dtype == Dtype::BOOL {
        return Ok(Verdict::Skip(format!(
            "dtype {} holds integers; a position table holds floats",
            entry.dtype
        )));
    }
    if !values::is_float(entry.dtype) {
        return Ok(Verdict::Skip(format!(
            "dtype {} is not one posgrid resamples (F16, BF16, F32, F64)",
            entry.dtype
        )));
    }
    if dim == 0 || rows == 0 {
        return Ok(Verdict::Skip("the table is empty".into()));
    }

    let mut notes = Vec::new();
    let candidates: Vec<(usize, (usize, usize))> = if let Some(g) = grid_from_shape {
        if let Some(s) = hints.slots.filter(|&s| s != 0) {
            notes.push(format!(
                "--slots {s} ignored: a grid-shaped table has no class slots"
            ));
        }
        vec![(0, g)]
    } else if let Some((h, w)) = hints.source_grid {
        match rows.checked_sub(h * w) {
            Some(s) if s <= MAX_SLOTS && hints.slots.is_none_or(|hs| hs == s) => vec![(s, (h, w))],
            _ => {
                return Ok(Verdict::Skip(format!(
                    "{rows} rows do not fit --source-grid {h}x{w}{}",
                    hints
                        .slots
                        .map(|s| format!(" with --slots {s}"))
                        .unwrap_or_default()
                )))
            }
        }
    } else if let Some(s) = hints.slots {
        match rows.checked_sub(s).and_then(integer_sqrt) {
            Some(k) if k >= 2 => vec![(s, (k, k))],
            _ => {
                return Ok(Verdict::Skip(format!(
                    "{rows} rows with --slots {s} leave no square grid; pass --source-grid HxW"
                )))
            }
        }
    } else {
        square_explanations(rows)
    };

    // The values settle the sine-cosine kind, and can settle an ambiguous or non-square grid.
    // A table too large to hold in memory comfortably is not read: its kind stays learned.
    let readable = entry.byte_len() <= MAX_VALUE_READ;
    if !readable {
        notes.push(format!(
            "values not read (over {} MiB): the sine-cosine check was skipped",
            MAX_VALUE_READ >> 20
        ));
    }
    let table_values = || -> Result<Vec<f64>> {
        if !readable {
            return Ok(Vec::new());
        }
        let bytes = source.bytes(entry)?;
        values::decode_f64(entry.dtype, &bytes)
            .map_err(|e| values::value_error(source.source_path(), &entry.name, e))
    };
    let tol = sincos_tolerance(entry.dtype);
    let mut loaded: Option<Vec<f64>> = None;
    let sincos_fit = |v: &[f64], s: usize, (h, w): (usize, usize)| -> Option<FirstAxis> {
        sincos::matches(v.get(s * dim..)?, h, w, dim, tol)
    };

    let (slots, grid) = match candidates.len() {
        1 => candidates[0],
        0 => {
            // No square grid: only a sine-cosine table can tell a non-square one.
            let v = loaded.insert(table_values()?);
            let fits: Vec<_> = all_explanations(rows)
                .into_iter()
                .filter(|&(s, g)| sincos_fit(v, s, g).is_some())
                .collect();
            if fits.len() == 1 {
                notes.push(format!(
                    "grid {}x{} read from the sine-cosine values (no square grid fits {rows} rows)",
                    fits[0].1 .0, fits[0].1 .1
                ));
                fits[0]
            } else {
                return Ok(Verdict::Skip(format!(
                    "{rows} rows have no square-grid explanation with 0-{MAX_SLOTS} class slots (a 1-D sequence table?); pass --source-grid HxW if it is a grid"
                )));
            }
        }
        _ => {
            let v = loaded.insert(table_values()?);
            let fits: Vec<_> = candidates
                .iter()
                .copied()
                .filter(|&(s, g)| sincos_fit(v, s, g).is_some())
                .collect();
            if fits.len() == 1 {
                notes.push("slots and grid read from the sine-cosine values".into());
                fits[0]
            } else if let Some(&c) = candidates.iter().find(|(s, _)| *s <= 2) {
                // 0, 1 or 2 slots is what released models use (common practice); a larger
                // count that also fits is named so the user can override.
                let others: Vec<String> = candidates
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
                c
            } else {
                return Ok(Verdict::Ambiguous(Ambiguous {
                    name: entry.name.clone(),
                    rows,
                    candidates: candidates.iter().map(|&(s, (h, w))| (s, [h, w])).collect(),
                    resolve_with: "--slots N or --source-grid HxW".into(),
                }));
            }
        }
    };

    let v = match loaded {
        Some(v) => v,
        None => table_values()?,
    };
    let first_axis = sincos_fit(&v, slots, grid);
    let kind = if first_axis.is_some() {
        Kind::Sincos
    } else {
        Kind::Learned
    };
    if kind == Kind::Sincos && slots > 0 {
        let class_zero = v[..slots * dim].iter().all(|x| *x == 0.0);
        notes.push(if class_zero {
            "class rows are zero".to_string()
        } else {
            "class rows are not part of the sine-cosine construction".to_string()
        });
    }

    Ok(Verdict::Table(Box::new(Table {
        name: entry.name.clone(),
        dtype: entry.dtype,
        shape: entry.shape.clone(),
        layout,
        slots,
        grid: [grid.0, grid.1],
        dim,
        patch: None,
        patch_source: None,
        kind,
        sincos_first_axis: first_axis,
        companions: Vec::new(),
        copy_of: None,
        notes,
    })))
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
        for h in 2..=n / 2 {
            if n % h == 0 && n / h >= 2 {
                out.push((s, (h, n / h)));
            }
        }
    }
    out
}

/// Patch size from the patch-projection kernel: `[D, C, p, p]` (channels-first) or
/// `[p, p, C, D]` (channels-last), whose output width D matches the table's.
fn infer_patches(entries: &[TensorEntry], found: &mut Discovery, hints: &Hints) {
    let kernels: Vec<(&TensorEntry, usize, usize)> = entries
        .iter()
        .filter(|e| values::is_float(e.dtype))
        .filter_map(|e| match e.shape.as_slice() {
            [d, c, p, q] if p == q && *c <= 64 => Some((e, *d, *p)),
            [p, q, c, d] if p == q && *c <= 64 => Some((e, *d, *p)),
            _ => None,
        })
        .collect();
    let name_score = |n: &str| {
        let n = normalized(n);
        ["patchemb", "patchify", "conv1", "stem", "embedding", "proj"]
            .iter()
            .filter(|k| n.contains(*k))
            .count()
    };
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
