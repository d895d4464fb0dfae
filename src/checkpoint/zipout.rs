//! Writing ZIP archives record by record (the PyTorch and npz writers): local header, data,
//! then the central directory and end records, ZIP64 where sizes or offsets need it. Every
//! record's data is aligned by padding its local header with an extra field of an id no reader
//! interprets: to a fixed multiple (64 bytes for the framework's memory-mapping), and for a
//! record copied from a source file, to its source offset modulo the file system's block
//! size, so that its whole blocks can be shared with the source rather than copied.

use std::borrow::Cow;

use crate::checkpoint::writer::OutEntry;
use crate::checkpoint::{Reader, Span};
use crate::error::Result;
use crate::write::share::whole_block_bytes;
use crate::write::{AtomicFile, Progress};

/// The extra-field id local headers are padded with (an id no reader interprets).
const PAD_ID: u16 = 0x5047;
/// DOS date of 1980-01-01, midnight: the earliest the format can state.
pub const DOS_DATE: u16 = 0x21;
/// Bit 11: the name is UTF-8.
const FLAGS: u16 = 0x0800;
/// Unix, format version 4.5: the "made by" of records without one of their own.
const MADE_BY_UNIX: u16 = (3 << 8) | 45;
/// A regular file readable by everyone, as external attributes of a Unix record.
pub const REGULAR_FILE: u32 = 0o100644 << 16;

const LOCAL_FIXED: u64 = 30;
const CENTRAL_FIXED: u64 = 46;
const U32_MAX: u64 = u32::MAX as u64;
/// The largest alignment a local header can pad to (its extra field holds at most 65535
/// bytes, ZIP64 sizes included).
const LARGEST_PAD_MODULUS: u64 = 32768;

/// Where one record's bytes come from.
pub enum Body<'a> {
    /// Bytes stored as they are.
    Bytes(Cow<'a, [u8]>),
    /// Bytes compressed with deflate, with the CRC-32 and size of the uncompressed bytes.
    Deflated {
        data: Vec<u8>,
        crc32: u32,
        size: u64,
    },
    /// A run of a source file, copied as it is: a record of a source archive (with the CRC-32
    /// and size it records) or a tensor's span (CRC-32 computed by reading it once).
    Copy {
        span: Span<'a>,
        crc32: Option<u32>,
        size: u64,
        deflated: bool,
    },
    /// An entry's bytes streamed from a source that does not hold them contiguously.
    Stream(&'a dyn Reader, &'a OutEntry<'a>),
}

/// One record of the archive.
pub struct Record<'a> {
    pub name: String,
    pub body: Body<'a>,
    /// DOS time and date.
    pub stamp: (u16, u16),
    /// "Version made by" (system in the high byte) and external attributes.
    pub made_by: u16,
    pub attributes: u32,
}

impl<'a> Record<'a> {
    /// A record with the fixed stamp and attributes of a regular Unix file.
    pub fn new(name: String, body: Body<'a>) -> Self {
        Record {
            name,
            body,
            stamp: (0, DOS_DATE),
            made_by: MADE_BY_UNIX,
            attributes: REGULAR_FILE,
        }
    }

    /// (stored size, uncompressed size)
    fn sizes(&self) -> (u64, u64) {
        match &self.body {
            Body::Bytes(b) => (b.len() as u64, b.len() as u64),
            Body::Deflated { data, size, .. } => (data.len() as u64, *size),
            Body::Copy { span, size, .. } => (span.len, *size),
            Body::Stream(_, e) => (e.byte_len(), e.byte_len()),
        }
    }

    /// The compression method: 8 (deflate) or 0 (stored).
    fn method(&self) -> u16 {
        match &self.body {
            Body::Copy { deflated: true, .. } | Body::Deflated { .. } => 8,
            _ => 0,
        }
    }
}

/// How record data is aligned.
#[derive(Debug, Clone, Copy)]
pub struct Alignment {
    /// Every record's data starts on a multiple of this (1: anywhere).
    pub base: u64,
    /// The file system's block size: a copied record whose source offset is a multiple of
    /// `base` and that holds whole blocks starts at its source offset modulo this.
    pub block: u64,
}

impl Alignment {
    /// (modulus, residue) the data of `r` must start at.
    fn target(&self, r: &Record) -> (u64, u64) {
        match &r.body {
            Body::Copy { span, .. }
                if span.offset % self.base == 0
                    && self.block <= LARGEST_PAD_MODULUS
                    && whole_block_bytes(span.offset, span.len, self.block) > 0 =>
            {
                (self.block, span.offset % self.block)
            }
            _ => (self.base, 0),
        }
    }
}

/// Sizes and positions of the archive: each record's header offset and padding, the central
/// directory's start, and the total size.
struct Layout {
    headers: Vec<(u64, u64)>,
    central_start: u64,
    total: u64,
}

/// Local header length for a record starting at `at`: fixed part, name, ZIP64 sizes when
/// needed, and the padding that puts its data at the residue wanted; returns (length, padding).
fn local_header_len(r: &Record, at: u64, align: &Alignment) -> (u64, u64) {
    let base = LOCAL_FIXED + r.name.len() as u64 + if zip64_sizes(r.sizes()) { 20 } else { 0 };
    let (modulus, residue) = align.target(r);
    let pad = match (residue + modulus - (at + base) % modulus) % modulus {
        0 => 0,
        // An extra field needs 4 bytes of its own header.
        p if p < 4 => p + modulus,
        p => p,
    };
    (base + pad, pad)
}

fn zip64_sizes((stored, size): (u64, u64)) -> bool {
    stored >= U32_MAX || size >= U32_MAX
}

fn layout(records: &[Record], align: &Alignment) -> Layout {
    let mut at = 0u64;
    let mut headers = Vec::with_capacity(records.len());
    let mut central_len = 0u64;
    for r in records {
        let sizes = r.sizes();
        let (len, pad) = local_header_len(r, at, align);
        headers.push((at, pad));
        central_len += CENTRAL_FIXED + r.name.len() as u64 + central_zip64_len(sizes, at);
        at += len + sizes.0;
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

/// The size of the archive the records make.
pub fn total_size(records: &[Record], align: &Alignment) -> u64 {
    layout(records, align).total
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

/// Write every record, then the central directory and the end records.
pub fn write_archive(
    records: &[Record],
    align: &Alignment,
    file: &mut AtomicFile,
    progress: &mut dyn Progress,
) -> Result<()> {
    let plan = layout(records, align);
    let mut crcs = Vec::with_capacity(records.len());
    for (r, &(_, pad)) in records.iter().zip(&plan.headers) {
        let crc = record_crc(r)?;
        file.write(&local_header(r, crc, pad), progress)?;
        write_body(r, file, progress)?;
        crcs.push(crc);
    }
    let mut central = Vec::new();
    for ((r, &(at, _)), &crc) in records.iter().zip(&plan.headers).zip(&crcs) {
        central.extend(central_header(r, crc, at));
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
fn record_crc(r: &Record) -> Result<u32> {
    Ok(match &r.body {
        Body::Bytes(b) => crc32fast::hash(b),
        Body::Deflated { crc32, .. } => *crc32,
        Body::Copy {
            crc32: Some(crc), ..
        } => *crc,
        Body::Copy { span, .. } => {
            let mut crc = crc32fast::Hasher::new();
            span.stream(&mut |chunk| {
                crc.update(chunk);
                Ok(())
            })?;
            crc.finalize()
        }
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

fn write_body(r: &Record, file: &mut AtomicFile, progress: &mut dyn Progress) -> Result<()> {
    match &r.body {
        Body::Bytes(b) => file.write(b, progress),
        Body::Deflated { data, .. } => file.write(data, progress),
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

fn local_header(r: &Record, crc: u32, pad: u64) -> Vec<u8> {
    let sizes = r.sizes();
    let zip64 = zip64_sizes(sizes);
    let mut v = Vec::with_capacity(LOCAL_FIXED as usize + r.name.len() + 20 + pad as usize);
    put32(&mut v, 0x0403_4b50);
    put16(&mut v, if zip64 { 45 } else { 20 });
    put16(&mut v, FLAGS);
    put16(&mut v, r.method());
    put16(&mut v, r.stamp.0);
    put16(&mut v, r.stamp.1);
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

fn central_header(r: &Record, crc: u32, offset: u64) -> Vec<u8> {
    let sizes = r.sizes();
    let extra = central_zip64_len(sizes, offset);
    let mut v = Vec::with_capacity(CENTRAL_FIXED as usize + r.name.len() + extra as usize);
    put32(&mut v, 0x0201_4b50);
    put16(&mut v, r.made_by);
    put16(&mut v, if extra > 0 { 45 } else { 20 });
    put16(&mut v, FLAGS);
    put16(&mut v, r.method());
    put16(&mut v, r.stamp.0);
    put16(&mut v, r.stamp.1);
    put32(&mut v, crc);
    put32(&mut v, clamp32(sizes.0));
    put32(&mut v, clamp32(sizes.1));
    put16(&mut v, r.name.len() as u16);
    put16(&mut v, extra as u16);
    put16(&mut v, 0);
    put16(&mut v, 0);
    put16(&mut v, 0);
    put32(&mut v, r.attributes);
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
    put16(&mut v, MADE_BY_UNIX);
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

#[cfg(test)]
mod tests {
    use super::*;

    fn copied<'a>(file: &'a std::fs::File, path: &'a std::path::Path, offset: u64) -> Record<'a> {
        Record::new(
            "archive/data/0".into(),
            Body::Copy {
                span: Span {
                    file,
                    path,
                    offset,
                    len: 3 * 4096,
                },
                crc32: Some(0),
                size: 3 * 4096,
                deflated: false,
            },
        )
    }

    #[test]
    fn copied_records_keep_their_offset_modulo_the_block_and_the_base() {
        let file = tempfile::tempfile().unwrap();
        let path = std::path::Path::new("x");
        let align = Alignment {
            base: 64,
            block: 4096,
        };
        for (offset, at) in [(4096 + 64 * 7, 100), (8192, 0), (64, 4000)] {
            let r = copied(&file, path, offset);
            let (len, pad) = local_header_len(&r, at, &align);
            assert_eq!((at + len) % 4096, offset % 4096, "source offset {offset}");
            assert!(pad == 0 || pad >= 4);
        }
        // A source offset off the base alignment: the base wins (the framework maps the file).
        let r = copied(&file, path, 4096 + 8);
        let (len, _) = local_header_len(&r, 100, &align);
        assert_eq!((100 + len) % 64, 0);
        // New bytes only take the base alignment.
        let r = Record::new("archive/data.pkl".into(), Body::Bytes(Cow::Borrowed(b"x")));
        let (len, _) = local_header_len(&r, 1, &align);
        assert_eq!((1 + len) % 64, 0);
    }

    #[test]
    fn without_a_base_alignment_new_records_are_not_padded() {
        let align = Alignment {
            base: 1,
            block: 4096,
        };
        let r = Record::new("a.npy".into(), Body::Bytes(Cow::Borrowed(b"x")));
        assert_eq!(local_header_len(&r, 13, &align), (30 + 5, 0));
    }
}
