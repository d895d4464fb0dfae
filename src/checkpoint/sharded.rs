//! Sharded safetensors sets: several shard files and a JSON index whose `weight_map` names the
//! shard holding each tensor (and whose `metadata.total_size` counts the tensor bytes). The
//! set is validated as a whole: the index, every shard, and that the two agree.

use std::collections::HashMap;
use std::fs;
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};

use serde_json::Value;

use super::safetensors::SafetensorsWriter;
use super::writer::{Destination, Output, Preview, SetLayout, Writer, Written};
use super::{Checkpoint, Format, Sink, TensorEntry};
use crate::error::{Error, FormatProblem, Result};
use crate::write::{AtomicDir, AtomicFile, OutputRules, Pending, Progress};

/// File names that mark a shard index (common practice: `model.safetensors.index.json`).
pub const INDEX_SUFFIX: &str = ".safetensors.index.json";

/// An opened, validated sharded set.
#[derive(Debug)]
pub struct ShardedSet {
    index_path: PathBuf,
    dir: PathBuf,
    /// The index as read (key order kept).
    pub index: serde_json::Map<String, Value>,
    /// Shard file names (relative to the directory) with their opened files, in index order.
    pub shards: Vec<(String, Checkpoint)>,
    entries: Vec<TensorEntry>,
    owner: HashMap<String, usize>,
}

fn invalid(path: &Path, message: String) -> Error {
    Error::invalid(path, FormatProblem::Other(message))
}

/// The index file of a directory, or `path` itself when it is a JSON file.
pub fn find_index(path: &Path) -> Result<PathBuf> {
    if !path.is_dir() {
        return Ok(path.to_path_buf());
    }
    let mut found: Vec<PathBuf> = fs::read_dir(path)
        .map_err(|e| Error::read(path, e))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            p.file_name()
                .and_then(|n| n.to_str())
                .is_some_and(|n| n.ends_with(INDEX_SUFFIX))
        })
        .collect();
    found.sort();
    match found.len() {
        1 => Ok(found.remove(0)),
        0 => Err(invalid(
            path,
            format!("directory has no *{INDEX_SUFFIX} shard index"),
        )),
        _ => Err(invalid(
            path,
            format!(
                "directory has several shard indexes; name one: {}",
                found
                    .iter()
                    .map(|p| p.display().to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        )),
    }
}

impl ShardedSet {
    /// Open a set from its directory or its index file.
    pub fn open(path: &Path) -> Result<Self> {
        let index_path = find_index(path)?;
        let dir = index_path
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_else(|| PathBuf::from("."));
        let text = super::read_capped(
            &index_path,
            super::safetensors::MAX_HEADER_LEN,
            "the shard index",
        )?;
        let index = super::json::parse_object(&text)
            .map_err(|p| invalid(&index_path, format!("the shard index {p}")))?;
        let index_id = file_id(&index_path)?;
        let Some(Value::Object(weight_map)) = index.get("weight_map") else {
            return Err(invalid(
                &index_path,
                "index has no \"weight_map\" object".into(),
            ));
        };
        let mut shard_names: Vec<String> = Vec::new();
        let mut wanted: HashMap<String, String> = HashMap::new();
        for (tensor, shard) in weight_map {
            let Value::String(shard) = shard else {
                return Err(invalid(
                    &index_path,
                    format!("weight_map entry \"{tensor}\" is not a file name"),
                ));
            };
            check_shard_name(shard).map_err(|why| {
                invalid(&index_path, format!("weight_map entry \"{tensor}\": {why}"))
            })?;
            if !shard_names.contains(shard) {
                shard_names.push(shard.clone());
            }
            wanted.insert(tensor.clone(), shard.clone());
        }
        let mut shards = Vec::new();
        let mut entries = Vec::new();
        let mut owner = HashMap::new();
        for (i, name) in shard_names.iter().enumerate() {
            let shard_path = dir.join(name);
            if file_id(&shard_path).ok() == Some(index_id) {
                return Err(invalid(
                    &index_path,
                    format!("the index lists itself (\"{name}\") as a shard"),
                ));
            }
            let ckpt = Checkpoint::open(shard_path)?;
            for t in ckpt.tensors() {
                match wanted.get(&t.name) {
                    Some(s) if s == name => {}
                    Some(s) => {
                        return Err(invalid(
                            &index_path,
                            format!(
                                "tensor \"{}\" is in shard {name} but the index says {s}",
                                t.name
                            ),
                        ))
                    }
                    None => {
                        return Err(invalid(
                            &index_path,
                            format!(
                                "tensor \"{}\" in shard {name} is missing from the index",
                                t.name
                            ),
                        ))
                    }
                }
                if owner.insert(t.name.clone(), i).is_some() {
                    return Err(invalid(
                        &index_path,
                        format!("tensor \"{}\" appears in two shards", t.name),
                    ));
                }
                entries.push(t.clone());
            }
            shards.push((name.clone(), ckpt));
        }
        for (tensor, shard) in &wanted {
            if !owner.contains_key(tensor) {
                return Err(invalid(
                    &index_path,
                    format!("the index lists \"{tensor}\" in {shard}, which does not hold it"),
                ));
            }
        }
        Ok(ShardedSet {
            index_path,
            dir,
            index,
            shards,
            entries,
            owner,
        })
    }

    /// The index file.
    pub fn index_path(&self) -> &Path {
        &self.index_path
    }

    /// The directory holding the shards.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// All tensors of all shards, shard by shard.
    pub fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }

    /// The shard (index into `shards`) holding a tensor.
    pub fn shard_of(&self, name: &str) -> Option<usize> {
        self.owner.get(name).copied()
    }

    /// The other regular files of the set's directory (configuration files and the like,
    /// hidden ones included), which a set output copies.
    pub fn other_files(&self) -> Result<Vec<PathBuf>> {
        let index_name = self.index_path.file_name().unwrap_or_default();
        let mut found: Vec<PathBuf> = fs::read_dir(&self.dir)
            .map_err(|e| Error::read(&self.dir, e))?
            .filter_map(|e| e.ok())
            // Links count as what they point at (a downloaded model's cache folder).
            .filter(|e| fs::metadata(e.path()).is_ok_and(|m| m.is_file()))
            .filter(|e| {
                let n = e.file_name();
                let text = n.to_string_lossy();
                n != index_name && !self.shards.iter().any(|(s, _)| s.as_str() == text)
            })
            .map(|e| e.path())
            .collect();
        found.sort();
        Ok(found)
    }

    /// Total size of all shard files.
    pub fn total_file_len(&self) -> u64 {
        self.shards.iter().map(|(_, c)| c.file_len()).sum()
    }

    /// Read one tensor's bytes from its shard.
    pub fn read_bytes(&self, t: &TensorEntry) -> Result<Vec<u8>> {
        self.shard_holding(t).read_bytes(t)
    }

    /// Pass one tensor's bytes to `sink` a chunk at a time.
    pub fn stream_bytes(&self, t: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        self.shard_holding(t).stream_bytes(t, sink)
    }

    fn shard_holding(&self, t: &TensorEntry) -> &Checkpoint {
        let i = self
            .shard_of(&t.name)
            .expect("entries come from the shards");
        &self.shards[i].1
    }
}

/// A shard must be a plain file beside the index: no sub-directory (the set is written back as
/// one flat directory), no way out of the directory, nothing a platform reads differently.
fn check_shard_name(name: &str) -> std::result::Result<(), String> {
    let why = if name.is_empty() {
        "the shard name is empty"
    } else if name == "." || name == ".." {
        "the shard name must be a file name, not \".\" or \"..\""
    } else if name.contains('/') || name.contains('\\') {
        "the shard name must be a plain file name beside the index (no directories or path separators)"
    } else if name.contains('\0') {
        "the shard name contains a NUL character"
    } else {
        return Ok(());
    };
    Err(format!("{why}: {name:?}"))
}

/// The device and inode of a file (after links), to recognise the same file under two names.
fn file_id(path: &Path) -> Result<(u64, u64)> {
    let meta = fs::metadata(path).map_err(|e| Error::read(path, e))?;
    Ok((meta.dev(), meta.ino()))
}

impl super::TensorSource for ShardedSet {
    fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        self.read_bytes(tensor)
    }
    fn stream(&self, tensor: &TensorEntry, sink: super::Sink<'_>) -> Result<()> {
        self.stream_bytes(tensor, sink)
    }
    fn source_path(&self) -> &Path {
        &self.index_path
    }
}

impl super::Reader for ShardedSet {
    fn format(&self) -> super::Format {
        super::Format::ShardedSafetensors
    }
    fn file_len(&self) -> u64 {
        self.total_file_len()
    }
    fn span(&self, tensor: &TensorEntry) -> Option<super::Span<'_>> {
        let i = self.shard_of(&tensor.name)?;
        super::Reader::span(&self.shards[i].1, tensor)
    }
    fn as_any(&self) -> &dyn std::any::Any {
        self
    }
}

/// Writes a sharded set into a temporary directory beside OUTDIR: shards holding a changed
/// tensor are rewritten (streaming), the others and every other regular file of the set's
/// directory copied unchanged, and the index written with the new total size. Only a sharded
/// source can be written this way (its layout is what is kept).
pub struct SetWriter;

/// The shard layout a set writer keeps, planned before anything is written.
struct SetPlan<'a> {
    set: &'a ShardedSet,
    /// Per shard: its part of the output, and whether it changes.
    shards: Vec<(Output<'a>, bool)>,
    index_text: String,
    others: Vec<PathBuf>,
}

impl SetWriter {
    fn source<'a>(out: &Output<'a>) -> Result<&'a ShardedSet> {
        out.source.as_any().downcast_ref::<ShardedSet>().ok_or_else(|| {
            Error::Usage(
                "only a sharded set is written as a sharded set; give OUT a .safetensors or .npz name to convert".into(),
            )
        })
    }

    fn plan<'a>(out: &Output<'a>) -> Result<SetPlan<'a>> {
        let set = Self::source(out)?;
        let shards: Vec<(Output, bool)> = set
            .shards
            .iter()
            .enumerate()
            .map(|(i, (_, ckpt))| {
                let part = out.restricted(ckpt, |e| set.shard_of(&e.origin.name) == Some(i));
                // A shard that loses a tensor the resized model no longer has changes too.
                let loses = |name: &String| set.shard_of(name) == Some(i);
                let changed = part.changes_anything() || out.left_out.iter().any(loses);
                (part, changed)
            })
            .collect();
        let total_size: u64 = out.entries.iter().map(|e| e.byte_len()).sum();
        let mut index = set.index.clone();
        if let Some(Value::Object(weight_map)) = index.get_mut("weight_map") {
            weight_map.retain(|name, _| !out.left_out.contains(name));
        }
        let metadata = index
            .entry("metadata")
            .or_insert_with(|| Value::Object(Default::default()));
        if let Value::Object(m) = metadata {
            m.insert("total_size".into(), Value::from(total_size));
            // Provenance, and the mark by which --force later recognises a set posgrid wrote.
            m.insert(
                super::safetensors::PROVENANCE_KEY.into(),
                Value::String(out.provenance.to_string()),
            );
        }
        let index_text = serde_json::to_string_pretty(&index).expect("JSON serialises") + "\n";
        Ok(SetPlan {
            set,
            shards,
            index_text,
            others: set.other_files()?,
        })
    }
}

impl Writer for SetWriter {
    fn format(&self) -> Format {
        Format::ShardedSafetensors
    }

    fn check(&self, out: &Output) -> Result<()> {
        Self::source(out).map(|_| ())
    }

    fn preview(&self, out: &Output) -> Result<Preview> {
        let plan = Self::plan(out)?;
        let mut preview = Preview {
            size: plan.index_text.len() as u64,
            layout: Some(SetLayout::default()),
            notes: Vec::new(),
        };
        let layout = preview.layout.as_mut().expect("set above");
        for ((name, ckpt), (part, changed)) in plan.set.shards.iter().zip(&plan.shards) {
            if *changed {
                preview.size += SafetensorsWriter::size(part);
                layout.rewritten.push(name.clone());
            } else {
                preview.size += ckpt.file_len();
                layout.copied.push(name.clone());
            }
        }
        if !plan.others.is_empty() {
            let names: Vec<String> = plan
                .others
                .iter()
                .filter_map(|p| p.file_name())
                .map(|n| n.to_string_lossy().into_owned())
                .collect();
            preview
                .notes
                .push(format!("copied beside the shards: {}", names.join(", ")));
            for p in &plan.others {
                preview.size += fs::metadata(p).map_err(|e| Error::read(p, e))?.len();
            }
        }
        Ok(preview)
    }

    fn write(
        &self,
        out: &Output,
        dest: &Destination,
        progress: &mut dyn Progress,
    ) -> Result<Written> {
        let plan = Self::plan(out)?;
        let set = plan.set;
        let dir = AtomicDir::create_with(
            dest.path,
            &OutputRules::like(set.dir(), dest.sync, dest.force),
        )?;
        // Files inside the new directory: each as its input, never replacing anything.
        let member = |name: &std::ffi::OsStr, like: &Path| {
            AtomicFile::create_with(
                &dir.path().join(name),
                &OutputRules::like(like, dest.sync, false),
            )
        };
        let mut size = 0;
        for ((name, ckpt), (part, changed)) in set.shards.iter().zip(&plan.shards) {
            let mut file = member(name.as_ref(), ckpt.path())?;
            if *changed {
                SafetensorsWriter::fill(part, &mut file, progress)?;
            } else {
                file.copy_from(ckpt.file(), ckpt.path(), 0, ckpt.file_len(), progress)?;
            }
            size += file
                .file()
                .metadata()
                .map_err(|e| crate::write::write_error(dest.path, "cannot write", e))?
                .len();
            file.commit()?;
        }
        for p in &plan.others {
            let name = p.file_name().expect("listed files have names");
            let mut file = member(name, p)?;
            size += super::directory::fill_side_file(&mut file, p, &out.edits, progress)?;
            file.commit()?;
        }
        let index_name = set.index_path().file_name().expect("an index is a file");
        let mut file = member(index_name, set.index_path())?;
        file.write(plan.index_text.as_bytes(), progress)?;
        size += plan.index_text.len() as u64;
        file.commit()?;
        // Checked again: OUTDIR may have changed during the write.
        crate::write::check_destination_dir(set.dir(), dest.path, dest.force)?;
        Ok(Written {
            pending: Pending::Dir(dir),
            size,
            warnings: Vec::new(),
        })
    }
}
