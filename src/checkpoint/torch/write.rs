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
use crate::checkpoint::writer::{write_file, Destination, Output, Preview, Writer, Written};
use crate::checkpoint::zipout::{self, Alignment, Body, Record};
use crate::checkpoint::{Format, Span};
use crate::error::{Error, Result};
use crate::write::Progress;

/// Data of every record starts on a multiple of this (the framework's storage alignment).
const ALIGN: u64 = 64;
/// The folder of an archive made from another container.
const FRESH_FOLDER: &str = "archive";

/// Writes PyTorch zip-format files.
pub struct TorchWriter;

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
            size: zipout::total_size(&records, &alignment(out)),
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
        write_file(dest, |file| {
            zipout::write_archive(&records, &alignment(out), file, progress)
        })
    }
}

/// Every record's data on a multiple of 64 bytes; copied records at their source offset
/// modulo the destination's block size where that keeps the 64.
fn alignment(out: &Output) -> Alignment {
    Alignment {
        base: ALIGN,
        block: out.block,
    }
}

fn notes(out: &Output) -> Vec<String> {
    match out.source.as_any().downcast_ref::<TorchFile>() {
        Some(_) => Vec::new(),
        None => vec!["written as one ordered dict of tensors (a state dict); the provenance record is not stored in PyTorch files".into()],
    }
}

/// The records of the output, in order.
fn records<'a>(out: &'a Output<'a>) -> Result<Vec<Record<'a>>> {
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
fn check_names(records: &[Record]) -> Result<()> {
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
fn patched<'a>(src: &'a TorchFile, out: &'a Output<'a>) -> Result<Vec<Record<'a>>> {
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
    let mut records = vec![Record::new(
        pickle_name.clone(),
        Body::Bytes(Cow::Owned(pickle::write(&tree))),
    )];
    for r in &src.archive().records {
        let unused_storage = r
            .name
            .strip_prefix(&storage_prefix)
            .is_some_and(|key| !used.contains(key));
        if r.name == pickle_name || unused_storage {
            continue;
        }
        records.push(Record::new(
            r.name.clone(),
            Body::Copy {
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
        ));
    }
    // New storages go right after the last storage kept (or after the pickle).
    let at = records
        .iter()
        .rposition(|r| r.name.starts_with(&storage_prefix))
        .map_or(1, |i| i + 1);
    let new_records = new_storages.into_iter().map(|(key, bytes)| {
        Record::new(
            format!("{storage_prefix}{key}"),
            Body::Bytes(Cow::Borrowed(bytes)),
        )
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
fn fresh<'a>(out: &'a Output<'a>) -> Result<Vec<Record<'a>>> {
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
        storages.push(Record::new(
            format!("{FRESH_FOLDER}/data/{i}"),
            match (entry.new, out.source.span(entry.origin)) {
                (Some(bytes), _) => Body::Bytes(Cow::Borrowed(bytes)),
                (None, Some(span)) => Body::Copy {
                    span,
                    crc32: None,
                    size: span.len,
                    deflated: false,
                },
                (None, None) => Body::Stream(out.source, entry),
            },
        ));
    }
    if let Node::Dict {
        items: root_items, ..
    } = &mut tree.nodes[root]
    {
        *root_items = items;
    }
    tree.root = root;
    let text = |name: &str, body: &str| {
        Record::new(
            format!("{FRESH_FOLDER}/{name}"),
            Body::Bytes(Cow::Owned(body.as_bytes().to_vec())),
        )
    };
    let mut records = vec![
        Record::new(
            format!("{FRESH_FOLDER}/data.pkl"),
            Body::Bytes(Cow::Owned(pickle::write(&tree))),
        ),
        text("byteorder", "little"),
    ];
    records.extend(storages);
    records.push(text("version", "3\n"));
    Ok(records)
}
