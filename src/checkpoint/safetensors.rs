//! The safetensors container: an 8-byte little-endian header length, a UTF-8 JSON header, then
//! the data area. [`parse_header`] checks every number of the header before any data is used;
//! [`encode_header`] writes a header back in the same key order.

use std::fmt;
use std::fs::File;
use std::io;
use std::os::unix::fs::FileExt;

use serde::de::{Deserializer, MapAccess, Visitor};
use serde::Deserialize;
use serde_json::Value;

use super::placement::{self, Piece};
use super::writer::{copy_entries, write_file, Destination, Output, Preview, Writer, Written};
use super::{Checkpoint, Dtype, Format, TensorEntry};
use crate::error::FormatProblem;
use crate::write::{AtomicFile, Progress};

/// The largest header accepted, in bytes (the limit the reference implementation also uses).
pub const MAX_HEADER_LEN: u64 = 100_000_000;

const METADATA_KEY: &str = "__metadata__";

/// Every dtype the format defines, for name lookup.
const ALL_DTYPES: [Dtype; 22] = [
    Dtype::BOOL,
    Dtype::F4,
    Dtype::F6_E2M3,
    Dtype::F6_E3M2,
    Dtype::U8,
    Dtype::I8,
    Dtype::F8_E5M2,
    Dtype::F8_E4M3,
    Dtype::F8_E8M0,
    Dtype::F8_E4M3FNUZ,
    Dtype::F8_E5M2FNUZ,
    Dtype::I16,
    Dtype::U16,
    Dtype::F16,
    Dtype::BF16,
    Dtype::I32,
    Dtype::U32,
    Dtype::F32,
    Dtype::C64,
    Dtype::F64,
    Dtype::I64,
    Dtype::U64,
];

/// Look a dtype up by the name the format uses (`"F32"`, `"BF16"`, ...).
pub fn dtype_from_name(name: &str) -> Option<Dtype> {
    ALL_DTYPES.iter().copied().find(|d| d.to_string() == name)
}

/// A validated safetensors header.
#[derive(Debug, Clone, PartialEq)]
pub struct Header {
    /// Tensors in header order, with absolute file offsets.
    pub tensors: Vec<TensorEntry>,
    /// `__metadata__`, in file order, if present.
    pub metadata: Option<Vec<(String, String)>>,
    /// Where `__metadata__` sat among the header's keys (0 = first).
    pub metadata_position: usize,
    /// Length of the JSON header in bytes (without the 8-byte prefix).
    pub header_len: u64,
}

impl Header {
    /// Absolute file offset of the data area.
    pub fn data_start(&self) -> u64 {
        8 + self.header_len
    }
}

/// Why reading a header failed.
#[derive(Debug)]
pub enum ReadError {
    /// The operating system refused a read.
    Io(io::Error),
    /// The bytes break a rule of the format.
    Format(FormatProblem),
}

/// Read and validate the header of an open file of `file_len` bytes.
pub fn read_header(file: &File, file_len: u64) -> Result<Header, ReadError> {
    if file_len < 8 {
        return Err(ReadError::Format(FormatProblem::TooShort { len: file_len }));
    }
    let mut prefix = [0u8; 8];
    file.read_exact_at(&mut prefix, 0).map_err(ReadError::Io)?;
    let header_len = check_prefix(prefix, file_len).map_err(ReadError::Format)?;
    let mut json = vec![0u8; header_len as usize];
    file.read_exact_at(&mut json, 8).map_err(ReadError::Io)?;
    parse_header(&json, file_len - 8 - header_len, 8 + header_len).map_err(ReadError::Format)
}

/// Check the 8-byte length prefix against the limit and the file size; returns the header length.
pub fn check_prefix(prefix: [u8; 8], file_len: u64) -> Result<u64, FormatProblem> {
    let header_len = u64::from_le_bytes(prefix);
    if header_len > MAX_HEADER_LEN {
        return Err(FormatProblem::HeaderTooLarge {
            limit: MAX_HEADER_LEN,
        });
    }
    if header_len > file_len - 8 {
        return Err(FormatProblem::HeaderPastEnd { file_len });
    }
    if header_len < 2 {
        return Err(FormatProblem::HeaderTooSmall);
    }
    Ok(header_len)
}

/// Parse and validate a whole file held in memory (used by tests and the fuzz target).
pub fn parse_bytes(bytes: &[u8]) -> Result<Header, FormatProblem> {
    let file_len = bytes.len() as u64;
    if file_len < 8 {
        return Err(FormatProblem::TooShort { len: file_len });
    }
    let prefix: [u8; 8] = bytes[..8].try_into().expect("eight bytes");
    let header_len = check_prefix(prefix, file_len)?;
    let json = &bytes[8..8 + header_len as usize];
    parse_header(json, file_len - 8 - header_len, 8 + header_len)
}

/// Validate the JSON header `json`, followed by a data area of `data_len` bytes that starts at
/// absolute offset `data_start`.
pub fn parse_header(json: &[u8], data_len: u64, data_start: u64) -> Result<Header, FormatProblem> {
    let text = std::str::from_utf8(json).map_err(|e| FormatProblem::HeaderNotUtf8 {
        at: e.valid_up_to(),
    })?;
    let top: TopLevel = match serde_json::from_str(text) {
        Ok(t) => t,
        Err(e) => return Err(classify_json_error(text, e)),
    };
    let top = top.0?;

    let mut metadata = None;
    let mut metadata_position = 0;
    // (entry, relative begin, relative end) in header order.
    let mut spans: Vec<(TensorEntry, u64, u64)> = Vec::with_capacity(top.len());
    for (position, (key, value)) in top.into_iter().enumerate() {
        if key == METADATA_KEY {
            metadata = Some(parse_metadata(value)?);
            metadata_position = position;
            continue;
        }
        spans.push(parse_entry(key, value)?);
    }

    check_layout(&spans, data_len, data_start)?;

    let tensors = spans
        .into_iter()
        .map(|(mut t, b, e)| {
            t.begin = data_start + b;
            t.end = data_start + e;
            t
        })
        .collect();
    Ok(Header {
        tensors,
        metadata,
        metadata_position,
        header_len: data_start - 8,
    })
}

/// Spans must tile the data area exactly: sorted by begin, each starts where the previous ended,
/// the first at 0 and the last at the end of the data area.
fn check_layout(
    spans: &[(TensorEntry, u64, u64)],
    data_len: u64,
    data_start: u64,
) -> Result<(), FormatProblem> {
    for (t, _, end) in spans {
        if *end > data_len {
            return Err(FormatProblem::SpanPastEnd {
                tensor: t.name.clone(),
                end: *end,
                data_len,
            });
        }
    }
    let mut order: Vec<usize> = (0..spans.len()).collect();
    order.sort_by_key(|&i| (spans[i].1, spans[i].2));
    let mut cursor = 0u64;
    let mut previous: Option<usize> = None;
    for &i in &order {
        let (t, begin, end) = &spans[i];
        if *begin > cursor {
            return Err(FormatProblem::Hole {
                after: previous.map(|p| spans[p].0.name.clone()),
                begin: cursor,
                end: *begin,
            });
        }
        if *begin < cursor {
            let p = previous.expect("a span before the cursor exists");
            return Err(FormatProblem::SpansOverlap {
                first: spans[p].0.name.clone(),
                second: t.name.clone(),
            });
        }
        cursor = *end;
        if end > begin || previous.is_none() {
            previous = Some(i);
        }
    }
    if cursor != data_len {
        return Err(FormatProblem::TrailingBytes {
            data_end: data_start + cursor,
            file_len: data_start + data_len,
        });
    }
    Ok(())
}

fn parse_metadata(value: Value) -> Result<Vec<(String, String)>, FormatProblem> {
    let Value::Object(map) = value else {
        return Err(FormatProblem::MetadataNotStrings { key: None });
    };
    map.into_iter()
        .map(|(k, v)| match v {
            Value::String(s) => Ok((k, s)),
            _ => Err(FormatProblem::MetadataNotStrings { key: Some(k) }),
        })
        .collect()
}

fn parse_entry(name: String, value: Value) -> Result<(TensorEntry, u64, u64), FormatProblem> {
    let bad = |detail: &str| FormatProblem::BadEntry {
        tensor: name.clone(),
        detail: detail.into(),
    };
    let Value::Object(map) = value else {
        return Err(bad(
            "entry must be an object with dtype, shape and data_offsets",
        ));
    };
    let dtype = match map.get("dtype") {
        Some(Value::String(s)) => {
            dtype_from_name(s).ok_or_else(|| FormatProblem::UnknownDtype {
                tensor: name.clone(),
                dtype: s.clone(),
            })?
        }
        Some(_) => return Err(bad("dtype must be a string such as \"F32\"")),
        None => return Err(bad("dtype is missing")),
    };
    let shape = match map.get("shape") {
        Some(Value::Array(dims)) => dims
            .iter()
            .map(|d| parse_dimension(&name, d))
            .collect::<Result<Vec<usize>, _>>()?,
        Some(_) => return Err(bad("shape must be an array of non-negative integers")),
        None => return Err(bad("shape is missing")),
    };
    let (begin, end) = match map.get("data_offsets") {
        Some(Value::Array(o)) if o.len() == 2 => match (o[0].as_u64(), o[1].as_u64()) {
            (Some(b), Some(e)) => (b, e),
            _ => return Err(bad("data_offsets must hold two non-negative integers")),
        },
        Some(_) => return Err(bad("data_offsets must be an array [begin, end]")),
        None => return Err(bad("data_offsets is missing")),
    };
    if end < begin {
        return Err(FormatProblem::SpanReversed {
            tensor: name,
            begin,
            end,
        });
    }
    let expected = byte_size(dtype, &shape).ok_or_else(|| FormatProblem::SizeOverflow {
        tensor: name.clone(),
    })?;
    if expected != end - begin {
        return Err(FormatProblem::SpanMismatch {
            tensor: name,
            expected,
            found: end - begin,
        });
    }
    Ok((
        TensorEntry {
            name,
            dtype,
            shape,
            begin: 0,
            end: 0,
        },
        begin,
        end,
    ))
}

fn parse_dimension(tensor: &str, d: &Value) -> Result<usize, FormatProblem> {
    let bad = |detail: String| FormatProblem::BadDimension {
        tensor: tensor.to_string(),
        detail,
    };
    match d {
        Value::Number(n) => {
            if let Some(u) = n.as_u64() {
                usize::try_from(u).map_err(|_| bad(format!("dimension {u} is too large")))
            } else if n.as_i64().is_some() {
                Err(bad(format!("dimension {n} is negative")))
            } else {
                Err(bad(format!("dimension {n} is not a whole number")))
            }
        }
        other => Err(bad(format!("dimension {other} is not a number"))),
    }
}

/// Bytes needed for `shape` elements of `dtype`, or `None` on overflow or a sub-byte dtype whose
/// element count does not fill whole bytes.
pub fn byte_size(dtype: Dtype, shape: &[usize]) -> Option<u64> {
    let mut count: u64 = 1;
    for &d in shape {
        count = count.checked_mul(d as u64)?;
    }
    let bits = count.checked_mul(dtype.bitsize() as u64)?;
    if bits % 8 != 0 {
        return None;
    }
    Some(bits / 8)
}

fn classify_json_error(text: &str, e: serde_json::Error) -> FormatProblem {
    // A syntactically valid document of the wrong type is reported as such.
    if let Ok(v) = serde_json::from_str::<Value>(text) {
        let found = match v {
            Value::Null => "null",
            Value::Bool(_) => "a boolean",
            Value::Number(_) => "a number",
            Value::String(_) => "a string",
            Value::Array(_) => "an array",
            Value::Object(_) => "an object",
        };
        return FormatProblem::HeaderNotObject { found };
    }
    FormatProblem::HeaderNotJson {
        detail: e.to_string(),
    }
}

/// The top-level object with its keys in file order; a duplicate key is an error, not a
/// silent overwrite.
struct TopLevel(Result<Vec<(String, Value)>, FormatProblem>);

impl<'de> Deserialize<'de> for TopLevel {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct OrderedVisitor;
        impl<'de> Visitor<'de> for OrderedVisitor {
            type Value = TopLevel;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut access: A) -> Result<TopLevel, A::Error> {
                let mut entries: Vec<(String, Value)> = Vec::new();
                let mut seen = std::collections::HashSet::new();
                let mut duplicate = None;
                while let Some((k, v)) = access.next_entry::<String, Value>()? {
                    if duplicate.is_none() && !seen.insert(k.clone()) {
                        duplicate = Some(k.clone());
                    }
                    entries.push((k, v));
                }
                Ok(TopLevel(match duplicate {
                    Some(key) => Err(FormatProblem::DuplicateKey { key }),
                    None => Ok(entries),
                }))
            }
        }
        deserializer.deserialize_map(OrderedVisitor)
    }
}

/// One header entry: (name, dtype, shape, relative begin, relative end).
pub type HeaderEntry = (String, Dtype, Vec<usize>, u64, u64);

/// Serialise a header: `entries` in the order to write them; metadata goes at
/// `metadata_position` among the keys. The result includes the 8-byte length prefix and is
/// padded with spaces to a multiple of 8 bytes, so the data area stays 8-byte aligned.
pub fn encode_header(
    entries: &[HeaderEntry],
    metadata: Option<&[(String, String)]>,
    metadata_position: usize,
) -> Vec<u8> {
    let json = header_json(entries, metadata, metadata_position);
    let start = placement::start_offset(8 + json.len() as u64, None, 8);
    with_prefix(json, start)
}

/// The header as JSON text, unpadded.
fn header_json(
    entries: &[HeaderEntry],
    metadata: Option<&[(String, String)]>,
    metadata_position: usize,
) -> String {
    let mut out = String::from("{");
    let mut first = true;
    let mut push_key = |out: &mut String, key: &str| {
        if !first {
            out.push(',');
        }
        first = false;
        out.push_str(&serde_json::to_string(key).expect("string serialises"));
        out.push(':');
    };
    let write_metadata = |out: &mut String, push: &mut dyn FnMut(&mut String, &str)| {
        if let Some(meta) = metadata {
            push(out, METADATA_KEY);
            let obj: serde_json::Map<String, Value> = meta
                .iter()
                .map(|(k, v)| (k.clone(), Value::String(v.clone())))
                .collect();
            out.push_str(&serde_json::to_string(&obj).expect("map serialises"));
        }
    };
    let mut placed = false;
    for (i, (name, dtype, shape, begin, end)) in entries.iter().enumerate() {
        if i == metadata_position && !placed {
            write_metadata(&mut out, &mut push_key);
            placed = true;
        }
        push_key(&mut out, name);
        let shape_text: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
        out.push_str(&format!(
            "{{\"dtype\":\"{dtype}\",\"shape\":[{}],\"data_offsets\":[{begin},{end}]}}",
            shape_text.join(",")
        ));
    }
    if !placed {
        write_metadata(&mut out, &mut push_key);
    }
    out.push('}');
    out
}

/// The length prefix and `json`, padded with trailing spaces (JSON whitespace, which the
/// format allows) so that the data area starts at `data_start`.
fn with_prefix(mut json: String, data_start: u64) -> Vec<u8> {
    let spaces = data_start.saturating_sub(8 + json.len() as u64) as usize;
    json.extend(std::iter::repeat_n(' ', spaces));
    let mut bytes = Vec::with_capacity(8 + json.len());
    bytes.extend_from_slice(&(json.len() as u64).to_le_bytes());
    bytes.extend_from_slice(json.as_bytes());
    bytes
}
/// The metadata key posgrid adds, holding its provenance as a JSON string.
pub const PROVENANCE_KEY: &str = "posgrid";

/// Writes a safetensors file: header keys in output order, the source's metadata kept with
/// the provenance key added. The data area follows the source's data order when the source
/// is one safetensors file (so untouched runs stay back to back and are copied in one step),
/// with resized tables kept in place or moved to the end and the header padded, whichever
/// keeps the most untouched bytes at their source offset modulo the block size: on a file
/// system that shares extents, those blocks are then cloned rather than copied.
pub struct SafetensorsWriter;

/// The output's layout: entry indices in data order, and the header that goes before them.
struct Layout {
    order: Vec<usize>,
    header: Vec<u8>,
}

impl SafetensorsWriter {
    /// Output entry indices in the source's data order.
    fn source_order(out: &Output) -> Vec<usize> {
        let mut order: Vec<usize> = (0..out.entries.len()).collect();
        if out.source.as_any().is::<Checkpoint>() {
            order.sort_by_key(|&i| (out.entries[i].origin.begin, out.entries[i].origin.end));
        }
        order
    }

    /// The data area as pieces: runs of copied entries that lie back to back in one source
    /// file, and entries written anew (or streamed), each with the entries it holds.
    fn pieces(out: &Output, order: &[usize]) -> (Vec<Piece>, Vec<Vec<usize>>) {
        let mut pieces: Vec<Piece> = Vec::new();
        let mut members: Vec<Vec<usize>> = Vec::new();
        let mut last_file: Option<&std::fs::File> = None;
        for &i in order {
            let entry = &out.entries[i];
            let span = match entry.new {
                None => out.source.span(entry.origin),
                Some(_) => None,
            };
            let Some(span) = span else {
                pieces.push(Piece::New {
                    len: entry.byte_len(),
                });
                members.push(vec![i]);
                last_file = None;
                continue;
            };
            if let (Some(Piece::Kept { at, len }), Some(f)) = (pieces.last_mut(), last_file) {
                if std::ptr::eq(f, span.file) && *at + *len == span.offset {
                    *len += span.len;
                    members.last_mut().expect("a member per piece").push(i);
                    continue;
                }
            }
            pieces.push(Piece::Kept {
                at: span.offset,
                len: span.len,
            });
            members.push(vec![i]);
            last_file = Some(span.file);
        }
        (pieces, members)
    }

    fn layout(out: &Output) -> Layout {
        let (pieces, members) = Self::pieces(out, &Self::source_order(out));
        let placed = placement::place(&pieces, out.block);
        let order: Vec<usize> = placed
            .order
            .iter()
            .flat_map(|&p| members[p].iter().copied())
            .collect();
        let json = Self::header_json(out, &order);
        let start = placement::start_offset(8 + json.len() as u64, placed.start_residue, out.block);
        Layout {
            order,
            header: with_prefix(json, start),
        }
    }

    fn header_json(out: &Output, order: &[usize]) -> String {
        let mut offsets = vec![(0u64, 0u64); out.entries.len()];
        let mut cursor = 0u64;
        for &i in order {
            let len = out.entries[i].byte_len();
            offsets[i] = (cursor, cursor + len);
            cursor += len;
        }
        let entries: Vec<_> = out
            .entries
            .iter()
            .zip(&offsets)
            .map(|(e, &(b, end))| (e.name.clone(), e.dtype(), e.shape.clone(), b, end))
            .collect();
        let mut metadata: Vec<(String, String)> =
            out.source.metadata().map(<[_]>::to_vec).unwrap_or_default();
        let previous = metadata
            .iter()
            .position(|(k, _)| k == PROVENANCE_KEY)
            .map(|i| metadata.remove(i).1);
        let mut record = out.provenance.clone();
        if let (Some(p), Some(map)) = (previous, record.as_object_mut()) {
            map.insert("previous".into(), serde_json::Value::String(p));
        }
        metadata.push((PROVENANCE_KEY.to_string(), record.to_string()));
        let position = match out.source.as_any().downcast_ref::<Checkpoint>() {
            Some(c) if c.metadata().is_some() => c.header().metadata_position,
            _ => 0,
        };
        header_json(&entries, Some(&metadata), position)
    }

    /// The size of the file this writer makes.
    pub(crate) fn size(out: &Output) -> u64 {
        Self::layout(out).header.len() as u64
            + out.entries.iter().map(|e| e.byte_len()).sum::<u64>()
    }

    /// Fill `file` with the output.
    pub(crate) fn fill(
        out: &Output,
        file: &mut AtomicFile,
        progress: &mut dyn Progress,
    ) -> crate::error::Result<()> {
        let layout = Self::layout(out);
        file.write(&layout.header, progress)?;
        copy_entries(out, &layout.order, file, progress)
    }
}

impl Writer for SafetensorsWriter {
    fn format(&self) -> Format {
        Format::Safetensors
    }

    fn preview(&self, out: &Output) -> crate::error::Result<Preview> {
        Ok(Preview {
            size: Self::size(out),
            ..Preview::default()
        })
    }

    fn write(
        &self,
        out: &Output,
        dest: &Destination,
        progress: &mut dyn Progress,
    ) -> crate::error::Result<Written> {
        write_file(dest, |file| Self::fill(out, file, progress))
    }
}
