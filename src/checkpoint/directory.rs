//! Model directories: one checkpoint file (any container posgrid reads) beside its
//! configuration, preprocessing configuration and other files, as models are usually
//! distributed. The weights are read like a file; every other regular file of the directory,
//! hidden ones included, and its sub-directories go to the output directory (configuration
//! files at the top updated to the new size). A directory with a shard index is a sharded set instead (see `sharded`).

use std::collections::HashSet;
use std::fs;
use std::path::{Path, PathBuf};

use super::Format;
use crate::error::{Error, FormatProblem, Result};

/// Files a training run writes beside the weights that are not model weights (common practice
/// of a widely used trainer's checkpoint folders, from memory): copied like configuration.
const NOT_WEIGHTS: [&str; 5] = [
    "training_args.bin",
    "optimizer.pt",
    "scheduler.pt",
    "scaler.pt",
    "optimizer.bin",
];

/// The most entries a model directory may list, sub-directories included (bounded work on a
/// hostile directory).
const MAX_ENTRIES: usize = 10_000;

/// Sub-directories deeper than this are not copied (named in a warning).
const MAX_DEPTH: usize = 8;

/// A repository's history: not part of the model, and as large again as its weights.
const HISTORY_DIR: &str = ".git";

/// A model directory: its weights file and the other files beside it.
#[derive(Debug, Clone)]
pub struct ModelDir {
    pub dir: PathBuf,
    /// The one checkpoint file.
    pub weights: PathBuf,
    /// Every other regular file at the top (hidden files included), sorted by name.
    pub others: Vec<PathBuf>,
    /// Files in sub-directories, with their paths relative to `dir` (copied as they are).
    pub nested: Vec<(PathBuf, PathBuf)>,
    /// Sub-directories to make in the output, relative to `dir`, parents first.
    pub nested_dirs: Vec<PathBuf>,
    /// Sub-directories not copied, relative to `dir`, with the reason.
    pub left_out: Vec<(String, &'static str)>,
}

/// One entry of a directory listing, links read through.
enum Listed {
    File(PathBuf),
    Dir(PathBuf),
    /// A link to a directory: not followed (it may lead anywhere, or in a loop).
    LinkedDir,
}

/// The entries of `dir` by name (as the file system spells it: not always UTF-8), sorted,
/// counted against `budget`. Special files are refused.
fn list(dir: &Path, budget: &mut usize) -> Result<Vec<(std::ffi::OsString, Listed)>> {
    let mut out = Vec::new();
    for entry in fs::read_dir(dir).map_err(|e| Error::read(dir, e))? {
        if *budget == 0 {
            return Err(invalid(
                dir,
                format!(
                    "holds more than {MAX_ENTRIES} entries with its sub-directories; name the checkpoint file instead"
                ),
            ));
        }
        *budget -= 1;
        let entry = entry.map_err(|e| Error::read(dir, e))?;
        let path = entry.path();
        let name = entry.file_name();
        let own = entry.file_type().map_err(|e| Error::read(dir, e))?;
        // A link is taken for what it points at: a downloaded model's cache folder is links
        // to its files. A dangling link or a loop cannot be read.
        let kind = match own.is_symlink() {
            true => fs::metadata(&path)
                .map_err(|e| Error::read(&path, e))?
                .file_type(),
            false => own,
        };
        let listed = if kind.is_file() {
            Listed::File(path)
        } else if kind.is_dir() && own.is_symlink() {
            Listed::LinkedDir
        } else if kind.is_dir() {
            Listed::Dir(path)
        } else {
            return Err(invalid(
                dir,
                format!(
                    "holds \"{}\", which is not a regular file or a directory (a device, a pipe or a socket, or a link to one); a model directory is copied file by file",
                    name.to_string_lossy()
                ),
            ));
        };
        out.push((name, listed));
    }
    out.sort_by(|a, b| a.0.cmp(&b.0));
    Ok(out)
}

/// What a model directory's sub-directories hold: the files to copy and the directories to
/// make (relative paths), and the sub-directories left out.
#[derive(Default)]
struct Tree {
    files: Vec<(PathBuf, PathBuf)>,
    dirs: Vec<PathBuf>,
    left_out: Vec<(String, &'static str)>,
}

impl Tree {
    /// Take in sub-directory `path` (relative `rel`, at `depth`) and everything below it.
    fn take(&mut self, path: &Path, rel: PathBuf, depth: usize, budget: &mut usize) -> Result<()> {
        if rel.file_name() == Some(std::ffi::OsStr::new(HISTORY_DIR)) {
            let shown = rel.display().to_string();
            self.left_out.push((shown, "a repository's history"));
            return Ok(());
        }
        if depth > MAX_DEPTH {
            let why = "deeper than the levels posgrid copies";
            self.left_out.push((rel.display().to_string(), why));
            return Ok(());
        }
        self.dirs.push(rel.clone());
        for (name, listed) in list(path, budget)? {
            match listed {
                Listed::File(file) => self.files.push((file, rel.join(&name))),
                Listed::Dir(sub) => self.take(&sub, rel.join(&name), depth + 1, budget)?,
                Listed::LinkedDir => {
                    let shown = rel.join(&name).display().to_string();
                    self.left_out.push((shown, "a link to a directory"));
                }
            }
        }
        Ok(())
    }
}

impl ModelDir {
    /// Find the one checkpoint of `dir`. Refused: no checkpoint, several (listed, with how
    /// to choose), special files. Links to files count as the files; sub-directories are
    /// copied (a repository's history, links to directories and trees deeper than
    /// [`MAX_DEPTH`] are left out and named).
    pub fn find(dir: &Path) -> Result<Self> {
        let mut weights = Vec::new();
        let mut others = Vec::new();
        let mut tree = Tree::default();
        let mut budget = MAX_ENTRIES;
        for (name, listed) in list(dir, &mut budget)? {
            match listed {
                Listed::File(path) if is_weights(&path) => weights.push(path),
                Listed::File(path) => others.push(path),
                Listed::Dir(path) => tree.take(&path, PathBuf::from(&name), 1, &mut budget)?,
                Listed::LinkedDir => tree
                    .left_out
                    .push((name.to_string_lossy().into_owned(), "a link to a directory")),
            }
        }
        match weights.as_slice() {
            [one] => Ok(ModelDir {
                dir: dir.to_path_buf(),
                weights: one.clone(),
                others,
                nested: tree.files,
                nested_dirs: tree.dirs,
                left_out: tree.left_out,
            }),
            [] => Err(invalid(
                dir,
                "holds no checkpoint file (*.safetensors, *.npz, *.pth, *.pt, *.bin) and no *.safetensors.index.json shard index".into(),
            )),
            many => {
                let names: Vec<String> = many
                    .iter()
                    .filter_map(|p| p.file_name())
                    .map(|n| n.to_string_lossy().into_owned())
                    .collect();
                Err(invalid(
                    dir,
                    format!(
                        "holds several checkpoint files ({}); name the one to resize, e.g. {}",
                        names.join(", "),
                        many[0].display()
                    ),
                ))
            }
        }
    }

    /// What posgrid writes in the output directory, relative to it: the files (the weights
    /// under their own name, every other file) and the sub-directories.
    pub fn written(&self) -> (HashSet<PathBuf>, HashSet<PathBuf>) {
        let top = std::iter::once(&self.weights).chain(&self.others);
        let files = top
            .filter_map(|p| p.file_name().map(PathBuf::from))
            .chain(self.nested.iter().map(|(_, rel)| rel.clone()))
            .collect();
        (files, self.nested_dirs.iter().cloned().collect())
    }

    /// Warnings for what the output does not carry over as the model needs it: sub-directories
    /// left out (and why), and checkpoint files in sub-directories, copied at the old size
    /// (a trainer's earlier checkpoints, say).
    pub fn tree_warnings(&self) -> Vec<String> {
        let left_out: Vec<String> = self
            .left_out
            .iter()
            .map(|(n, why)| format!("\"{n}\" ({why})"))
            .collect();
        let old_size: Vec<String> = self
            .nested
            .iter()
            .filter(|(path, _)| is_weights(path))
            .map(|(_, rel)| format!("\"{}\"", rel.display()))
            .collect();
        let dir = self.dir.display();
        let mut out = Vec::new();
        if !left_out.is_empty() {
            out.push(format!(
                "{dir}: not copied: {}; copy them into the output by hand if the model needs them",
                first_few(&left_out)
            ));
        }
        if !old_size.is_empty() {
            out.push(format!(
                "{dir}: checkpoint files in sub-directories are copied as they are, at the old size: {}; resize them on their own if the model uses them",
                first_few(&old_size)
            ));
        }
        out
    }

    /// The weights file's name.
    pub fn weights_name(&self) -> &std::ffi::OsStr {
        self.weights.file_name().expect("a listed file has a name")
    }

    /// The directory's configuration files (`*.json`), which may record the input size.
    pub fn json_files(&self) -> impl Iterator<Item = &PathBuf> {
        self.others
            .iter()
            .filter(|p| p.extension().is_some_and(|e| e == "json"))
    }
}

/// The first eight of `items`, then how many more.
fn first_few(items: &[String]) -> String {
    const LISTED: usize = 8;
    let mut shown: Vec<String> = items.iter().take(LISTED).cloned().collect();
    if items.len() > LISTED {
        shown.push(format!("and {} more", items.len() - LISTED));
    }
    shown.join(", ")
}

fn is_weights(path: &Path) -> bool {
    let name = path.file_name().unwrap_or_default().to_string_lossy();
    Format::from_extension(path).is_some()
        && !name.starts_with('.')
        && !NOT_WEIGHTS.contains(&name.as_ref())
        && !name.starts_with("rng_state")
}

fn invalid(dir: &Path, message: String) -> Error {
    Error::invalid(dir, FormatProblem::Other(message))
}

/// Whether `dir` is a sharded set's directory (it holds a shard index).
pub fn has_shard_index(dir: &Path) -> bool {
    fs::read_dir(dir).is_ok_and(|entries| {
        entries.flatten().take(MAX_ENTRIES).any(|e| {
            e.file_name()
                .to_string_lossy()
                .ends_with(".safetensors.index.json")
        })
    })
}

/// The configuration files beside a single checkpoint file (`config.json` and the like):
/// they may record the old input size.
pub fn configs_beside(file: &Path) -> Vec<PathBuf> {
    let dir = file
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    ["config.json", "preprocessor_config.json"]
        .iter()
        .map(|n| dir.join(n))
        .filter(|p| p.is_file())
        .collect()
}

/// Fill the output copy of side file `p`: its new contents from `edits`, or its bytes as they
/// are. Returns the bytes written.
pub(crate) fn fill_side_file(
    file: &mut crate::write::AtomicFile,
    p: &Path,
    edits: &[(PathBuf, Vec<u8>)],
    progress: &mut dyn crate::write::Progress,
) -> Result<u64> {
    match edits.iter().find(|(q, _)| q == p) {
        Some((_, text)) => {
            file.write(text, progress)?;
            Ok(text.len() as u64)
        }
        None => {
            let (input, meta) = super::open_regular(p)?;
            file.copy_from(&input, p, 0, meta.len(), progress)?;
            Ok(meta.len())
        }
    }
}

/// Write a model directory's output in a temporary directory beside `dest.path`: the weights
/// through `writer` under their own file name, every other file copied as it is or, when
/// `edits` holds new contents for it, written anew. Committed by the caller (with the figure).
pub fn write_dir(
    md: &ModelDir,
    writer: &dyn super::writer::Writer,
    out: &super::writer::Output,
    dest: &super::writer::Destination,
    progress: &mut dyn crate::write::Progress,
) -> Result<super::writer::Written> {
    use crate::write::{commit_all, AtomicDir, AtomicFile, OutputRules, Pending};
    let dir = AtomicDir::create_with(
        dest.path,
        &OutputRules::like(&md.dir, dest.sync, dest.force),
    )?;
    let inner = dir.path().join(md.weights_name());
    let weights = super::writer::Destination {
        path: &inner,
        sync: dest.sync,
        force: false,
        like: &md.weights,
    };
    let written = writer.write(out, &weights, progress)?;
    let mut size = written.size;
    let mut warnings = written.warnings;
    // A rename inside the temporary directory: nothing is visible before the directory is.
    warnings.extend(commit_all(vec![written.pending])?);
    for d in &md.nested_dirs {
        let made = dir.path().join(d);
        fs::create_dir(&made)
            .map_err(|e| Error::write(&made, format!("cannot make the directory: {e}")))?;
    }
    let top = md.others.iter().map(|p| {
        let name = p.file_name().expect("listed files have names");
        (p, PathBuf::from(name))
    });
    for (p, rel) in top.chain(md.nested.iter().map(|(p, rel)| (p, rel.clone()))) {
        let mut file = AtomicFile::create_with(
            &dir.path().join(rel),
            &OutputRules::like(p, dest.sync, false),
        )?;
        size += fill_side_file(&mut file, p, &out.edits, progress)?;
        file.commit()?;
    }
    warnings.extend(md.tree_warnings());
    // Checked again: OUTDIR may have appeared during the write.
    crate::write::check_destination_model_dir(md, dest.path, dest.force)?;
    Ok(super::writer::Written {
        pending: Pending::Dir(dir),
        size,
        warnings,
    })
}
