//! The command line: flags parsed with clap, the library called, results printed. Errors are
//! printed once, by `main`, with their exit code.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};

use clap::{Args, Parser, Subcommand};

use crate::checkpoint::Format;
use crate::checkpoint::{Source, TensorSource};
use crate::error::{Error, Result, EXIT_NO_TABLE, EXIT_OK};
use crate::figure;
use crate::kinds::patch::Flatten;
use crate::kinds::{self, Channels, Hints};
use crate::plan::{Frames, Relative, Request, Target};
use crate::report::{self, ScanReport};
use crate::resample::{Antialias, Coords, Edges, Kernel, Options, DEFAULT_CUBIC_A};
use crate::resize::{self, ResizeJob};
use crate::selection::SelectionRequest;
use crate::similarity::DEFAULT_REFS;

const EXIT_CODES: &str = "\
Exit codes:
  0    success, or nothing to do (tables already at the target grid)
  2    usage: a bad flag or value, or options that do not fit together
  3    invalid input: the file cannot be read or is not a valid checkpoint
  4    no position table found, a named tensor is missing, or a table is ambiguous
  5    the output cannot be written (exists, is the input, no space, ...); nothing is left behind
  6    a table is refused: non-finite values, integer dtype, or over the memory guard
  130  interrupted by SIGINT, SIGTERM or SIGHUP; nothing is left behind";

/// Resample the position tables of vision-transformer checkpoints to a new patch grid.
#[derive(Debug, Parser)]
#[command(name = "posgrid", version, after_long_help = EXIT_CODES)]
#[command(
    long_about = "Resample the position tables of vision-transformer checkpoints to a new \
patch grid, so a model pre-trained at one input size loads and fine-tunes at another. posgrid \
finds the tables whatever their names, keeps the class slots, follows the ONNX Resize conventions \
exactly, and writes a patched checkpoint that is byte-identical everywhere else."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// List the position tables of a checkpoint: slots, grid, patch size, kind, companions.
    #[command(after_long_help = concat!("Examples:\n  posgrid scan model.safetensors\n  posgrid scan model.safetensors --json | jq '.tables[].grid'\n\n", "Exit codes: 0 tables found; 3 invalid file; 4 no table, or an ambiguous one."))]
    Scan(ScanArgs),
    /// Write a copy of a checkpoint whose position tables are resampled to a new grid.
    #[command(after_long_help = concat!("Examples:\n  posgrid resize vit-224.safetensors -o vit-384.safetensors --image 384\n  posgrid resize ckpt.safetensors -o out.safetensors --grid 24x32 --kernel bilinear\n  posgrid resize ckpt.safetensors -o out.safetensors --grid 24 --dry-run --json\n\n", "Exit codes: 0 written or nothing to do; 2 usage; 3 invalid input; 4 no or ambiguous table;\n5 cannot write (nothing left behind); 6 table refused; 130 interrupted."))]
    Resize(Box<ResizeArgs>),
    /// Draw cosine-similarity maps of a table (before and after, given two files) to a PNG.
    #[command(after_long_help = concat!("Examples:\n  posgrid map vit-224.safetensors -o maps.png\n  posgrid map vit-224.safetensors vit-384.safetensors -o before-after.png --json\n\n", "Each tile shows how similar one reference position is to every position of the grid, on a\n",
    "diverging scale over [-1, 1]. With two files, the same relative reference positions are drawn\n",
    "side by side and the fidelity score compares them.\n\n",
    "Exit codes: 0 written; 2 usage; 3 invalid input; 4 no table, several without --tensor, or tables\n",
    "of different widths; 5 cannot write; 6 refused (over --memory-limit, or out of memory)."))]
    Map(MapArgs),
}

#[derive(Debug, Args)]
pub struct MapArgs {
    /// The checkpoint to draw (the "before" one when AFTER is given).
    pub checkpoint: PathBuf,
    /// A resized copy of it: draws both side by side and scores the fidelity.
    pub after: Option<PathBuf>,
    /// Where to write the PNG.
    #[arg(short, long, value_name = "PNG")]
    pub output: PathBuf,
    /// Reference positions per axis (spread evenly over the grid).
    #[arg(long, value_name = "N", default_value_t = DEFAULT_REFS, value_parser = parse_refs)]
    pub refs: usize,
    /// Print one JSON object on stdout (with the fidelity and the distance profiles).
    #[arg(long)]
    pub json: bool,
    /// Replace the PNG if it exists.
    #[arg(long)]
    pub force: bool,
    /// Refuse tables and maps that would need more memory than this (e.g. 512M, 8G); large
    /// grids get fewer reference positions.
    #[arg(long, value_name = "SIZE", value_parser = parse_size, default_value = "4G")]
    pub memory_limit: u64,
    #[command(flatten)]
    pub discovery: DiscoveryArgs,
}

/// How discovery reads the file; the same flags for every command.
#[derive(Debug, Args, Clone)]
pub struct DiscoveryArgs {
    /// The source grid as HxW (or N for NxN; TxHxW for a video grid of T frames), when the
    /// row count alone does not tell it.
    #[arg(long, value_name = "HxW", value_parser = parse_grid_frames)]
    pub source_grid: Option<GridArg>,
    /// The number of leading class slots (class token, distillation token, ...).
    #[arg(long, value_name = "N")]
    pub slots: Option<usize>,
    /// The patch size in pixels, when no patch-projection kernel tells it.
    #[arg(long, value_name = "P", value_parser = clap::value_parser!(u32).range(1..))]
    pub patch: Option<u32>,
    /// Only this table (repeatable). Also forces a tensor discovery did not pick by name.
    #[arg(long = "tensor", value_name = "NAME")]
    pub tensors: Vec<String>,
    /// Where the channels of a 4-D table sit: last ([1, H, W, D]) or first ([1, D, H, W]).
    #[arg(long, value_name = "ORDER", value_parser = parse_text::<Channels>)]
    pub channels: Option<Channels>,
    /// How a linear patch embedding [D, C*p*p] flattens a patch: cyx (channel by channel) or
    /// yxc (pixel by pixel), when its values do not tell.
    #[arg(long, value_name = "ORDER", value_parser = parse_text::<Flatten>)]
    pub patch_order: Option<Flatten>,
}

impl DiscoveryArgs {
    fn hints(&self) -> Hints {
        Hints {
            source_grid: self.source_grid.map(|g| (g.h, g.w)),
            source_frames: self.source_grid.and_then(|g| g.frames),
            slots: self.slots,
            patch: self.patch.map(|p| p as usize),
            tensors: self.tensors.clone(),
            channels: self.channels,
            patch_order: self.patch_order,
            new_patch: None,
            recorded_grid: None,
        }
    }
}

#[derive(Debug, Args)]
pub struct ScanArgs {
    /// The checkpoint: a .safetensors, .npz or PyTorch (.pth, .pt, .bin) file, or a sharded set
    /// (directory or index .json).
    pub checkpoint: PathBuf,
    /// Print one JSON object on stdout instead of the summary.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub discovery: DiscoveryArgs,
}

#[derive(Debug, Args)]
#[command(group(clap::ArgGroup::new("target").required(true).args(["grid", "image", "scale"])))]
pub struct ResizeArgs {
    /// The checkpoint to read: a .safetensors, .npz or PyTorch (.pth, .pt, .bin) file, or a
    /// sharded set (its directory or index .json). It is never changed.
    pub checkpoint: PathBuf,
    /// Where to write the patched checkpoint (a directory for a sharded set).
    #[arg(short, long, value_name = "OUT")]
    pub output: PathBuf,
    /// Target patch grid: HxW, or N for NxN; TxHxW for a video grid of T frames.
    #[arg(long, value_name = "HxW", value_parser = parse_grid_frames)]
    pub grid: Option<GridArg>,
    /// Target input image size in pixels: HxW, or N for NxN. The grid is image / patch size.
    #[arg(long, value_name = "HxW", value_parser = parse_grid)]
    pub image: Option<(usize, usize)>,
    /// Scale factors instead of a size: S or SYxSX, each a decimal or a fraction A/B.
    #[arg(
        long,
        value_name = "S",
        value_parser = parse_scale,
        long_help = "Scale factors instead of a target size: S for both axes or SYxSX, each a decimal (1.5) or a \
fraction A/B (24.1/14, so that a nudged size is written as it is meant). Each side becomes floor(side * S) and \
absolute tables are sampled with S itself: x_src = (x + 0.5)/S - 0.5 (the ONNX Resize scales input; a framework \
interpolate given scale_factor), not with the ratio of the sizes. align-corners ignores S, as in the standard. \
Other kinds take the sizes the scale gives."
    )]
    pub scale: Option<(f64, f64)>,
    /// Target input frames of a video model: the time axis is frames / tubelet size (the
    /// 5-D patch kernel's); --grid TxHxW gives it directly instead.
    #[arg(long, value_name = "T", value_parser = clap::value_parser!(u32).range(1..))]
    pub frames: Option<u32>,
    #[command(flatten)]
    pub discovery: DiscoveryArgs,
    /// Interpolation kernel.
    #[arg(long, default_value = "bicubic", value_parser = parse_text::<Kernel>,
          long_help = "Interpolation kernel: nearest (ONNX nearest, round_prefer_floor), bilinear (ONNX linear), \
bicubic (ONNX cubic with --cubic-a), lanczos3 (normalised three-lobe Lanczos), area (box average over each \
output cell; half-pixel only).")]
    pub kernel: Kernel,
    /// Coordinate mapping: half-pixel or align-corners.
    #[arg(long, default_value = "half-pixel", value_parser = parse_text::<Coords>,
          long_help = "Coordinate mapping from output to source: half-pixel, x_src = (x + 0.5) * in/out - 0.5 \
(ONNX half_pixel); align-corners, x_src = x * (in - 1)/(out - 1) (ONNX align_corners).")]
    pub coords: Coords,
    /// Out-of-range taps: clamp (border value) or renormalize (drop and rescale).
    #[arg(long, default_value = "clamp", value_parser = parse_text::<Edges>,
          long_help = "Kernel taps outside the grid: clamp reads the border value (ONNX exclude_outside = 0); \
renormalize drops them and rescales the rest to sum to 1 (ONNX exclude_outside = 1).")]
    pub edges: Edges,
    /// Antialiasing: off, on, or auto (on for a shrinking axis).
    #[arg(long, default_value = "auto", value_parser = parse_text::<Antialias>,
          long_help = "Antialiasing: on stretches the kernel by the shrink factor on a shrinking axis and \
normalises its weights (ONNX antialias = 1); off never; auto is on for an axis that shrinks, off for one that grows.")]
    pub antialias: Antialias,
    /// The bicubic parameter a (ONNX cubic_coeff_a).
    #[arg(long, default_value_t = DEFAULT_CUBIC_A, allow_negative_numbers = true, value_name = "A")]
    pub cubic_a: f64,
    /// A new patch size P or PxQ: patch-projection kernels resized so every patch projects as
    /// before; the grid then follows --image / P.
    #[arg(
        long,
        value_name = "P",
        value_parser = parse_grid,
        long_help = "A new patch size, P or PxQ pixels. Every patch-projection kernel ([D, C, p, p], channels \
last [p, p, C, D], or a linear patch embedding [D, C*p*p] / [C*p*p, D], see --patch-order) is resized by the \
pseudo-inverse method: with B the matrix that resizes a p x p patch to P x Q (bilinear, half-pixel, \
antialiased when shrinking), the new kernel is pinv(B^T) w, so that <x, w> = <Bx, w'> for every patch x when \
enlarging (in the least-squares sense when shrinking); computed in f64, bias unchanged. The grid follows \
--image / P, and the position tables are resampled to it in the same run. Without a kernel to resize the \
run is refused (exit 4)."
    )]
    pub new_patch: Option<(usize, usize)>,
    /// Leave the configuration files of a directory output as they are.
    #[arg(
        long,
        long_help = "Leave the configuration files of a model directory or sharded set as they are. By default \
the keys that record the input resolution and patch size (image_size, patch_size, at the top level or in a \
nested vision section; a preprocessing file's size and crop_size when they equal the old input size) are set \
to the new values, every other byte kept, and each change is reported (config_changes)."
    )]
    pub keep_config: bool,
    /// Print what would change, write nothing.
    #[arg(long)]
    pub dry_run: bool,
    /// Print one JSON object on stdout instead of the summary.
    #[arg(long)]
    pub json: bool,
    /// Replace OUT if it exists.
    #[arg(long)]
    pub force: bool,
    /// Print nothing on success (errors still go to stderr).
    #[arg(short, long)]
    pub quiet: bool,
    /// Skip syncing the output to disk before the rename (still atomic; for scratch outputs).
    #[arg(
        long,
        long_help = "Skip syncing the output to disk before the rename. The rename is still atomic, \
so the output is whole or absent; but after a power loss a recent output may be lost. For scratch outputs that \
can be regenerated."
    )]
    pub no_sync: bool,
    /// New attention window of window-relative and per-axis tables: HxW, or N for NxN.
    #[arg(
        long,
        value_name = "HxW",
        value_parser = parse_grid,
        long_help = "The new attention window of window-relative bias tables without class rows and of \
per-axis tables of windowed blocks: HxW, or N for NxN. Their index buffers and shifted-window masks are \
rebuilt with them. Tables that span the whole patch grid (BEiT-style tables with class rows, per-axis tables \
of global blocks) follow --grid/--image instead. Default: windows unchanged."
    )]
    pub window: Option<(usize, usize)>,
    /// How window-relative tables are resampled: kernel or geometric.
    #[arg(
        long,
        value_name = "METHOD",
        default_value = "kernel",
        value_parser = parse_text::<Relative>,
        long_help = "How window-relative bias tables are resampled: kernel uses the engine with --kernel, \
--coords, --edges, --antialias and --cubic-a on the [2Wh-1, 2Ww-1] grid of offsets, like any other grid; \
geometric spaces the source offsets by a geometric progression whose ratio, found by bisection, puts the far \
edge on the new half-width, and interpolates with a bicubic spline through the data points (not-a-knot ends), \
as BEiT-style fine-tuning code does. Class rows are kept as they are either way."
    )]
    pub relative: Relative,
    /// Build fixed sine-cosine tables anew on the target grid instead of resampling them.
    #[arg(
        long,
        long_help = "Build tables that follow the fixed 2-D sine-cosine construction (scan shows \
kind sincos) anew on the target grid, with the same axis order, instead of resampling them. Class rows are \
kept as they are. Learned tables are resampled as usual."
    )]
    pub rebuild_sincos: bool,
    /// Resize tables that hold NaN or infinity instead of refusing them.
    #[arg(long)]
    pub allow_nonfinite: bool,
    /// Output container: safetensors, npz or pytorch (default: OUT's extension, else the input's).
    #[arg(long, value_name = "FORMAT", value_parser = parse_text::<Format>)]
    pub format: Option<Format>,
    /// Which state dict of a PyTorch file a flat output holds (its key path, e.g. model).
    #[arg(
        long,
        value_name = "PATH",
        long_help = "Which state dict of a PyTorch file a flat output (.safetensors, .npz, or .pth with \
--model-only) holds, by its key path as scan shows it: model, model_ema, teacher, state_dict ... Default: \
the one dict that holds the position tables."
    )]
    pub state_dict: Option<String>,
    /// Remove this prefix from every written tensor name (e.g. module.).
    #[arg(long, value_name = "TEXT")]
    pub strip_prefix: Option<String>,
    /// For a PyTorch output: write only the model's state dict (optimizer and the rest dropped).
    #[arg(
        long,
        long_help = "For a PyTorch output: write only the model's state dict (the one --state-dict names, \
or the one holding the position tables) as one ordered dict; optimizer state, schedulers, epoch counters \
and other entries are dropped and listed. The usual first step before fine-tuning from a training checkpoint."
    )]
    pub model_only: bool,
    /// Also draw before/after similarity maps of the first resized table to this PNG.
    #[arg(long, value_name = "PNG")]
    pub map: Option<PathBuf>,
    /// Reference positions per axis for the maps and the fidelity score.
    #[arg(long, value_name = "N", default_value_t = DEFAULT_REFS, value_parser = parse_refs)]
    pub refs: usize,
    /// Refuse a table whose output would need more memory than this (e.g. 512M, 8G).
    #[arg(long, value_name = "SIZE", value_parser = parse_size, default_value = "4G")]
    pub memory_limit: u64,
}

fn parse_refs(s: &str) -> std::result::Result<usize, String> {
    match s.parse::<usize>() {
        Ok(n) if (1..=64).contains(&n) => Ok(n),
        _ => Err(format!("\"{s}\" is not a count from 1 to 64")),
    }
}

fn parse_text<T: std::str::FromStr<Err = String>>(s: &str) -> std::result::Result<T, String> {
    s.parse()
}

/// `HxW`, `H×W` or `N` (square), each side at least 1.
pub fn parse_grid(s: &str) -> std::result::Result<(usize, usize), String> {
    let side = |t: &str| -> std::result::Result<usize, String> {
        match t.trim().parse::<usize>() {
            Ok(0) => Err(format!("\"{s}\": sides must be at least 1")),
            Ok(v) => Ok(v),
            Err(_) => Err(format!(
                "\"{s}\" is not HxW or N (for example 24x24, 384 or 24x32)"
            )),
        }
    };
    match s.split_once(['x', 'X', '×']) {
        Some((h, w)) => Ok((side(h)?, side(w)?)),
        None => side(s).map(|n| (n, n)),
    }
}

/// A grid of one or two sides, with the frames of a video grid in front.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct GridArg {
    pub frames: Option<usize>,
    pub h: usize,
    pub w: usize,
}

/// `HxW`, `N` (square) or `TxHxW` (a video grid of T frames), each side at least 1.
pub fn parse_grid_frames(s: &str) -> std::result::Result<GridArg, String> {
    let parts: Vec<&str> = s.split(['x', 'X', '×']).collect();
    if parts.len() == 3 {
        let (t, _) = parse_grid(parts[0])?;
        let (h, w) = parse_grid(&format!("{}x{}", parts[1], parts[2]))
            .map_err(|_| format!("\"{s}\" is not TxHxW (for example 8x14x14)"))?;
        return Ok(GridArg {
            frames: Some(t),
            h,
            w,
        });
    }
    parse_grid(s).map(|(h, w)| GridArg { frames: None, h, w })
}

/// `S` or `SYxSX`, each a positive decimal or a fraction `A/B` of positive decimals.
pub fn parse_scale(s: &str) -> std::result::Result<(f64, f64), String> {
    let factor = |t: &str| -> std::result::Result<f64, String> {
        let number = |u: &str| {
            u.trim()
                .parse::<f64>()
                .ok()
                .filter(|v| v.is_finite() && *v > 0.0)
        };
        let value = match t.split_once('/') {
            Some((a, b)) => number(a).zip(number(b)).map(|(a, b)| a / b),
            None => number(t),
        };
        value.filter(|v| v.is_finite() && *v > 0.0).ok_or_else(|| {
            format!("\"{s}\" is not S or SYxSX with positive decimals or fractions A/B (for example 1.5, 24.1/14 or 2x1.5)")
        })
    };
    match s.split_once(['x', 'X', '×']) {
        Some((a, b)) => Ok((factor(a)?, factor(b)?)),
        None => factor(s).map(|v| (v, v)),
    }
}

/// A byte count with an optional K, M, G or T suffix (powers of 1024; `B`, `iB` accepted).
pub fn parse_size(s: &str) -> std::result::Result<u64, String> {
    let t = s.trim();
    let t = t
        .strip_suffix("iB")
        .or_else(|| t.strip_suffix('B'))
        .unwrap_or(t);
    let (digits, shift) = match t.chars().last() {
        Some('K' | 'k') => (&t[..t.len() - 1], 10),
        Some('M' | 'm') => (&t[..t.len() - 1], 20),
        Some('G' | 'g') => (&t[..t.len() - 1], 30),
        Some('T' | 't') => (&t[..t.len() - 1], 40),
        _ => (t, 0),
    };
    let n: u64 = digits
        .trim()
        .parse()
        .map_err(|_| format!("\"{s}\" is not a size such as 512M or 4G"))?;
    n.checked_mul(1u64 << shift)
        .ok_or_else(|| format!("\"{s}\" is too large"))
}

/// Run a parsed command line; returns the exit code for a run that did not fail.
pub fn run(cli: Cli) -> Result<i32> {
    match cli.command {
        Command::Scan(args) => scan(args),
        Command::Resize(args) => resize_cmd(*args),
        Command::Map(args) => map_cmd(args),
    }
}

fn map_cmd(args: MapArgs) -> Result<i32> {
    let report = figure::run(
        &args.checkpoint,
        args.after.as_deref(),
        &args.discovery.hints(),
        args.refs,
        &args.output,
        args.force,
        args.memory_limit,
    )?;
    print_warnings(&report.warnings);
    if args.json {
        print_json(&report);
    } else {
        print_text(&report::map_text(&report));
    }
    Ok(EXIT_OK)
}

/// Results on stdout. A closed or full stdout (a pipe whose reader left, /dev/full) loses the
/// printout but not the outcome: the work is done and the exit status still tells.
fn print_text(text: &str) {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    let _ = out.write_all(text.as_bytes()).and_then(|()| out.flush());
}

fn print_json<T: serde::Serialize>(value: &T) {
    print_text(&(serde_json::to_string_pretty(value).expect("reports serialise") + "\n"));
}

/// Warnings go to stderr, so stdout holds only the result a script reads; a closed stderr
/// loses them, nothing else.
fn print_warnings(warnings: &[String]) {
    use std::io::Write;
    let _ = std::io::stderr().write_all(report::warnings_text(warnings).as_bytes());
}

/// A `--tensor` name the checkpoint does not hold is an error for every command (exit 4).
fn check_named_tensors(ckpt: &Source, names: &[String]) -> Result<()> {
    match names.iter().find(|n| ckpt.find(n).is_none()) {
        Some(name) => Err(Error::table(
            &ckpt_path(ckpt),
            format!("--tensor {name}: no tensor of that name in the checkpoint"),
        )),
        None => Ok(()),
    }
}

fn ckpt_path(ckpt: &Source) -> PathBuf {
    ckpt.source_path().to_path_buf()
}

/// What `scan --json` prints, as a library call: open, check the named tensors, discover
/// (with the grid a configuration file beside the checkpoint records, unless `hints` has one).
pub fn scan_report(checkpoint: &Path, hints: &Hints) -> Result<ScanReport> {
    let ckpt = Source::open(checkpoint)?;
    check_named_tensors(&ckpt, &hints.tensors)?;
    let hints = Hints {
        recorded_grid: hints
            .recorded_grid
            .clone()
            .or_else(|| crate::config_files::grid_beside(&ckpt, checkpoint)),
        ..hints.clone()
    };
    let mut found = kinds::discover(&ckpt, &hints)?;
    found.warnings.extend(ckpt.notes());
    Ok(ScanReport::new(checkpoint, &ckpt, found))
}

fn scan(args: ScanArgs) -> Result<i32> {
    let report = scan_report(&args.checkpoint, &args.discovery.hints())?;
    if args.json {
        print_json(&report);
    } else {
        print_text(&report::scan_text(&report));
    }
    print_warnings(&report.discovery.warnings);
    Ok(if report.is_conclusive() {
        EXIT_OK
    } else {
        EXIT_NO_TABLE
    })
}

/// The job a `resize` command line asks for, with its usage checks (exit 2). A progress bar
/// is drawn only for a terminal, without `--quiet` and `--json`.
pub fn resize_job(args: &ResizeArgs) -> Result<ResizeJob> {
    if !args.cubic_a.is_finite() {
        return Err(Error::Usage("--cubic-a must be a finite number".into()));
    }
    let target = match (args.grid, args.image) {
        (Some(g), None) => Target::Grid(g.h, g.w),
        (None, Some((h, w))) => Target::Image(h, w),
        (None, None) if args.scale.is_some() => {
            let (sy, sx) = args.scale.expect("checked");
            Target::Scale(sy, sx)
        }
        _ => {
            return Err(Error::Usage(
                "give exactly one of --grid and --image".into(),
            ))
        }
    };
    let frames = match (args.grid.and_then(|g| g.frames), args.frames) {
        (Some(_), Some(_)) => return Err(Error::Usage(
            "--grid TxHxW gives the time axis already; --frames is for --image (or a 2-D --grid)"
                .into(),
        )),
        (Some(t), None) => Some(Frames::Grid(t)),
        (None, f) => f.map(|f| Frames::Input(f as usize)),
    };
    Ok(ResizeJob {
        input: args.checkpoint.clone(),
        output: args.output.clone(),
        hints: Hints {
            new_patch: args.new_patch,
            ..args.discovery.hints()
        },
        request: Request {
            target,
            tensors: args.discovery.tensors.clone(),
            options: Options {
                kernel: args.kernel,
                coords: args.coords,
                edges: args.edges,
                antialias: args.antialias,
                cubic_a: args.cubic_a,
            },
            allow_nonfinite: args.allow_nonfinite,
            memory_limit: args.memory_limit,
            rebuild_sincos: args.rebuild_sincos,
            window: args.window,
            frames,
            relative: args.relative,
            new_patch: args.new_patch,
        },
        dry_run: args.dry_run,
        force: args.force,
        sync: !args.no_sync,
        progress: !args.quiet && !args.json && std::io::stderr().is_terminal(),
        refs: args.refs,
        map: args.map.clone(),
        format: args.format,
        selection: SelectionRequest {
            state_dict: args.state_dict.clone(),
            strip_prefix: args.strip_prefix.clone(),
            model_only: args.model_only,
        },
        keep_config: args.keep_config,
    })
}

fn resize_cmd(args: ResizeArgs) -> Result<i32> {
    let report = resize::run(&resize_job(&args)?)?;
    if args.json {
        print_json(&report);
    } else if !args.quiet {
        print_text(&report::resize_text(&report));
    }
    if !args.quiet {
        print_warnings(&report.warnings);
    }
    Ok(EXIT_OK)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grids_and_sizes_parse() {
        assert_eq!(parse_grid("24x32"), Ok((24, 32)));
        assert_eq!(parse_grid("384"), Ok((384, 384)));
        assert!(parse_grid("0x4").is_err());
        assert!(parse_grid("ax4").is_err());
        assert_eq!(parse_size("4G"), Ok(4 << 30));
        assert_eq!(parse_size("512MiB"), Ok(512 << 20));
        assert_eq!(parse_size("100"), Ok(100));
        assert!(parse_size("lots").is_err());
    }

    #[test]
    fn command_line_is_consistent() {
        use clap::CommandFactory;
        Cli::command().debug_assert();
    }
}
