//! Planning: from what discovery found and the user's request to the exact list of changes —
//! each kind plans its own tensors and the companions that follow them — checked before any
//! value is computed or any byte is written.

use std::collections::HashMap;
use std::path::Path;

use crate::checkpoint::TensorSource;
use crate::error::{Error, Result};
use crate::kinds::{absolute, Change, Discovery, Encoding, Table};
use crate::resample::Options;

/// The grid to resample to.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Target {
    /// A patch grid (rows, columns).
    Grid(usize, usize),
    /// An input image size in pixels (height, width); the grid is image / patch per table.
    Image(usize, usize),
    /// Scale factors (rows, columns): each side becomes floor(side·s), and absolute tables are
    /// sampled with s itself (x_src = (x + 0.5)/s − 0.5, as the ONNX `scales` input and a
    /// framework call given a scale factor do), not with the ratio of the sizes.
    Scale(f64, f64),
}

impl Target {
    /// The scale factors of a `Scale` target.
    pub fn scale(&self) -> Option<[f64; 2]> {
        match *self {
            Target::Scale(sy, sx) => Some([sy, sx]),
            _ => None,
        }
    }

    /// The grid this target gives tensor `name`, now on grid `old` (rows, columns) of
    /// `patch`-pixel patches. Errors: an unknown patch size for an image target, an image the
    /// patch does not divide, a scale that leaves no row or column.
    pub fn grid_for(
        &self,
        path: &Path,
        name: &str,
        old: [usize; 2],
        patch: Option<[usize; 2]>,
    ) -> Result<[usize; 2]> {
        match *self {
            Target::Grid(h, w) => Ok([h, w]),
            Target::Image(h, w) => {
                let [p, q] = patch.ok_or_else(|| {
                    Error::table(
                        path,
                        format!("\"{name}\": the patch size is unknown (no patch-projection kernel found); pass --patch P or give --grid"),
                    )
                })?;
                if h % p != 0 || w % q != 0 {
                    let sides = if p == q {
                        format!("{p}")
                    } else {
                        format!("{p}x{q}")
                    };
                    return Err(Error::usage_in(path, format!(
                        "image {h}x{w} is not a whole number of {sides}-pixel patches (\"{name}\"); choose a multiple of {sides}"
                    )));
                }
                Ok([h / p, w / q])
            }
            Target::Scale(sy, sx) => {
                let side = |n: usize, s: f64| {
                    crate::resample::try_scaled_side(n, s).map_err(|e| {
                        Error::usage_in(path, format!("\"{name}\": scale {s} of side {n}: {e}"))
                    })
                };
                Ok([side(old[0], sy)?, side(old[1], sx)?])
            }
        }
    }
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
    /// The new attention window `(Wh, Ww)` of window-relative and per-axis tables that do not
    /// span the whole grid (`None`: unchanged).
    pub window: Option<(usize, usize)>,
    /// The new time axis of a video grid (`None`: unchanged).
    pub frames: Option<Frames>,
    /// How window-relative tables are resampled.
    pub relative: Relative,
    /// A new patch size (rows, columns): patch-projection kernels are resized to it and an
    /// image target is divided by it.
    pub new_patch: Option<(usize, usize)>,
}

impl Request {
    /// The grid the target gives tensor `name`, now on grid `old` of `patch`-pixel patches
    /// (the new patch size when one is asked for).
    pub fn grid_for(
        &self,
        path: &Path,
        name: &str,
        old: [usize; 2],
        patch: Option<usize>,
    ) -> Result<[usize; 2]> {
        let sides = self
            .new_patch
            .map(|(p, q)| [p, q])
            .or(patch.map(|p| [p, p]));
        self.target.grid_for(path, name, old, sides)
    }
}

/// The new time axis of a video grid.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Frames {
    /// Positions along time (the T of `--grid TxHxW`).
    Grid(usize),
    /// Input frames (`--frames`): positions are frames / tubelet size, as the grid is image /
    /// patch size.
    Input(usize),
}

impl Frames {
    /// The positions along time for a model whose tubelets span `tubelet` frames.
    pub fn positions(self, name: &str, tubelet: usize) -> Result<usize> {
        match self {
            Frames::Grid(t) => Ok(t),
            Frames::Input(f) if tubelet > 0 && f % tubelet == 0 => Ok(f / tubelet),
            Frames::Input(f) => Err(Error::Usage(format!(
                "{f} frames are not a whole number of {tubelet}-frame tubelets (\"{name}\"); choose a multiple of {tubelet}"
            ))),
        }
    }
}

/// How window-relative tables are resampled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Relative {
    /// With the engine and the kernel options, like every other grid.
    #[default]
    Kernel,
    /// Offsets spaced by a geometric progression, interpolated by a cubic spline (the
    /// fine-tuning method of BEiT-style models).
    Geometric,
}

impl std::str::FromStr for Relative {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "kernel" => Ok(Relative::Kernel),
            "geometric" => Ok(Relative::Geometric),
            _ => Err(format!(
                "unknown value \"{s}\"; expected kernel or geometric"
            )),
        }
    }
}

/// Everything that will change; the rest of the checkpoint is copied as it is.
#[derive(Debug)]
pub struct Plan {
    pub changes: Vec<Box<dyn Change>>,
    /// Tensors already at their target, left unchanged.
    pub already_at_target: Vec<String>,
}

impl Plan {
    /// True when nothing needs to change.
    pub fn is_noop(&self) -> bool {
        self.changes.is_empty()
    }

    /// The new shape of a rewritten tensor.
    pub fn new_shape(&self, name: &str) -> Option<&[usize]> {
        self.changes
            .iter()
            .flat_map(|c| c.rewrites())
            .find(|(n, _)| *n == name)
            .map(|(_, shape)| shape)
    }

    /// Keep only the changes (and tensors at target) whose main tensors `keep` accepts.
    pub fn retain(&mut self, keep: impl Fn(&str) -> bool) {
        self.changes.retain(|c| keep(c.name()));
        self.already_at_target.retain(|n| keep(n));
    }

    /// Tensors the output leaves out.
    pub fn drops(&self) -> Vec<&str> {
        self.changes.iter().flat_map(|c| c.drops()).collect()
    }

    /// The new shape of every rewritten tensor, by name (the first change that rewrites it
    /// decides, as in [`Plan::new_shape`]): one lookup per tensor of the file, however many
    /// changes the plan holds.
    pub fn new_shapes(&self) -> HashMap<&str, &[usize]> {
        let mut shapes = HashMap::new();
        for (name, shape) in self.changes.iter().flat_map(|c| c.rewrites()) {
            shapes.entry(name).or_insert(shape);
        }
        shapes
    }

    /// Whether the tensor with this name is rewritten by the plan.
    pub fn changes(&self, name: &str) -> bool {
        self.new_shape(name).is_some()
    }

    /// The companion buffers rewritten with the main tensors.
    pub fn companions(&self) -> Vec<String> {
        self.changes
            .iter()
            .flat_map(|c| c.rewrites().into_iter().skip(1).map(|(n, _)| n.to_string()))
            .collect()
    }
}

/// Decide what changes. Errors: unknown or unusable `--tensor` names, ambiguous or missing
/// tables (exit 4), an image size that the patch does not divide, a table over the memory
/// guard (refused, before anything is allocated).
pub fn build(ckpt: &dyn TensorSource, found: &Discovery, request: &Request) -> Result<Plan> {
    let path = ckpt.source_path();
    let named =
        |name: &str| request.tensors.is_empty() || request.tensors.iter().any(|n| n == name);
    let encodings: Vec<_> = found.encodings.iter().filter(|e| named(e.name())).collect();
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
        if found.tables.is_empty() && encodings.is_empty() {
            return Err(Error::table(path, no_table_message(found)));
        }
        found.tables.iter().collect()
    } else {
        request
            .tensors
            .iter()
            .filter(|name| !found.encodings.iter().any(|e| e.name() == name.as_str()))
            .map(|name| select(ckpt, found, name))
            .collect::<Result<_>>()?
    };
    if let Some(message) = missing_kernel(found, &encodings, request) {
        return Err(Error::table(path, message));
    }
    let mut plan = Plan {
        changes: Vec::new(),
        already_at_target: Vec::new(),
    };
    for table in selected {
        match absolute::plan(ckpt, table, request)? {
            Some(change) => plan.changes.push(Box::new(change)),
            None => plan.already_at_target.push(table.name.clone()),
        }
    }
    for encoding in encodings {
        match encoding.plan(ckpt, request)? {
            Some(change) => plan.changes.push(change),
            None => plan.already_at_target.push(encoding.name().to_string()),
        }
    }
    refuse_over_guard(path, &plan, request.memory_limit)?;
    Ok(plan)
}

/// Records the job keeps per changed tensor until the output is written: its discovery entry,
/// plan, report, provenance and output-header entries. Measured: 100 000 resized window tables
/// peaked at 1.1 GB, about 11 KB each; this leaves room.
pub const RECORDS_PER_CHANGE: u64 = 16 << 10;

/// Each change is checked against the guard alone; together they hold every result and its
/// records until the output is written, and while one computes it needs its working memory
/// (its own results among it) on top of the others' results. A file of many tables (or of a
/// million tiny ones) must fit the guard too.
fn refuse_over_guard(path: &Path, plan: &Plan, limit: u64) -> Result<()> {
    let held = plan
        .changes
        .iter()
        .map(|c| c.held_bytes().saturating_add(RECORDS_PER_CHANGE))
        .fold(0u64, u64::saturating_add);
    let working = plan
        .changes
        .iter()
        .map(|c| c.needed_bytes().saturating_sub(c.held_bytes()))
        .max()
        .unwrap_or(0);
    let needed = held.saturating_add(working);
    if needed <= limit {
        return Ok(());
    }
    Err(Error::refused(
        path,
        format!(
            "resizing {} tensors together needs about {} MiB (each one's results and records are kept until the output is written), over the {} MiB guard; raise it with --memory-limit, or resize fewer with --tensor",
            plan.changes.len(),
            needed >> 20,
            limit >> 20
        ),
    ))
}

/// Warnings for flags no tensor of the file follows (`--window`, `--frames`): a typo in a
/// script should not pass for a resize.
pub fn unused_flags(found: &Discovery, request: &Request) -> Vec<String> {
    let mut out = Vec::new();
    if let Some((h, w)) = request.window {
        if !found.encodings.iter().any(|e| e.follows_window()) {
            out.push(format!(
                "--window {h}x{w}: no table of this file follows a window (window-relative tables with class rows and per-axis tables of global blocks follow the grid); ignored"
            ));
        }
    }
    if let Some(frames) = request.frames {
        let t = match frames {
            Frames::Grid(t) | Frames::Input(t) => t,
        };
        let video = found.tables.iter().any(|t| t.frames.is_some());
        let temporal = found
            .encodings
            .iter()
            .any(|e| e.kind() == crate::kinds::Kind::Temporal);
        if !video && !temporal {
            out.push(format!(
                "{t} frames asked for, but the file has no video grid or temporal table (a video table needs --source-grid TxHxW); ignored"
            ));
        }
    }
    out
}

/// A new patch size with no patch-projection kernel among the `selected` encodings would leave
/// the model projecting patches of the old size onto the new grid: refused, with the kernels
/// `--tensor` left out or else what was looked at.
fn missing_kernel(found: &Discovery, selected: &[&Encoding], request: &Request) -> Option<String> {
    let (p, q) = request.new_patch?;
    let is_kernel = |e: &&Encoding| e.kind() == crate::kinds::Kind::PatchKernel;
    if selected.iter().any(is_kernel) {
        return None;
    }
    let mut message = format!("--new-patch {p}x{q}: no patch-projection kernel to resize");
    let left_out: Vec<String> = found
        .encodings
        .iter()
        .filter(is_kernel)
        .map(|e| format!("\"{}\"", e.name()))
        .collect();
    let looked: Vec<String> = found
        .skipped
        .iter()
        .filter(|s| s.reason.contains("patch"))
        .map(|s| format!("\"{}\" ({})", s.name, s.reason))
        .collect();
    if !left_out.is_empty() {
        message.push_str(&format!(
            "; --tensor leaves out {}: name it with --tensor too",
            left_out.join(", ")
        ));
    } else if looked.is_empty() {
        message.push_str(" (none found by name and shape)");
    } else {
        message.push_str(&format!("; looked at {}", looked.join(", ")));
    }
    Some(message)
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
    if let Some(owner) = found
        .encodings
        .iter()
        .find(|e| e.companions().iter().any(|c| c == name))
    {
        return Err(Error::table(
            path,
            format!(
                "\"{name}\" is rebuilt with \"{}\", not resized on its own; name that one with --tensor",
                owner.name()
            ),
        ));
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
