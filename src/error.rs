//! One error type for the whole library. Each variant is one way a run can fail; the binary maps
//! them to the documented exit codes with [`Error::exit_code`].

use std::fmt;
use std::io;
use std::path::{Path, PathBuf};

/// Exit status for success or "nothing to do".
pub const EXIT_OK: i32 = 0;
/// Exit status for a bad command line (also what clap uses).
pub const EXIT_USAGE: i32 = 2;
/// Exit status for an input file that cannot be read or is not a valid checkpoint.
pub const EXIT_INVALID_INPUT: i32 = 3;
/// Exit status when no position table is found, or the one found is ambiguous.
pub const EXIT_NO_TABLE: i32 = 4;
/// Exit status when the output cannot be written (nothing is left behind).
pub const EXIT_WRITE: i32 = 5;
/// Exit status when a table is refused for its values or size (non-finite, integer, too large).
pub const EXIT_REFUSED: i32 = 6;
/// Exit status after SIGINT or SIGTERM stopped a write (128 + 2, common shell practice).
pub const EXIT_INTERRUPTED: i32 = 130;

/// Why a checkpoint file is not a valid container. One variant per rule a file can break.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum FormatProblem {
    /// The file is shorter than the 8-byte header length prefix.
    TooShort { len: u64 },
    /// The header length prefix is larger than the limit. The prefix itself is not kept: in a
    /// file that is not safetensors it is the file's first bytes, which a message must not show.
    HeaderTooLarge { limit: u64 },
    /// The header length prefix points past the end of the file.
    HeaderPastEnd { file_len: u64 },
    /// The header length is too small to hold a JSON object.
    HeaderTooSmall,
    /// The header bytes are not UTF-8.
    HeaderNotUtf8 { at: usize },
    /// The header is not valid JSON.
    HeaderNotJson { detail: String },
    /// The header is JSON but not an object.
    HeaderNotObject { found: &'static str },
    /// A key appears twice in the header.
    DuplicateKey { key: String },
    /// `__metadata__` is not an object of strings.
    MetadataNotStrings { key: Option<String> },
    /// A tensor entry is malformed (not an object, field missing or of the wrong type).
    BadEntry { tensor: String, detail: String },
    /// A dtype name that the format does not define.
    UnknownDtype { tensor: String, dtype: String },
    /// A dimension is negative, fractional or too large.
    BadDimension { tensor: String, detail: String },
    /// shape × dtype size overflows.
    SizeOverflow { tensor: String },
    /// The byte span does not equal shape × dtype size.
    SpanMismatch {
        tensor: String,
        expected: u64,
        found: u64,
    },
    /// The span ends before it begins.
    SpanReversed {
        tensor: String,
        begin: u64,
        end: u64,
    },
    /// The span runs past the end of the data area.
    SpanPastEnd {
        tensor: String,
        end: u64,
        data_len: u64,
    },
    /// Two spans share bytes.
    SpansOverlap { first: String, second: String },
    /// Bytes between spans belong to no tensor.
    Hole {
        after: Option<String>,
        begin: u64,
        end: u64,
    },
    /// Bytes after the last tensor belong to no tensor.
    TrailingBytes { data_end: u64, file_len: u64 },
    /// Anything else specific to a container (npz member, shard index).
    Other(String),
}

impl fmt::Display for FormatProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        use FormatProblem::*;
        match self {
            TooShort { len: 0 } => write!(
                f,
                "file is empty; a safetensors file starts with an 8-byte header length"
            ),
            TooShort { len } => write!(
                f,
                "file is {len} bytes long; a safetensors file starts with an 8-byte header length"
            ),
            HeaderTooLarge { limit } => write!(
                f,
                "the 8-byte header length at the start is over the {limit}-byte limit; the file is not safetensors or is corrupt"
            ),
            HeaderPastEnd { file_len } => write!(
                f,
                "the 8-byte header length at the start is more than the {} bytes that follow it; the file is truncated or not safetensors",
                file_len.saturating_sub(8)
            ),
            HeaderTooSmall => write!(
                f,
                "the 8-byte header length at the start gives a header too short to hold a JSON object"
            ),
            HeaderNotUtf8 { at } => write!(f, "header is not UTF-8 text (bad byte at header offset {at})"),
            HeaderNotJson { detail } => write!(f, "header is not valid JSON: {detail}"),
            HeaderNotObject { found } => write!(f, "header must be a JSON object, found {found}"),
            DuplicateKey { key } => write!(f, "header names \"{key}\" twice"),
            MetadataNotStrings { key: Some(k) } => write!(
                f,
                "__metadata__ must map strings to strings, but the value of \"{k}\" is not a string"
            ),
            MetadataNotStrings { key: None } => {
                write!(f, "__metadata__ must be a JSON object of strings")
            }
            BadEntry { tensor, detail } => write!(f, "tensor \"{tensor}\": {detail}"),
            UnknownDtype { tensor, dtype } => {
                write!(f, "tensor \"{tensor}\": unknown dtype \"{dtype}\"")
            }
            BadDimension { tensor, detail } => write!(f, "tensor \"{tensor}\": {detail}"),
            SizeOverflow { tensor } => write!(
                f,
                "tensor \"{tensor}\": shape times element size overflows a 64-bit byte count"
            ),
            SpanMismatch { tensor, expected, found } => write!(
                f,
                "tensor \"{tensor}\": its shape and dtype need {expected} bytes but its data_offsets span {found}"
            ),
            SpanReversed { tensor, begin, end } => write!(
                f,
                "tensor \"{tensor}\": data_offsets end ({end}) is before its begin ({begin})"
            ),
            SpanPastEnd { tensor, end, data_len } => write!(
                f,
                "tensor \"{tensor}\": data ends at byte {end} of the data area, which holds only {data_len} bytes (truncated file?)"
            ),
            SpansOverlap { first, second } => write!(
                f,
                "tensors \"{first}\" and \"{second}\" share bytes (overlapping data_offsets)"
            ),
            Hole { after: Some(t), begin, end } => write!(
                f,
                "data bytes {begin}..{end} after tensor \"{t}\" belong to no tensor (a hole)"
            ),
            Hole { after: None, begin, end } => write!(
                f,
                "data bytes {begin}..{end} at the start of the data area belong to no tensor (a hole)"
            ),
            TrailingBytes { data_end, file_len } => write!(
                f,
                "{} bytes after the last tensor (data ends at file byte {data_end}, file has {file_len}) belong to no tensor",
                file_len - data_end
            ),
            Other(s) => f.write_str(s),
        }
    }
}

/// Every way a posgrid operation can fail.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The command line or the request does not make sense.
    #[error("{0}")]
    Usage(String),
    /// The input file could not be opened or read.
    #[error("{}: cannot read: {source}", path.display())]
    Read { path: PathBuf, source: io::Error },
    /// The input file is not a valid checkpoint.
    #[error("{}: {problem}", path.display())]
    Invalid {
        path: PathBuf,
        problem: FormatProblem,
    },
    /// No table was found, the request names an unknown tensor, or a table is ambiguous.
    #[error("{}: {message}", path.display())]
    Table { path: PathBuf, message: String },
    /// A table was found but its values or size are refused.
    #[error("{}: {message}", path.display())]
    Refused { path: PathBuf, message: String },
    /// The output could not be written; nothing was left behind.
    #[error("{}: {message}", path.display())]
    Write { path: PathBuf, message: String },
    /// SIGINT or SIGTERM arrived during a write; nothing was left behind.
    #[error("{}: interrupted; the output was not written and nothing was left behind", path.display())]
    Interrupted { path: PathBuf },
}

impl Error {
    /// The documented exit status for this error.
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::Usage(_) => EXIT_USAGE,
            Error::Read { .. } | Error::Invalid { .. } => EXIT_INVALID_INPUT,
            Error::Table { .. } => EXIT_NO_TABLE,
            Error::Refused { .. } => EXIT_REFUSED,
            Error::Write { .. } => EXIT_WRITE,
            Error::Interrupted { .. } => EXIT_INTERRUPTED,
        }
    }

    pub(crate) fn invalid(path: &Path, problem: FormatProblem) -> Self {
        Error::Invalid {
            path: path.to_path_buf(),
            problem,
        }
    }

    pub(crate) fn read(path: &Path, source: io::Error) -> Self {
        Error::Read {
            path: path.to_path_buf(),
            source,
        }
    }

    pub(crate) fn table(path: &Path, message: impl Into<String>) -> Self {
        Error::Table {
            path: path.to_path_buf(),
            message: message.into(),
        }
    }

    /// A request that does not fit this input: a usage error (exit 2) that names the file.
    pub(crate) fn usage_in(path: &Path, message: impl std::fmt::Display) -> Self {
        Error::Usage(format!("{}: {message}", path.display()))
    }

    pub(crate) fn refused(path: &Path, message: impl Into<String>) -> Self {
        Error::Refused {
            path: path.to_path_buf(),
            message: message.into(),
        }
    }

    pub(crate) fn write(path: &Path, message: impl Into<String>) -> Self {
        Error::Write {
            path: path.to_path_buf(),
            message: message.into(),
        }
    }
}

/// Result with the library's error.
pub type Result<T> = std::result::Result<T, Error>;
