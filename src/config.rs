//! The configuration files beside a checkpoint: the input resolution and patch size they record,
//! and a rewrite of exactly those values for a resized checkpoint.
//!
//! A model configuration records `image_size`, `patch_size` and the attention window
//! `window_size` at its top level or in a nested vision section; a preprocessing configuration
//! records the resize and crop sizes (`size`, `crop_size`, `image_size`). [`recorded_sizes`] reads
//! them, [`update`] rewrites them and nothing else, [`disagreements`] and
//! [`window_disagreements`] compare them with a checkpoint, [`crop_fit_warnings`] finds a crop
//! that no longer fits the resize before it. Key names are those a widely
//! used model library writes in `config.json` and `preprocessor_config.json` (common practice,
//! from memory); a text is a preprocessing configuration when its top level has one of the keys
//! only those files carry (`image_processor_type`, `do_resize`, `size`, …).
//!
//! The rewrite never re-serialises the document: a small scanner records the byte span of every
//! value and only the digits of the changed numbers are replaced, so key order, whitespace,
//! number formatting, string escapes and the trailing newline stay as the file had them. The
//! whole text is first validated as JSON with repeated keys refused (a reader that keeps the last
//! of two keys would see another value than the one rewritten).

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::ops::Range;

use serde::Serialize;
use serde_json::Value;

use crate::checkpoint::json::{parse_object, JsonProblem};

/// Deepest nesting of objects and arrays accepted; configuration files use a handful of levels.
pub const MAX_DEPTH: usize = 64;
/// Largest configuration text accepted (callers read files with this cap).
pub const MAX_TEXT_BYTES: usize = 16 << 20;
/// Largest side, in pixels, read as a size; anything above is a broken or hostile file.
pub const MAX_SIDE: usize = 1 << 20;

/// Why a configuration text was refused. The caller prefixes the file name.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ConfigError {
    #[error("is {len} bytes, over the {limit}-byte limit for a configuration file")]
    TooLarge { len: usize, limit: usize },
    #[error("is not UTF-8 text (invalid byte at offset {at})")]
    NotUtf8 { at: usize },
    /// Not JSON, or JSON but not an object.
    #[error("{0}")]
    Malformed(String),
    #[error("names the key {0:?} twice in one object")]
    DuplicateKey(String),
    #[error("nests objects and arrays deeper than {limit} levels")]
    TooDeep { limit: usize },
    /// A size key holds a number or array that is not a size.
    #[error("{path}: {detail}")]
    BadSize { path: String, detail: String },
    /// A size written as one number cannot take a size whose sides differ.
    #[error("{path} is one number and cannot record the {height}x{width} size; write it as [height, width] or keep the configuration")]
    NotSquare {
        path: String,
        height: usize,
        width: usize,
    },
}

/// Which kind of configuration a text is, told from its top-level keys.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FileKind {
    /// A model configuration (config.json): `image_size`, `patch_size`, vision sections.
    Model,
    /// A preprocessing configuration (preprocessor_config.json): `size`, `crop_size`.
    Preprocessing,
}

/// What a size key records.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SizeKey {
    /// `image_size`: the input resolution.
    ImageSize,
    /// `patch_size`: the side of one patch.
    PatchSize,
    /// `size`: what images are resized to before cropping.
    Size,
    /// `crop_size`: the centre crop the model receives.
    CropSize,
    /// `window_size`: the attention window, in patches.
    WindowSize,
}

/// A size as it is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SizeValue {
    /// One number for both sides.
    Number(usize),
    /// `[height, width]`.
    Array(usize, usize),
    /// `{"height": h, "width": w}`.
    HeightWidth(usize, usize),
    /// `{"shortest_edge": s}`: the shorter side after resizing, the longer one following the
    /// aspect ratio.
    ShortestEdge(usize),
}

impl SizeValue {
    /// (height, width) for the forms that fix both sides.
    pub fn pair(self) -> Option<(usize, usize)> {
        match self {
            SizeValue::Number(n) => Some((n, n)),
            SizeValue::Array(h, w) | SizeValue::HeightWidth(h, w) => Some((h, w)),
            SizeValue::ShortestEdge(_) => None,
        }
    }
}

impl fmt::Display for SizeValue {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            SizeValue::Number(n) => write!(f, "{n}"),
            SizeValue::Array(h, w) | SizeValue::HeightWidth(h, w) => write!(f, "{h}x{w}"),
            SizeValue::ShortestEdge(s) => write!(f, "shortest edge {s}"),
        }
    }
}

/// One size key found in a configuration.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct RecordedSize {
    /// Keys from the top level down to the size key, e.g. `["vision_config", "image_size"]`.
    pub path: Vec<String>,
    pub key: SizeKey,
    pub value: SizeValue,
    /// Byte span of the whole value in the text.
    #[serde(skip)]
    span: Range<usize>,
    /// Byte spans of the numbers a rewrite replaces.
    #[serde(skip)]
    slots: Slots,
}

/// Where the numbers of a size are written: one number, or a height and a width.
#[derive(Debug, Clone, PartialEq, Eq)]
enum Slots {
    One(Range<usize>),
    Two {
        height: Range<usize>,
        width: Range<usize>,
    },
}

/// A size key whose value posgrid does not read as a size, left as it is.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Skipped {
    pub path: Vec<String>,
    pub key: SizeKey,
    pub reason: String,
    /// A number that is no size (a window of 0 stands for global attention in some
    /// configurations: a setting of its own).
    #[serde(skip)]
    pub number: bool,
}

/// Every size a configuration records, in file order.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Recorded {
    pub kind: FileKind,
    pub sizes: Vec<RecordedSize>,
    pub skipped: Vec<Skipped>,
}

/// The resize a configuration is updated for. A size the request keeps (old equals new) leaves
/// its keys alone, even where they disagree with the checkpoint. The default changes nothing
/// (no recorded size is 0).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Request {
    /// Input size (height, width) before and after.
    pub old_image: (usize, usize),
    pub new_image: (usize, usize),
    /// Patch (height, width) before and after.
    pub old_patch: (usize, usize),
    pub new_patch: (usize, usize),
    /// The attention windows that change: a `window_size` equal to an old one takes its new one.
    pub windows: Vec<WindowMove>,
}

/// An attention window (rows, columns) before and after.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct WindowMove {
    pub old: (usize, usize),
    pub new: (usize, usize),
}

/// One value rewritten, for the `config_changes` report (the caller adds the file).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Change {
    pub path: Vec<String>,
    pub old: Value,
    pub new: Value,
    /// Byte span of the value in the input text.
    #[serde(skip)]
    pub input_span: Range<usize>,
    /// Byte span of the rewritten value in the output text.
    #[serde(skip)]
    pub output_span: Range<usize>,
}

/// `bytes` as text, after the size cap and the UTF-8 check.
pub fn text_from_bytes(bytes: &[u8]) -> Result<&str, ConfigError> {
    if bytes.len() > MAX_TEXT_BYTES {
        return Err(ConfigError::TooLarge {
            len: bytes.len(),
            limit: MAX_TEXT_BYTES,
        });
    }
    std::str::from_utf8(bytes).map_err(|e| ConfigError::NotUtf8 {
        at: e.valid_up_to(),
    })
}

/// The input resolution, patch size and preprocessing sizes a configuration text records.
pub fn recorded_sizes(text: &str) -> Result<Recorded, ConfigError> {
    record(&Document::parse(text)?)
}

fn record(doc: &Document) -> Result<Recorded, ConfigError> {
    let top = doc.members(&doc.root)?;
    let kind = file_kind(&top);
    let mut recorded = Recorded {
        kind,
        sizes: Vec::new(),
        skipped: Vec::new(),
    };
    match kind {
        FileKind::Model => collect_model(doc, top, &mut Vec::new(), &mut recorded)?,
        FileKind::Preprocessing => collect_preprocessing(doc, top, &mut recorded)?,
    }
    Ok(recorded)
}

/// `text` with the recorded sizes set for `changes`, and the list of values rewritten. Every byte
/// outside the rewritten numbers is kept; new numbers are integers, written in the form the old
/// value had (one number, `[h, w]`, `{"height", "width"}`, `{"shortest_edge"}`).
///
/// In a model configuration, `image_size` and `patch_size` take the new values whenever the
/// request changes that size, and `window_size` only where it equals an old window of the
/// request. In a preprocessing configuration a size changes only where it equals the old input
/// size, and a shortest edge only where it equals the old short side.
pub fn update(text: &str, changes: &Request) -> Result<(String, Vec<Change>), ConfigError> {
    let doc = Document::parse(text)?;
    let recorded = record(&doc)?;
    let moves = moves_by_old(&changes.windows);
    let mut planned = Vec::new();
    for size in &recorded.sizes {
        let target = match size.key {
            SizeKey::WindowSize => window_target(size, &moves),
            _ => target_of(size, recorded.kind, changes),
        };
        if let Some(target) = target {
            let writes = writes_for(size, target)?;
            if !writes.is_empty() {
                planned.push((size, writes));
            }
        }
    }
    planned.sort_by_key(|(size, _)| size.span.start);
    splice(&doc, &planned)
}

/// Warnings for recorded sizes that do not describe a checkpoint whose grid is `grid` (rows,
/// columns) of `patch`-pixel patches. Paths and values come from the file: print them through
/// [`crate::visible::visible`].
pub fn disagreements(recorded: &Recorded, grid: (usize, usize), patch: usize) -> Vec<String> {
    let input = (grid.0.saturating_mul(patch), grid.1.saturating_mul(patch));
    let has_crop = recorded.sizes.iter().any(|s| s.key == SizeKey::CropSize);
    let checkpoint = format!(
        "the checkpoint's {}x{} grid of {patch}-pixel patches takes {}x{} images",
        grid.0, grid.1, input.0, input.1
    );
    recorded
        .sizes
        .iter()
        .filter_map(|size| {
            let at = dotted(&size.path);
            let value = size.value;
            match size.key {
                SizeKey::PatchSize if value.pair() != Some((patch, patch)) => Some(format!(
                    "{at} records patch size {value}, but the checkpoint's patches are {patch} pixels"
                )),
                SizeKey::ImageSize | SizeKey::CropSize if value.pair() != Some(input) => {
                    Some(format!("{at} records {value}, but {checkpoint}"))
                }
                SizeKey::Size if resize_disagrees(value, input, has_crop) => Some(format!(
                    "{at} resizes images to {value}, which does not fit the input: {checkpoint}"
                )),
                _ => None,
            }
        })
        .collect()
}

/// Whether a resize size cannot feed an `input`-sized model: smaller than the input when a crop
/// follows, different from it when none does.
fn resize_disagrees(value: SizeValue, input: (usize, usize), has_crop: bool) -> bool {
    let short = input.0.min(input.1);
    match (value, has_crop) {
        (SizeValue::ShortestEdge(s), true) => s < short,
        (SizeValue::ShortestEdge(s), false) => s != short,
        (v, true) => v.pair().is_some_and(|(h, w)| h < input.0 || w < input.1),
        (v, false) => v.pair() != Some(input),
    }
}

/// Warnings for `window_size` keys that record neither a window the request moves nor the
/// window they move to: the configuration does not describe the checkpoint's windowed tables.
/// Nothing is known of the windows when none moves, so nothing is compared then.
pub fn window_disagreements(recorded: &Recorded, windows: &[WindowMove]) -> Vec<String> {
    let Some(first) = windows.first() else {
        return Vec::new();
    };
    let side = |(h, w): (usize, usize)| format!("{h}x{w}");
    // A hostile checkpoint may hold thousands of windows: name a few.
    const NAMED: usize = 4;
    let mut olds: Vec<String> = windows.iter().take(NAMED).map(|m| side(m.old)).collect();
    if windows.len() > NAMED {
        olds.push(format!("{} more", windows.len() - NAMED));
    }
    let known: HashSet<(usize, usize)> = windows.iter().flat_map(|m| [m.old, m.new]).collect();
    recorded
        .sizes
        .iter()
        .filter(|s| s.key == SizeKey::WindowSize)
        .filter(|s| s.value.pair().is_some_and(|p| !known.contains(&p)))
        .map(|s| {
            format!(
                "{} records window {}, but the checkpoint's windowed tables have window {} (resized to {}); left as it is",
                dotted(&s.path),
                s.value,
                olds.join(", "),
                side(first.new)
            )
        })
        .collect()
}

/// Warnings for the size keys posgrid does not read as sizes (a string, a list of per-stage
/// windows, an object of other fields) where `req` changes what they record: [`update`] leaves
/// them as they are, so they may still record the old size. A number that is no window (0 for
/// global attention) is a setting of its own and not warned about.
pub fn unread_warnings(recorded: &Recorded, req: &Request) -> Vec<String> {
    recorded
        .skipped
        .iter()
        .filter(|s| match s.key {
            SizeKey::PatchSize => req.old_patch != req.new_patch,
            SizeKey::WindowSize => !req.windows.is_empty() && !s.number,
            SizeKey::ImageSize | SizeKey::Size | SizeKey::CropSize => {
                req.old_image != req.new_image
            }
        })
        .map(|s| {
            format!(
                "{} {}; left as it is, it may still record the old size",
                dotted(&s.path),
                s.reason
            )
        })
        .collect()
}

/// Warnings for a preprocessing crop that [`update`] sets to the new input size while the resize
/// before it stays (it did not record the old input size) and is now smaller than the crop on a
/// side: images resized that way cannot be cropped. Each names both keys and values and suggests
/// the resize that keeps its old ratio to the crop.
pub fn crop_fit_warnings(recorded: &Recorded, req: &Request) -> Vec<String> {
    if recorded.kind != FileKind::Preprocessing {
        return Vec::new();
    }
    let Some(crop) = recorded.sizes.iter().find(|s| s.key == SizeKey::CropSize) else {
        return Vec::new();
    };
    let (Some(old_crop), Some(Target::Pair(h, w))) =
        (crop.value.pair(), target_of(crop, recorded.kind, req))
    else {
        return Vec::new();
    };
    let new_crop = (h, w);
    if old_crop == new_crop {
        return Vec::new();
    }
    recorded
        .sizes
        .iter()
        .filter(|s| s.key == SizeKey::Size && target_of(s, recorded.kind, req).is_none())
        .filter(|s| smaller_than(s.value, new_crop))
        .map(|s| {
            format!(
                "{} becomes {h}x{w} (the new input size), but {} stays {}: it did not record the old input size and is now smaller than the crop, so images resized to it cannot be cropped; set {} to {} to keep its old ratio to the crop (old size × new crop / old crop, rounded)",
                dotted(&crop.path),
                dotted(&s.path),
                s.value,
                dotted(&s.path),
                keeping_ratio(s.value, old_crop, new_crop)
            )
        })
        .collect()
}

/// Whether images resized to `value` are smaller than `crop` (height, width) on a side.
fn smaller_than(value: SizeValue, (h, w): (usize, usize)) -> bool {
    match value {
        SizeValue::ShortestEdge(s) => s < h.max(w),
        v => v.pair().is_some_and(|(vh, vw)| vh < h || vw < w),
    }
}

/// `value` scaled by new crop / old crop per side, rounded, as JSON text in the form it is
/// written in; a single number (or shortest edge) takes the larger side, so the crop fits.
fn keeping_ratio(value: SizeValue, old: (usize, usize), new: (usize, usize)) -> String {
    // Sides are at most MAX_SIDE (2^20): the products fit in 64 bits.
    let scaled = |x: usize, to: usize, from: usize| {
        let (x, to, from) = (x as u64, to as u64, from.max(1) as u64);
        (x * to * 2 + from) / (2 * from)
    };
    let both = |x: usize| scaled(x, new.0, old.0).max(scaled(x, new.1, old.1));
    match value {
        SizeValue::Number(n) => both(n).to_string(),
        SizeValue::ShortestEdge(s) => format!("{{\"shortest_edge\": {}}}", both(s)),
        SizeValue::Array(h, w) => {
            format!("[{}, {}]", scaled(h, new.0, old.0), scaled(w, new.1, old.1))
        }
        SizeValue::HeightWidth(h, w) => format!(
            "{{\"height\": {}, \"width\": {}}}",
            scaled(h, new.0, old.0),
            scaled(w, new.1, old.1)
        ),
    }
}

fn dotted(path: &[String]) -> String {
    path.join(".")
}

// ---------------------------------------------------------------------------------------------
// Which keys are sizes

/// Top-level keys that only preprocessing configurations have (key names as a widely used model
/// library writes them; common practice).
const PREPROCESSING_MARKERS: [&str; 8] = [
    "image_processor_type",
    "feature_extractor_type",
    "do_resize",
    "do_center_crop",
    "image_mean",
    "image_std",
    "size",
    "crop_size",
];

fn file_kind(top: &[(String, Range<usize>)]) -> FileKind {
    if top
        .iter()
        .any(|(key, _)| PREPROCESSING_MARKERS.contains(&key.as_str()))
    {
        FileKind::Preprocessing
    } else {
        FileKind::Model
    }
}

/// A nested object holding a vision tower's settings.
fn is_vision_section(key: &str) -> bool {
    key == "vision" || key.ends_with("vision_config")
}

fn collect_model(
    doc: &Document,
    members: Vec<(String, Range<usize>)>,
    path: &mut Vec<String>,
    out: &mut Recorded,
) -> Result<(), ConfigError> {
    for (key, span) in members {
        let size_key = match key.as_str() {
            "image_size" => SizeKey::ImageSize,
            "patch_size" => SizeKey::PatchSize,
            "window_size" => SizeKey::WindowSize,
            k if is_vision_section(k) && doc.is_object(&span) => {
                let inner = doc.members(&span)?;
                path.push(key);
                collect_model(doc, inner, path, out)?;
                path.pop();
                continue;
            }
            _ => continue,
        };
        path.push(key);
        read_size(doc, path, size_key, span, out)?;
        path.pop();
    }
    Ok(())
}

fn collect_preprocessing(
    doc: &Document,
    members: Vec<(String, Range<usize>)>,
    out: &mut Recorded,
) -> Result<(), ConfigError> {
    for (key, span) in members {
        let size_key = match key.as_str() {
            "size" => SizeKey::Size,
            "crop_size" => SizeKey::CropSize,
            "image_size" => SizeKey::ImageSize,
            _ => continue,
        };
        read_size(doc, &[key], size_key, span, out)?;
    }
    Ok(())
}

/// Read the value of one size key into `out`: a size, a skipped entry, or an error for numbers
/// that are no size.
fn read_size(
    doc: &Document,
    path: &[String],
    key: SizeKey,
    span: Range<usize>,
    out: &mut Recorded,
) -> Result<(), ConfigError> {
    let value = doc.value(&span)?;
    let read = match &value {
        Value::Number(_) => one_number(&value, path, span.clone()).map(Some),
        Value::Array(items) => array_pair(doc, items, path, &span),
        Value::Object(_) => object_size(doc, path, key, &span),
        _ => Ok(None),
    };
    let read = match read {
        // A window of 0 stands for global attention in some configurations: not a size, kept.
        Err(ConfigError::BadSize { detail, .. }) if key == SizeKey::WindowSize => {
            out.skipped.push(Skipped {
                path: path.to_vec(),
                key,
                reason: detail,
                number: value.is_number(),
            });
            return Ok(());
        }
        other => other?,
    };
    match read {
        Some((value, slots)) => out.sizes.push(RecordedSize {
            path: path.to_vec(),
            key,
            value,
            span,
            slots,
        }),
        None => out.skipped.push(Skipped {
            path: path.to_vec(),
            key,
            reason: format!("holds {}, not a size posgrid reads", describe(&value)),
            number: false,
        }),
    }
    Ok(())
}

fn one_number(
    value: &Value,
    path: &[String],
    span: Range<usize>,
) -> Result<(SizeValue, Slots), ConfigError> {
    Ok((SizeValue::Number(side(value, path)?), Slots::One(span)))
}

fn array_pair(
    doc: &Document,
    items: &[Value],
    path: &[String],
    span: &Range<usize>,
) -> Result<Option<(SizeValue, Slots)>, ConfigError> {
    if items.len() != 2 || !items.iter().all(Value::is_number) {
        return Ok(None);
    }
    let spans = doc.elements(span)?;
    let [height, width] = <[Range<usize>; 2]>::try_from(spans)
        .map_err(|_| ConfigError::Malformed("array spans disagree with its items".into()))?;
    let (h, w) = (side(&items[0], path)?, side(&items[1], path)?);
    Ok(Some((SizeValue::Array(h, w), Slots::Two { height, width })))
}

/// `{"height", "width"}` anywhere, `{"shortest_edge"}` for a resize size; any other object is
/// not read (a form posgrid cannot keep consistent, such as a shortest and a longest edge).
fn object_size(
    doc: &Document,
    path: &[String],
    key: SizeKey,
    span: &Range<usize>,
) -> Result<Option<(SizeValue, Slots)>, ConfigError> {
    let members = doc.members(span)?;
    let field = |name: &str| members.iter().find(|(k, _)| k == name).map(|(_, s)| s);
    let number_at = |s: &Range<usize>| -> Result<Option<usize>, ConfigError> {
        let value = doc.value(s)?;
        if !value.is_number() {
            return Ok(None);
        }
        side(&value, path).map(Some)
    };
    match (
        members.len(),
        field("height"),
        field("width"),
        field("shortest_edge"),
    ) {
        (2, Some(hs), Some(ws), _) => match (number_at(hs)?, number_at(ws)?) {
            (Some(h), Some(w)) => Ok(Some((
                SizeValue::HeightWidth(h, w),
                Slots::Two {
                    height: hs.clone(),
                    width: ws.clone(),
                },
            ))),
            _ => Ok(None),
        },
        (1, _, _, Some(ss)) if key == SizeKey::Size => {
            Ok(number_at(ss)?.map(|s| (SizeValue::ShortestEdge(s), Slots::One(ss.clone()))))
        }
        _ => Ok(None),
    }
}

/// A number read as a side in pixels: a whole number from 1 to [`MAX_SIDE`].
fn side(value: &Value, path: &[String]) -> Result<usize, ConfigError> {
    let bad = |detail: String| ConfigError::BadSize {
        path: dotted(path),
        detail,
    };
    let Value::Number(n) = value else {
        return Err(bad(format!("holds {}, not a number", describe(value))));
    };
    let whole = match (n.as_u64(), n.as_f64()) {
        (Some(u), _) => u as f64,
        (None, Some(f)) if f.fract() == 0.0 => f,
        _ => return Err(bad(format!("{n} is not a whole number of pixels"))),
    };
    if whole < 1.0 {
        return Err(bad(format!("{n} is not a positive size")));
    }
    if whole > MAX_SIDE as f64 {
        return Err(bad(format!("{n} is larger than {MAX_SIDE} pixels")));
    }
    Ok(whole as usize)
}

fn describe(value: &Value) -> &'static str {
    match value {
        Value::Null => "null",
        Value::Bool(_) => "a boolean",
        Value::Number(_) => "a number",
        Value::String(_) => "a string",
        Value::Array(_) => "an array",
        Value::Object(_) => "an object",
    }
}

// ---------------------------------------------------------------------------------------------
// What changes

/// The size a recorded key takes.
#[derive(Debug, Clone, Copy)]
enum Target {
    Pair(usize, usize),
    ShortSide(usize),
}

/// The model's own keys follow the request whenever it changes that size; preprocessing sizes
/// only when they equal the old input (a 256 resize before a 224 crop is another setting).
fn target_of(size: &RecordedSize, kind: FileKind, req: &Request) -> Option<Target> {
    let (new_h, new_w) = req.new_image;
    let short = |(h, w): (usize, usize)| h.min(w);
    match (kind, size.key, size.value) {
        (_, SizeKey::PatchSize, _) => (req.old_patch != req.new_patch)
            .then_some(Target::Pair(req.new_patch.0, req.new_patch.1)),
        // Windows follow the windows that move ([`window_target`]).
        (_, SizeKey::WindowSize, _) => None,
        (FileKind::Model, _, _) => {
            (req.old_image != req.new_image).then_some(Target::Pair(new_h, new_w))
        }
        (FileKind::Preprocessing, _, SizeValue::ShortestEdge(s)) => {
            (s == short(req.old_image)).then_some(Target::ShortSide(short(req.new_image)))
        }
        (FileKind::Preprocessing, _, value) => {
            (value.pair() == Some(req.old_image)).then_some(Target::Pair(new_h, new_w))
        }
    }
}

/// A window and the window it moves to.
type Moves = HashMap<(usize, usize), (usize, usize)>;

/// The windows a request moves, by old window (the first move of each), for lookups in
/// constant time: a hostile checkpoint may move thousands of windows and a hostile
/// configuration hold thousands of window keys.
fn moves_by_old(windows: &[WindowMove]) -> Moves {
    let mut moves = Moves::new();
    for m in windows {
        moves.entry(m.old).or_insert(m.new);
    }
    moves
}

/// Only a window that moves takes a new value: stages whose window is already the new one
/// keep theirs.
fn window_target(size: &RecordedSize, moves: &Moves) -> Option<Target> {
    let (h, w) = moves.get(&size.value.pair()?)?;
    Some(Target::Pair(*h, *w))
}

/// A number written over the span of the number it replaces.
type Write = (Range<usize>, usize);

/// The numbers to write for `target`, only those that differ from the file.
fn writes_for(size: &RecordedSize, target: Target) -> Result<Vec<Write>, ConfigError> {
    let current = match size.value {
        SizeValue::ShortestEdge(s) => (s, s),
        other => other.pair().unwrap_or_default(),
    };
    let wanted = match (&size.slots, target) {
        (Slots::One(span), Target::ShortSide(s)) => vec![(span.clone(), current.0, s)],
        (Slots::One(span), Target::Pair(h, w)) if h == w => vec![(span.clone(), current.0, h)],
        (Slots::One(_), Target::Pair(height, width)) => {
            return Err(ConfigError::NotSquare {
                path: dotted(&size.path),
                height,
                width,
            })
        }
        (Slots::Two { height, width }, Target::Pair(h, w)) => vec![
            (height.clone(), current.0, h),
            (width.clone(), current.1, w),
        ],
        // A shortest edge is always one slot.
        (Slots::Two { .. }, Target::ShortSide(_)) => Vec::new(),
    };
    Ok(wanted
        .into_iter()
        .filter(|(_, old, new)| old != new)
        .map(|(span, _, new)| (span, new))
        .collect())
}

/// Build the output text from the planned writes (sorted by position, never overlapping), and
/// the change list with each value as the input and output hold it.
fn splice(
    doc: &Document,
    planned: &[(&RecordedSize, Vec<Write>)],
) -> Result<(String, Vec<Change>), ConfigError> {
    let text = doc.text;
    let mut out = String::with_capacity(text.len() + 16);
    let mut cursor = 0;
    let mut spans = Vec::with_capacity(planned.len());
    for (size, writes) in planned {
        let start = out.len() + size.span.start - cursor;
        for (span, number) in writes {
            out.push_str(doc.slice(&(cursor..span.start))?);
            out.push_str(&number.to_string());
            cursor = span.end;
        }
        out.push_str(doc.slice(&(cursor..size.span.end))?);
        cursor = size.span.end;
        spans.push((*size, start..out.len()));
    }
    out.push_str(doc.slice(&(cursor..text.len()))?);
    let changes = spans
        .into_iter()
        .map(|(size, output_span)| {
            let new = serde_json::from_str(&out[output_span.clone()])
                .map_err(|e| ConfigError::Malformed(format!("rewritten value unreadable: {e}")))?;
            Ok(Change {
                path: size.path.clone(),
                old: doc.value(&size.span)?,
                new,
                input_span: size.span.clone(),
                output_span,
            })
        })
        .collect::<Result<_, ConfigError>>()?;
    Ok((out, changes))
}

// ---------------------------------------------------------------------------------------------
// The scanner: byte spans of values in a text already validated as JSON

/// A validated JSON object text and the span of its top-level value.
struct Document<'a> {
    text: &'a str,
    root: Range<usize>,
}

impl<'a> Document<'a> {
    /// Validate `text` (strict JSON object, no repeated key, bounded size and depth).
    fn parse(text: &'a str) -> Result<Self, ConfigError> {
        if text.len() > MAX_TEXT_BYTES {
            return Err(ConfigError::TooLarge {
                len: text.len(),
                limit: MAX_TEXT_BYTES,
            });
        }
        let bytes = text.as_bytes();
        // The depth limit is the scanner's; any other fault is named by the strict parser, whose
        // messages give line and column.
        let start = skip_space(bytes, 0);
        let scanned = value_end(bytes, start, 0);
        if let Err(ConfigError::TooDeep { limit }) = scanned {
            return Err(ConfigError::TooDeep { limit });
        }
        parse_object(bytes).map_err(|problem| match problem {
            JsonProblem::DuplicateKey(key) => ConfigError::DuplicateKey(key),
            JsonProblem::Malformed(m) => ConfigError::Malformed(m),
        })?;
        let end = scanned?;
        if skip_space(bytes, end) != bytes.len() {
            return Err(unexpected(end));
        }
        Ok(Document {
            text,
            root: start..end,
        })
    }

    fn slice(&self, span: &Range<usize>) -> Result<&'a str, ConfigError> {
        self.text
            .get(span.clone())
            .ok_or_else(|| unexpected(span.start))
    }

    fn value(&self, span: &Range<usize>) -> Result<Value, ConfigError> {
        serde_json::from_str(self.slice(span)?)
            .map_err(|e| ConfigError::Malformed(format!("is not valid JSON: {e}")))
    }

    fn is_object(&self, span: &Range<usize>) -> bool {
        self.text.as_bytes().get(span.start) == Some(&b'{')
    }

    /// Keys (decoded, escapes resolved) and value spans of the object at `span`, in file order.
    fn members(&self, span: &Range<usize>) -> Result<Vec<(String, Range<usize>)>, ConfigError> {
        let mut items = Vec::new();
        container_end(self.text.as_bytes(), span.start, 0, &mut |item| {
            items.push(item)
        })?;
        items
            .into_iter()
            .map(|(key, value)| {
                let key = key.ok_or_else(|| unexpected(span.start))?;
                let key = serde_json::from_str::<String>(self.slice(&key)?)
                    .map_err(|e| ConfigError::Malformed(format!("is not valid JSON: {e}")))?;
                Ok((key, value))
            })
            .collect()
    }

    /// Value spans of the array at `span`.
    fn elements(&self, span: &Range<usize>) -> Result<Vec<Range<usize>>, ConfigError> {
        let mut items = Vec::new();
        container_end(self.text.as_bytes(), span.start, 0, &mut |(_, value)| {
            items.push(value)
        })?;
        Ok(items)
    }
}

/// An object member's key span (none in an array) and its value span.
type Item = (Option<Range<usize>>, Range<usize>);

fn unexpected(at: usize) -> ConfigError {
    ConfigError::Malformed(format!("is not valid JSON: unexpected text at byte {at}"))
}

fn skip_space(bytes: &[u8], mut at: usize) -> usize {
    while matches!(bytes.get(at), Some(b' ' | b'\t' | b'\n' | b'\r')) {
        at += 1;
    }
    at
}

/// End of the value starting at `at`, inside `depth` enclosing containers.
fn value_end(bytes: &[u8], at: usize, depth: usize) -> Result<usize, ConfigError> {
    match bytes.get(at) {
        Some(b'{' | b'[') => container_end(bytes, at, depth + 1, &mut |_| {}),
        Some(b'"') => string_end(bytes, at),
        Some(b'-' | b'0'..=b'9') => Ok(run_end(bytes, at, |b| {
            matches!(b, b'-' | b'+' | b'.' | b'e' | b'E' | b'0'..=b'9')
        })),
        Some(b't' | b'f' | b'n') => Ok(run_end(bytes, at, |b| b.is_ascii_lowercase())),
        _ => Err(unexpected(at)),
    }
}

fn run_end(bytes: &[u8], at: usize, part: impl Fn(u8) -> bool) -> usize {
    at + bytes[at..].iter().take_while(|&&b| part(b)).count()
}

/// End of the string whose opening quote is at `at` (escapes skipped as pairs; bytes of
/// multi-byte characters are never a quote or a backslash).
fn string_end(bytes: &[u8], at: usize) -> Result<usize, ConfigError> {
    let mut i = at + 1;
    loop {
        match bytes.get(i) {
            Some(b'"') => return Ok(i + 1),
            Some(b'\\') => i += 2,
            Some(_) => i += 1,
            None => return Err(unexpected(at)),
        }
    }
}

/// End of the object or array opening at `at`, at nesting level `depth`; `visit` sees each
/// member.
fn container_end(
    bytes: &[u8],
    at: usize,
    depth: usize,
    visit: &mut dyn FnMut(Item),
) -> Result<usize, ConfigError> {
    if depth > MAX_DEPTH {
        return Err(ConfigError::TooDeep { limit: MAX_DEPTH });
    }
    let (is_object, close) = match bytes.get(at) {
        Some(b'{') => (true, b'}'),
        Some(b'[') => (false, b']'),
        _ => return Err(unexpected(at)),
    };
    let mut i = skip_space(bytes, at + 1);
    if bytes.get(i) == Some(&close) {
        return Ok(i + 1);
    }
    loop {
        let key = if is_object {
            let (key, next) = member_key(bytes, i)?;
            i = next;
            Some(key)
        } else {
            None
        };
        let end = value_end(bytes, i, depth)?;
        visit((key, i..end));
        i = skip_space(bytes, end);
        match bytes.get(i) {
            Some(b',') => i = skip_space(bytes, i + 1),
            Some(&b) if b == close => return Ok(i + 1),
            _ => return Err(unexpected(i)),
        }
    }
}

/// The key string at `at` and where its value starts.
fn member_key(bytes: &[u8], at: usize) -> Result<(Range<usize>, usize), ConfigError> {
    if bytes.get(at) != Some(&b'"') {
        return Err(unexpected(at));
    }
    let end = string_end(bytes, at)?;
    let colon = skip_space(bytes, end);
    if bytes.get(colon) != Some(&b':') {
        return Err(unexpected(colon));
    }
    Ok((at..end, skip_space(bytes, colon + 1)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scanner_spans_cover_values_exactly() {
        let text = r#" { "a\"}" : [1, {"b": "]"}], "c":-2.5e3 , "d": null } "#;
        let doc = Document::parse(text).unwrap();
        let members = doc.members(&doc.root).unwrap();
        let got: Vec<(&str, &str)> = members
            .iter()
            .map(|(k, s)| (k.as_str(), &text[s.clone()]))
            .collect();
        assert_eq!(
            got,
            [
                ("a\"}", r#"[1, {"b": "]"}]"#),
                ("c", "-2.5e3"),
                ("d", "null")
            ]
        );
    }

    #[test]
    fn depth_is_bounded_before_the_strict_parser_runs() {
        let deep = format!("{}{}", "[".repeat(100_000), "]".repeat(100_000));
        let text = format!("{{\"a\":{deep}}}");
        assert_eq!(
            Document::parse(&text).err(),
            Some(ConfigError::TooDeep { limit: MAX_DEPTH })
        );
    }
}
