//! Checkpoint containers, one module each, behind one interface per side: a [`Reader`] lists
//! a container's tensors (name, dtype, shape, where the bytes lie) and reads one; a writer
//! ([`writer`]) takes the ordered output entries, each "copy the source's bytes" or "these new
//! bytes", and commits atomically. Validation happens when a container is opened, before any
//! tensor data is used.

pub mod directory;
pub mod json;
pub mod npz;
pub mod pickle;
pub mod placement;
pub mod safetensors;
pub mod sharded;
pub mod torch;
pub mod writer;
pub mod zipout;

use std::fs::{File, FileType, Metadata, OpenOptions};
use std::io::Read;
use std::os::unix::fs::{FileExt, FileTypeExt, OpenOptionsExt};
use std::path::{Path, PathBuf};

pub use ::safetensors::Dtype;

use crate::error::{Error, FormatProblem, Result};

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
    /// A PyTorch file in the framework's zip format (`.pth`, `.pt`, `.bin`).
    PyTorch,
}

impl std::str::FromStr for Format {
    type Err = String;
    /// The names `--format` takes.
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "safetensors" => Ok(Format::Safetensors),
            "npz" => Ok(Format::Npz),
            "pytorch" => Ok(Format::PyTorch),
            _ => Err(format!(
                "unknown format \"{s}\"; expected safetensors, npz or pytorch"
            )),
        }
    }
}

impl Format {
    /// The format an output path asks for by its extension.
    pub fn from_extension(path: &Path) -> Option<Self> {
        match path.extension()?.to_str()? {
            "npz" => Some(Format::Npz),
            "safetensors" => Some(Format::Safetensors),
            "pth" | "pt" | "bin" => Some(Format::PyTorch),
            _ => None,
        }
    }

    /// The file extension of a single file of this container.
    pub fn extension(self) -> &'static str {
        match self {
            Format::Npz => "npz",
            Format::PyTorch => "pth",
            _ => "safetensors",
        }
    }

    /// The name used in reports.
    pub fn name(self) -> &'static str {
        match self {
            Format::Safetensors => "safetensors",
            Format::ShardedSafetensors => "safetensors-sharded",
            Format::Npz => "npz",
            Format::PyTorch => "pytorch",
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
        let (file, meta) = open_regular(path)?;
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
        let mut buf = whole_tensor_buffer(&self.path, tensor)?;
        buf.resize(buf.capacity(), 0);
        self.file
            .read_exact_at(&mut buf, tensor.begin)
            .map_err(|e| Error::read(&self.path, e))?;
        Ok(buf)
    }

    /// Pass one tensor's bytes to `sink` a chunk at a time.
    pub fn stream_bytes(&self, tensor: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        Reader::span(self, tensor)
            .expect("a safetensors tensor is one span")
            .stream(sink)
    }
}

/// Bytes handed to a [`Sink`] at once: a fixed buffer, so copying a tensor costs the same
/// memory whatever its size. A multiple of every element width, for byte swapping per chunk.
pub const COPY_CHUNK: usize = 1 << 20;

/// The next chunk's length when `left` bytes remain.
pub(crate) fn chunk_len(left: u64) -> usize {
    left.min(COPY_CHUNK as u64) as usize
}

/// Where a streamed tensor's bytes go, chunk by chunk.
pub type Sink<'a> = &'a mut dyn FnMut(&[u8]) -> Result<()>;

/// An empty buffer with room for a whole tensor, or a refusal (exit 6) when the memory cannot
/// be had: a hostile header must not abort the process with its declared size.
pub(crate) fn whole_tensor_buffer(path: &Path, tensor: &TensorEntry) -> Result<Vec<u8>> {
    let too_large = || {
        Error::refused(
            path,
            format!(
                "tensor \"{}\" ({} bytes) does not fit in memory",
                tensor.name,
                tensor.byte_len()
            ),
        )
    };
    let len = usize::try_from(tensor.byte_len()).map_err(|_| too_large())?;
    crate::values::try_with_capacity(len).map_err(|_| too_large())
}

/// What a file that is not a regular file is, in words.
fn kind_name(t: FileType) -> &'static str {
    if t.is_dir() {
        "is a directory"
    } else if t.is_fifo() {
        "is a FIFO (named pipe)"
    } else if t.is_char_device() {
        "is a character device"
    } else if t.is_block_device() {
        "is a block device"
    } else if t.is_socket() {
        "is a socket"
    } else {
        "is of an unknown kind"
    }
}

fn refuse_irregular(path: &Path, meta: &Metadata) -> Result<()> {
    if meta.is_file() {
        return Ok(());
    }
    let words = format!("{}, not a regular file", kind_name(meta.file_type()));
    Err(Error::read(path, std::io::Error::other(words)))
}

/// Open an input for reading only if it is a regular file (after following links). A FIFO or a
/// device would block in `open` or never end, so the type is checked before opening, the open
/// itself cannot block, and the opened file is checked again in case the path was swapped.
pub fn open_regular(path: &Path) -> Result<(File, Metadata)> {
    let before = std::fs::metadata(path).map_err(|e| Error::read(path, e))?;
    refuse_irregular(path, &before)?;
    let file = OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NONBLOCK)
        .open(path)
        .map_err(|e| Error::read(path, e))?;
    let meta = file.metadata().map_err(|e| Error::read(path, e))?;
    refuse_irregular(path, &meta)?;
    clear_nonblocking(&file).map_err(|e| Error::read(path, e))?;
    Ok((file, meta))
}

fn clear_nonblocking(file: &File) -> std::io::Result<()> {
    use std::os::fd::AsRawFd;
    let fd = file.as_raw_fd();
    // SAFETY: fcntl reads and sets the flags of a descriptor `file` owns; no memory is passed.
    let flags = unsafe { libc::fcntl(fd, libc::F_GETFL) };
    if flags < 0 || unsafe { libc::fcntl(fd, libc::F_SETFL, flags & !libc::O_NONBLOCK) } < 0 {
        return Err(std::io::Error::last_os_error());
    }
    Ok(())
}

/// Read a whole side file (JSON) of at most `limit` bytes. The size is checked before reading
/// and the read stops past the limit, so a file that lies about its size or grows costs no more.
pub fn read_capped(path: &Path, limit: u64, what: &str) -> Result<Vec<u8>> {
    let (file, meta) = open_regular(path)?;
    let too_large = || {
        Error::invalid(
            path,
            FormatProblem::Other(format!(
                "{what} is larger than the {} MB limit",
                limit / 1_000_000
            )),
        )
    };
    if meta.len() > limit {
        return Err(too_large());
    }
    let mut text = Vec::with_capacity(meta.len() as usize);
    file.take(limit + 1)
        .read_to_end(&mut text)
        .map_err(|e| Error::read(path, e))?;
    if text.len() as u64 > limit {
        return Err(too_large());
    }
    Ok(text)
}

/// Read access to tensor values, as discovery and planning need it. Implemented by
/// [`Checkpoint`] and [`Source`]; tests implement it over in-memory tensors.
pub trait TensorSource {
    /// All tensors, in file order.
    fn entries(&self) -> &[TensorEntry];
    /// Raw little-endian bytes of one tensor.
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>>;
    /// The same bytes passed to `sink` in pieces, for copies whose memory must not grow with
    /// the tensor. Sources held in memory pass them at once.
    fn stream(&self, tensor: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        sink(&self.bytes(tensor)?)
    }
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
    fn stream(&self, tensor: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        self.stream_bytes(tensor, sink)
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

/// A run of a file that holds one tensor's bytes exactly as a writer needs them
/// (little-endian, C order): writers copy such runs file to file, in the kernel.
#[derive(Debug, Clone, Copy)]
pub struct Span<'a> {
    pub file: &'a File,
    /// The file's path, for error messages.
    pub path: &'a Path,
    pub offset: u64,
    pub len: u64,
}

impl Span<'_> {
    /// The run's bytes passed to `sink` in fixed-size chunks, read with positioned reads.
    pub fn stream(&self, sink: Sink<'_>) -> Result<()> {
        let mut buf = vec![0u8; chunk_len(self.len)];
        let (mut at, end) = (self.offset, self.offset + self.len);
        while at < end {
            let n = chunk_len(end - at);
            self.file
                .read_exact_at(&mut buf[..n], at)
                .map_err(|e| Error::read(self.path, e))?;
            sink(&buf[..n])?;
            at += n as u64;
        }
        Ok(())
    }
}

/// An opened, validated container: what every reader offers the job and the writers. It lists
/// its entries ([`TensorSource::entries`]), reads or streams one, and says where an entry's
/// bytes lie when they are stored as they are ([`Reader::span`]).
pub trait Reader: TensorSource + std::fmt::Debug {
    /// The container format.
    fn format(&self) -> Format;
    /// Bytes on disk (all files of a set).
    fn file_len(&self) -> u64;
    /// Where `tensor`'s bytes lie, when a file holds them as they are.
    fn span(&self, _tensor: &TensorEntry) -> Option<Span<'_>> {
        None
    }
    /// What a user should know about the container beyond its tensors (shown as warnings).
    fn notes(&self) -> Vec<String> {
        Vec::new()
    }
    /// String metadata the container carries (safetensors `__metadata__`), in file order.
    fn metadata(&self) -> Option<&[(String, String)]> {
        None
    }
    /// The concrete reader, for a writer of the same container that keeps more than tensors
    /// (an npz member's compressed bytes, a set's shard layout).
    fn as_any(&self) -> &dyn std::any::Any;
}

impl Reader for Checkpoint {
    fn format(&self) -> Format {
        self.format
    }
    fn file_len(&self) -> u64 {
        self.file_len
    }
    fn span(&self, tensor: &TensorEntry) -> Option<Span<'_>> {
        Some(Span {
            file: &self.file,
            path: &self.path,
            offset: tensor.begin,
            len: tensor.byte_len(),
        })
    }
    fn metadata(&self) -> Option<&[(String, String)]> {
        self.header.metadata.as_deref()
    }
    fn as_any(&self) -> &dyn std::any::Any {
        self
    }
}

/// Any checkpoint posgrid reads — a single safetensors file, a sharded set, an npz archive or a
/// PyTorch file —
/// opened behind the one [`Reader`] interface.
#[derive(Debug)]
pub struct Source {
    reader: Box<dyn Reader>,
    /// The model directory the weights were found in, when a directory was given.
    directory: Option<directory::ModelDir>,
    /// Each name's place in `entries`, so that finding a tensor costs the same in a file of
    /// a hundred thousand tensors as in one of ten (discovery and planning look up companions
    /// by name for every table).
    by_name: std::collections::HashMap<String, usize>,
}

impl Source {
    /// Open a file, a model directory (one checkpoint file and its configuration), a set's
    /// directory or a set's index. The container is told by the file's first bytes; a `.npz`
    /// name that is not a ZIP archive is reported as such.
    pub fn open(path: impl AsRef<Path>) -> Result<Self> {
        let path = path.as_ref();
        let is_index = path.extension().is_some_and(|e| e == "json");
        if is_index || (path.is_dir() && directory::has_shard_index(path)) {
            return Ok(Source::new(
                Box::new(sharded::ShardedSet::open(path)?),
                None,
            ));
        }
        if path.is_dir() {
            let dir = directory::ModelDir::find(path)?;
            return Ok(Source::new(open_file(&dir.weights)?, Some(dir)));
        }
        Ok(Source::new(open_file(path)?, None))
    }

    /// A source over `reader`, with its name index built once.
    fn new(reader: Box<dyn Reader>, directory: Option<directory::ModelDir>) -> Self {
        let mut by_name = std::collections::HashMap::new();
        for (i, t) in reader.entries().iter().enumerate() {
            by_name.entry(t.name.clone()).or_insert(i);
        }
        Source {
            reader,
            directory,
            by_name,
        }
    }

    /// The model directory the weights come from, if a directory was opened.
    pub fn directory(&self) -> Option<&directory::ModelDir> {
        self.directory.as_ref()
    }

    /// The reader behind this source.
    pub fn reader(&self) -> &dyn Reader {
        self.reader.as_ref()
    }

    /// The concrete reader, if it is a `T`.
    pub fn downcast<T: 'static>(&self) -> Option<&T> {
        self.reader.as_any().downcast_ref::<T>()
    }
}

/// Open one checkpoint file, its container told by its first bytes.
fn open_file(path: &Path) -> Result<Box<dyn Reader>> {
    let (file, meta) = open_regular(path)?;
    let named_npz = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("npz"));
    // A PyTorch name with a damaged ZIP inside is reported as a PyTorch file.
    let named_torch = Format::from_extension(path) == Some(Format::PyTorch);
    let zip = is_zip(&file);
    Ok(if zip && (named_torch || torch::is_torch_zip(&file)) {
        Box::new(torch::TorchFile::open(path)?)
    } else if zip {
        Box::new(npz::Npz::open(path)?)
    } else if torch::is_legacy(&file) {
        return Err(torch::legacy_error(path));
    } else if named_npz {
        let problem = if meta.len() == 0 {
            "is empty, not an npz archive"
        } else {
            "has a .npz name but is not a ZIP archive (an npz file is a ZIP of .npy arrays)"
        };
        return Err(Error::invalid(path, FormatProblem::Other(problem.into())));
    } else {
        Box::new(Checkpoint::open(path)?)
    })
}

impl std::ops::Deref for Source {
    type Target = dyn Reader;
    fn deref(&self) -> &Self::Target {
        self.reader.as_ref()
    }
}

impl TensorSource for Source {
    fn entries(&self) -> &[TensorEntry] {
        self.reader.entries()
    }
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        self.reader.bytes(tensor)
    }
    fn stream(&self, tensor: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        self.reader.stream(tensor, sink)
    }
    fn source_path(&self) -> &Path {
        self.reader.source_path()
    }
    fn find(&self, name: &str) -> Option<&TensorEntry> {
        self.by_name.get(name).map(|&i| &self.entries()[i])
    }
}

/// Why an archive member's name is refused, if it is: an empty name, an absolute path, a drive
/// letter, a `..` step, a backslash or a NUL would be unsafe to write back into an archive.
pub(crate) fn unsafe_member_name(name: &[u8]) -> Option<&'static str> {
    if name.is_empty() {
        Some("has an empty name")
    } else if name.contains(&0) {
        Some("has a NUL byte in its name")
    } else if name.contains(&b'\\') {
        Some("has a backslash in its name")
    } else if name[0] == b'/' {
        Some("has an absolute path as its name")
    } else if name.len() >= 2 && name[1] == b':' && name[0].is_ascii_alphabetic() {
        Some("has a drive letter in its name")
    } else if name.split(|&b| b == b'/').any(|part| part == b"..") {
        Some("has a \"..\" step in its name")
    } else {
        None
    }
}

/// Whether a file starts like a ZIP archive (`PK\x03\x04`, or `PK\x05\x06` when empty).
fn is_zip(file: &File) -> bool {
    let mut magic = [0u8; 4];
    file.read_exact_at(&mut magic, 0).is_ok()
        && (magic == *b"PK\x03\x04" || magic == *b"PK\x05\x06")
}
