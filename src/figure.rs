//! The `map` job: read one table (or the same table before and after), compute its similarity
//! maps and fidelity, and write the figure as a PNG, atomically.

use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::checkpoint::{Source, TensorSource};
use crate::discover::{self, Hints, Table};
use crate::error::{Error, Result};
use crate::render::{self, Figure, Panel};
use crate::similarity::{self, Fidelity, Grid, MapSet, Profile};
use crate::values;
use crate::write::{self, AtomicFile};

/// A table's grid rows as f32, without the class slots.
pub struct GridRows {
    pub table: Table,
    pub rows: Vec<f32>,
}

impl GridRows {
    pub fn grid(&self) -> Grid<'_> {
        Grid {
            rows: &self.rows,
            h: self.table.grid[0],
            w: self.table.grid[1],
            d: self.table.dim,
        }
    }
}

/// Find the table to draw: the one named in `hints.tensors`, or the only one in the file.
pub fn load_table(ckpt: &dyn TensorSource, hints: &Hints, name: Option<&str>) -> Result<GridRows> {
    let found = discover::discover(ckpt, hints)?;
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
    let bytes = ckpt.bytes(entry)?;
    let elem = entry.dtype.bitsize() / 8;
    let rows = values::decode_f32(entry.dtype, &bytes[table.slots * table.dim * elem..])
        .expect("float table");
    Ok(GridRows { table, rows })
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
}

/// A drawn figure: the PNG bytes, the maps behind it, and the image size.
pub struct Drawn {
    pub png: Vec<u8>,
    pub before: MapSet,
    pub after: Option<(MapSet, Fidelity)>,
    pub width: usize,
    pub height: usize,
}

/// Draw `before` (and `after`, if given).
pub fn figure(before: &GridRows, after: Option<&GridRows>, refs: usize) -> Drawn {
    let b = MapSet::spread(before.grid(), refs);
    let a = after.map(|a| {
        let set = b.matching(a.grid());
        let fid = similarity::fidelity(&b, &set);
        (set, fid)
    });
    let t = &before.table;
    let title = match after {
        Some(a) => format!(
            "{}  |  {}x{} -> {}x{}  |  {}",
            t.name, t.grid[0], t.grid[1], a.table.grid[0], a.table.grid[1], t.dtype
        ),
        None => format!("{}  |  {}x{}  |  {}", t.name, t.grid[0], t.grid[1], t.dtype),
    };
    let mut subtitle = format!(
        "cosine similarity of {}x{} reference positions (outlined) to every position",
        b.ref_rows.len(),
        b.ref_cols.len()
    );
    if let Some((_, f)) = &a {
        subtitle.push_str(&format!(
            "  |  fidelity {:.3}, lowest {:.3} at row {}, column {}",
            f.score, f.min, f.worst[0], f.worst[1]
        ));
    }
    let prefix = if after.is_some() { "before: " } else { "" };
    let mut panels = vec![Panel {
        label: format!("{prefix}{}x{} grid", t.grid[0], t.grid[1]),
        set: &b,
    }];
    if let (Some((set, _)), Some(after)) = (&a, after) {
        panels.push(Panel {
            label: format!(
                "after: {}x{} grid",
                after.table.grid[0], after.table.grid[1]
            ),
            set,
        });
    }
    let canvas = render::draw(&Figure {
        title,
        subtitle,
        panels,
    });
    Drawn {
        png: canvas.png(),
        before: b,
        after: a,
        width: canvas.width,
        height: canvas.height,
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

/// The whole `map` command as a library call.
pub fn run(
    before_path: &Path,
    after_path: Option<&Path>,
    hints: &Hints,
    refs: usize,
    output: &Path,
    force: bool,
) -> Result<MapReport> {
    // The figure's path is checked before any work, against both inputs.
    for input in std::iter::once(before_path).chain(after_path) {
        write::check_destination(input, output, force)?;
    }
    let ckpt = Source::open(before_path)?;
    let before = load_table(&ckpt, hints, None)?;
    let after = match after_path {
        Some(p) => {
            let ck = Source::open(p)?;
            // The same table by name; its grid comes from the file, not from the hints.
            let after_hints = Hints {
                tensors: vec![before.table.name.clone()],
                ..Hints::default()
            };
            Some(load_table(&ck, &after_hints, Some(&before.table.name))?)
        }
        None => None,
    };
    if let Some(a) = &after {
        if a.table.dim != before.table.dim {
            return Err(Error::Usage(format!(
                "\"{}\" has width {} before and {} after; the maps cannot be compared",
                before.table.name, before.table.dim, a.table.dim
            )));
        }
    }
    let Drawn {
        png,
        before: b,
        after: a,
        width,
        height,
    } = figure(&before, after.as_ref(), refs);
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
    })
}
