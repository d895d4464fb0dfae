//! Model directories: one checkpoint file (any container posgrid reads) beside its
//! configuration, preprocessing configuration and other files, as models are usually
//! distributed. The weights are read like a file; every other regular file of the directory,
//! hidden ones included, goes to the output directory (configuration files updated to the new
//! size). A directory with a shard index is a sharded set instead (see `sharded`).

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

/// The most entries a model directory may list (bounded work on a hostile directory).
const MAX_ENTRIES: usize = 10_000;

/// A model directory: its weights file and the other files beside it.
#[derive(Debug, Clone)]
pub struct ModelDir {
    pub dir: PathBuf,
    /// The one checkpoint file.
    pub weights: PathBuf,
    /// Every other regular file (hidden files included), sorted by name.
    pub others: Vec<PathBuf>,
    /// Names of the sub-directories, which are not copied (sorted).
    pub subdirs: Vec<String>,
}

impl ModelDir {
    /// Find the one checkpoint of `dir`. Refused: no checkpoint, several (listed, with how
    /// to choose), special files. Links count as what they point at; sub-directories are
    /// listed, not copied.
    pub fn find(dir: &Path) -> Result<Self> {
        let mut weights = Vec::new();
        let mut others = Vec::new();
        let mut subdirs = Vec::new();
        let listing = fs::read_dir(dir).map_err(|e| Error::read(dir, e))?;
        for (count, entry) in listing.enumerate() {
            if count >= MAX_ENTRIES {
                return Err(invalid(
                    dir,
                    format!(
                        "holds more than {MAX_ENTRIES} entries; name the checkpoint file instead"
                    ),
                ));
            }
            let entry = entry.map_err(|e| Error::read(dir, e))?;
            let path = entry.path();
            let mut kind = entry.file_type().map_err(|e| Error::read(dir, e))?;
            // A link is taken for what it points at: a downloaded model's cache folder is
            // links to its files. A dangling link or a loop cannot be read.
            if kind.is_symlink() {
                kind = fs::metadata(&path)
                    .map_err(|e| Error::read(&path, e))?
                    .file_type();
            }
            if kind.is_dir() {
                subdirs.push(entry.file_name().to_string_lossy().into_owned());
                continue;
            }
            if !kind.is_file() {
                return Err(invalid(
                    dir,
                    format!(
                        "holds \"{}\", which is not a regular file or a directory (a device, a pipe or a socket, or a link to one); a model directory is copied file by file",
                        entry.file_name().to_string_lossy()
                    ),
                ));
            }
            if is_weights(&path) {
                weights.push(path);
            } else {
                others.push(path);
            }
        }
        weights.sort();
        others.sort();
        subdirs.sort();
        match weights.as_slice() {
            [one] => Ok(ModelDir {
                dir: dir.to_path_buf(),
                weights: one.clone(),
                others,
                subdirs,
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

    /// A warning naming the sub-directories the output leaves out (the first few, then a
    /// count): the files at the top of a model directory are what posgrid copies.
    pub fn subdirs_not_copied(&self) -> Option<String> {
        const LISTED: usize = 8;
        if self.subdirs.is_empty() {
            return None;
        }
        let mut names: Vec<String> = self
            .subdirs
            .iter()
            .take(LISTED)
            .map(|n| format!("\"{n}\""))
            .collect();
        if self.subdirs.len() > LISTED {
            names.push(format!("and {} more", self.subdirs.len() - LISTED));
        }
        Some(format!(
            "{}: sub-directories not copied ({}): posgrid copies the files at the top of a model directory; copy them into the output by hand if the model needs them",
            self.dir.display(),
            names.join(", ")
        ))
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
    for p in &md.others {
        let name = p.file_name().expect("listed files have names");
        let mut file = AtomicFile::create_with(
            &dir.path().join(name),
            &OutputRules::like(p, dest.sync, false),
        )?;
        size += fill_side_file(&mut file, p, &out.edits, progress)?;
        file.commit()?;
    }
    warnings.extend(md.subdirs_not_copied());
    // Checked again: OUTDIR may have appeared during the write.
    crate::write::check_destination_model_dir(&md.dir, dest.path, dest.force)?;
    Ok(super::writer::Written {
        pending: Pending::Dir(dir),
        size,
        warnings,
    })
}
