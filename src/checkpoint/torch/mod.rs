//! PyTorch checkpoint files in the framework's zip format (its default since 2020): a ZIP with
//! one top folder holding `data.pkl` (the object tree, a pickle), `data/<key>` storage records,
//! `byteorder` and `version`. The pickle is interpreted by [`super::pickle`], which executes
//! nothing; tensors are found anywhere in the tree and named by their key path (`model/pos_embed`,
//! see [`super::pickle`] for the rule). A tensor is a view of a storage record: an offset,
//! a shape and strides, checked to lie inside the record; views that are C-contiguous are read
//! (and copied by writers) straight from the file.
//!
//! The legacy pre-zip stream format and TorchScript archives are recognised and refused with
//! what to do.

pub mod archive;
mod write;

use std::collections::HashMap;
use std::fs::File;
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};

pub use write::TorchWriter;

use self::archive::{invalid, Archive};
use super::pickle::{self, Limits, Node, NodeId, Pickle};
use super::{Dtype, Format, Reader, Sink, Span, TensorEntry, TensorSource};
use crate::error::{Error, Result};

/// The largest `data.pkl` accepted. Real ones are kilobytes (a training checkpoint's optimizer
/// state included); each opcode byte can make a node of about a hundred bytes.
const MAX_PICKLE: u64 = 64 << 20;
/// The most nodes one `data.pkl` may build: bounds the tree's memory (a node takes up to about
/// two hundred bytes) near 400 MiB whatever the stream, far above what a checkpoint's tree
/// holds (a few nodes per tensor, and the optimizer's state).
const MAX_NODES: usize = 2 << 20;

/// How the legacy format starts: protocol 2, then the pickled magic number of that format
/// (fact of the framework's file format, read off a file it wrote: fixtures/torch/legacy.pth).
const LEGACY_MAGIC: [u8; 14] = [
    0x80, 0x02, 0x8a, 0x0a, 0x6c, 0xfc, 0x9c, 0x46, 0xf9, 0x20, 0x6a, 0xa8, 0x50, 0x19,
];

/// The storage classes a checkpoint carries and their element types (the framework's names).
pub fn dtype_of_storage(class: &str) -> Option<Dtype> {
    Some(match class {
        "FloatStorage" => Dtype::F32,
        "HalfStorage" => Dtype::F16,
        "BFloat16Storage" => Dtype::BF16,
        "DoubleStorage" => Dtype::F64,
        "LongStorage" => Dtype::I64,
        "IntStorage" => Dtype::I32,
        "ShortStorage" => Dtype::I16,
        "CharStorage" => Dtype::I8,
        "ByteStorage" => Dtype::U8,
        "BoolStorage" => Dtype::BOOL,
        "ComplexFloatStorage" => Dtype::C64,
        _ => return None,
    })
}

/// The element type a `torch.<name>` dtype global names (the framework's dtype names).
pub fn dtype_of_name(name: &str) -> Option<Dtype> {
    Some(match name {
        "float32" | "float" => Dtype::F32,
        "float16" | "half" => Dtype::F16,
        "bfloat16" => Dtype::BF16,
        "float64" | "double" => Dtype::F64,
        "int64" | "long" => Dtype::I64,
        "int32" | "int" => Dtype::I32,
        "int16" | "short" => Dtype::I16,
        "int8" => Dtype::I8,
        "uint8" => Dtype::U8,
        "bool" => Dtype::BOOL,
        "uint16" => Dtype::U16,
        "uint32" => Dtype::U32,
        "uint64" => Dtype::U64,
        "float8_e4m3fn" => Dtype::F8_E4M3,
        "float8_e5m2" => Dtype::F8_E5M2,
        "complex64" | "cfloat" => Dtype::C64,
        _ => return None,
    })
}

/// The storage class of an element type.
pub fn storage_of_dtype(dtype: Dtype) -> Option<&'static str> {
    [
        "FloatStorage",
        "HalfStorage",
        "BFloat16Storage",
        "DoubleStorage",
        "LongStorage",
        "IntStorage",
        "ShortStorage",
        "CharStorage",
        "ByteStorage",
        "BoolStorage",
        "ComplexFloatStorage",
    ]
    .into_iter()
    .find(|c| dtype_of_storage(c) == Some(dtype))
}

/// Whether a file starts like the legacy (pre-zip) stream format.
pub fn is_legacy(file: &File) -> bool {
    let mut head = [0u8; LEGACY_MAGIC.len()];
    file.read_exact_at(&mut head, 0).is_ok() && head == LEGACY_MAGIC
}

/// Whether a ZIP archive is a PyTorch checkpoint (a `<folder>/data.pkl` record) rather than
/// an npz.
pub fn is_torch_zip(file: &File) -> bool {
    let Ok(handle) = file.try_clone() else {
        return false;
    };
    zip::ZipArchive::new(handle).is_ok_and(|z| {
        z.file_names_raw().any(|n| {
            n.strip_suffix(b"/data.pkl")
                .is_some_and(|folder| !folder.contains(&b'/'))
        })
    })
}

/// The refusal of the legacy format, with what to do.
pub fn legacy_error(path: &Path) -> Error {
    invalid(
        path,
        "is a PyTorch file in the legacy (pre-2020) format, which posgrid does not read; \
         re-save it with a current framework (torch.save writes the zip format) in a trusted environment",
    )
}

/// Modules whose functions run programs, touch files or the network, load or evaluate code,
/// or run a debugger or profiler over code given as text, and the built-in functions that
/// evaluate text or reach attributes: a checkpoint has no reason to name any of them, so a file
/// that does is refused as hostile (common practice of safe loaders: such objects are how a
/// malicious pickle runs its payload, called directly or handed to another callable).
const DANGEROUS_MODULES: &[&str] = &[
    "os",
    "posix",
    "nt",
    "subprocess",
    "sys",
    "shutil",
    "socket",
    "pty",
    "importlib",
    "runpy",
    "pickle",
    "_pickle",
    "marshal",
    "ctypes",
    "code",
    "codeop",
    "webbrowser",
    "multiprocessing",
    "signal",
    "asyncio",
    "io",
    "pathlib",
    "tempfile",
    "urllib",
    "http",
    "ftplib",
    "smtplib",
    "telnetlib",
    "timeit",
    "pdb",
    "bdb",
    "cProfile",
    "profile",
    "trace",
    "doctest",
    "pydoc",
    "imp",
    "zipimport",
    "commands",
    "popen2",
    "platform",
];
const DANGEROUS_BUILTINS: &[&str] = &[
    "eval",
    "exec",
    "compile",
    "__import__",
    "open",
    "getattr",
    "setattr",
    "delattr",
    "globals",
    "locals",
    "vars",
    "input",
    "breakpoint",
    "exit",
    "quit",
    "apply",
    "execfile",
    "file",
];

/// Whether a global marks the file as hostile wherever it appears.
fn dangerous(module: &str, name: &str) -> bool {
    let top = module.split('.').next().unwrap_or(module);
    DANGEROUS_MODULES.contains(&top)
        || (matches!(module, "builtins" | "__builtin__") && DANGEROUS_BUILTINS.contains(&name))
        || (module == "operator" && matches!(name, "attrgetter" | "methodcaller"))
        || module.starts_with("numpy.testing")
}

/// Globals of the framework's own checkpoint vocabulary (the rebuild functions, storage
/// classes, ordered dicts); anything else is carried through inert and named in a note.
fn framework_global(module: &str, name: &str) -> bool {
    matches!(
        (module, name),
        ("collections", "OrderedDict")
            | ("torch._utils", "_rebuild_tensor_v2")
            | ("torch._utils", "_rebuild_parameter")
            | ("torch._utils", "_rebuild_parameter_with_state")
            | ("torch._utils", "_rebuild_tensor_v3")
            | ("torch", "UntypedStorage")
    ) || (module == "torch" && (dtype_of_storage(name).is_some() || dtype_of_name(name).is_some()))
}

/// Refuse a pickle that names a dangerous object anywhere in its tree (posgrid never runs it;
/// the refusal tells the user what the file is); return the other foreign globals.
fn check_globals(path: &Path, p: &Pickle) -> Result<Vec<String>> {
    let reachable = p.reachable();
    let mut foreign = Vec::new();
    for (id, node) in p.nodes.iter().enumerate() {
        let Node::Global { module, name } = node else {
            continue;
        };
        if !reachable[id] {
            continue;
        }
        if dangerous(module, name) {
            return Err(invalid(
                path,
                format!(
                    "data.pkl names {module}.{name}, which a checkpoint never needs: the file is built to run code when loaded. Nothing was executed; do not load it with the framework"
                ),
            ));
        }
        let full = format!("{module}.{name}");
        if !framework_global(module, name) && !foreign.contains(&full) {
            foreign.push(full);
        }
    }
    Ok(foreign)
}

/// Where one tensor's elements lie.
#[derive(Debug, Clone)]
struct View {
    /// The storage record (index into the archive's records).
    record: usize,
    elem: usize,
    /// In elements, from the start of the storage.
    offset: u64,
    shape: Vec<u64>,
    stride: Vec<u64>,
    contiguous: bool,
    /// The view covers its whole storage record (so its CRC-32 can be checked).
    whole_record: bool,
}

/// An opened, validated PyTorch file.
pub struct TorchFile {
    path: PathBuf,
    file: File,
    file_len: u64,
    archive: Archive,
    pickle: Pickle,
    entries: Vec<TensorEntry>,
    views: Vec<View>,
    /// Per entry, the node named (a tensor or a parameter) and the tensor node itself.
    nodes: Vec<(NodeId, NodeId)>,
    by_name: HashMap<String, usize>,
    /// Globals outside the framework's checkpoint vocabulary, carried through inert.
    foreign: Vec<String>,
}

impl std::fmt::Debug for TorchFile {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TorchFile")
            .field("path", &self.path)
            .field("tensors", &self.entries.len())
            .finish()
    }
}

impl TorchFile {
    /// Open and validate a file: the archive, the pickle and every tensor's view.
    pub fn open(path: &Path) -> Result<Self> {
        let (file, meta) = super::open_regular(path)?;
        let file_len = meta.len();
        let archive = Archive::open(path, &file, file_len)?;
        if archive.get("constants.pkl").is_some() || archive.has_prefix("code/") {
            return Err(invalid(
                path,
                "is a TorchScript archive (a compiled model), not a checkpoint of weights; \
                 save the model's state_dict() with torch.save and resize that",
            ));
        }
        if let Some(r) = archive.get("byteorder") {
            let order = archive::read_whole(path, &file, r, 16)?;
            if order != b"little" {
                return Err(invalid(
                    path,
                    "stores its tensors big-endian (byteorder record), which posgrid does not read",
                ));
            }
        }
        let pkl = archive
            .get("data.pkl")
            .expect("the archive's folder is the folder of its data.pkl");
        let bytes = archive::read_whole(path, &file, pkl, MAX_PICKLE)?;
        let limits = Limits {
            max_nodes: MAX_NODES,
            ..Limits::for_len(bytes.len())
        };
        let pickle =
            pickle::parse(&bytes, &limits).map_err(|e| invalid(path, format!("data.pkl: {e}")))?;
        let foreign = check_globals(path, &pickle)?;
        let mut ckpt = TorchFile {
            path: path.to_path_buf(),
            file,
            file_len,
            archive,
            pickle,
            entries: Vec::new(),
            views: Vec::new(),
            nodes: Vec::new(),
            by_name: HashMap::new(),
            foreign,
        };
        ckpt.check_storages()?;
        for (name, named) in ckpt.pickle.tensors() {
            let tensor = ckpt.pickle.tensor_of(named);
            let (entry, view) = ckpt.view(&name, tensor)?;
            if ckpt
                .by_name
                .insert(name.clone(), ckpt.entries.len())
                .is_some()
            {
                return Err(invalid(
                    path,
                    format!("two tensors have the same name \"{name}\" (a key set twice); which one is meant is ambiguous"),
                ));
            }
            ckpt.entries.push(entry);
            ckpt.views.push(view);
            ckpt.nodes.push((named, tensor));
        }
        Ok(ckpt)
    }

    /// Every storage the tree refers to — through a tensor or on its own — must name a
    /// record of the archive that holds exactly its elements.
    fn check_storages(&self) -> Result<()> {
        let reachable = self.pickle.reachable();
        for (id, node) in self.pickle.nodes.iter().enumerate() {
            if reachable[id] && matches!(node, Node::Storage { .. }) {
                self.storage_record(id)
                    .map_err(|why| invalid(&self.path, format!("data.pkl: {why}")))?;
            }
        }
        Ok(())
    }

    /// The element type and record of a storage node, checked; or why it is refused.
    /// The element type (none for an untyped storage, whose tensors name theirs) and record
    /// of a storage node, checked; or why it is refused. An untyped storage counts bytes.
    fn storage_record(
        &self,
        storage: NodeId,
    ) -> std::result::Result<(Option<Dtype>, usize), String> {
        let Node::Storage {
            class, key, numel, ..
        } = &self.pickle.nodes[storage]
        else {
            return Err("its storage is not a storage record".into());
        };
        let dtype = match class.as_str() {
            "UntypedStorage" => None,
            _ => Some(
                dtype_of_storage(class)
                    .ok_or_else(|| format!("storage type {class} is not one posgrid reads"))?,
            ),
        };
        if key.is_empty() || key.contains('/') || key.contains('\\') || key == ".." {
            return Err(format!("storage key {key:?} is not a plain record name"));
        }
        let record = self
            .archive
            .index_of(&format!("data/{key}"))
            .ok_or_else(|| format!("storage record data/{key} is missing"))?;
        let r = &self.archive.records[record];
        if !r.stored {
            return Err(format!(
                "storage record data/{key} is compressed; the framework stores storages as they are"
            ));
        }
        let elem = dtype.map_or(1, |d| (d.bitsize() / 8).max(1) as u64);
        if numel.checked_mul(elem) != Some(r.size) {
            return Err(format!(
                "storage record data/{key} holds {} bytes, not the {numel} elements its reference says",
                r.size
            ));
        }
        Ok((dtype, record))
    }

    /// Check one tensor node against its storage record.
    fn view(&self, name: &str, tensor: NodeId) -> Result<(TensorEntry, View)> {
        let bad = |why: String| invalid(&self.path, format!("tensor \"{name}\": {why}"));
        let Node::Tensor {
            storage,
            offset,
            size,
            stride,
            dtype: tensor_dtype,
            ..
        } = &self.pickle.nodes[tensor]
        else {
            return Err(bad("a parameter that does not wrap a tensor".into()));
        };
        let (typed, record) = self.storage_record(*storage).map_err(bad)?;
        let Node::Storage { numel, .. } = &self.pickle.nodes[*storage] else {
            unreachable!("checked by storage_record")
        };
        // A v3 tensor names its element type; a typed storage gives it otherwise.
        let named = match tensor_dtype {
            Some(g) => match &self.pickle.nodes[*g] {
                Node::Global { name, .. } => Some(dtype_of_name(name).ok_or_else(|| {
                    bad(format!(
                        "element type torch.{name} is not one posgrid reads"
                    ))
                })?),
                _ => None,
            },
            None => None,
        };
        let dtype = named
            .or(typed)
            .ok_or_else(|| bad("an untyped storage without an element type".into()))?;
        let elem = (dtype.bitsize() / 8).max(1);
        // An untyped storage counts bytes: its elements are those bytes in the tensor's type.
        let numel = &match typed {
            Some(_) => *numel,
            None if numel % elem as u64 == 0 => numel / elem as u64,
            None => {
                return Err(bad(format!(
                    "its untyped storage of {numel} bytes is not a whole number of {dtype} elements"
                )))
            }
        };
        let r = &self.archive.records[record];
        let outside = || {
            bad(format!("its view (offset {offset}, shape {size:?}, strides {stride:?}) does not lie inside its storage of {numel} elements"))
        };
        let count = check_view(size, stride, *offset, *numel).ok_or_else(outside)?;
        // Byte positions: checked, so a view of 2^61 elements of one stored value cannot wrap.
        let begin = offset
            .checked_mul(elem as u64)
            .and_then(|o| o.checked_add(r.data_start));
        let len = count.checked_mul(elem as u64);
        let (Some(begin), Some(len)) = (begin, len) else {
            return Err(bad(format!(
                "its shape {size:?} holds more bytes than a file can"
            )));
        };
        let end = begin.checked_add(len).ok_or_else(outside)?;
        let view = View {
            record,
            elem,
            offset: *offset,
            shape: size.clone(),
            stride: stride.clone(),
            contiguous: count == 0 || is_contiguous(size, stride),
            whole_record: *offset == 0 && count == *numel,
        };
        let entry = TensorEntry {
            name: name.to_string(),
            dtype,
            shape: size.iter().map(|&d| d as usize).collect(),
            begin,
            end,
        };
        Ok((entry, view))
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The object tree.
    pub fn pickle(&self) -> &Pickle {
        &self.pickle
    }

    /// The archive's records.
    pub fn archive(&self) -> &Archive {
        &self.archive
    }

    pub fn file(&self) -> &File {
        &self.file
    }

    /// The keys of the root dict, named as tensor paths name them (see [`super::pickle`]);
    /// empty when the root is not a dict.
    pub fn root_keys(&self) -> Vec<String> {
        let Node::Dict { items, .. } = &self.pickle.nodes[self.pickle.root] else {
            return Vec::new();
        };
        items
            .iter()
            .filter_map(|&(k, _)| match &self.pickle.nodes[k] {
                Node::Str(s) => Some(pickle::escape_key(s)),
                _ => None,
            })
            .collect()
    }

    /// The named node and the tensor node of an entry.
    pub fn nodes_of(&self, name: &str) -> Option<(NodeId, NodeId)> {
        self.by_name.get(name).map(|&i| self.nodes[i])
    }

    fn view_of(&self, t: &TensorEntry) -> &View {
        &self.views[*self
            .by_name
            .get(&t.name)
            .expect("entries come from the file")]
    }

    /// A contiguous view's bytes, in chunks; the CRC-32 is checked when it covers its record.
    fn stream_contiguous(&self, t: &TensorEntry, v: &View, sink: Sink<'_>) -> Result<()> {
        let mut crc = crc32fast::Hasher::new();
        let span = Span {
            file: &self.file,
            path: &self.path,
            offset: t.begin,
            len: t.byte_len(),
        };
        span.stream(&mut |chunk| {
            crc.update(chunk);
            sink(chunk)
        })?;
        if v.whole_record {
            archive::check_crc(&self.path, &self.archive.records[v.record], crc.finalize())?;
        }
        Ok(())
    }

    /// A strided view gathered into C order, a block at a time: the leading dimensions are
    /// walked one index at a time until what is left spans at most [`GATHER_WINDOW`] bytes of
    /// storage; each such block is read at once and its elements picked out, and the result is
    /// passed on in chunks. Memory stays near the window whatever the view.
    fn gather(&self, v: &View, sink: Sink<'_>) -> Result<()> {
        self.gather_in(v, GATHER_WINDOW, sink)
    }

    fn gather_in(&self, v: &View, window_bytes: u64, sink: Sink<'_>) -> Result<()> {
        let r = &self.archive.records[v.record];
        let elem = v.elem as u64;
        let fits = |k: usize| {
            span_elements_checked(&v.shape[k..], &v.stride[k..])
                .is_some_and(|n| n.saturating_mul(elem) <= window_bytes)
        };
        let k = (0..=v.shape.len())
            .find(|&k| fits(k))
            .unwrap_or(v.shape.len());
        let (outer_shape, inner_shape) = v.shape.split_at(k);
        let (outer_stride, inner_stride) = v.stride.split_at(k);
        // Checked when the file was opened; an empty view is contiguous and never gathered.
        let inner_span = span_elements_checked(inner_shape, inner_stride).unwrap_or(0);
        let inner_count: u64 = inner_shape.iter().product();
        let outer_count: u64 = outer_shape.iter().product();
        let mut window = vec![0u8; (inner_span * elem) as usize];
        let mut out = Vec::with_capacity(super::COPY_CHUNK);
        for o in 0..outer_count {
            let base = v.offset + strided_position(o, outer_shape, outer_stride);
            self.file
                .read_exact_at(&mut window, r.data_start + base * elem)
                .map_err(|e| Error::read(&self.path, e))?;
            for i in 0..inner_count {
                let at = (strided_position(i, inner_shape, inner_stride) * elem) as usize;
                out.extend_from_slice(&window[at..at + v.elem]);
                if out.len() >= super::COPY_CHUNK {
                    sink(&out)?;
                    out.clear();
                }
            }
        }
        if !out.is_empty() {
            sink(&out)?;
        }
        Ok(())
    }
}

/// The most storage bytes a strided view's gather reads at once.
const GATHER_WINDOW: u64 = 4 << 20;

/// The number of elements of a view, if it lies inside a storage of `numel` elements.
fn check_view(size: &[u64], stride: &[u64], offset: u64, numel: u64) -> Option<u64> {
    if size.len() != stride.len() {
        return None;
    }
    let count = size.iter().try_fold(1u64, |n, &d| n.checked_mul(d))?;
    usize::try_from(count).ok()?;
    if count == 0 {
        return (offset <= numel).then_some(0);
    }
    let last = offset.checked_add(span_elements_checked(size, stride)? - 1)?;
    (last < numel).then_some(count)
}

/// How many elements a view spans from its first to its last, inclusive.
fn span_elements_checked(size: &[u64], stride: &[u64]) -> Option<u64> {
    size.iter().zip(stride).try_fold(1u64, |acc, (&d, &s)| {
        acc.checked_add(d.checked_sub(1)?.checked_mul(s)?)
    })
}

/// Whether strides are the C-order strides of the shape (dimensions of one element ignored).
fn is_contiguous(size: &[u64], stride: &[u64]) -> bool {
    let mut expected = 1u64;
    for (&d, &s) in size.iter().zip(stride).rev() {
        if d != 1 && s != expected {
            return false;
        }
        expected = expected.saturating_mul(d);
    }
    true
}

/// The storage position (relative to the view's offset) of the `index`-th element in C order.
fn strided_position(mut index: u64, size: &[u64], stride: &[u64]) -> u64 {
    let mut at = 0;
    for (&d, &s) in size.iter().zip(stride).rev() {
        at += (index % d) * s;
        index /= d;
    }
    at
}

impl TensorSource for TorchFile {
    fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }
    fn bytes(&self, t: &TensorEntry) -> Result<Vec<u8>> {
        let v = self.view_of(t);
        let mut out = super::whole_tensor_buffer(&self.path, t)?;
        let mut keep = |chunk: &[u8]| {
            out.extend_from_slice(chunk);
            Ok(())
        };
        if v.contiguous {
            self.stream_contiguous(t, v, &mut keep)?;
        } else {
            self.gather(v, &mut keep)?;
        }
        Ok(out)
    }
    fn stream(&self, t: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        let v = self.view_of(t);
        if v.contiguous {
            return self.stream_contiguous(t, v, sink);
        }
        self.gather(v, sink)
    }
    fn source_path(&self) -> &Path {
        &self.path
    }
}

impl Reader for TorchFile {
    fn format(&self) -> Format {
        Format::PyTorch
    }
    fn file_len(&self) -> u64 {
        self.file_len
    }
    fn notes(&self) -> Vec<String> {
        if self.foreign.is_empty() {
            return Vec::new();
        }
        vec![format!(
            "data.pkl names objects outside the framework's checkpoint types ({}); posgrid carries them through unchanged and never runs them, but the framework's safe loader (weights_only) may ask you to allow them",
            self.foreign.join(", ")
        )]
    }
    fn span(&self, t: &TensorEntry) -> Option<Span<'_>> {
        self.view_of(t).contiguous.then_some(Span {
            file: &self.file,
            path: &self.path,
            offset: t.begin,
            len: t.byte_len(),
        })
    }
    fn as_any(&self) -> &dyn std::any::Any {
        self
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn views_inside_and_outside_their_storage() {
        // A [2, 3] view with C strides at offset 4 of 10 elements ends at element 9.
        assert_eq!(check_view(&[2, 3], &[3, 1], 4, 10), Some(6));
        assert_eq!(check_view(&[2, 3], &[3, 1], 5, 10), None);
        // A transposed view: strides (1, 2) over a 2x3 storage.
        assert_eq!(check_view(&[3, 2], &[1, 3], 0, 6), Some(6));
        assert!(!is_contiguous(&[3, 2], &[1, 3]));
        assert!(is_contiguous(&[1, 4, 2], &[99, 2, 1]));
        assert_eq!(check_view(&[2], &[1, 1], 0, 10), None);
        assert_eq!(check_view(&[u64::MAX, 2], &[1, 1], 0, 10), None);
        assert_eq!(check_view(&[0, 5], &[5, 1], 3, 3), Some(0));
    }

    #[test]
    fn gathering_block_by_block_gives_the_same_bytes() {
        // view.pth (written by the framework): a transposed and a strided view. Read with a
        // window of one element, every leading index is walked; the bytes must not change.
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("fixtures/torch/view.pth");
        let file = TorchFile::open(&path).unwrap();
        let mut strided = 0;
        for (t, v) in file.entries.iter().zip(&file.views) {
            if v.contiguous {
                continue;
            }
            strided += 1;
            let whole = file.bytes(t).unwrap();
            for window in [4, 8, 48] {
                let mut pieces = Vec::new();
                file.gather_in(v, window, &mut |c| {
                    pieces.extend_from_slice(c);
                    Ok(())
                })
                .unwrap();
                assert_eq!(pieces, whole, "{} with a {window}-byte window", t.name);
            }
        }
        assert_eq!(strided, 2);
    }

    #[test]
    fn strided_positions_follow_c_order() {
        // Transpose of a 2x3 row-major matrix: element (i, j) of the view is (j, i) of the base.
        let pos: Vec<u64> = (0..6)
            .map(|i| strided_position(i, &[3, 2], &[1, 3]))
            .collect();
        assert_eq!(pos, vec![0, 3, 1, 4, 2, 5]);
    }
}
