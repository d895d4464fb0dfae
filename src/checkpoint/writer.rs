//! The output side of every container. The job hands a writer the ordered output entries —
//! each one either "copy the source's bytes" or "these new bytes" — and the writer lays them
//! out in its container, in a temporary file or directory beside OUT, ready to be committed
//! atomically. A conversion is only a different writer.

use std::collections::HashSet;
use std::path::Path;

use super::{Dtype, Format, Reader, Span, TensorEntry};
use crate::error::{Error, Result};
use crate::write::{self, AtomicFile, OutputRules, Pending, Progress};

/// One tensor of the output, in output order.
#[derive(Debug, Clone)]
pub struct OutEntry<'a> {
    /// The name in the output.
    pub name: String,
    /// The shape in the output.
    pub shape: Vec<usize>,
    /// The source tensor this entry comes from (its dtype is kept).
    pub origin: &'a TensorEntry,
    /// New bytes (little-endian, C order), or `None` to copy the origin's bytes.
    pub new: Option<&'a [u8]>,
}

impl OutEntry<'_> {
    pub fn dtype(&self) -> Dtype {
        self.origin.dtype
    }

    /// Bytes of data this entry takes.
    pub fn byte_len(&self) -> u64 {
        self.new.map_or(self.origin.byte_len(), |b| b.len() as u64)
    }
}

/// Everything a writer needs: where the bytes come from, what goes out, and the provenance
/// record for containers that can hold one.
pub struct Output<'a> {
    pub source: &'a dyn Reader,
    pub entries: Vec<OutEntry<'a>>,
    /// posgrid's provenance (a JSON object); a writer adds a record already in its source
    /// under `previous`.
    pub provenance: serde_json::Value,
    /// New contents for side files of a set or model directory (configuration files updated
    /// to the new size); the others are copied as they are.
    pub edits: Vec<(std::path::PathBuf, Vec<u8>)>,
    /// Source tensors the output leaves out because the resized model no longer has them (a
    /// mask of a block whose window now covers its map). A writer that keeps the source's
    /// structure (archive members, shard index, object tree) must leave them out of it too.
    pub left_out: HashSet<String>,
    /// The block size of the destination's file system: untouched bytes laid out at their
    /// source offset modulo it can share blocks with the source (see `crate::write::share`).
    pub block: u64,
}

impl<'a> Output<'a> {
    /// An output laid out for the usual 4 KiB blocks.
    pub fn new(
        source: &'a dyn Reader,
        entries: Vec<OutEntry<'a>>,
        provenance: serde_json::Value,
    ) -> Self {
        Output {
            source,
            entries,
            provenance,
            edits: Vec::new(),
            left_out: Default::default(),
            block: crate::write::share::DEFAULT_BLOCK,
        }
    }

    /// The same output over another source (one shard of a set): the entries that come from it.
    pub fn restricted(&self, source: &'a dyn Reader, keep: impl Fn(&OutEntry) -> bool) -> Self {
        Output {
            source,
            entries: self.entries.iter().filter(|e| keep(e)).cloned().collect(),
            provenance: self.provenance.clone(),
            edits: self.edits.clone(),
            left_out: self.left_out.clone(),
            block: self.block,
        }
    }

    /// Whether any entry carries new bytes.
    pub fn changes_anything(&self) -> bool {
        self.entries.iter().any(|e| e.new.is_some())
    }
}

/// Where the output goes.
pub struct Destination<'a> {
    pub path: &'a Path,
    /// Sync before the rename.
    pub sync: bool,
    /// Replace an existing output (within the rules of [`OutputRules`]).
    pub force: bool,
    /// The input whose permission bits bound the output's.
    pub like: &'a Path,
}

impl Destination<'_> {
    pub fn rules(&self) -> OutputRules {
        OutputRules::like(self.like, self.sync, self.force)
    }
}

/// How a set was laid out: shards rewritten and shards copied unchanged.
#[derive(Debug, Clone, Default)]
pub struct SetLayout {
    pub rewritten: Vec<String>,
    pub copied: Vec<String>,
}

/// What a writer will do, known before anything is written (for dry runs and progress).
#[derive(Debug, Clone, Default)]
pub struct Preview {
    /// The output's size in bytes (for compressed containers, the data size).
    pub size: u64,
    pub layout: Option<SetLayout>,
    /// What the container cannot keep, or what else is copied.
    pub notes: Vec<String>,
}

/// A written output, not yet in place.
pub struct Written {
    pub pending: Pending,
    pub size: u64,
    pub warnings: Vec<String>,
}

/// One container's writer.
pub trait Writer {
    fn format(&self) -> Format;
    /// Refuse, before any work, an output this container cannot hold.
    fn check(&self, _out: &Output) -> Result<()> {
        Ok(())
    }
    fn preview(&self, out: &Output) -> Result<Preview>;
    fn write(
        &self,
        out: &Output,
        dest: &Destination,
        progress: &mut dyn Progress,
    ) -> Result<Written>;
}

/// A container whose output is one file: the file is made here, the writer fills it.
pub(crate) fn write_file(
    dest: &Destination,
    fill: impl FnOnce(&mut AtomicFile) -> Result<()>,
) -> Result<Written> {
    let mut file = AtomicFile::create_with(dest.path, &dest.rules())?;
    fill(&mut file)?;
    let size = file
        .file()
        .metadata()
        .map_err(|e| write::write_error(dest.path, "cannot write", e))?
        .len();
    Ok(Written {
        pending: Pending::File(file),
        size,
        warnings: Vec::new(),
    })
}

/// The writer of a format.
pub fn for_format(format: Format) -> Box<dyn Writer> {
    match format {
        Format::Safetensors => Box::new(super::safetensors::SafetensorsWriter),
        Format::ShardedSafetensors => Box::new(super::sharded::SetWriter),
        Format::Npz => Box::new(super::npz::NpzWriter),
        Format::PyTorch => Box::new(super::torch::TorchWriter),
    }
}

/// Copy the entries' bytes to the end of `file` in the given order: runs that lie back to back
/// in one source file are copied file to file in one step; new bytes are written; anything
/// else is streamed through a fixed buffer.
pub(crate) fn copy_entries(
    out: &Output,
    order: &[usize],
    file: &mut AtomicFile,
    progress: &mut dyn Progress,
) -> Result<()> {
    let mut run: Option<Span> = None;
    for &i in order {
        let entry = &out.entries[i];
        let span = match entry.new {
            None => out.source.span(entry.origin),
            Some(_) => None,
        };
        if let (Some(r), Some(s)) = (&mut run, &span) {
            if std::ptr::eq(r.file, s.file) && r.offset + r.len == s.offset {
                r.len += s.len;
                continue;
            }
        }
        if let Some(r) = run.take() {
            file.copy_from(r.file, r.path, r.offset, r.len, progress)?;
        }
        match (entry.new, span) {
            (_, Some(s)) => run = Some(s),
            (Some(bytes), None) => file.write(bytes, progress)?,
            (None, None) => out
                .source
                .stream(entry.origin, &mut |chunk| file.write(chunk, progress))?,
        }
    }
    if let Some(r) = run {
        file.copy_from(r.file, r.path, r.offset, r.len, progress)?;
    }
    Ok(())
}

/// The interrupted error for a writer that checks between entries.
pub(crate) fn check_interrupt(path: &Path) -> Result<()> {
    if write::interrupted() {
        return Err(Error::Interrupted {
            path: path.to_path_buf(),
        });
    }
    Ok(())
}
