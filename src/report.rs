//! Reports: the JSON objects scripts read (field names are a contract) and the short text
//! summaries people read.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use crate::visible::push_line;

use serde::Serialize;

use crate::checkpoint::{Source, TensorSource};
use crate::figure::MapReport;
use crate::kinds::{axial, window, ChangeReport, Discovery, Encoding, Kind};
use crate::resize::ResizeReport;

/// The result of `scan`.
#[derive(Debug, Clone, Serialize)]
pub struct ScanReport {
    pub file: PathBuf,
    pub format: &'static str,
    pub tensor_count: usize,
    pub file_size: u64,
    #[serde(flatten)]
    pub discovery: Discovery,
}

impl ScanReport {
    pub fn new(path: &Path, ckpt: &Source, discovery: Discovery) -> Self {
        ScanReport {
            file: path.to_path_buf(),
            format: ckpt.format().name(),
            tensor_count: ckpt.entries().len(),
            file_size: ckpt.file_len(),
            discovery,
        }
    }

    /// Whether a script should treat the scan as a success: some grid-dependent tensor found
    /// (of any kind), and nothing ambiguous.
    pub fn is_conclusive(&self) -> bool {
        let d = &self.discovery;
        !(d.tables.is_empty() && d.encodings.is_empty()) && d.ambiguous.is_empty()
    }
}

fn plural(n: usize, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// The readable summary of a scan.
pub fn scan_text(r: &ScanReport) -> String {
    let mut s = String::new();
    let d = &r.discovery;
    push_line(
        &mut s,
        format!(
            "{} ({}, {}, {:.1} MiB): {}",
            r.file.display(),
            r.format,
            plural(r.tensor_count, "tensor", "tensors"),
            r.file_size as f64 / (1 << 20) as f64,
            plural(
                d.tables.len() + d.encodings.len(),
                "grid-dependent table",
                "grid-dependent tables"
            ),
        ),
    );
    for t in &d.tables {
        let kind = match (t.kind, t.sincos_first_axis) {
            (Kind::Sincos, Some(a)) => format!("sincos ({a:?} axis first)").to_lowercase(),
            (Kind::Sincos, None) => "sincos".into(),
            (Kind::Learned, _) => "learned".into(),
            (other, _) => format!("{other:?}").to_lowercase(),
        };
        push_line(&mut s, format!("  {}", t.name));
        push_line(
            &mut s,
            format!(
                "      {} {:?}  {} (from {}) + {}{}x{} grid, dim {}, {}",
                t.dtype,
                t.shape,
                plural(t.slots, "slot", "slots"),
                format!("{:?}", t.slots_from).to_lowercase(),
                t.frames.map(|f| format!("{f}x")).unwrap_or_default(),
                t.grid[0],
                t.grid[1],
                t.dim,
                kind
            ),
        );
        match (&t.patch, &t.patch_source) {
            (Some(p), Some(src)) => {
                push_line(
                    &mut s,
                    format!(
                        "      patch {p} px (from {src}), image {}x{} px{}",
                        t.grid[0] * p,
                        t.grid[1] * p,
                        match (t.frames, t.tubelet) {
                            (Some(f), Some(k)) => format!(", {} frames ({k} per tubelet)", f * k),
                            _ => String::new(),
                        }
                    ),
                );
            }
            _ => {
                push_line(
                    &mut s,
                    "      patch unknown (pass --patch P to size by image)",
                );
            }
        }
        if !t.companions.is_empty() {
            push_line(
                &mut s,
                format!("      companions: {}", t.companions.join(", ")),
            );
        }
        if let Some(c) = &t.copy_of {
            push_line(&mut s, format!("      copy of {c}"));
        }
        for n in &t.notes {
            push_line(&mut s, format!("      note: {n}"));
        }
    }
    for e in &d.encodings {
        push_line(&mut s, format!("  {}", e.name()));
        for line in encoding_lines(e) {
            push_line(&mut s, format!("      {line}"));
        }
    }
    for skipped in &d.skipped {
        push_line(
            &mut s,
            format!("  not a grid table: {} ({})", skipped.name, skipped.reason),
        );
    }
    s
}

/// `14x14`, `8x14x14`, `27`.
fn sides(v: &[usize]) -> String {
    v.iter()
        .map(|n| n.to_string())
        .collect::<Vec<_>>()
        .join("x")
}

/// How a change was made, in words.
fn method_text(t: &ChangeReport) -> String {
    if t.method == "rebuilt" {
        return match t.kind {
            Kind::Sincos => "sine-cosine table built anew".into(),
            _ => "built anew by its construction".into(),
        };
    }
    let mut options = match (t.kernel, t.coords, t.edges) {
        (Some(k), Some(c), Some(e)) => format!("{k}, {c}, {e}"),
        _ => t.method.to_string(),
    };
    if let Some(a) = t.cubic_a {
        let _ = write!(options, ", a = {a}");
    }
    if t.antialias {
        options.push_str(", antialiased");
    }
    options
}

/// What `scan` says about a grid-dependent tensor other than an absolute table: its kind, what
/// it spans, and what a resize does to it.
fn encoding_lines(e: &Encoding) -> Vec<String> {
    match e {
        Encoding::Window(t) => {
            let mut lines = vec![format!(
                "{} {:?}  window_relative: window {}x{}, {}{}",
                t.dtype,
                t.shape,
                t.window[0],
                t.window[1],
                plural(t.heads, "head", "heads"),
                if t.class_rows { ", 3 class rows" } else { "" }
            )];
            lines.push(match t.follows {
                window::Follows::Grid => {
                    "spans the patch grid: follows --grid/--image; offsets resampled, class rows kept".into()
                }
                window::Follows::Window => {
                    "follows --window; offsets resampled".into()
                }
            });
            if let Some(ix) = &t.index {
                lines.push(format!("index buffer rebuilt: {ix}"));
            }
            for m in &t.masks {
                lines.push(format!(
                    "mask rebuilt for the stage's new map: {} ({}x{} map, shift {}x{})",
                    m.name, m.map[0], m.map[1], m.shift[0], m.shift[1]
                ));
            }
            lines.extend(t.notes.iter().map(|n| format!("note: {n}")));
            lines
        }
        Encoding::Axial(t) => vec![
            format!(
                "{} {:?}  axial_relative: {} axis, span {}",
                t.dtype,
                t.shape,
                format!("{:?}", t.axis).to_lowercase(),
                t.span
            ),
            match t.follows {
                axial::Span::Grid => {
                    "global block: follows --grid/--image; 1-D linear, half-pixel".into()
                }
                axial::Span::Window => {
                    "windowed block: follows --window; 1-D linear, half-pixel".into()
                }
            },
        ],
        Encoding::Rotary(b) => vec![
            format!(
                "{} {:?}  rotary: {}x{} grid, theta {}, pre-training side {}, {} channels per axis",
                b.dtype, b.shape, b.grid[0], b.grid[1], b.theta, b.pretrain_side, b.axis_dim
            ),
            format!(
                "rebuilt by the construction for the new grid{}",
                if b.companions.is_empty() {
                    String::new()
                } else {
                    format!(", with {}", b.companions.join(", "))
                }
            ),
        ],
        Encoding::Patch(k) => vec![
            format!(
                "{} {:?}  patch_kernel: {}x{} patches, {} input channels, dim {}",
                k.dtype, k.shape, k.patch[0], k.patch[1], k.channels, k.dim
            ),
            "resized for --new-patch by the pseudo-inverse method (bias unchanged)".into(),
        ],
        Encoding::Temporal(t) => vec![
            format!(
                "{} {:?}  temporal: {} frames, dim {}",
                t.dtype, t.shape, t.frames, t.dim
            ),
            "follows --frames (or the T of --grid TxHxW); resampled in 1-D".into(),
        ],
    }
}

/// The readable summary of a resize.
pub fn resize_text(r: &ResizeReport) -> String {
    let mut s = String::new();
    if r.nothing_to_do {
        push_line(
            &mut s,
            format!(
                "{}: already at the target grid ({}); nothing written",
                r.input.display(),
                r.already_at_target.join(", ")
            ),
        );
        return s;
    }
    for t in &r.tables {
        push_line(
            &mut s,
            format!(
                "{}: {} -> {} ({} kept; {}; {} {:?} -> {:?})",
                t.name,
                sides(&t.from),
                sides(&t.to),
                plural(t.slots, "slot", "slots"),
                method_text(t),
                t.dtype,
                t.shape,
                t.new_shape
            ),
        );
        if let Some(f) = t.fidelity {
            push_line(
                &mut s,
                format!(
                    "    fidelity {f:.3} (similarity maps before and after agree; 1 is perfect)"
                ),
            );
        }
    }
    if !r.companions.is_empty() {
        push_line(
            &mut s,
            format!("rewritten with them: {}", r.companions.join(", ")),
        );
    }
    if !r.already_at_target.is_empty() {
        push_line(
            &mut s,
            format!("already at target: {}", r.already_at_target.join(", ")),
        );
    }
    let size = r.output_size as f64 / (1 << 20) as f64;
    if r.dry_run {
        push_line(
            &mut s,
            format!(
                "dry run: would write {} ({size:.1} MiB, {} copied unchanged)",
                r.output.display(),
                plural(r.copied.len(), "tensor", "tensors")
            ),
        );
    } else {
        push_line(
            &mut s,
            format!(
                "wrote {} ({size:.1} MiB, {} copied unchanged)",
                r.output.display(),
                plural(r.copied.len(), "tensor", "tensors")
            ),
        );
    }
    for c in &r.config_changes {
        push_line(
            &mut s,
            format!("{}: {} {} -> {}", c.file, c.path.join("."), c.old, c.new),
        );
    }
    if r.bytes_shared > 0 {
        push_line(
            &mut s,
            format!(
                "{:.1} MiB cloned (blocks shared on disk with the input), {:.1} MiB in new blocks",
                r.bytes_shared as f64 / (1 << 20) as f64,
                r.bytes_copied as f64 / (1 << 20) as f64
            ),
        );
    }
    if let Some(m) = &r.map {
        push_line(&mut s, format!("similarity maps: {}", m.display()));
    }
    s
}

/// The readable summary of a map.
pub fn map_text(r: &MapReport) -> String {
    let mut s = format!(
        "{}: {} ({}x{}), {}x{} reference positions",
        r.output.display(),
        r.tensor,
        r.grid[0],
        r.grid[1],
        r.refs[0],
        r.refs[1]
    );
    if let (Some(g), Some(f)) = (r.after_grid, &r.fidelity) {
        let _ = write!(
            s,
            "; after {}x{}: {}",
            g[0],
            g[1],
            crate::figure::fidelity_text(f)
        );
    }
    let mut out = String::new();
    push_line(&mut out, s);
    out
}

/// Warnings for stderr (stdout is kept for results), one line each, made visible.
pub fn warnings_text(warnings: &[String]) -> String {
    let mut s = String::new();
    for w in warnings {
        push_line(&mut s, format!("posgrid: warning: {w}"));
    }
    s
}
