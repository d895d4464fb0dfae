//! The `map` job: read one table (or the same table before and after), compute its similarity
//! maps and fidelity, and write the figure as a PNG, atomically.

use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::checkpoint::{Source, TensorSource};
use crate::error::{Error, Result};
use crate::kinds::{self, Hints, Table};
use crate::render::{self, Figure, Panel};
use crate::similarity::{self, Budget, Fidelity, Grid, MapSet, MapsError, Profile};
use crate::values;
use crate::write::{self, AtomicFile};

/// A table's grid rows as f32 in row order, without the class slots: owned when read from a
/// file, borrowed from a resize (no copy of an input-sized buffer).
pub struct GridRows<'a> {
    pub table: Table,
    pub rows: std::borrow::Cow<'a, [f32]>,
}

impl<'a> GridRows<'a> {
    /// Rows held elsewhere, with their table.
    pub fn borrowed(table: &Table, rows: &'a [f32]) -> Self {
        GridRows {
            table: table.clone(),
            rows: rows.into(),
        }
    }

    pub fn grid(&self) -> Grid<'_> {
        Grid {
            rows: &self.rows,
            h: self.table.grid[0],
            w: self.table.grid[1],
            d: self.table.dim,
        }
    }
}

/// Find the table to draw: the one named in `hints.tensors`, or the only one in the file. Its
/// bytes and decoded rows must fit `memory_limit`.
pub fn load_table(
    ckpt: &dyn TensorSource,
    hints: &Hints,
    name: Option<&str>,
    memory_limit: u64,
) -> Result<GridRows<'static>> {
    let found = kinds::discover(ckpt, hints)?;
    let table = match name.or(hints.tensors.first().map(String::as_str)) {
        Some(n) => found.table(n).cloned().ok_or_else(|| {
            Error::table(
                ckpt.source_path(),
                format!("no position table named \"{n}\" (see `posgrid scan`)"),
            )
        })?,
        None => match found.tables.as_slice() {
            [one] => one.clone(),
            [] => {
                return Err(Error::table(
                    ckpt.source_path(),
                    "no position table on a 2-D patch grid found",
                ))
            }
            many => {
                let names: Vec<&str> = many.iter().map(|t| t.name.as_str()).collect();
                return Err(Error::table(
                    ckpt.source_path(),
                    format!(
                        "several position tables ({}); choose one with --tensor NAME",
                        names.join(", ")
                    ),
                ));
            }
        },
    };
    let entry = ckpt.find(&table.name).expect("discovered tables exist");
    // The bytes and their f32 decoding (two decodings for a channels-first transpose).
    let copies = if table.layout == kinds::Layout::GridChannelsFirst {
        2
    } else {
        1
    };
    let needed = entry
        .byte_len()
        .saturating_add(table_f32_bytes(&table).saturating_mul(copies));
    if needed > memory_limit {
        return Err(Error::refused(
            ckpt.source_path(),
            format!(
                "reading \"{}\" needs about {} MiB, over the {} MiB guard; raise it with --memory-limit",
                table.name,
                needed >> 20,
                memory_limit >> 20
            ),
        ));
    }
    let bytes = ckpt.bytes(entry)?;
    let elem = entry.dtype.bitsize() / 8;
    let rows = values::decode_f32(entry.dtype, &bytes[table.slots * table.dim * elem..])
        .map_err(|e| values::value_error(ckpt.source_path(), &table.name, e))?;
    drop(bytes);
    let rows = table
        .to_row_order(rows)
        .map_err(|e| values::out_of_memory(ckpt.source_path(), &table.name, e))?;
    Ok(GridRows {
        table,
        rows: rows.into(),
    })
}

/// Bytes of a table's grid rows as f32.
fn table_f32_bytes(t: &Table) -> u64 {
    (t.grid[0] as u64 * t.grid[1] as u64)
        .saturating_mul(t.dim as u64)
        .saturating_mul(4)
}

/// A maps failure as a run error naming `path`.
pub(crate) fn maps_error(path: &Path, table: &str, e: MapsError) -> Error {
    match e {
        MapsError::OutOfMemory(m) => {
            values::out_of_memory(path, &format!("similarity maps of \"{table}\""), m)
        }
        over => Error::refused(path, format!("\"{table}\": {over}")),
    }
}

/// What `map` reports.
#[derive(Debug, Clone, Serialize)]
pub struct MapReport {
    pub file: PathBuf,
    pub after_file: Option<PathBuf>,
    pub tensor: String,
    pub dtype: String,
    pub grid: [usize; 2],
    pub after_grid: Option<[usize; 2]>,
    pub refs: [usize; 2],
    pub fidelity: Option<Fidelity>,
    pub profile: Profile,
    pub after_profile: Option<Profile>,
    pub output: PathBuf,
    pub width: usize,
    pub height: usize,
    /// How the maps were made when not as asked (fewer references, undefined similarity).
    pub warnings: Vec<String>,
}

/// A drawn figure: the PNG bytes, the maps behind it, and the image size.
pub struct Drawn {
    pub png: Vec<u8>,
    pub before: MapSet,
    pub after: Option<(MapSet, Fidelity)>,
    pub width: usize,
    pub height: usize,
    /// Fewer references than asked for, or an undefined fidelity.
    pub notes: Vec<String>,
}

/// Draw `before` (and `after`, if given) within the memory and time `budget`. `path` is the
/// file errors name.
pub fn figure(
    path: &Path,
    before: &GridRows,
    after: Option<&GridRows>,
    refs: usize,
    budget: Budget,
) -> Result<Drawn> {
    let t = &before.table;
    let caption = Caption {
        name: &t.name,
        dtype: &t.dtype.to_string(),
    };
    let grids = (before.grid(), after.map(GridRows::grid));
    figure_of_grids(path, &caption, grids, refs, budget)
}

/// What a figure's title names: the table and its dtype.
pub struct Caption<'a> {
    pub name: &'a str,
    pub dtype: &'a str,
}

/// Draw the grid `before` (and `after`, if given) within the memory and time `budget`: the
/// figure of [`figure`], for rows that come from no file (`path` is the file errors name).
pub fn figure_of_grids(
    path: &Path,
    caption: &Caption,
    (before, after): (Grid, Option<Grid>),
    refs: usize,
    budget: Budget,
) -> Result<Drawn> {
    let name = caption.name;
    let sets =
        similarity::map_sets(before, after, refs, budget).map_err(|e| maps_error(path, name, e))?;
    let b = sets.before;
    let a = sets.after;
    let mut notes: Vec<String> = sets
        .note
        .map(|n| format!("\"{name}\": maps drawn at {n}"))
        .into_iter()
        .collect();
    notes.extend(a.as_ref().and_then(|(_, f)| f.note(name)));
    let title = match after {
        Some(g) => format!(
            "{name}  |  {}x{} -> {}x{}  |  {}",
            before.h, before.w, g.h, g.w, caption.dtype
        ),
        None => format!("{name}  |  {}x{}  |  {}", before.h, before.w, caption.dtype),
    };
    let mut subtitle = format!(
        "cosine similarity of {}x{} reference positions (outlined) to every position",
        b.ref_rows.len(),
        b.ref_cols.len()
    );
    if let Some((_, f)) = &a {
        subtitle.push_str(&format!("  |  {}", fidelity_text(f)));
    }
    let prefix = if after.is_some() { "before: " } else { "" };
    let mut panels = vec![Panel {
        label: format!("{prefix}{}x{} grid", before.h, before.w),
        set: &b,
    }];
    if let (Some((set, _)), Some(g)) = (&a, after) {
        panels.push(Panel {
            label: format!("after: {}x{} grid", g.h, g.w),
            set,
        });
    }
    let canvas = render::draw(&Figure {
        title,
        subtitle,
        panels,
    });
    Ok(Drawn {
        png: canvas.png(),
        before: b,
        after: a,
        width: canvas.width,
        height: canvas.height,
        notes,
    })
}

/// "fidelity 0.987, lowest 0.950 at row 3, column 7", or "fidelity undefined".
pub fn fidelity_text(f: &Fidelity) -> String {
    match (f.score, f.min, f.worst) {
        (Some(score), Some(min), Some([r, c])) => {
            format!("fidelity {score:.3}, lowest {min:.3} at row {r}, column {c}")
        }
        _ => "fidelity undefined (zero rows: cosine similarity is undefined)".to_string(),
    }
}

/// Write bytes to `path` atomically (temporary file, sync, rename), replacing an existing
/// file only with `force`, with permission bits no wider than `input`'s.
pub fn write_png(path: &Path, png: &[u8], force: bool, input: &Path) -> Result<()> {
    write::check_destination(input, path, force)?;
    let mut out = AtomicFile::create_with(path, &write::OutputRules::like(input, true, force))?;
    out.write(png, &mut write::Silent)?;
    out.commit()
}

/// Write a figure made from no input file to `path` atomically, replacing an existing file
/// only with `force` (permission bits: read and write, less the umask).
pub fn write_png_alone(path: &Path, png: &[u8], force: bool) -> Result<()> {
    write::check_output(path, force)?;
    let rules = write::OutputRules {
        sync: true,
        replace: force,
        mode_limit: 0o666,
    };
    let mut out = AtomicFile::create_with(path, &rules)?;
    out.write(png, &mut write::Silent)?;
    out.commit()
}

/// A figure may not land among the files of an input set.
fn refuse_inside_set(source: &Source, output: &Path) -> Result<()> {
    match source.downcast::<crate::checkpoint::sharded::ShardedSet>() {
        Some(set) => write::outside_set(output, set.dir()),
        None => Ok(()),
    }
}

/// The whole `map` command as a library call. `memory_limit` bounds the tables read, the maps
/// and the score together.
pub fn run(
    before_path: &Path,
    after_path: Option<&Path>,
    hints: &Hints,
    refs: usize,
    output: &Path,
    force: bool,
    memory_limit: u64,
) -> Result<MapReport> {
    // The figure's path is checked before any work, against both inputs.
    for input in std::iter::once(before_path).chain(after_path) {
        write::check_destination(input, output, force)?;
    }
    let ckpt = Source::open(before_path)?;
    refuse_inside_set(&ckpt, output)?;
    let before = load_table(&ckpt, hints, None, memory_limit)?;
    let left = memory_limit.saturating_sub(table_f32_bytes(&before.table));
    let after = match after_path {
        Some(p) => {
            let ck = Source::open(p)?;
            refuse_inside_set(&ck, output)?;
            // The same table by name; its grid comes from the file, not from the hints.
            let after_hints = Hints {
                tensors: vec![before.table.name.clone()],
                channels: hints.channels,
                ..Hints::default()
            };
            let a = load_table(&ck, &after_hints, Some(&before.table.name), left)?;
            if a.table.dim != before.table.dim {
                return Err(Error::table(
                    p,
                    format!(
                        "\"{}\" has width {} here but {} in {}; the maps of tables of different widths cannot be compared",
                        before.table.name,
                        a.table.dim,
                        before.table.dim,
                        before_path.display()
                    ),
                ));
            }
            Some(a)
        }
        None => None,
    };
    let left = left.saturating_sub(after.as_ref().map_or(0, |a| table_f32_bytes(&a.table)));
    let Drawn {
        png,
        before: b,
        after: a,
        width,
        height,
        notes,
    } = figure(
        before_path,
        &before,
        after.as_ref(),
        refs,
        Budget::memory(left),
    )?;
    write_png(output, &png, force, before_path)?;
    Ok(MapReport {
        file: before_path.to_path_buf(),
        after_file: after_path.map(Path::to_path_buf),
        tensor: before.table.name.clone(),
        dtype: before.table.dtype.to_string(),
        grid: before.table.grid,
        after_grid: after.as_ref().map(|a| a.table.grid),
        refs: [b.ref_rows.len(), b.ref_cols.len()],
        fidelity: a.as_ref().map(|(_, f)| f.clone()),
        profile: b.profile.clone(),
        after_profile: a.map(|(s, _)| s.profile),
        output: output.to_path_buf(),
        width,
        height,
        warnings: notes,
    })
}
