//! The configuration files of a directory output (a model directory or a sharded set), updated
//! to the new size: the JSON files beside the weights that record the input resolution, patch
//! size and attention window get their new values, every other byte kept (see
//! [`crate::config`]). Files that cannot be read as such are copied as they are, with a warning.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::config::{self, Request, WindowMove};
use crate::error::{Error, Result};
use crate::plan::Plan;

/// One configuration value changed, for the report.
#[derive(Debug, Clone, Serialize)]
pub struct ConfigChange {
    /// The file's name in the output directory.
    pub file: String,
    /// The key path inside it.
    pub path: Vec<String>,
    pub old: serde_json::Value,
    pub new: serde_json::Value,
}

/// The new contents of the configuration files, the changes, and the warnings.
#[derive(Debug, Default)]
pub struct Updates {
    pub edits: Vec<(PathBuf, Vec<u8>)>,
    pub changes: Vec<ConfigChange>,
    pub warnings: Vec<String>,
}

/// The model's grid before and after and its patch size, from the first change that moves the
/// patch grid itself (an absolute table, a window-relative table spanning the grid, rotary
/// buffers).
pub fn model_sizes(plan: &Plan) -> Option<GridSizes> {
    plan.changes.iter().find_map(|c| c.grid_change())
}

/// The attention windows `plan` moves (tables that follow `--window`), each old window once.
/// The per-axis tables of one block (`….rel_pos_h`, `….rel_pos_w`) make one window; an axis
/// none of them changes kept its side, which is then the new one.
pub fn window_moves(plan: &Plan) -> Vec<WindowMove> {
    let mut moves = BTreeSet::new();
    let mut blocks: HashMap<(&str, [usize; 2]), [Option<usize>; 2]> = HashMap::new();
    for change in &plan.changes {
        let Some((from, to)) = change.window_change() else {
            continue;
        };
        let old = match from {
            [Some(h), Some(w)] => [h, w],
            _ => {
                let block = crate::kinds::names::parent(change.name());
                let sides = blocks.entry((block, to)).or_default();
                for axis in 0..2 {
                    sides[axis] = sides[axis].or(from[axis]);
                }
                continue;
            }
        };
        moves.insert(moved(old, to));
    }
    for ((_, to), from) in blocks {
        moves.insert(moved(
            [from[0].unwrap_or(to[0]), from[1].unwrap_or(to[1])],
            to,
        ));
    }
    moves.into_iter().filter(|m| m.old != m.new).collect()
}

fn moved(old: [usize; 2], new: [usize; 2]) -> WindowMove {
    WindowMove {
        old: (old[0], old[1]),
        new: (new[0], new[1]),
    }
}

/// The model's grid before and after, and the patch size it is cut in (pixels).
type GridSizes = ([usize; 2], [usize; 2], usize);

/// What the configuration files are updated for: the input size from `grid` (the first change
/// that moves the patch grid, else the configuration's own record taken to the target), the
/// patch from the kernel the plan resizes (also where the grid stays), the windows of the
/// tables that follow `--window`. Errors: a new input size past what a configuration records.
fn request_for(grid: Option<GridSizes>, plan: &Plan) -> Result<Request> {
    let patches = plan.changes.iter().find_map(|c| c.patch_change());
    let (old_patch, new_patch) = patches.map_or_else(Default::default, |(from, to)| {
        ((from[0], from[1]), (to[0], to[1]))
    });
    let (old_image, new_image) = match grid {
        Some((from, to, patch)) => {
            let old = (from[0].saturating_mul(patch), from[1].saturating_mul(patch));
            (
                old,
                input_size(to, patches.map_or([patch, patch], |(_, to)| to))?,
            )
        }
        None => Default::default(),
    };
    Ok(Request {
        old_image,
        new_image,
        old_patch,
        new_patch,
        windows: window_moves(plan),
    })
}

/// The input size (height, width) of a `grid` of `patch`-pixel patches, refused past the
/// largest side a configuration records (posgrid would not read back what it wrote; a product
/// past 64 bits wrapped to 0).
fn input_size(grid: [usize; 2], patch: [usize; 2]) -> Result<(usize, usize)> {
    let side = |g: usize, p: usize| g.checked_mul(p).filter(|&s| s <= config::MAX_SIDE);
    match (side(grid[0], patch[0]), side(grid[1], patch[1])) {
        (Some(h), Some(w)) => Ok((h, w)),
        _ => Err(Error::Usage(format!(
            "a {}x{} grid of {}x{}-pixel patches takes {}x{}-pixel images, past the {} pixels a configuration records; choose a smaller target, or leave the configuration as it is with --keep-config",
            grid[0],
            grid[1],
            patch[0],
            patch[1],
            grid[0] as u128 * patch[0] as u128,
            grid[1] as u128 * patch[1] as u128,
            config::MAX_SIDE
        ))),
    }
}

/// Update the configuration files among `files` for `plan` (none with `keep`: only the
/// warnings of recorded sizes that disagree with the checkpoint). Errors: a target the
/// recorded input size cannot take (not with `keep`, which changes nothing).
pub fn updates(
    files: &[PathBuf],
    plan: &Plan,
    job: &crate::plan::Request,
    keep: bool,
) -> Result<Updates> {
    let mut out = Updates::default();
    let grid = match model_sizes(plan) {
        Some(sizes) => Some(sizes),
        None => {
            grid_from_config(files, plan, job).or_else(|e| if keep { Ok(None) } else { Err(e) })?
        }
    };
    let request = match request_for(grid, plan) {
        Err(_) if keep => Request {
            windows: window_moves(plan),
            ..Request::default()
        },
        other => other?,
    };
    if request == Request::default() {
        return Ok(out);
    }
    for path in files
        .iter()
        .filter(|p| p.extension().is_some_and(|e| e == "json"))
    {
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let file = update_file(path, grid, &request, keep)?;
        out.warnings.extend(bounded(&name, file.warnings));
        out.changes
            .extend(file.changes.into_iter().map(|c| ConfigChange {
                file: name.clone(),
                path: c.path,
                old: c.old,
                new: c.new,
            }));
        out.edits
            .extend(file.text.map(|t| (path.clone(), t.into_bytes())));
    }
    Ok(out)
}

/// Warnings of one file listed at most: a hostile configuration can hold hundreds of
/// thousands of keys that disagree with the checkpoint.
const MAX_FILE_WARNINGS: usize = 8;

/// `warnings` of the file `name`, prefixed with it, the first [`MAX_FILE_WARNINGS`] and a count
/// of the rest.
fn bounded(name: &str, warnings: Vec<String>) -> Vec<String> {
    let more = warnings.len().saturating_sub(MAX_FILE_WARNINGS);
    let mut out: Vec<String> = warnings
        .into_iter()
        .take(MAX_FILE_WARNINGS)
        .map(|w| format!("{name}: {w}"))
        .collect();
    if more > 0 {
        out.push(format!("{name}: {more} more warnings like these left out"));
    }
    out
}

/// What one configuration file becomes: its new text (`None`: copied as it is), the values
/// changed, and the warnings (without the file's name).
#[derive(Default)]
struct FileUpdate {
    text: Option<String>,
    changes: Vec<config::Change>,
    warnings: Vec<String>,
}

/// Read one configuration file and update it for `request` (only the warnings with `keep`).
/// Files that cannot be read as configurations are copied as they are, with a warning.
fn update_file(
    path: &Path,
    grid: Option<GridSizes>,
    request: &Request,
    keep: bool,
) -> Result<FileUpdate> {
    let mut out = FileUpdate::default();
    let Some(bytes) = read_capped(path)? else {
        out.warnings.push(format!(
            "over {} MiB, not read as a configuration; copied as it is",
            config::MAX_TEXT_BYTES >> 20
        ));
        return Ok(out);
    };
    let read =
        config::text_from_bytes(&bytes).and_then(|text| Ok((text, config::recorded_sizes(text)?)));
    let (text, recorded) = match read {
        Ok(read) => read,
        Err(e) => {
            out.warnings.push(format!(
                "not read as a configuration ({e}); copied as it is"
            ));
            return Ok(out);
        }
    };
    if let Some((from, _, patch)) = grid {
        let grid = (from[0], from[1]);
        out.warnings
            .extend(config::disagreements(&recorded, grid, patch));
    }
    out.warnings
        .extend(config::window_disagreements(&recorded, &request.windows));
    if keep {
        return Ok(out);
    }
    out.warnings
        .extend(config::unread_warnings(&recorded, request));
    if recorded.sizes.is_empty() {
        return Ok(out);
    }
    match config::update(text, request) {
        Ok((new_text, changes)) if !changes.is_empty() => {
            out.warnings
                .extend(config::crop_fit_warnings(&recorded, request));
            out.text = Some(new_text);
            out.changes = changes;
        }
        Ok(_) => {}
        Err(e) => out
            .warnings
            .push(format!("not updated ({e}); copied as it is")),
    }
    Ok(out)
}

/// A side file's bytes, or `None` past the configuration size cap (a hostile directory cannot
/// make posgrid read a huge file into memory; such a file is copied as it is).
fn read_capped(path: &Path) -> Result<Option<Vec<u8>>> {
    let (_, meta) = crate::checkpoint::open_regular(path)?;
    if meta.len() > config::MAX_TEXT_BYTES as u64 {
        return Ok(None);
    }
    crate::checkpoint::read_capped(path, config::MAX_TEXT_BYTES as u64, "a configuration file")
        .map(Some)
}

/// The patch grid a model configuration beside the checkpoint records (`image_size` / `patch_size`
/// of `config.json`, at the top level or in a vision section), with the file it came from:
/// evidence for a grid the row count alone does not settle (a non-square one).
pub fn recorded_grid(files: &[PathBuf]) -> Option<((usize, usize), String)> {
    let (grid, _, file) = recorded_grid_and_patch(files)?;
    Some((grid, file))
}

/// Rows and columns (of a grid, or of a patch in pixels).
type Sides = (usize, usize);

/// [`recorded_grid`] with the recorded patch `(p, q)`.
fn recorded_grid_and_patch(files: &[PathBuf]) -> Option<(Sides, Sides, String)> {
    let config = files
        .iter()
        .find(|p| p.file_name().is_some_and(|n| n == "config.json"))?;
    let bytes = read_capped(config).ok()??;
    let recorded = config::recorded_sizes(config::text_from_bytes(&bytes).ok()?).ok()?;
    let find = |key: config::SizeKey| {
        recorded
            .sizes
            .iter()
            .find(|s| s.key == key)
            .and_then(|s| s.value.pair())
    };
    let (h, w) = find(config::SizeKey::ImageSize)?;
    let (p, q) = find(config::SizeKey::PatchSize)?;
    let fits = p > 0 && q > 0 && h % p == 0 && w % q == 0;
    fits.then(|| ((h / p, w / q), (p, q), config.display().to_string()))
}

/// The model's grid before and after when no tensor of `plan` holds it (a windowed model whose
/// checkpoint stores no masks: its tables follow the window, not the grid): the grid and patch
/// `config.json` records, taken to the request's target. `None` when nothing changes or the
/// configuration records no square patch; an error when the target cannot apply to the
/// recorded grid (an image the patch does not divide, a scale that leaves no patch).
fn grid_from_config(
    files: &[PathBuf],
    plan: &Plan,
    request: &crate::plan::Request,
) -> Result<Option<GridSizes>> {
    if plan.changes.is_empty() {
        return Ok(None);
    }
    let Some(((h, w), (p, q), file)) = recorded_grid_and_patch(files) else {
        return Ok(None);
    };
    if p != q {
        return Ok(None);
    }
    let sides = request.new_patch.map_or([p, q], |(a, b)| [a, b]);
    let recorded = "the input size it records";
    let new = request
        .target
        .grid_for(Path::new(&file), recorded, [h, w], Some(sides))
        .map_err(|e| match e {
            Error::Usage(m) => Error::Usage(format!(
                "{m}; or leave the configuration as it is with --keep-config"
            )),
            other => other,
        })?;
    Ok(Some(([h, w], new, p)))
}

/// [`recorded_grid`] for the configuration files that go with `source` opened from `input`:
/// those of its model directory or set, or those beside a single file.
pub fn grid_beside(
    source: &crate::checkpoint::Source,
    input: &Path,
) -> Option<((usize, usize), String)> {
    use crate::checkpoint::sharded::ShardedSet;
    let files = match (source.directory(), source.downcast::<ShardedSet>()) {
        (Some(md), _) => md.others.clone(),
        (None, Some(set)) => set.other_files().ok()?,
        (None, None) => crate::checkpoint::directory::configs_beside(input),
    };
    recorded_grid(&files)
}
