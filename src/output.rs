//! Output containers other than a patched safetensors file: a patched npz archive (untouched
//! members copied as their compressed bytes), and conversions between npz and safetensors.
//! Copied tensors are streamed through a fixed buffer, so memory does not grow with the input
//! (an npz member may inflate to far more than the archive's size).

use std::collections::HashMap;

use zip::write::SimpleFileOptions;
use zip::{CompressionMethod, ZipWriter};

use crate::checkpoint::npz::{self, Npz};
use crate::checkpoint::{safetensors, TensorSource};
use crate::error::{Error, Result};
use crate::plan::Plan;
use crate::resize::{provenance, PROVENANCE_KEY};
use crate::write::{self, AtomicFile, Progress};

/// The container to write.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutputFormat {
    Safetensors,
    Npz,
}

impl std::str::FromStr for OutputFormat {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "safetensors" => Ok(OutputFormat::Safetensors),
            "npz" => Ok(OutputFormat::Npz),
            _ => Err(format!(
                "unknown format \"{s}\"; expected safetensors or npz"
            )),
        }
    }
}

impl OutputFormat {
    /// The format an output path asks for by its extension.
    pub fn from_extension(path: &std::path::Path) -> Option<Self> {
        match path.extension()?.to_str()? {
            "npz" => Some(OutputFormat::Npz),
            "safetensors" => Some(OutputFormat::Safetensors),
            _ => None,
        }
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

/// Start one `.npy` member of `data_len` data bytes and write its header; the data follows
/// through [`write_data`], in one piece or in chunks.
fn start_member(
    zip: &mut ZipWriter<std::fs::File>,
    out: &AtomicFile,
    name: String,
    method: CompressionMethod,
    header: &[u8],
    data_len: u64,
) -> Result<()> {
    zip.start_file(name, member_options(method, header.len() as u64 + data_len))
        .map_err(|e| zip_error(out, e))?;
    write_data(zip, out, header)
}

fn write_data(zip: &mut ZipWriter<std::fs::File>, out: &AtomicFile, bytes: &[u8]) -> Result<()> {
    if write::interrupted() {
        return Err(Error::Interrupted {
            path: out.final_path().to_path_buf(),
        });
    }
    std::io::Write::write_all(zip, bytes)
        .map_err(|e| write::write_error(out.final_path(), "cannot write", e))
}

/// An npz archive like `src`: changed arrays rewritten (little-endian, same dtype and member
/// compression), every other member copied as its stored bytes.
pub fn patch_npz(
    src: &Npz,
    plan: &Plan,
    new_data: &HashMap<String, Vec<u8>>,
    out: &mut AtomicFile,
) -> Result<()> {
    let by_index: HashMap<usize, usize> = src
        .members()
        .iter()
        .enumerate()
        .map(|(i, m)| (m.index, i))
        .collect();
    let mut archive = src.archive();
    let file = out
        .file()
        .try_clone()
        .map_err(|e| write::write_error(out.final_path(), "cannot write", e))?;
    let mut zip = ZipWriter::new(file);
    for index in 0..archive.len() {
        if write::interrupted() {
            return Err(Error::Interrupted {
                path: out.final_path().to_path_buf(),
            });
        }
        let changed = by_index
            .get(&index)
            .map(|&i| (&src.entries()[i], &src.members()[i]))
            .filter(|(t, _)| new_data.contains_key(&t.name));
        match changed {
            Some((t, m)) => {
                let bytes = &new_data[&t.name];
                let shape = plan
                    .new_shape(&t.name)
                    .expect("changed tensors have a new shape");
                let descr = npz::descr_of(t.dtype).expect("npz dtypes have a descr");
                let header = npz::npy_header(descr, shape);
                let method = if m.stored {
                    CompressionMethod::Stored
                } else {
                    CompressionMethod::Deflated
                };
                let name = m.file_name.clone();
                start_member(&mut zip, out, name, method, &header, bytes.len() as u64)?;
                write_data(&mut zip, out, bytes)?;
            }
            None => {
                let member = archive.by_index_raw(index).map_err(|e| {
                    Error::invalid(
                        src.path(),
                        crate::error::FormatProblem::Other(format!("ZIP member {index}: {e}")),
                    )
                })?;
                zip.raw_copy_file(member).map_err(|e| zip_error(out, e))?;
            }
        }
    }
    zip.finish().map_err(|e| zip_error(out, e))?;
    Ok(())
}

/// Write every tensor of `src` (new bytes where changed) as a safetensors file.
pub fn to_safetensors(
    src: &dyn TensorSource,
    plan: &Plan,
    new_data: &HashMap<String, Vec<u8>>,
    out: &mut AtomicFile,
    progress: &mut dyn Progress,
) -> Result<()> {
    let mut entries = Vec::new();
    let mut cursor = 0u64;
    for t in src.entries() {
        let len = new_data
            .get(&t.name)
            .map_or(t.byte_len(), |b| b.len() as u64);
        let shape = plan.new_shape(&t.name).unwrap_or(&t.shape).clone();
        entries.push((t.name.clone(), t.dtype, shape, cursor, cursor + len));
        cursor += len;
    }
    let metadata = vec![(PROVENANCE_KEY.to_string(), provenance(plan, None))];
    out.write(
        &safetensors::encode_header(&entries, Some(&metadata), 0),
        progress,
    )?;
    for t in src.entries() {
        match new_data.get(&t.name) {
            Some(bytes) => out.write(bytes, progress)?,
            // Streamed: an npz member that inflates to gigabytes costs one chunk of memory.
            None => src.stream(t, &mut |chunk| out.write(chunk, progress))?,
        }
    }
    Ok(())
}

/// Write every tensor of `src` (new bytes where changed) as stored `.npy` members of an npz.
pub fn to_npz(
    src: &dyn TensorSource,
    plan: &Plan,
    new_data: &HashMap<String, Vec<u8>>,
    out: &mut AtomicFile,
) -> Result<()> {
    for t in src.entries() {
        if npz::descr_of(t.dtype).is_none() {
            return Err(Error::Usage(format!(
                "tensor \"{}\" is {}, which npz (numpy) cannot hold; write a .safetensors output instead",
                t.name, t.dtype
            )));
        }
    }
    let file = out
        .file()
        .try_clone()
        .map_err(|e| write::write_error(out.final_path(), "cannot write", e))?;
    let mut zip = ZipWriter::new(file);
    for t in src.entries() {
        if write::interrupted() {
            return Err(Error::Interrupted {
                path: out.final_path().to_path_buf(),
            });
        }
        let shape = plan.new_shape(&t.name).unwrap_or(&t.shape);
        let header = npz::npy_header(npz::descr_of(t.dtype).expect("checked above"), shape);
        let name = format!("{}.npy", t.name);
        let new = new_data.get(&t.name);
        let len = new.map_or(t.byte_len(), |b| b.len() as u64);
        start_member(&mut zip, out, name, CompressionMethod::Stored, &header, len)?;
        match new {
            Some(bytes) => write_data(&mut zip, out, bytes)?,
            None => src.stream(t, &mut |chunk| write_data(&mut zip, out, chunk))?,
        }
    }
    zip.finish().map_err(|e| zip_error(out, e))?;
    Ok(())
}
