//! Checkpoint containers. Each sub-module reads one format into the same [`Checkpoint`] value:
//! a validated list of tensors (name, dtype, shape, byte span) plus positioned reads of one
//! tensor's bytes. Validation happens when the file is opened, before any tensor data is used.

pub mod npz;
pub mod pickle;
pub mod safetensors;
pub mod sharded;

use std::fs::File;
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};

pub use ::safetensors::Dtype;

use crate::error::{Error, Result};

/// One tensor as the container describes it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TensorEntry {
    /// Name as stored in the file.
    pub name: String,
    /// Element type.
    pub dtype: Dtype,
    /// Dimensions, outermost first.
    pub shape: Vec<usize>,
    /// Absolute byte offset of the first data byte in the file.
    pub begin: u64,
    /// Absolute byte offset one past the last data byte.
    pub end: u64,
}

impl TensorEntry {
    /// Number of elements (product of the shape; 1 for a scalar).
    pub fn numel(&self) -> usize {
        self.shape.iter().product()
    }

    /// Length of the data in bytes.
    pub fn byte_len(&self) -> u64 {
        self.end - self.begin
    }
}

/// The container format of a checkpoint.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// A single safetensors file.
    Safetensors,
    /// Safetensors shards with a JSON index.
    ShardedSafetensors,
    /// A ZIP of `.npy` arrays.
    Npz,
}

impl Format {
    /// The name used in reports.
    pub fn name(self) -> &'static str {
        match self {
            Format::Safetensors => "safetensors",
            Format::ShardedSafetensors => "safetensors-sharded",
            Format::Npz => "npz",
        }
    }
}

/// An opened, validated checkpoint. Holds the file open for positioned reads; never maps it.
#[derive(Debug)]
pub struct Checkpoint {
    path: PathBuf,
    format: Format,
    file: File,
    file_len: u64,
    header: safetensors::Header,
}

impl Checkpoint {
    /// Open and validate a checkpoint. Only the header is read.
    pub fn open(path: impl AsRef<Path>) -> Result<Self> {
        let path = path.as_ref();
        let file = File::open(path).map_err(|e| Error::read(path, e))?;
        let meta = file.metadata().map_err(|e| Error::read(path, e))?;
        if meta.is_dir() {
            return Err(Error::read(
                path,
                std::io::Error::other("is a directory, not a checkpoint file"),
            ));
        }
        let file_len = meta.len();
        let header = safetensors::read_header(&file, file_len).map_err(|e| match e {
            safetensors::ReadError::Io(io) => Error::read(path, io),
            safetensors::ReadError::Format(p) => Error::invalid(path, p),
        })?;
        Ok(Checkpoint {
            path: path.to_path_buf(),
            format: Format::Safetensors,
            file,
            file_len,
            header,
        })
    }

    /// The path the checkpoint was opened from.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The container format.
    pub fn format(&self) -> Format {
        self.format
    }

    /// Size of the file in bytes.
    pub fn file_len(&self) -> u64 {
        self.file_len
    }

    /// The open file, for streaming copies.
    pub fn file(&self) -> &File {
        &self.file
    }

    /// The parsed header.
    pub fn header(&self) -> &safetensors::Header {
        &self.header
    }

    /// All tensors, in the order the header lists them.
    pub fn tensors(&self) -> &[TensorEntry] {
        &self.header.tensors
    }

    /// The tensor with this exact name.
    pub fn tensor(&self, name: &str) -> Option<&TensorEntry> {
        self.header.tensors.iter().find(|t| t.name == name)
    }

    /// The string metadata, in file order.
    pub fn metadata(&self) -> Option<&[(String, String)]> {
        self.header.metadata.as_deref()
    }

    /// Read one tensor's raw bytes with a positioned read.
    pub fn read_bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        let len = usize::try_from(tensor.byte_len()).map_err(|_| {
            Error::refused(
                &self.path,
                format!("tensor \"{}\" is too large to read", tensor.name),
            )
        })?;
        let mut buf = vec![0u8; len];
        self.file
            .read_exact_at(&mut buf, tensor.begin)
            .map_err(|e| Error::read(&self.path, e))?;
        Ok(buf)
    }
}

/// Read access to tensor values, as discovery and planning need it. Implemented by
/// [`Checkpoint`] and [`Source`]; tests implement it over in-memory tensors.
pub trait TensorSource {
    /// All tensors, in file order.
    fn entries(&self) -> &[TensorEntry];
    /// Raw little-endian bytes of one tensor.
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>>;
    /// The path errors should name.
    fn source_path(&self) -> &Path {
        Path::new("<memory>")
    }
    /// The tensor with this exact name.
    fn find(&self, name: &str) -> Option<&TensorEntry> {
        self.entries().iter().find(|t| t.name == name)
    }
}

impl TensorSource for Checkpoint {
    fn entries(&self) -> &[TensorEntry] {
        self.tensors()
    }
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        self.read_bytes(tensor)
    }
    fn source_path(&self) -> &Path {
        self.path()
    }
}

/// A whole safetensors file held in memory, with its parsed entries: for callers that already
/// have the bytes, and for the tests and the fuzz target.
pub struct InMemory<'a> {
    pub bytes: &'a [u8],
    pub entries: Vec<TensorEntry>,
}

impl<'a> InMemory<'a> {
    /// Parse and validate a safetensors file held in memory.
    pub fn parse(bytes: &'a [u8]) -> std::result::Result<Self, crate::error::FormatProblem> {
        let header = safetensors::parse_bytes(bytes)?;
        Ok(InMemory {
            bytes,
            entries: header.tensors,
        })
    }
}

impl TensorSource for InMemory<'_> {
    fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }
    fn bytes(&self, t: &TensorEntry) -> Result<Vec<u8>> {
        Ok(self.bytes[t.begin as usize..t.end as usize].to_vec())
    }
}

/// Any checkpoint posgrid reads: a single file, a sharded set or an npz archive.
#[derive(Debug)]
pub enum Source {
    Single(Checkpoint),
    Sharded(sharded::ShardedSet),
    Npz(npz::Npz),
}

impl Source {
    /// Open a file, a set's directory or a set's index.
    pub fn open(path: impl AsRef<Path>) -> Result<Self> {
        let path = path.as_ref();
        let is_index = path.extension().is_some_and(|e| e == "json");
        if path.is_dir() || is_index {
            Ok(Source::Sharded(sharded::ShardedSet::open(path)?))
        } else if is_zip(path) {
            Ok(Source::Npz(npz::Npz::open(path)?))
        } else {
            Ok(Source::Single(Checkpoint::open(path)?))
        }
    }

    pub fn format(&self) -> Format {
        match self {
            Source::Single(c) => c.format(),
            Source::Sharded(_) => Format::ShardedSafetensors,
            Source::Npz(_) => Format::Npz,
        }
    }

    /// Bytes on disk (all shards for a set).
    pub fn file_len(&self) -> u64 {
        match self {
            Source::Single(c) => c.file_len(),
            Source::Sharded(s) => s.total_file_len(),
            Source::Npz(n) => n.file_len(),
        }
    }
}

impl TensorSource for Source {
    fn entries(&self) -> &[TensorEntry] {
        match self {
            Source::Single(c) => c.tensors(),
            Source::Sharded(s) => s.entries(),
            Source::Npz(n) => n.entries(),
        }
    }
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        match self {
            Source::Single(c) => c.read_bytes(tensor),
            Source::Sharded(s) => s.read_bytes(tensor),
            Source::Npz(n) => n.read_bytes(tensor),
        }
    }
    fn source_path(&self) -> &Path {
        match self {
            Source::Single(c) => c.path(),
            Source::Sharded(s) => s.index_path(),
            Source::Npz(n) => n.path(),
        }
    }
}

/// Whether a file starts like a ZIP archive (`PK\x03\x04`, or `PK\x05\x06` when empty).
fn is_zip(path: &Path) -> bool {
    let mut magic = [0u8; 4];
    File::open(path)
        .and_then(|f| f.read_exact_at(&mut magic, 0))
        .is_ok()
        && (magic == *b"PK\x03\x04" || magic == *b"PK\x05\x06")
}
