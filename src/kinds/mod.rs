//! Kinds of grid-dependent tensors: one module per kind says how the kind is recognised (names,
//! shapes, values, companions), what its target is for a request, how it is transformed
//! (resampled or rebuilt) and which companion buffers follow it. Discovery runs every kind over
//! the checkpoint's tensor list; planning and the writer iterate over what the kinds found.
//! Nothing here writes; ambiguity is reported, never guessed away.

pub mod absolute;
pub mod names;

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
    /// The number of leading class slots.
    pub slots: Option<usize>,
    /// The patch size in pixels.
    pub patch: Option<usize>,
    /// Consider these tensors position tables whatever their names.
    pub tensors: Vec<String>,
    /// Where the channels of a 4-D `[1, ., ., .]` table sit.
    pub channels: Option<Channels>,
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

/// The kind of a grid-dependent tensor, as `scan` and the reports name it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Kind {
    /// An absolute position table whose values were learned.
    Learned,
    /// An absolute position table that follows the fixed 2-D sine-cosine construction.
    Sincos,
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
    /// Absolute position tables.
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
    /// Buffers rewritten with it (position ids, index buffers, masks).
    pub companions: Vec<String>,
    /// Similarity-map fidelity of the changed tensor (1 is perfect).
    pub fidelity: Option<f64>,
}

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
    /// The absolute table, for the similarity-map figure.
    fn absolute(&self) -> Option<&absolute::TableChange> {
        None
    }
}
