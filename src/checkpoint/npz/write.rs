//! Writing npz archives. From an npz source the archive is patched: changed arrays rewritten
//! (little-endian, same dtype and member compression), every other member copied as its
//! compressed bytes. From any other source each tensor becomes a stored `.npy` member. Copied
//! tensors are streamed through a fixed buffer, so memory does not grow with the input (an npz
//! member may inflate to far more than the archive's size).

use std::collections::HashMap;

use zip::write::SimpleFileOptions;
use zip::{CompressionMethod, ZipWriter};

use super::{descr_of, npy_header, Npz};
use crate::checkpoint::writer::{
    check_interrupt, write_file, Destination, OutEntry, Output, Preview, Writer, Written,
};
use crate::checkpoint::Format;
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
        _progress: &mut dyn Progress,
    ) -> Result<Written> {
        write_file(dest, |file| {
            match out.source.as_any().downcast_ref::<Npz>() {
                Some(npz) => patch(npz, out, file),
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

/// An archive like `src`, member by member: changed arrays rewritten, the rest copied raw.
fn patch(src: &Npz, out: &Output, file: &mut AtomicFile) -> Result<()> {
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
    let mut zip = zip_writer(file)?;
    let mut archive = src.archive();
    for index in 0..archive.len() {
        check_interrupt(file.final_path())?;
        if left_out.contains(&index) {
            continue;
        }
        match by_member.get(&index) {
            Some(entry) => {
                let m = src
                    .members()
                    .iter()
                    .find(|m| m.index == index)
                    .expect("mapped from the members");
                let method = if m.stored {
                    CompressionMethod::Stored
                } else {
                    CompressionMethod::Deflated
                };
                write_member(&mut zip, file, out, entry, m.file_name.clone(), method)?;
            }
            None => {
                let member = archive.by_index_raw(index).map_err(|e| {
                    Error::invalid(
                        src.path(),
                        FormatProblem::Other(format!("ZIP member {index}: {e}")),
                    )
                })?;
                zip.raw_copy_file(member).map_err(|e| zip_error(file, e))?;
            }
        }
    }
    zip.finish().map_err(|e| zip_error(file, e))?;
    Ok(())
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
