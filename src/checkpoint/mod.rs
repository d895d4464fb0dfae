//! Checkpoint containers. Each sub-module reads one format into the same [`Checkpoint`] value:
//! a validated list of tensors (name, dtype, shape, byte span) plus positioned reads of one
//! tensor's bytes. Validation happens when the file is opened, before any tensor data is used.

pub mod safetensors;

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
}

impl Format {
    /// The name used in reports.
    pub fn name(self) -> &'static str {
        match self {
            Format::Safetensors => "safetensors",
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

/// Read access to tensor values, as discovery needs it. Implemented by [`Checkpoint`]; tests
/// implement it over in-memory tensors.
pub trait TensorSource {
    /// All tensors, in file order.
    fn entries(&self) -> &[TensorEntry];
    /// Raw little-endian bytes of one tensor.
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>>;
}

impl TensorSource for Checkpoint {
    fn entries(&self) -> &[TensorEntry] {
        self.tensors()
    }
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        self.read_bytes(tensor)
    }
}
