//! Writing npz archives. From an npz source the archive is patched: changed arrays rewritten
//! (little-endian, same dtype and member compression), every other member copied as its
//! stored bytes, file to file, at its source offset modulo the block size (so a file system
//! that shares extents clones it); names, times and attributes are kept. From any other
//! source each tensor becomes a stored `.npy` member. Copied tensors are streamed through a
//! fixed buffer, so memory does not grow with the input (an npz member may inflate to far more
//! than the archive's size).

use std::borrow::Cow;
use std::collections::HashMap;
use std::io::Write as _;

use zip::write::SimpleFileOptions;
use zip::{CompressionMethod, ZipWriter};

use super::{descr_of, npy_header, Npz};
use crate::checkpoint::writer::{
    check_interrupt, write_file, Destination, OutEntry, Output, Preview, Writer, Written,
};
use crate::checkpoint::zipout::{self, Alignment, Body, Record};
use crate::checkpoint::{Format, Span};
use crate::error::{Error, FormatProblem, Result};
use crate::write::{self, AtomicFile, Progress};

/// Writes npz archives.
pub struct NpzWriter;

impl Writer for NpzWriter {
    fn format(&self) -> Format {
        Format::Npz
    }

    fn check(&self, out: &Output) -> Result<()> {
        match out.entries.iter().find(|e| descr_of(e.dtype()).is_none()) {
            Some(e) => Err(Error::Usage(format!(
                "tensor \"{}\" is {}, which npz (numpy) cannot hold; write a .safetensors output instead",
                e.name,
                e.dtype()
            ))),
            None => Ok(()),
        }
    }

    fn preview(&self, out: &Output) -> Result<Preview> {
        // Sizes are known only once written (compression, member headers): the data size.
        Ok(Preview {
            size: out.entries.iter().map(OutEntry::byte_len).sum(),
            layout: None,
            notes: vec![
                "npz archives hold no metadata: the provenance record is not stored".into(),
            ],
        })
    }

    fn write(
        &self,
        out: &Output,
        dest: &Destination,
        progress: &mut dyn Progress,
    ) -> Result<Written> {
        write_file(dest, |file| {
            match out.source.as_any().downcast_ref::<Npz>() {
                Some(npz) => {
                    // npz readers ask no alignment: only copied members are placed.
                    let align = Alignment {
                        base: 1,
                        block: out.block,
                    };
                    zipout::write_archive(&patch(npz, out)?, &align, file, progress)
                }
                None => fresh(out, file),
            }
        })
    }
}

fn zip_error(out: &AtomicFile, e: zip::result::ZipError) -> Error {
    match e {
        zip::result::ZipError::Io(io) => write::write_error(out.final_path(), "cannot write", io),
        other => Error::write(
            out.final_path(),
            format!("cannot write the archive: {other}"),
        ),
    }
}

fn member_options(method: CompressionMethod, len: u64) -> SimpleFileOptions {
    SimpleFileOptions::default()
        .compression_method(method)
        .large_file(len >= u32::MAX as u64 / 2)
}

/// Write one `.npy` member: its header, then its data (new bytes, or the source's streamed).
fn write_member(
    zip: &mut ZipWriter<std::fs::File>,
    file: &AtomicFile,
    out: &Output,
    entry: &OutEntry,
    name: String,
    method: CompressionMethod,
) -> Result<()> {
    let descr = descr_of(entry.dtype()).expect("checked before writing");
    let header = npy_header(descr, &entry.shape);
    zip.start_file(
        name,
        member_options(method, header.len() as u64 + entry.byte_len()),
    )
    .map_err(|e| zip_error(file, e))?;
    let mut data = |bytes: &[u8]| {
        check_interrupt(file.final_path())?;
        std::io::Write::write_all(zip, bytes)
            .map_err(|e| write::write_error(file.final_path(), "cannot write", e))
    };
    data(&header)?;
    match entry.new {
        Some(bytes) => data(bytes),
        None => out.source.stream(entry.origin, &mut data),
    }
}

fn zip_writer(file: &mut AtomicFile) -> Result<ZipWriter<std::fs::File>> {
    let f = file
        .file()
        .try_clone()
        .map_err(|e| write::write_error(file.final_path(), "cannot write", e))?;
    Ok(ZipWriter::new(f))
}

/// An archive like `src`, member by member: changed arrays rewritten, the rest copied as
/// they are stored.
fn patch<'a>(src: &'a Npz, out: &'a Output<'a>) -> Result<Vec<Record<'a>>> {
    let by_member: HashMap<usize, &OutEntry> = out
        .entries
        .iter()
        .filter(|e| e.new.is_some())
        .filter_map(|e| {
            let i = src.entries().iter().position(|t| t.name == e.origin.name)?;
            Some((src.members()[i].index, e))
        })
        .collect();
    // Members of tensors the resized model no longer has are not copied.
    let left_out: std::collections::HashSet<usize> = src
        .entries()
        .iter()
        .zip(src.members())
        .filter(|(t, _)| out.left_out.contains(&t.name))
        .map(|(_, m)| m.index)
        .collect();
    let mut archive = src.archive();
    let mut records = Vec::with_capacity(archive.len());
    for index in 0..archive.len() {
        if left_out.contains(&index) {
            continue;
        }
        let member = archive.by_index_raw(index).map_err(|e| {
            Error::invalid(
                src.path(),
                FormatProblem::Other(format!("ZIP member {index}: {e}")),
            )
        })?;
        let stored = stored_member(src, index, &member)?;
        let body = match by_member.get(&index) {
            Some(entry) => new_member(entry, stored.deflated),
            None => Body::Copy {
                span: Span {
                    file: src.file(),
                    path: src.path(),
                    offset: stored.data_start,
                    len: member.compressed_size(),
                },
                crc32: Some(member.crc32()),
                size: member.size(),
                deflated: stored.deflated,
            },
        };
        records.push(Record {
            name: stored.name,
            body,
            stamp: member
                .last_modified()
                .map_or((0, zipout::DOS_DATE), |t| (t.timepart(), t.datepart())),
            made_by: ((member.system() as u16) << 8) | 45,
            attributes: member.external_attributes(),
        });
    }
    Ok(records)
}

/// What a member's copy needs, checked: its name, where its stored bytes start (inside the
/// file), and whether they are deflated (the only compressions numpy writes).
struct StoredMember {
    name: String,
    data_start: u64,
    deflated: bool,
}

fn stored_member(
    src: &Npz,
    index: usize,
    member: &zip::read::ZipFile<'_, std::fs::File>,
) -> Result<StoredMember> {
    let refuse = |why: String| {
        Err(Error::invalid(
            src.path(),
            FormatProblem::Other(format!("ZIP member {index} {why}")),
        ))
    };
    let name = match member.name() {
        Ok(n) => n.into_owned(),
        Err(e) => return refuse(format!("has a name that cannot be read: {e}")),
    };
    if member.encrypted() {
        return refuse(format!("({name}) is encrypted and cannot be copied"));
    }
    let deflated = match member.compression() {
        CompressionMethod::Stored => false,
        CompressionMethod::Deflated => true,
        other => {
            return refuse(format!(
                "({name}) is compressed with {other}, which posgrid does not copy"
            ))
        }
    };
    let inside = member.data_start().filter(|&at| {
        at.checked_add(member.compressed_size())
            .is_some_and(|end| end <= src.file_len())
    });
    match inside {
        Some(data_start) => Ok(StoredMember {
            name,
            data_start,
            deflated,
        }),
        None => refuse(format!("({name}) runs past the end of the file")),
    }
}

/// A rewritten array's member: its `.npy` header and new bytes, deflated when the member was.
fn new_member<'a>(entry: &OutEntry, deflated: bool) -> Body<'a> {
    let descr = descr_of(entry.dtype()).expect("checked before writing");
    let mut bytes = npy_header(descr, &entry.shape);
    bytes.extend_from_slice(entry.new.expect("a changed entry has new bytes"));
    if !deflated {
        return Body::Bytes(Cow::Owned(bytes));
    }
    let mut encoder =
        flate2::write::DeflateEncoder::new(Vec::new(), flate2::Compression::default());
    encoder
        .write_all(&bytes)
        .expect("deflating into memory cannot fail");
    Body::Deflated {
        crc32: crc32fast::hash(&bytes),
        size: bytes.len() as u64,
        data: encoder.finish().expect("deflating into memory cannot fail"),
    }
}

/// Every entry as a stored `.npy` member, in output order.
fn fresh(out: &Output, file: &mut AtomicFile) -> Result<()> {
    let mut zip = zip_writer(file)?;
    for entry in &out.entries {
        let name = format!("{}.npy", entry.name);
        write_member(&mut zip, file, out, entry, name, CompressionMethod::Stored)?;
    }
    zip.finish().map_err(|e| zip_error(file, e))?;
    Ok(())
}
