//! The ZIP layer of the framework's checkpoint files: one top folder holding `data.pkl`,
//! `data/<key>` storage records, `byteorder`, `version` and friends. The central directory is
//! read with the zip crate; every record is then checked here before any data is used: names
//! inside the one top folder and safe, no name twice, spans inside the file and not
//! overlapping, only stored or deflated records, nothing encrypted.

use std::collections::HashMap;
use std::fs::File;
use std::io::Read;
use std::os::unix::fs::FileExt;
use std::path::Path;

use crate::checkpoint::unsafe_member_name;
use crate::error::{Error, FormatProblem, Result};

/// One record of the archive.
#[derive(Debug, Clone)]
pub struct Record {
    /// The full name, with the top folder.
    pub name: String,
    /// Where its local header starts.
    pub header_start: u64,
    /// Where its (possibly compressed) data starts.
    pub data_start: u64,
    /// Uncompressed size.
    pub size: u64,
    /// Size as stored.
    pub stored_size: u64,
    /// Stored as it is (not deflated).
    pub stored: bool,
    pub crc32: u32,
}

/// A validated archive: the top folder and the records in archive order.
#[derive(Debug)]
pub struct Archive {
    /// The top folder, without its slash.
    pub folder: String,
    pub records: Vec<Record>,
    by_name: HashMap<String, usize>,
}

pub(crate) fn invalid(path: &Path, message: impl Into<String>) -> Error {
    Error::invalid(path, FormatProblem::Other(message.into()))
}

impl Archive {
    /// Read and check the central directory of `file`.
    pub fn open(path: &Path, file: &File, file_len: u64) -> Result<Self> {
        let handle = file.try_clone().map_err(|e| Error::read(path, e))?;
        let mut zip = zip::ZipArchive::new(handle)
            .map_err(|e| invalid(path, format!("not a valid ZIP archive: {e}")))?;
        if zip.metadata().has_duplicate_names() {
            return Err(invalid(
                path,
                "the archive holds two records of the same name; which one is meant is ambiguous",
            ));
        }
        let mut records = Vec::with_capacity(zip.len());
        for index in 0..zip.len() {
            records.push(read_record(path, &mut zip, index)?);
        }
        let folder = top_folder(path, &records)?;
        check_spans(path, &records, file_len)?;
        let by_name = records
            .iter()
            .enumerate()
            .map(|(i, r)| (r.name.clone(), i))
            .collect();
        Ok(Archive {
            folder,
            records,
            by_name,
        })
    }

    /// The record `<folder>/<name>`.
    pub fn get(&self, name: &str) -> Option<&Record> {
        self.index_of(name).map(|i| &self.records[i])
    }

    /// The position of the record `<folder>/<name>` among the records.
    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.by_name
            .get(&format!("{}/{name}", self.folder))
            .copied()
    }

    /// Whether a record `<folder>/<prefix>...` exists.
    pub fn has_prefix(&self, prefix: &str) -> bool {
        let full = format!("{}/{prefix}", self.folder);
        self.records.iter().any(|r| r.name.starts_with(&full))
    }
}

fn read_record(path: &Path, zip: &mut zip::ZipArchive<File>, index: usize) -> Result<Record> {
    let member = zip
        .by_index_raw(index)
        .map_err(|e| invalid(path, format!("ZIP record {index} cannot be read: {e}")))?;
    let raw = member.name_raw();
    if let Some(why) = unsafe_member_name(raw) {
        let shown = String::from_utf8_lossy(raw);
        return Err(invalid(
            path,
            format!("ZIP record {index} ({shown:?}) {why}"),
        ));
    }
    let name = std::str::from_utf8(raw)
        .map_err(|_| {
            invalid(
                path,
                format!("ZIP record {index} has a name that is not UTF-8"),
            )
        })?
        .to_string();
    if member.encrypted() {
        return Err(invalid(path, format!("record {name} is encrypted")));
    }
    let stored = match member.compression() {
        zip::CompressionMethod::Stored => true,
        zip::CompressionMethod::Deflated => false,
        other => {
            return Err(invalid(
                path,
                format!("record {name} is compressed with {other}, which posgrid does not read"),
            ))
        }
    };
    let data_start = member
        .data_start()
        .ok_or_else(|| invalid(path, format!("record {name} has no data position")))?;
    if stored && member.compressed_size() != member.size() {
        return Err(invalid(
            path,
            format!("record {name} is stored but its sizes disagree"),
        ));
    }
    Ok(Record {
        name,
        header_start: member.header_start(),
        data_start,
        size: member.size(),
        stored_size: member.compressed_size(),
        stored,
        crc32: member.crc32(),
    })
}

/// The one top folder: the folder of `data.pkl`, which every record must be inside.
fn top_folder(path: &Path, records: &[Record]) -> Result<String> {
    let pickles: Vec<&str> = records
        .iter()
        .filter_map(|r| r.name.strip_suffix("/data.pkl"))
        .filter(|f| !f.contains('/'))
        .collect();
    let folder = match pickles.as_slice() {
        [one] => one.to_string(),
        [] => return Err(invalid(path, "the archive has no <folder>/data.pkl record: it is not a PyTorch checkpoint")),
        _ => return Err(invalid(path, "the archive has several top folders with a data.pkl; which one is the checkpoint is ambiguous")),
    };
    let inside = format!("{folder}/");
    if let Some(r) = records.iter().find(|r| !r.name.starts_with(&inside)) {
        return Err(invalid(
            path,
            format!(
                "record {:?} lies outside the archive folder {folder:?}",
                r.name
            ),
        ));
    }
    Ok(folder)
}

/// Every record's local header and data inside the file, and no two sharing bytes.
fn check_spans(path: &Path, records: &[Record], file_len: u64) -> Result<()> {
    let mut spans: Vec<(u64, u64, &str)> = Vec::with_capacity(records.len());
    for r in records {
        let end = r
            .data_start
            .checked_add(r.stored_size)
            .filter(|&e| e <= file_len);
        match end {
            Some(end) if r.header_start < r.data_start => {
                spans.push((r.header_start, end, &r.name))
            }
            _ => {
                return Err(invalid(
                    path,
                    format!("record {} runs past the end of the file", r.name),
                ))
            }
        }
    }
    spans.sort();
    for pair in spans.windows(2) {
        if pair[1].0 < pair[0].1 {
            return Err(invalid(
                path,
                format!("records {} and {} share bytes", pair[0].2, pair[1].2),
            ));
        }
    }
    Ok(())
}

/// Read a whole record (inflating a deflated one) and check its size and CRC-32. `limit`
/// bounds the size accepted, before anything is allocated.
pub fn read_whole(path: &Path, file: &File, r: &Record, limit: u64) -> Result<Vec<u8>> {
    if r.size > limit {
        return Err(invalid(
            path,
            format!(
                "record {} holds {} bytes, more than the {limit}-byte limit for it",
                r.name, r.size
            ),
        ));
    }
    let mut buf = crate::values::try_with_capacity(r.size as usize)
        .map_err(|_| Error::refused(path, format!("record {} does not fit in memory", r.name)))?;
    if r.stored {
        buf.resize(r.size as usize, 0);
        file.read_exact_at(&mut buf, r.data_start)
            .map_err(|e| Error::read(path, e))?;
    } else {
        let raw = PositionedReader {
            file,
            at: r.data_start,
            left: r.stored_size,
        };
        flate2::read::DeflateDecoder::new(raw)
            .take(r.size + 1)
            .read_to_end(&mut buf)
            .map_err(|e| invalid(path, format!("record {} cannot be inflated: {e}", r.name)))?;
        if buf.len() as u64 != r.size {
            return Err(invalid(
                path,
                format!(
                    "record {} inflates to a size other than the {} bytes it declares",
                    r.name, r.size
                ),
            ));
        }
    }
    check_crc(path, r, crc32fast::hash(&buf))?;
    Ok(buf)
}

/// Compare a record's computed CRC-32 with the one the archive records.
pub fn check_crc(path: &Path, r: &Record, computed: u32) -> Result<()> {
    if computed != r.crc32 {
        return Err(invalid(
            path,
            format!(
                "record {} fails its CRC-32 check (the archive is damaged)",
                r.name
            ),
        ));
    }
    Ok(())
}

/// Reads a span of a file with positioned reads (the file's cursor is never moved).
struct PositionedReader<'a> {
    file: &'a File,
    at: u64,
    left: u64,
}

impl Read for PositionedReader<'_> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = (buf.len() as u64).min(self.left) as usize;
        if n == 0 {
            return Ok(0);
        }
        let got = self.file.read_at(&mut buf[..n], self.at)?;
        self.at += got as u64;
        self.left -= got as u64;
        Ok(got)
    }
}
