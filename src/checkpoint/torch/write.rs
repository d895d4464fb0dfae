//! Writing PyTorch files in the framework's zip format. From a PyTorch source the object tree
//! is kept: only the changed tensors' sizes, strides and storages are edited, every other
//! object (opaque ones included) is written back as it was, and every untouched record is
//! copied byte for byte, file to file. From any other source the output is one ordered dict
//! of tensors, as the framework saves a state dict. Records are stored, each one's data aligned
//! to 64 bytes (so the framework can map the file), with its CRC-32; ZIP64 where sizes need it.

use std::borrow::Cow;
use std::collections::HashSet;

use super::{storage_of_dtype, TorchFile};
use crate::checkpoint::pickle::{self, Node, NodeId, Pickle};
use crate::checkpoint::writer::{
    write_file, Destination, OutEntry, Output, Preview, Writer, Written,
};
use crate::checkpoint::{Format, Reader, Span};
use crate::error::{Error, Result};
use crate::write::{AtomicFile, Progress};

/// Data of every record starts on a multiple of this (the framework's storage alignment).
const ALIGN: u64 = 64;
/// The extra-field id posgrid pads local headers with (an id no reader interprets).
const PAD_ID: u16 = 0x5047;
/// The folder of an archive made from another container.
const FRESH_FOLDER: &str = "archive";

/// Writes PyTorch zip-format files.
pub struct TorchWriter;

/// Where one record's bytes come from.
enum Body<'a> {
    /// Bytes made here (the pickle, small text records) or an entry's new bytes.
    Bytes(Cow<'a, [u8]>),
    /// A run of a source file, copied as it is: a record of a PyTorch source (with the CRC-32
    /// and size its archive records) or a tensor's span (CRC-32 computed by reading it once).
    Copy {
        span: Span<'a>,
        crc32: Option<u32>,
        size: u64,
        deflated: bool,
    },
    /// An entry's bytes streamed from a source that does not hold them contiguously.
    Stream(&'a dyn Reader, &'a OutEntry<'a>),
}

struct RecordOut<'a> {
    name: String,
    body: Body<'a>,
}

impl RecordOut<'_> {
    /// (stored size, uncompressed size)
    fn sizes(&self) -> (u64, u64) {
        match &self.body {
            Body::Bytes(b) => (b.len() as u64, b.len() as u64),
            Body::Copy { span, size, .. } => (span.len, *size),
            Body::Stream(_, e) => (e.byte_len(), e.byte_len()),
        }
    }
}

impl Writer for TorchWriter {
    fn format(&self) -> Format {
        Format::PyTorch
    }

    fn check(&self, out: &Output) -> Result<()> {
        // A tree written back keeps every storage as it is; only a fresh dict needs a typed
        // storage class per tensor.
        if let Some(src) = out.source.as_any().downcast_ref::<TorchFile>() {
            if same_names(src, out) {
                return Ok(());
            }
        }
        match out
            .entries
            .iter()
            .find(|e| storage_of_dtype(e.dtype()).is_none())
        {
            Some(e) => Err(Error::Usage(format!(
                "tensor \"{}\" is {}, which a PyTorch file cannot hold here; write a .safetensors output instead",
                e.name,
                e.dtype()
            ))),
            None => Ok(()),
        }
    }

    fn preview(&self, out: &Output) -> Result<Preview> {
        let records = records(out)?;
        check_names(&records)?;
        Ok(Preview {
            size: layout(&records).total,
            layout: None,
            notes: notes(out),
        })
    }

    fn write(
        &self,
        out: &Output,
        dest: &Destination,
        progress: &mut dyn Progress,
    ) -> Result<Written> {
        let records = records(out)?;
        check_names(&records)?;
        write_file(dest, |file| write_archive(&records, file, progress))
    }
}

fn notes(out: &Output) -> Vec<String> {
    match out.source.as_any().downcast_ref::<TorchFile>() {
        Some(_) => Vec::new(),
        None => vec!["written as one ordered dict of tensors (a state dict); the provenance record is not stored in PyTorch files".into()],
    }
}

/// The records of the output, in order.
fn records<'a>(out: &'a Output<'a>) -> Result<Vec<RecordOut<'a>>> {
    match out.source.as_any().downcast_ref::<TorchFile>() {
        Some(src) if same_names(src, out) => patched(src, out),
        _ => fresh(out),
    }
}

/// Whether the output holds the source's tensors under their own names, but for those the
/// resized model no longer has, so the source's tree can be written back.
fn same_names(src: &TorchFile, out: &Output) -> bool {
    use crate::checkpoint::TensorSource;
    src.entries().len() == out.entries.len() + out.left_out.len()
        && out
            .entries
            .iter()
            .all(|e| e.name == e.origin.name && !out.left_out.contains(&e.name))
}

/// C-order strides of a shape.
fn c_strides(shape: &[usize]) -> Vec<u64> {
    let mut strides = vec![1u64; shape.len()];
    for i in (0..shape.len().saturating_sub(1)).rev() {
        strides[i] = strides[i + 1] * shape[i + 1] as u64;
    }
    strides
}

/// A storage key not used by any record of `taken`.
fn fresh_key(taken: &mut HashSet<String>) -> String {
    let mut n = taken.len();
    loop {
        let key = n.to_string();
        if taken.insert(key.clone()) {
            return key;
        }
        n += 1;
    }
}

/// A ZIP record name is at most 65535 bytes long.
fn check_names(records: &[RecordOut]) -> Result<()> {
    match records.iter().find(|r| r.name.len() > u16::MAX as usize) {
        Some(r) => Err(Error::Usage(format!(
            "the record name of {} bytes is too long for a ZIP archive; write a .safetensors output instead",
            r.name.len()
        ))),
        None => Ok(()),
    }
}

/// The source's tree with the changed tensors pointing at new storages; every untouched
/// record copied.
fn patched<'a>(src: &'a TorchFile, out: &'a Output<'a>) -> Result<Vec<RecordOut<'a>>> {
    let mut tree = src.pickle().clone();
    let folder = &src.archive().folder;
    let storage_prefix = format!("{folder}/data/");
    let mut taken: HashSet<String> = src
        .archive()
        .records
        .iter()
        .filter_map(|r| r.name.strip_prefix(&storage_prefix).map(str::to_string))
        .collect();
    leave_out(src, out, &mut tree)?;
    let mut new_storages: Vec<(String, &[u8])> = Vec::new();
    for entry in &out.entries {
        let Some(bytes) = entry.new else { continue };
        let (_, tensor) = src.nodes_of(&entry.name).expect("checked by same_names");
        let key = fresh_key(&mut taken);
        let elem = (entry.dtype().bitsize() / 8).max(1) as u64;
        retarget(&mut tree, tensor, &key, &entry.shape, elem);
        new_storages.push((key, bytes));
    }
    let used = storage_keys(&tree);
    let pickle_name = format!("{folder}/data.pkl");
    let mut records = vec![RecordOut {
        name: pickle_name.clone(),
        body: Body::Bytes(Cow::Owned(pickle::write(&tree))),
    }];
    for r in &src.archive().records {
        let unused_storage = r
            .name
            .strip_prefix(&storage_prefix)
            .is_some_and(|key| !used.contains(key));
        if r.name == pickle_name || unused_storage {
            continue;
        }
        records.push(RecordOut {
            name: r.name.clone(),
            body: Body::Copy {
                span: Span {
                    file: src.file(),
                    path: src.path(),
                    offset: r.data_start,
                    len: r.stored_size,
                },
                crc32: Some(r.crc32),
                size: r.size,
                deflated: !r.stored,
            },
        });
    }
    // New storages go right after the last storage kept (or after the pickle).
    let at = records
        .iter()
        .rposition(|r| r.name.starts_with(&storage_prefix))
        .map_or(1, |i| i + 1);
    let new_records = new_storages.into_iter().map(|(key, bytes)| RecordOut {
        name: format!("{storage_prefix}{key}"),
        body: Body::Bytes(Cow::Borrowed(bytes)),
    });
    records.splice(at..at, new_records);
    Ok(records)
}

/// Remove the source tensors the output leaves out from every dict that holds them; their
/// storages are then unused and not copied. A tensor also held elsewhere (a list, an object's
/// arguments) cannot be removed without changing the rest of the tree: refused.
fn leave_out(src: &TorchFile, out: &Output, tree: &mut Pickle) -> Result<()> {
    let left: Vec<(&str, NodeId)> = out
        .left_out
        .iter()
        .filter_map(|name| Some((name.as_str(), src.nodes_of(name)?.0)))
        .collect();
    if left.is_empty() {
        return Ok(());
    }
    let ids: HashSet<NodeId> = left.iter().map(|(_, id)| *id).collect();
    for node in &mut tree.nodes {
        if let Node::Dict { items, .. } = node {
            items.retain(|(_, value)| !ids.contains(value));
        }
    }
    let reachable = tree.reachable();
    match left.iter().find(|(_, id)| reachable[*id]) {
        Some((name, _)) => Err(Error::table(
            src.path(),
            format!("\"{name}\" must be left out of the output, but it is held by something other than a dict; write a .safetensors output instead"),
        )),
        None => Ok(()),
    }
}

/// Point a tensor node at a new storage `key` holding `shape` in C order.
/// An untyped storage counts bytes (`elem` per element), a typed one elements.
fn retarget(tree: &mut Pickle, tensor: NodeId, key: &str, shape: &[usize], elem: u64) {
    let Node::Tensor { storage, .. } = &tree.nodes[tensor] else {
        unreachable!("entries name tensor nodes")
    };
    let (class, location) = match &tree.nodes[*storage] {
        Node::Storage {
            class, location, ..
        } => (class.clone(), location.clone()),
        _ => unreachable!("checked when the file was opened"),
    };
    let count = shape.iter().product::<usize>() as u64;
    let numel = if class == "UntypedStorage" {
        count * elem
    } else {
        count
    };
    tree.nodes.push(Node::Storage {
        class,
        key: key.to_string(),
        location,
        numel,
    });
    let new_storage = tree.nodes.len() - 1;
    if let Node::Tensor {
        storage,
        offset,
        size,
        stride,
        ..
    } = &mut tree.nodes[tensor]
    {
        *storage = new_storage;
        *offset = 0;
        *size = shape.iter().map(|&d| d as u64).collect();
        *stride = c_strides(shape);
    }
}

/// Keys of every storage the tree still refers to — through a tensor, a parameter's state,
/// or on its own.
fn storage_keys(tree: &Pickle) -> HashSet<String> {
    let reachable = tree.reachable();
    tree.nodes
        .iter()
        .zip(reachable)
        .filter_map(|(node, live)| match node {
            Node::Storage { key, .. } if live => Some(key.clone()),
            _ => None,
        })
        .collect()
}

/// One ordered dict of the output's tensors, each on a storage of its own.
fn fresh<'a>(out: &'a Output<'a>) -> Result<Vec<RecordOut<'a>>> {
    let mut tree = Pickle {
        nodes: Vec::new(),
        root: 0,
        protocol: 2,
    };
    let push = |tree: &mut Pickle, node: Node| {
        tree.nodes.push(node);
        tree.nodes.len() - 1
    };
    let root = push(
        &mut tree,
        Node::Dict {
            items: Vec::new(),
            ordered: true,
            state: None,
        },
    );
    let mut items = Vec::with_capacity(out.entries.len());
    let mut storages = Vec::with_capacity(out.entries.len());
    for (i, entry) in out.entries.iter().enumerate() {
        let class = storage_of_dtype(entry.dtype()).expect("checked before writing");
        let storage = push(
            &mut tree,
            Node::Storage {
                class: class.to_string(),
                key: i.to_string(),
                location: "cpu".into(),
                numel: entry.shape.iter().product::<usize>() as u64,
            },
        );
        let hooks = push(
            &mut tree,
            Node::Dict {
                items: Vec::new(),
                ordered: true,
                state: None,
            },
        );
        let tensor = push(
            &mut tree,
            Node::Tensor {
                storage,
                offset: 0,
                size: entry.shape.iter().map(|&d| d as u64).collect(),
                stride: c_strides(&entry.shape),
                requires_grad: false,
                hooks,
                dtype: None,
                extra: Vec::new(),
            },
        );
        let key = push(&mut tree, Node::Str(entry.name.clone()));
        items.push((key, tensor));
        storages.push(RecordOut {
            name: format!("{FRESH_FOLDER}/data/{i}"),
            body: match (entry.new, out.source.span(entry.origin)) {
                (Some(bytes), _) => Body::Bytes(Cow::Borrowed(bytes)),
                (None, Some(span)) => Body::Copy {
                    span,
                    crc32: None,
                    size: span.len,
                    deflated: false,
                },
                (None, None) => Body::Stream(out.source, entry),
            },
        });
    }
    if let Node::Dict {
        items: root_items, ..
    } = &mut tree.nodes[root]
    {
        *root_items = items;
    }
    tree.root = root;
    let text = |name: &str, body: &str| RecordOut {
        name: format!("{FRESH_FOLDER}/{name}"),
        body: Body::Bytes(Cow::Owned(body.as_bytes().to_vec())),
    };
    let mut records = vec![
        RecordOut {
            name: format!("{FRESH_FOLDER}/data.pkl"),
            body: Body::Bytes(Cow::Owned(pickle::write(&tree))),
        },
        text("byteorder", "little"),
    ];
    records.extend(storages);
    records.push(text("version", "3\n"));
    Ok(records)
}

/// Sizes and positions of the archive: each record's header offset and the total size.
struct Layout {
    headers: Vec<u64>,
    central_start: u64,
    total: u64,
}

const LOCAL_FIXED: u64 = 30;
const CENTRAL_FIXED: u64 = 46;
const U32_MAX: u64 = u32::MAX as u64;

/// Local header length for a record starting at `at`: fixed part, name, ZIP64 sizes when
/// needed, and padding so the data starts aligned.
fn local_header_len(name: &str, at: u64, sizes: (u64, u64)) -> (u64, u64) {
    let zip64 = needs_zip64_sizes(sizes);
    let base = LOCAL_FIXED + name.len() as u64 + if zip64 { 20 } else { 0 };
    let unpadded = at + base;
    let pad = match (ALIGN - unpadded % ALIGN) % ALIGN {
        0 => 0,
        // An extra field needs 4 bytes of its own header.
        p if p < 4 => p + ALIGN,
        p => p,
    };
    (base + pad, pad)
}

fn needs_zip64_sizes((stored, size): (u64, u64)) -> bool {
    stored >= U32_MAX || size >= U32_MAX
}

fn layout(records: &[RecordOut]) -> Layout {
    let mut at = 0u64;
    let mut headers = Vec::with_capacity(records.len());
    let mut central_len = 0u64;
    for r in records {
        let sizes = r.sizes();
        headers.push(at);
        at += local_header_len(&r.name, at, sizes).0 + sizes.0;
        central_len += CENTRAL_FIXED
            + r.name.len() as u64
            + central_zip64_len(sizes, *headers.last().expect("pushed"));
    }
    let central_start = at;
    let mut total = at + central_len + 22;
    if end_needs_zip64(records.len(), central_start, central_len) {
        total += 56 + 20;
    }
    Layout {
        headers,
        central_start,
        total,
    }
}

fn central_zip64_len(sizes: (u64, u64), offset: u64) -> u64 {
    let n = [sizes.1 >= U32_MAX, sizes.0 >= U32_MAX, offset >= U32_MAX]
        .iter()
        .filter(|&&b| b)
        .count() as u64;
    if n == 0 {
        0
    } else {
        4 + 8 * n
    }
}

fn end_needs_zip64(count: usize, central_start: u64, central_len: u64) -> bool {
    count >= 0xFFFF || central_start >= U32_MAX || central_len >= U32_MAX
}

/// The record's compression method: 8 (deflate) for a deflated record copied as it is.
fn method(body: &Body) -> u16 {
    match body {
        Body::Copy { deflated: true, .. } => 8,
        _ => 0,
    }
}

/// Write every record, then the central directory and the end records.
fn write_archive(
    records: &[RecordOut],
    file: &mut AtomicFile,
    progress: &mut dyn Progress,
) -> Result<()> {
    let plan = layout(records);
    let mut crcs = Vec::with_capacity(records.len());
    for (r, &at) in records.iter().zip(&plan.headers) {
        let sizes = r.sizes();
        let crc = record_crc(r)?;
        let (_, pad) = local_header_len(&r.name, at, sizes);
        let header = local_header(r, sizes, crc, pad);
        file.write(&header, progress)?;
        write_body(r, file, progress)?;
        crcs.push(crc);
    }
    let mut central = Vec::new();
    for ((r, &at), &crc) in records.iter().zip(&plan.headers).zip(&crcs) {
        central.extend(central_header(r, r.sizes(), crc, at));
    }
    let central_len = central.len() as u64;
    if end_needs_zip64(records.len(), plan.central_start, central_len) {
        central.extend(zip64_end(
            records.len() as u64,
            central_len,
            plan.central_start,
        ));
    }
    central.extend(end_record(records.len(), central_len, plan.central_start));
    file.write(&central, progress)
}

/// The CRC-32 of a record: computed for bytes in memory, the source archive's for a copied
/// record; for a tensor copied from another container, computed by reading it once.
fn record_crc(r: &RecordOut) -> Result<u32> {
    Ok(match &r.body {
        Body::Bytes(b) => crc32fast::hash(b),
        Body::Copy {
            crc32: Some(crc), ..
        } => *crc,
        Body::Copy { span, .. } => span_crc(span)?,
        Body::Stream(source, entry) => {
            let mut crc = crc32fast::Hasher::new();
            source.stream(entry.origin, &mut |chunk| {
                crc.update(chunk);
                Ok(())
            })?;
            crc.finalize()
        }
    })
}

fn span_crc(span: &Span) -> Result<u32> {
    let mut crc = crc32fast::Hasher::new();
    span.stream(&mut |chunk| {
        crc.update(chunk);
        Ok(())
    })?;
    Ok(crc.finalize())
}

fn write_body(r: &RecordOut, file: &mut AtomicFile, progress: &mut dyn Progress) -> Result<()> {
    match &r.body {
        Body::Bytes(b) => file.write(b, progress),
        Body::Copy { span, .. } => {
            file.copy_from(span.file, span.path, span.offset, span.len, progress)
        }
        Body::Stream(source, entry) => {
            source.stream(entry.origin, &mut |chunk| file.write(chunk, progress))
        }
    }
}

fn put16(v: &mut Vec<u8>, x: u16) {
    v.extend(x.to_le_bytes());
}
fn put32(v: &mut Vec<u8>, x: u32) {
    v.extend(x.to_le_bytes());
}
fn put64(v: &mut Vec<u8>, x: u64) {
    v.extend(x.to_le_bytes());
}
fn clamp32(x: u64) -> u32 {
    x.min(U32_MAX) as u32
}

/// DOS date of 1980-01-01, midnight: the earliest the format can state.
const DOS_DATE: u16 = 0x21;
/// Bit 11: the name is UTF-8.
const FLAGS: u16 = 0x0800;

fn local_header(r: &RecordOut, sizes: (u64, u64), crc: u32, pad: u64) -> Vec<u8> {
    let zip64 = needs_zip64_sizes(sizes);
    let mut v = Vec::with_capacity(LOCAL_FIXED as usize + r.name.len() + 20 + pad as usize);
    put32(&mut v, 0x0403_4b50);
    put16(&mut v, if zip64 { 45 } else { 20 });
    put16(&mut v, FLAGS);
    put16(&mut v, method(&r.body));
    put16(&mut v, 0);
    put16(&mut v, DOS_DATE);
    put32(&mut v, crc);
    put32(&mut v, if zip64 { u32::MAX } else { sizes.0 as u32 });
    put32(&mut v, if zip64 { u32::MAX } else { sizes.1 as u32 });
    put16(&mut v, r.name.len() as u16);
    put16(&mut v, ((if zip64 { 20 } else { 0 }) + pad) as u16);
    v.extend(r.name.as_bytes());
    if zip64 {
        put16(&mut v, 0x0001);
        put16(&mut v, 16);
        put64(&mut v, sizes.1);
        put64(&mut v, sizes.0);
    }
    if pad > 0 {
        put16(&mut v, PAD_ID);
        put16(&mut v, (pad - 4) as u16);
        v.resize(v.len() + pad as usize - 4, 0);
    }
    v
}

fn central_header(r: &RecordOut, sizes: (u64, u64), crc: u32, offset: u64) -> Vec<u8> {
    let extra = central_zip64_len(sizes, offset);
    let mut v = Vec::with_capacity(CENTRAL_FIXED as usize + r.name.len() + extra as usize);
    put32(&mut v, 0x0201_4b50);
    put16(&mut v, (3 << 8) | 45);
    put16(&mut v, if extra > 0 { 45 } else { 20 });
    put16(&mut v, FLAGS);
    put16(&mut v, method(&r.body));
    put16(&mut v, 0);
    put16(&mut v, DOS_DATE);
    put32(&mut v, crc);
    put32(&mut v, clamp32(sizes.0));
    put32(&mut v, clamp32(sizes.1));
    put16(&mut v, r.name.len() as u16);
    put16(&mut v, extra as u16);
    put16(&mut v, 0);
    put16(&mut v, 0);
    put16(&mut v, 0);
    put32(&mut v, 0o100644 << 16);
    put32(&mut v, clamp32(offset));
    v.extend(r.name.as_bytes());
    if extra > 0 {
        put16(&mut v, 0x0001);
        put16(&mut v, (extra - 4) as u16);
        if sizes.1 >= U32_MAX {
            put64(&mut v, sizes.1);
        }
        if sizes.0 >= U32_MAX {
            put64(&mut v, sizes.0);
        }
        if offset >= U32_MAX {
            put64(&mut v, offset);
        }
    }
    v
}

fn zip64_end(count: u64, central_len: u64, central_start: u64) -> Vec<u8> {
    let zip64_end_at = central_start + central_len;
    let mut v = Vec::with_capacity(76);
    put32(&mut v, 0x0606_4b50);
    put64(&mut v, 44);
    put16(&mut v, (3 << 8) | 45);
    put16(&mut v, 45);
    put32(&mut v, 0);
    put32(&mut v, 0);
    put64(&mut v, count);
    put64(&mut v, count);
    put64(&mut v, central_len);
    put64(&mut v, central_start);
    put32(&mut v, 0x0706_4b50);
    put32(&mut v, 0);
    put64(&mut v, zip64_end_at);
    put32(&mut v, 1);
    v
}

fn end_record(count: usize, central_len: u64, central_start: u64) -> Vec<u8> {
    let mut v = Vec::with_capacity(22);
    put32(&mut v, 0x0605_4b50);
    put16(&mut v, 0);
    put16(&mut v, 0);
    put16(&mut v, count.min(0xFFFF) as u16);
    put16(&mut v, count.min(0xFFFF) as u16);
    put32(&mut v, clamp32(central_len));
    put32(&mut v, clamp32(central_start));
    put16(&mut v, 0);
    v
}
