//! Kinds of grid-dependent tensors: one module per kind says how the kind is recognised (names,
//! shapes, values, companions), what its target is for a request, how it is transformed
//! (resampled or rebuilt) and which companion buffers follow it. Discovery runs every kind over
//! the checkpoint's tensor list; planning and the writer iterate over what the kinds found.
//! Nothing here writes; ambiguity is reported, never guessed away.

pub mod absolute;
pub mod axial;
pub mod names;
pub mod patch;
pub mod rotary;
pub mod temporal;
pub mod window;

pub use absolute::TableChange;

use serde::Serialize;

use crate::checkpoint::{Dtype, TensorSource};
use crate::error::Result;

pub use absolute::{Layout, Table};

/// Candidate tables larger than this are not read for the sine-cosine check (bounded memory).
pub const MAX_VALUE_READ: u64 = 256 << 20;

/// What the user told discovery; each `None` means "infer it".
#[derive(Debug, Clone, Default)]
pub struct Hints {
    /// The source grid (rows, columns), for tables whose grid cannot be inferred.
    pub source_grid: Option<(usize, usize)>,
    /// The source frames T of a video grid (`--source-grid TxHxW`).
    pub source_frames: Option<usize>,
    /// A new patch size is asked for: patch-projection kernels are grid-dependent too.
    pub new_patch: Option<(usize, usize)>,
    /// The patch grid a configuration file beside the checkpoint records, and the file.
    pub recorded_grid: Option<((usize, usize), String)>,
    /// The number of leading class slots.
    pub slots: Option<usize>,
    /// The patch size in pixels.
    pub patch: Option<usize>,
    /// Consider these tensors position tables whatever their names.
    pub tensors: Vec<String>,
    /// Where the channels of a 4-D `[1, ., ., .]` table sit.
    pub channels: Option<Channels>,
    /// How a linear patch embedding flattens a patch (`--patch-order`).
    pub patch_order: Option<patch::Flatten>,
}

/// Where the channel (embedding) dimension of a 4-D table sits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Channels {
    /// `[1, D, H, W]`
    First,
    /// `[1, H, W, D]`
    Last,
}

impl std::str::FromStr for Channels {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "first" => Ok(Channels::First),
            "last" => Ok(Channels::Last),
            _ => Err(format!(
                "unknown value \"{s}\"; expected first ([1, D, H, W]) or last ([1, H, W, D])"
            )),
        }
    }
}

/// Refuse a change that needs more memory than the guard allows: `what` says what the change
/// does (`resizing "pos_embed" to 24x24`), and the message adds the figures and the flag.
pub(crate) fn within_guard(
    path: &std::path::Path,
    what: &str,
    needed: u64,
    limit: u64,
) -> Result<()> {
    if needed <= limit {
        return Ok(());
    }
    Err(crate::error::Error::refused(
        path,
        format!(
            "{what} needs about {} MiB, over the {} MiB guard; raise it with --memory-limit",
            needed >> 20,
            limit >> 20
        ),
    ))
}

/// The kind of a grid-dependent tensor, as `scan` and the reports name it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Kind {
    /// An absolute position table whose values were learned.
    Learned,
    /// An absolute position table that follows the fixed 2-D sine-cosine construction.
    Sincos,
    /// A window-relative bias table `[(2Wh−1)(2Ww−1) (+3), heads]`.
    WindowRelative,
    /// A per-axis relative table `[2S−1, c]` (`…rel_pos_h`, `…rel_pos_w`).
    AxialRelative,
    /// Fixed 2-D rotary frequency buffers `[G², 2d]` (`…freqs_cos`, `…freqs_sin`).
    Rotary,
    /// A temporal table of a video model `[1, T, D]`.
    Temporal,
    /// A patch-projection kernel, resized for a new patch size (`--new-patch`).
    PatchKernel,
}

/// A grid-dependent tensor of a kind other than an absolute table.
#[derive(Debug, Clone, Serialize)]
#[serde(untagged)]
pub enum Encoding {
    Window(window::WindowTable),
    Axial(axial::AxialTable),
    Rotary(rotary::RotaryBuffers),
    Temporal(temporal::TemporalTable),
    Patch(patch::PatchKernel),
}

impl Encoding {
    pub fn name(&self) -> &str {
        match self {
            Encoding::Window(t) => &t.name,
            Encoding::Axial(t) => &t.name,
            Encoding::Rotary(b) => &b.name,
            Encoding::Temporal(t) => &t.name,
            Encoding::Patch(k) => &k.name,
        }
    }

    /// Buffers rebuilt with it (index buffers, masks, the other rotary buffer).
    pub fn companions(&self) -> &[String] {
        match self {
            Encoding::Window(t) => &t.companions,
            Encoding::Rotary(b) => &b.companions,
            Encoding::Axial(_) | Encoding::Temporal(_) | Encoding::Patch(_) => &[],
        }
    }

    /// Whether `--window` decides its target.
    pub fn follows_window(&self) -> bool {
        match self {
            Encoding::Window(t) => t.follows == window::Follows::Window,
            Encoding::Axial(t) => t.follows == axial::Span::Window,
            Encoding::Rotary(_) | Encoding::Temporal(_) | Encoding::Patch(_) => false,
        }
    }

    pub fn kind(&self) -> Kind {
        match self {
            Encoding::Window(t) => t.kind,
            Encoding::Axial(t) => t.kind,
            Encoding::Rotary(b) => b.kind,
            Encoding::Temporal(t) => t.kind,
            Encoding::Patch(k) => k.kind,
        }
    }

    /// Plan its change: `None` when it is already at its target.
    pub fn plan(
        &self,
        ckpt: &dyn TensorSource,
        request: &crate::plan::Request,
    ) -> Result<Option<Box<dyn Change>>> {
        Ok(match self {
            Encoding::Window(t) => window::plan(ckpt, t, request)?.map(|c| Box::new(c) as _),
            Encoding::Axial(t) => axial::plan(ckpt, t, request)?.map(|c| Box::new(c) as _),
            Encoding::Rotary(b) => rotary::plan(ckpt, b, request)?.map(|c| Box::new(c) as _),
            Encoding::Temporal(t) => temporal::plan(ckpt, t, request)?.map(|c| Box::new(c) as _),
            Encoding::Patch(k) => patch::plan(ckpt, k, request)?.map(|c| Box::new(c) as _),
        })
    }
}

/// Scripts read one list, `tables`, holding every grid-dependent tensor with its `kind`.
impl Serialize for Discovery {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        #[derive(Serialize)]
        #[serde(untagged)]
        enum Entry<'a> {
            Absolute(&'a Table),
            Other(&'a Encoding),
        }
        #[derive(Serialize)]
        struct View<'a> {
            tables: Vec<Entry<'a>>,
            ambiguous: &'a [Ambiguous],
            skipped: &'a [Skipped],
            warnings: &'a [String],
        }
        View {
            tables: self
                .tables
                .iter()
                .map(Entry::Absolute)
                .chain(self.encodings.iter().map(Entry::Other))
                .collect(),
            ambiguous: &self.ambiguous,
            skipped: &self.skipped,
            warnings: &self.warnings,
        }
        .serialize(s)
    }
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
    pub candidates: Vec<(usize, Vec<usize>)>,
    /// What to pass to settle it.
    pub resolve_with: String,
}

/// Everything discovery found.
#[derive(Debug, Clone, Default)]
pub struct Discovery {
    /// Absolute position tables.
    pub tables: Vec<Table>,
    /// Every other grid-dependent tensor, by kind.
    pub encodings: Vec<Encoding>,
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

pub(crate) fn serialize_dtype<S: serde::Serializer>(
    d: &Dtype,
    s: S,
) -> std::result::Result<S::Ok, S::Error> {
    s.collect_str(d)
}

/// Tolerance for recognising the sine-cosine construction: 1e-4, plus the rounding step of
/// the storage dtype near 1.0 (half an ulp of F16/BF16).
pub(crate) fn value_tolerance(dtype: Dtype) -> f64 {
    1e-4 + match dtype {
        Dtype::F16 => 2f64.powi(-11),
        Dtype::BF16 => 2f64.powi(-8),
        _ => 0.0,
    }
}

/// Find every grid-dependent tensor in `source`, kind by kind.
pub fn discover(source: &dyn TensorSource, hints: &Hints) -> Result<Discovery> {
    let mut found = Discovery::default();
    for name in &hints.tensors {
        if source.find(name).is_none() {
            found.warnings.push(format!(
                "--tensor {name}: no tensor of that name in the file"
            ));
        }
    }
    absolute::find(source, hints, &mut found)?;
    window::find(source, hints, &mut found)?;
    axial::find(source, hints, &mut found)?;
    rotary::find(source, hints, &mut found)?;
    temporal::find(source, &mut found)?;
    patch::find(source, hints, &mut found)?;
    for a in &found.ambiguous {
        let options: Vec<String> = a
            .candidates
            .iter()
            .map(|(s, g)| {
                let sides: Vec<String> = g.iter().map(|n| n.to_string()).collect();
                format!("{s} slot(s) + {}", sides.join("x"))
            })
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

/// The grid rows of a tensor before and after its change, as f32 in row order `[H·W, D]`
/// (class slots excluded): what the fidelity score and the maps compare.
#[derive(Debug, Clone)]
pub struct Images {
    pub before: Vec<f32>,
    pub after: Vec<f32>,
    pub from: [usize; 2],
    pub to: [usize; 2],
    /// Values per grid cell.
    pub width: usize,
    /// Why the fidelity score would mislead here, if it would (it compares with an even
    /// stretch of the old grid).
    pub unscored: Option<&'static str>,
}

/// The new bytes of every tensor a change rewrites, and its images.
#[derive(Debug, Default)]
pub struct Computed {
    pub bytes: Vec<(String, Vec<u8>)>,
    pub images: Option<Images>,
}

/// One entry of a resize report: a grid-dependent tensor, the grid (or window, or axis) it
/// goes from and to, and how.
#[derive(Debug, Clone, Serialize)]
pub struct ChangeReport {
    pub name: String,
    pub kind: Kind,
    pub dtype: String,
    pub slots: usize,
    pub from: Vec<usize>,
    pub to: Vec<usize>,
    pub shape: Vec<usize>,
    pub new_shape: Vec<usize>,
    pub kernel: Option<crate::resample::Kernel>,
    pub coords: Option<crate::resample::Coords>,
    pub edges: Option<crate::resample::Edges>,
    pub antialias: bool,
    pub cubic_a: Option<f64>,
    /// `resampled`, or `rebuilt` for a tensor built anew by its construction.
    pub method: &'static str,
    /// The scale factors (rows, columns) an absolute table was sampled with (`--scale`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub scale: Option<[f64; 2]>,
    /// Buffers rewritten with it (position ids, index buffers, masks).
    pub companions: Vec<String>,
    /// Similarity-map fidelity of the changed tensor (1 is perfect).
    pub fidelity: Option<f64>,
}

/// An attention window before and after a change: the sides before (rows, columns; `None` for
/// an axis the tensor does not span, as a per-axis table spans one) and the window after.
pub type WindowSides = ([Option<usize>; 2], [usize; 2]);

/// One planned change of a grid-dependent tensor and the companion buffers that follow it,
/// checked before any value is computed. Each kind plans its own; the job runs them all alike.
pub trait Change: std::fmt::Debug + Send + Sync {
    /// The main tensor's name.
    fn name(&self) -> &str;
    /// Its shape before the change.
    fn shape(&self) -> &[usize];
    /// Every tensor the change rewrites with its new shape, the main tensor first.
    fn rewrites(&self) -> Vec<(&str, &[usize])>;
    /// The new bytes of every rewritten tensor, and the images before and after.
    fn compute(&self, ckpt: &dyn TensorSource, allow_nonfinite: bool) -> Result<Computed>;
    /// The report entry (fidelity not yet filled in).
    fn report(&self) -> ChangeReport;
    /// What the output's provenance records about the change.
    fn provenance(&self) -> serde_json::Value;
    /// Bytes the change needs (what the memory guard checked).
    fn needed_bytes(&self) -> u64;
    /// Bytes its results hold until the output is written: the new tensors (at most 8 bytes a
    /// value) and the images before and after kept for the report (f32).
    fn held_bytes(&self) -> u64 {
        let values = |shape: &[usize]| {
            shape
                .iter()
                .fold(1u64, |n, &side| n.saturating_mul(side as u64))
        };
        let new = self
            .rewrites()
            .iter()
            .map(|(_, shape)| values(shape))
            .fold(0u64, u64::saturating_add);
        let images = values(self.shape()).saturating_add(new).saturating_mul(4);
        new.saturating_mul(8).saturating_add(images)
    }
    /// The model's patch grid before and after, and its patch size, when this change moves
    /// the patch grid itself (what configuration files record as the input size).
    fn grid_change(&self) -> Option<([usize; 2], [usize; 2], usize)> {
        None
    }
    /// The patch (rows, columns of pixels) before and after, when this change resizes a
    /// patch-projection kernel (what configuration files record as `patch_size`).
    fn patch_change(&self) -> Option<([usize; 2], [usize; 2])> {
        None
    }
    /// The attention window before and after, when this change follows `--window` (what
    /// configuration files record as `window_size`).
    fn window_change(&self) -> Option<WindowSides> {
        None
    }
    /// Tensors the output leaves out (a mask its block no longer has).
    fn drops(&self) -> Vec<&str> {
        Vec::new()
    }
    /// The absolute table, for the similarity-map figure.
    fn absolute(&self) -> Option<&absolute::TableChange> {
        None
    }
}

/// The refusal for a target whose size does not fit a 64-bit count: no machine could hold it,
/// and a wrapped count would slip past every later check.
pub(crate) fn too_large(path: &std::path::Path, name: &str, target: &str) -> crate::error::Error {
    crate::error::Error::refused(
        path,
        format!("resizing \"{name}\" to {target}: too large (its size overflows a 64-bit count); choose a smaller target"),
    )
}

/// Refuse a tensor holding NaN or infinity (`after`: where the values come from, for the
/// message), unless the user allowed them.
pub(crate) fn refuse_nonfinite(
    path: &std::path::Path,
    name: &str,
    dtype: Dtype,
    bytes: &[u8],
    after: &str,
) -> Result<()> {
    let bad = crate::values::count_nonfinite(dtype, bytes);
    if bad == 0 {
        return Ok(());
    }
    Err(crate::error::Error::refused(
        path,
        format!("\"{name}\" holds {bad} NaN or infinite value(s){after}; pass --allow-nonfinite to resize it anyway"),
    ))
}

/// A `[rows, c]` tensor (or `[1, rows, c]`) stretched along its rows to `to` rows with
/// `options`, in f32 (f64 for F64): its new bytes, and the rows before and after as f32.
pub(crate) fn stretch_rows(
    path: &std::path::Path,
    entry: &crate::checkpoint::TensorEntry,
    raw: &[u8],
    to: usize,
    options: &crate::resample::Options,
) -> Result<(Vec<u8>, Vec<f32>, Vec<f32>)> {
    use crate::values;
    let what = format!("resizing \"{}\"", entry.name);
    let value_error = |e| values::value_error(path, &what, e);
    let oom = |e| values::out_of_memory(path, &what, e);
    // The target decides how much the engine allocates: running out is a refusal (exit 6).
    let usage = |e| match e {
        crate::resample::ResampleError::OutOfMemory { bytes } => oom(values::OutOfMemory { bytes }),
        other => crate::error::Error::usage_in(path, format!("{what}: {other}")),
    };
    let c = *entry.shape.last().unwrap_or(&1);
    let from = entry.shape.iter().product::<usize>() / c.max(1);
    // One axis: a `[rows, 1]` grid of `c` channels.
    let resample = |v| crate::resample::resample(v, (from, 1), c, (to, 1), options);
    Ok(if entry.dtype == Dtype::F64 {
        let v = values::decode_f64(entry.dtype, raw).map_err(value_error)?;
        let r = crate::resample::resample(&v, (from, 1), c, (to, 1), options).map_err(usage)?;
        let bytes = values::encode_f64(entry.dtype, &r).map_err(value_error)?;
        let narrow = |x: &[f64]| values::try_collect(x.len(), x.iter().map(|v| *v as f32));
        (bytes, narrow(&v).map_err(oom)?, narrow(&r).map_err(oom)?)
    } else {
        let v = values::decode_f32(entry.dtype, raw).map_err(value_error)?;
        let r = resample(&v).map_err(usage)?;
        let bytes = values::encode_f32(entry.dtype, &r).map_err(value_error)?;
        (bytes, v, r)
    })
}

/// Whether a kind other than the absolute table claims tensors named like this: `--tensor`
/// forces the absolute reading only on names no other kind recognises.
pub(crate) fn other_kind_name(name: &str) -> bool {
    window::claims(name)
        || axial::claims(name)
        || rotary::claims(name)
        || temporal::is_temporal_name(name)
}

/// The change of a one-axis table (per-axis and temporal tables): read, checked for
/// non-finite values, stretched along its rows to `to` rows with `options`, checked again.
pub(crate) fn stretched(
    ckpt: &dyn TensorSource,
    name: &str,
    to: usize,
    options: &crate::resample::Options,
    allow_nonfinite: bool,
) -> Result<Computed> {
    let path = ckpt.source_path();
    let entry = ckpt.find(name).expect("planned tables exist");
    let raw = ckpt.bytes(entry)?;
    if !allow_nonfinite {
        refuse_nonfinite(path, name, entry.dtype, &raw, "")?;
    }
    let (bytes, before, after) = stretch_rows(path, entry, &raw, to, options)?;
    if !allow_nonfinite {
        refuse_nonfinite(path, name, entry.dtype, &bytes, " after resampling (the kernel overshoots; use --kernel bilinear or pass --allow-nonfinite)")?;
    }
    let width = *entry.shape.last().unwrap_or(&1);
    Ok(Computed {
        bytes: vec![(entry.name.clone(), bytes)],
        images: Some(Images {
            from: [before.len() / width.max(1), 1],
            to: [to, 1],
            before,
            after,
            width,
            unscored: None,
        }),
    })
}
