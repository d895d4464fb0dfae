//! npz archives: a ZIP (stored or deflated members, ZIP64 included) of `.npy` arrays, the
//! format of many JAX-era releases. Each `.npy` header is parsed and checked with the same care
//! as a safetensors header: magic, version, a dict of exactly `descr`, `fortran_order` and
//! `shape`, a known dtype, and a data size equal to shape × item size.

use std::cell::RefCell;
use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

mod write;

pub use write::NpzWriter;

use super::{Dtype, Sink, TensorEntry};
use crate::error::{Error, FormatProblem, Result};

/// The largest `.npy` header accepted (numpy's own readers limit it to 10 000 bytes by
/// default; this allows generous padding).
const MAX_NPY_HEADER: usize = 1 << 20;

/// One array member.
#[derive(Debug, Clone)]
pub struct Member {
    /// Index in the archive.
    pub index: usize,
    /// The member's file name (`name.npy`).
    pub file_name: String,
    /// Bytes of `.npy` header before the data.
    pub data_offset: u64,
    pub big_endian: bool,
    pub fortran_order: bool,
    /// The dtype text as stored (`<f4`, `>f8`, ...), kept for rewriting the member.
    pub descr: String,
    pub stored: bool,
}

/// An opened, validated npz archive.
pub struct Npz {
    path: PathBuf,
    /// The archive file, for copying members' stored bytes file to file.
    file: File,
    archive: RefCell<zip::ZipArchive<File>>,
    entries: Vec<TensorEntry>,
    members: Vec<Member>,
    file_len: u64,
}

impl std::fmt::Debug for Npz {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Npz")
            .field("path", &self.path)
            .field("tensors", &self.entries.len())
            .finish()
    }
}

fn invalid(path: &Path, message: String) -> Error {
    Error::invalid(path, FormatProblem::Other(message))
}

/// The safetensors dtype and byte order of a `.npy` dtype text.
pub fn dtype_from_descr(descr: &str) -> Option<(Dtype, bool)> {
    let mut chars = descr.chars();
    let big = match chars.next()? {
        '<' | '|' | '=' => false,
        '>' => true,
        _ => return None,
    };
    let code = chars.as_str();
    let dtype = match code {
        "f2" => Dtype::F16,
        "f4" => Dtype::F32,
        "f8" => Dtype::F64,
        "i1" => Dtype::I8,
        "u1" => Dtype::U8,
        "b1" => Dtype::BOOL,
        "i2" => Dtype::I16,
        "u2" => Dtype::U16,
        "i4" => Dtype::I32,
        "u4" => Dtype::U32,
        "i8" => Dtype::I64,
        "u8" => Dtype::U64,
        _ => return None,
    };
    Some((dtype, big && dtype.bitsize() > 8))
}

/// The little-endian `.npy` dtype text of a dtype, if numpy has one.
pub fn descr_of(dtype: Dtype) -> Option<&'static str> {
    Some(match dtype {
        Dtype::F16 => "<f2",
        Dtype::F32 => "<f4",
        Dtype::F64 => "<f8",
        Dtype::I8 => "|i1",
        Dtype::U8 => "|u1",
        Dtype::BOOL => "|b1",
        Dtype::I16 => "<i2",
        Dtype::U16 => "<u2",
        Dtype::I32 => "<i4",
        Dtype::U32 => "<u4",
        Dtype::I64 => "<i8",
        Dtype::U64 => "<u8",
        _ => return None,
    })
}

/// A parsed `.npy` header.
#[derive(Debug, Clone, PartialEq)]
pub struct NpyHeader {
    pub descr: String,
    pub fortran_order: bool,
    pub shape: Vec<usize>,
    /// Total header bytes (magic, version, length, dict) before the data.
    pub data_offset: usize,
}

/// Parse the start of a `.npy` stream. `Err` explains the rule broken.
pub fn parse_npy_header(bytes: &[u8]) -> std::result::Result<NpyHeader, String> {
    if bytes.len() < 10 || &bytes[..6] != b"\x93NUMPY" {
        return Err("not a .npy array (the \\x93NUMPY magic is missing)".into());
    }
    let (len, start) = match bytes[6] {
        1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
        2 | 3 => {
            if bytes.len() < 12 {
                return Err(".npy header is truncated".into());
            }
            (
                u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]) as usize,
                12,
            )
        }
        v => {
            return Err(format!(
                ".npy format version {v} is not one numpy defines (1, 2 or 3)"
            ))
        }
    };
    if len > MAX_NPY_HEADER {
        return Err(format!(
            ".npy header length is over the {MAX_NPY_HEADER}-byte limit"
        ));
    }
    let text = bytes
        .get(start..start + len)
        .ok_or(".npy header is truncated")?;
    let text = std::str::from_utf8(text).map_err(|_| ".npy header is not text".to_string())?;
    let (descr, fortran_order, shape) = parse_dict(text)?;
    Ok(NpyHeader {
        descr,
        fortran_order,
        shape,
        data_offset: start + len,
    })
}

/// The header dict: `{'descr': '<f4', 'fortran_order': False, 'shape': (3, 4), }`.
fn parse_dict(text: &str) -> std::result::Result<(String, bool, Vec<usize>), String> {
    let body = text.trim_end_matches([' ', '\n', '\0']).trim();
    let inner = body
        .strip_prefix('{')
        .and_then(|b| b.strip_suffix('}'))
        .ok_or_else(|| format!(".npy header is not a dict: {body:.60}"))?;
    let mut rest = inner.trim();
    let (mut descr, mut fortran, mut shape) = (None, None, None);
    while !rest.is_empty() {
        let (key, after) =
            quoted(rest).ok_or_else(|| format!(".npy header key expected at: {rest:.40}"))?;
        let after = after
            .trim_start()
            .strip_prefix(':')
            .ok_or(".npy header: ':' expected after a key")?
            .trim_start();
        let after = match key.as_str() {
            "descr" => {
                let (v, a) = quoted(after)
                    .ok_or(".npy header: descr must be a dtype string such as '<f4'")?;
                descr = Some(v);
                a
            }
            "fortran_order" => {
                if let Some(a) = after.strip_prefix("True") {
                    fortran = Some(true);
                    a
                } else if let Some(a) = after.strip_prefix("False") {
                    fortran = Some(false);
                    a
                } else {
                    return Err(".npy header: fortran_order must be True or False".into());
                }
            }
            "shape" => {
                let a = after
                    .strip_prefix('(')
                    .ok_or(".npy header: shape must be a tuple")?;
                let close = a
                    .find(')')
                    .ok_or(".npy header: shape tuple is not closed")?;
                let dims = a[..close]
                    .split(',')
                    .map(str::trim)
                    .filter(|s| !s.is_empty())
                    .map(|s| {
                        s.trim_end_matches('L').parse::<usize>().map_err(|_| {
                            format!(
                                ".npy header: shape dimension {s} is not a non-negative integer"
                            )
                        })
                    })
                    .collect::<std::result::Result<Vec<_>, _>>()?;
                shape = Some(dims);
                &a[close + 1..]
            }
            other => return Err(format!(".npy header has an unexpected key '{other}'")),
        };
        rest = after.trim_start();
        rest = rest.strip_prefix(',').unwrap_or(rest).trim_start();
    }
    match (descr, fortran, shape) {
        (Some(d), Some(f), Some(s)) => Ok((d, f, s)),
        _ => Err(".npy header must have descr, fortran_order and shape".into()),
    }
}

/// A Python string literal in single or double quotes at the start of `s`.
fn quoted(s: &str) -> Option<(String, &str)> {
    let q = s.chars().next().filter(|c| *c == '\'' || *c == '"')?;
    let end = s[1..].find(q)? + 1;
    Some((s[1..end].to_string(), &s[end + 1..]))
}

impl Npz {
    /// Open and validate an archive: every `.npy` member's header is read and checked.
    pub fn open(path: &Path) -> Result<Self> {
        let (file, meta) = super::open_regular(path)?;
        let file_len = meta.len();
        if file_len == 0 {
            return Err(invalid(path, "is empty, not an npz archive".into()));
        }
        let handle = file.try_clone().map_err(|e| Error::read(path, e))?;
        let mut archive = zip::ZipArchive::new(handle)
            .map_err(|e| invalid(path, format!("not a valid npz (ZIP) archive: {e}")))?;
        check_member_names(&archive).map_err(|m| invalid(path, m))?;
        let mut entries = Vec::new();
        let mut members = Vec::new();
        for index in 0..archive.len() {
            let mut member = archive
                .by_index(index)
                .map_err(|e| invalid(path, format!("ZIP member {index} cannot be read: {e}")))?;
            let file_name = member
                .name()
                .map_err(|e| invalid(path, format!("ZIP member {index}: {e}")))?
                .into_owned();
            if member.is_dir() || !file_name.ends_with(".npy") {
                continue;
            }
            if member.encrypted() {
                return Err(invalid(path, format!("member {file_name} is encrypted")));
            }
            let stored = member.compression() == zip::CompressionMethod::Stored;
            let size = member.size();
            let mut head = Vec::new();
            (&mut member)
                .take((MAX_NPY_HEADER + 12) as u64)
                .read_to_end(&mut head)
                .map_err(|e| {
                    invalid(
                        path,
                        format!("member {file_name} cannot be decompressed: {e}"),
                    )
                })?;
            let h = parse_npy_header(&head)
                .map_err(|m| invalid(path, format!("member {file_name}: {m}")))?;
            let (dtype, big_endian) = dtype_from_descr(&h.descr).ok_or_else(|| {
                invalid(path, format!("member {file_name}: dtype '{}' is not one posgrid reads (float, integer or bool)", h.descr))
            })?;
            let need = super::safetensors::byte_size(dtype, &h.shape).ok_or_else(|| {
                invalid(
                    path,
                    format!("member {file_name}: shape times item size overflows"),
                )
            })?;
            if need != size.saturating_sub(h.data_offset as u64) || (h.data_offset as u64) > size {
                return Err(invalid(
                    path,
                    format!(
                        "member {file_name}: shape {:?} of {} needs {need} bytes but the member holds {}",
                        h.shape,
                        h.descr,
                        size.saturating_sub(h.data_offset as u64)
                    ),
                ));
            }
            let name = file_name.trim_end_matches(".npy").to_string();
            entries.push(TensorEntry {
                name,
                dtype,
                shape: h.shape.clone(),
                begin: 0,
                end: need,
            });
            members.push(Member {
                index,
                file_name,
                data_offset: h.data_offset as u64,
                big_endian,
                fortran_order: h.fortran_order,
                descr: h.descr,
                stored,
            });
        }
        Ok(Npz {
            path: path.to_path_buf(),
            file,
            archive: RefCell::new(archive),
            entries,
            members,
            file_len,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    pub fn file_len(&self) -> u64 {
        self.file_len
    }

    /// The archive file.
    pub fn file(&self) -> &File {
        &self.file
    }

    pub fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }

    /// The archive members of the arrays, in the order of [`Npz::entries`].
    pub fn members(&self) -> &[Member] {
        &self.members
    }

    /// The archive, for raw copies of members.
    pub fn archive(&self) -> std::cell::RefMut<'_, zip::ZipArchive<File>> {
        self.archive.borrow_mut()
    }

    /// One array's data, little-endian, C order. Fortran-order arrays are refused.
    pub fn read_bytes(&self, t: &TensorEntry) -> Result<Vec<u8>> {
        let mut data = super::whole_tensor_buffer(&self.path, t)?;
        self.stream_bytes(t, &mut |chunk| {
            data.extend_from_slice(chunk);
            Ok(())
        })?;
        Ok(data)
    }

    /// Pass one array's data (little-endian, C order) to `sink`, inflated through a fixed
    /// buffer: exactly the size its `.npy` header declares is read, so a member that inflates
    /// to more (or less) is an error, never a larger allocation.
    pub fn stream_bytes(&self, t: &TensorEntry, sink: Sink<'_>) -> Result<()> {
        let i = self
            .entries
            .iter()
            .position(|e| e.name == t.name)
            .expect("entries come from the archive");
        let m = &self.members[i];
        if m.fortran_order {
            return Err(Error::refused(
                &self.path,
                format!("array \"{}\" is stored in Fortran order; save it in C order (numpy.ascontiguousarray) first", t.name),
            ));
        }
        let broken =
            |e: &dyn std::fmt::Display| invalid(&self.path, format!("member {}: {e}", m.file_name));
        let mut archive = self.archive.borrow_mut();
        let mut member = archive.by_index(m.index).map_err(|e| broken(&e))?;
        std::io::copy(&mut (&mut member).take(m.data_offset), &mut std::io::sink())
            .map_err(|e| broken(&e))?;
        let width = (t.dtype.bitsize() / 8).max(1);
        let mut buf = vec![0u8; super::chunk_len(t.byte_len())];
        let mut left = t.byte_len();
        while left > 0 {
            let n = super::chunk_len(left);
            member.read_exact(&mut buf[..n]).map_err(|e| broken(&e))?;
            if m.big_endian {
                buf[..n].chunks_exact_mut(width).for_each(|c| c.reverse());
            }
            sink(&buf[..n])?;
            left -= n as u64;
        }
        Ok(())
    }
}

/// Every member name must be safe to write back into an archive and unambiguous: no empty
/// name, no absolute path, drive letter, `..` step, backslash or NUL, and no name twice.
fn check_member_names(archive: &zip::ZipArchive<File>) -> std::result::Result<(), String> {
    if archive.metadata().has_duplicate_names() {
        return Err(
            "the archive holds two members of the same name; which one is meant is ambiguous"
                .into(),
        );
    }
    for (index, raw) in archive.file_names_raw().enumerate() {
        if let Some(why) = super::unsafe_member_name(raw) {
            let shown = String::from_utf8_lossy(raw);
            return Err(format!("ZIP member {index} ({shown:?}) {why}"));
        }
    }
    Ok(())
}

/// A `.npy` header for `dtype` (little-endian, C order) and `shape`, version 1.0 (2.0 when the
/// dict is too long), padded so the data starts on a 64-byte boundary as numpy writes it.
pub fn npy_header(descr: &str, shape: &[usize]) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
    let shape_text = match dims.len() {
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    let mut dict =
        format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape_text}, }}");
    let (version, prefix) = if dict.len() + 11 < 65536 {
        (1u8, 10)
    } else {
        (2u8, 12)
    };
    while (prefix + dict.len() + 1) % 64 != 0 {
        dict.push(' ');
    }
    dict.push('\n');
    let mut out = b"\x93NUMPY".to_vec();
    out.extend([version, 0]);
    if version == 1 {
        out.extend((dict.len() as u16).to_le_bytes());
    } else {
        out.extend((dict.len() as u32).to_le_bytes());
    }
    out.extend(dict.as_bytes());
    out
}

impl super::TensorSource for Npz {
    fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }
    fn bytes(&self, tensor: &TensorEntry) -> Result<Vec<u8>> {
        self.read_bytes(tensor)
    }
    fn stream(&self, tensor: &TensorEntry, sink: super::Sink<'_>) -> Result<()> {
        self.stream_bytes(tensor, sink)
    }
    fn source_path(&self) -> &Path {
        &self.path
    }
}

impl super::Reader for Npz {
    fn format(&self) -> super::Format {
        super::Format::Npz
    }
    fn file_len(&self) -> u64 {
        self.file_len
    }
    fn as_any(&self) -> &dyn std::any::Any {
        self
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn headers_numpy_writes_parse() {
        // The layout numpy's format module documents: magic, version 1.0, u16 length, dict.
        let h = npy_header("<f4", &[1, 197, 8]);
        assert_eq!(h.len() % 64, 0, "data starts on a 64-byte boundary");
        let p = parse_npy_header(&h).unwrap();
        assert_eq!(
            (p.descr.as_str(), p.fortran_order, p.shape, p.data_offset),
            ("<f4", false, vec![1, 197, 8], h.len())
        );
        assert_eq!(
            parse_npy_header(&npy_header("<i8", &[5])).unwrap().shape,
            vec![5]
        );
        assert_eq!(
            parse_npy_header(&npy_header("<f2", &[])).unwrap().shape,
            Vec::<usize>::new()
        );
    }

    #[test]
    fn fuzz_finding_multibyte_dtype_text_is_an_error_not_a_panic() {
        // Found by the npy_header fuzz target: a descr starting with a two-byte character.
        let input = b"\x93NUMPY\x01\x00v\x00{'descr': '\xc4\x9f3' 'fortran_order': False, 'shape': (1, 00000000000000000007301183093571962653, 8), }               \x00\x00\x00\x00\x00";
        if let Ok(h) = parse_npy_header(input) {
            assert!(dtype_from_descr(&h.descr).is_none());
        }
        assert!(dtype_from_descr("\u{11f}3").is_none());
        assert_eq!(dtype_from_descr(">f8"), Some((Dtype::F64, true)));
        assert_eq!(dtype_from_descr("|u1"), Some((Dtype::U8, false)));
    }
}
