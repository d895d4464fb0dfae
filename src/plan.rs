//! Planning: from the discovered tables and the user's request to the exact list of changes —
//! which tables go to which grid with which options, which companions are rewritten — checked
//! before any table data is computed or any byte is written.

use serde::Serialize;

use crate::checkpoint::TensorSource;
use crate::discover::{Discovery, Layout, Table};
use crate::error::{Error, Result};
use crate::resample::{self, Options};

/// The grid to resample to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Target {
    /// A patch grid (rows, columns).
    Grid(usize, usize),
    /// An input image size in pixels (height, width); the grid is image / patch per table.
    Image(usize, usize),
}

/// Default guard on the memory one output table may need (4 GiB).
pub const DEFAULT_MEMORY_LIMIT: u64 = 4 << 30;

/// What the user asked for.
#[derive(Debug, Clone)]
pub struct Request {
    pub target: Target,
    /// Only these tables (empty: every table discovery found).
    pub tensors: Vec<String>,
    pub options: Options,
    /// Accept tables holding NaN or infinity.
    pub allow_nonfinite: bool,
    /// Refuse a table whose output would need more bytes than this.
    pub memory_limit: u64,
    /// Build fixed sine-cosine tables anew on the target grid instead of resampling them.
    pub rebuild_sincos: bool,
}

/// One table to resample.
#[derive(Debug, Clone, Serialize)]
pub struct TableChange {
    #[serde(flatten)]
    pub table: Table,
    pub from: [usize; 2],
    pub to: [usize; 2],
    /// The new shape, in the table's own layout.
    pub new_shape: Vec<usize>,
    pub options: Options,
    /// Whether antialiasing is applied on at least one axis.
    pub antialias_applied: bool,
    /// A sine-cosine table built anew on the target grid (not resampled).
    pub rebuild: bool,
    /// Bytes the resize of this table needs (what the memory guard checked).
    #[serde(skip)]
    pub needed_bytes: u64,
}

/// One position-id buffer to rewrite as 0..N'-1.
#[derive(Debug, Clone, Serialize)]
pub struct CompanionChange {
    pub name: String,
    pub new_shape: Vec<usize>,
    pub rows: usize,
}

/// Everything that will change; the rest of the checkpoint is copied as it is.
#[derive(Debug, Clone, Serialize)]
pub struct Plan {
    pub tables: Vec<TableChange>,
    pub companions: Vec<CompanionChange>,
    /// Tables already at their target grid, left unchanged.
    pub already_at_target: Vec<String>,
}

impl Plan {
    /// True when nothing needs to change.
    pub fn is_noop(&self) -> bool {
        self.tables.is_empty()
    }

    /// The new shape of a changed tensor.
    pub fn new_shape(&self, name: &str) -> Option<&Vec<usize>> {
        self.tables
            .iter()
            .find(|t| t.table.name == name)
            .map(|t| &t.new_shape)
            .or_else(|| {
                self.companions
                    .iter()
                    .find(|c| c.name == name)
                    .map(|c| &c.new_shape)
            })
    }

    /// Keep only the changes (and tables at target) whose tensors `keep` accepts.
    pub fn retain(&mut self, keep: impl Fn(&str) -> bool) {
        self.tables.retain(|t| keep(&t.table.name));
        self.companions.retain(|c| keep(&c.name));
        self.already_at_target.retain(|n| keep(n));
    }

    /// Whether the tensor with this name is changed by the plan.
    pub fn changes(&self, name: &str) -> bool {
        self.tables.iter().any(|t| t.table.name == name)
            || self.companions.iter().any(|c| c.name == name)
    }
}

/// Decide what changes. Errors: unknown or unusable `--tensor` names, ambiguous or missing
/// tables (exit 4), an image size that the patch does not divide, a table over the memory
/// guard (refused, before anything is allocated).
pub fn build(ckpt: &dyn TensorSource, found: &Discovery, request: &Request) -> Result<Plan> {
    let path = ckpt.source_path();
    let selected: Vec<&Table> = if request.tensors.is_empty() {
        if let Some(a) = found.ambiguous.first() {
            return Err(Error::table(
                path,
                format!(
                    "table \"{}\" is ambiguous ({} rows fit several grids); pass {}, or --tensor to leave it out",
                    a.name, a.rows, a.resolve_with
                ),
            ));
        }
        if found.tables.is_empty() {
            return Err(Error::table(path, no_table_message(found)));
        }
        found.tables.iter().collect()
    } else {
        request
            .tensors
            .iter()
            .map(|name| select(ckpt, found, name))
            .collect::<Result<_>>()?
    };

    let mut plan = Plan {
        tables: Vec::new(),
        companions: Vec::new(),
        already_at_target: Vec::new(),
    };
    for table in selected {
        let to = target_grid(path, table, request.target)?;
        let from = table.grid;
        if from == to {
            plan.already_at_target.push(table.name.clone());
            continue;
        }
        resample::validate((from[0], from[1]), (to[0], to[1]), &request.options)
            .map_err(|e| Error::Usage(format!("{}: {e}", table.name)))?;
        let rows = table.slots + to[0] * to[1];
        let new_shape = match table.layout {
            Layout::BatchRows => vec![1, rows, table.dim],
            Layout::Rows => vec![rows, table.dim],
            Layout::Grid => vec![1, to[0], to[1], table.dim],
            Layout::GridChannelsFirst => vec![1, table.dim, to[0], to[1]],
        };
        let elem = table.dtype.bitsize() as u64 / 8;
        // Output bytes plus the f32/f64 working copies of source, intermediate and output.
        let work = if table.dtype == crate::checkpoint::Dtype::F64 {
            8
        } else {
            4
        };
        let cells = (rows as u64).saturating_mul(table.dim as u64);
        let source_cells = (table.slots + from[0] * from[1]) as u64 * table.dim as u64;
        // A channels-first table is transposed to rows and back: one more copy of each.
        let copies = if table.layout == Layout::GridChannelsFirst {
            1
        } else {
            0
        };
        let needed = cells
            .saturating_mul(elem + (3 + copies) * work)
            .saturating_add(source_cells.saturating_mul(elem + (1 + copies) * work));
        if needed > request.memory_limit {
            return Err(Error::refused(
                path,
                format!(
                    "resizing \"{}\" to {}x{} needs about {} MiB, over the {} MiB guard; raise it with --memory-limit",
                    table.name,
                    to[0],
                    to[1],
                    needed >> 20,
                    request.memory_limit >> 20
                ),
            ));
        }
        let rebuild = request.rebuild_sincos && table.kind == crate::discover::Kind::Sincos;
        let antialias_applied = !rebuild
            && request.options.kernel != resample::Kernel::Nearest
            && request.options.kernel != resample::Kernel::Area
            && (request.options.antialias_applies(from[0], to[0])
                || request.options.antialias_applies(from[1], to[1]));
        for companion in &table.companions {
            let entry = ckpt
                .find(companion)
                .expect("discovery names existing tensors");
            let new_shape = if entry.shape.len() == 2 {
                vec![1, rows]
            } else {
                vec![rows]
            };
            if !crate::values::range_fits(entry.dtype, rows) {
                return Err(Error::refused(
                    path,
                    format!(
                        "position ids \"{companion}\" ({}) cannot hold {rows} positions",
                        entry.dtype
                    ),
                ));
            }
            plan.companions.push(CompanionChange {
                name: companion.clone(),
                new_shape,
                rows,
            });
        }
        plan.tables.push(TableChange {
            table: table.clone(),
            from,
            to,
            new_shape,
            options: request.options,
            antialias_applied,
            rebuild,
            needed_bytes: needed,
        });
    }
    Ok(plan)
}

fn no_table_message(found: &Discovery) -> String {
    let mut message = String::from("no position table on a 2-D patch grid found");
    if !found.skipped.is_empty() {
        let list: Vec<String> = found
            .skipped
            .iter()
            .map(|s| format!("\"{}\" ({})", s.name, s.reason))
            .collect();
        message.push_str(&format!("; looked at {}", list.join(", ")));
    }
    message.push_str("; name a table with --tensor NAME (and --source-grid HxW if needed)");
    message
}

fn select<'a>(ckpt: &dyn TensorSource, found: &'a Discovery, name: &str) -> Result<&'a Table> {
    let path = ckpt.source_path();
    if let Some(t) = found.table(name) {
        return Ok(t);
    }
    if let Some(a) = found.ambiguous.iter().find(|a| a.name == name) {
        return Err(Error::table(
            path,
            format!(
                "table \"{name}\" is ambiguous ({} rows fit several grids); pass {}",
                a.rows, a.resolve_with
            ),
        ));
    }
    if let Some(s) = found.skipped.iter().find(|s| s.name == name) {
        let entry = ckpt.find(name);
        let integer = entry.is_some_and(|e| crate::values::is_integer(e.dtype));
        let message = format!("\"{name}\" cannot be resized: {}", s.reason);
        return Err(if integer {
            Error::refused(path, message)
        } else {
            Error::table(path, message)
        });
    }
    Err(Error::table(
        path,
        format!("no tensor named \"{name}\" in the file"),
    ))
}

fn target_grid(path: &std::path::Path, table: &Table, target: Target) -> Result<[usize; 2]> {
    match target {
        Target::Grid(h, w) => Ok([h, w]),
        Target::Image(h, w) => {
            let p = table.patch.ok_or_else(|| {
                Error::table(
                    path,
                    format!(
                        "\"{}\": the patch size is unknown (no patch-projection kernel found); pass --patch P or give --grid",
                        table.name
                    ),
                )
            })?;
            if h % p != 0 || w % p != 0 {
                return Err(Error::Usage(format!(
                    "image {h}x{w} is not a whole number of {p}-pixel patches (\"{}\"); choose a multiple of {p}",
                    table.name
                )));
            }
            Ok([h / p, w / p])
        }
    }
}
