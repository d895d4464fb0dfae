//! Writing: a temporary file beside the output, filled by streaming, synced, then renamed into
//! place. Until the rename the final path is untouched; on any failure or interruption the
//! temporary file is removed.
//!
//! The rename itself enforces the replace rule (an atomic no-replace rename without
//! `--force`), `--force` replaces only a regular file, a symbolic link (the link, never its
//! target) or a directory recognisably written by an earlier run, and the output's
//! permission bits are never wider than the input's.

mod rename;
pub mod share;
mod signals;
mod temp;

use std::fs::{self, File, Metadata, OpenOptions};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::os::unix::ffi::OsStrExt;
use std::os::unix::fs::{DirBuilderExt, MetadataExt, OpenOptionsExt, PermissionsExt};
use std::path::{Path, PathBuf};

use crate::checkpoint::directory::ModelDir;

use crate::error::{Error, Result};

use signals::{deregister, temporaries, Temporary};
pub use signals::{exit_process, install_interrupt_handler, interrupted};

/// Copy chunk between progress updates and interruption checks.
const CHUNK: u64 = 64 << 20;
/// Bytes written between starts of their writeback, for a durable output.
const WRITEBACK_STEP: u64 = 8 << 20;
/// Largest index file of an existing output set that is read to recognise it.
const INDEX_LIMIT: u64 = 100 << 20;

/// How an output is put in place.
#[derive(Debug, Clone, Copy)]
pub struct OutputRules {
    /// Sync the data to disk before the rename.
    pub sync: bool,
    /// An existing output may be replaced (`--force`).
    pub replace: bool,
    /// The widest permission bits the output may have (the input's).
    pub mode_limit: u32,
}

impl OutputRules {
    /// Rules for an output made from `input`: its permission bits are the limit.
    pub fn like(input: &Path, sync: bool, replace: bool) -> Self {
        OutputRules {
            sync,
            replace,
            // An input whose mode cannot be read gives an owner-only output.
            mode_limit: fs::metadata(input).map_or(0o700, |m| m.mode() & 0o777),
        }
    }
}

/// What kind of thing a path is, in words.
fn kind_name(m: &Metadata) -> &'static str {
    use std::os::unix::fs::FileTypeExt;
    let t = m.file_type();
    match () {
        _ if t.is_file() => "a regular file",
        _ if t.is_dir() => "a directory",
        _ if t.is_symlink() => "a symbolic link",
        _ if t.is_char_device() => "a character device",
        _ if t.is_block_device() => "a block device",
        _ if t.is_fifo() => "a FIFO (named pipe)",
        _ if t.is_socket() => "a socket",
        _ => "not a regular file",
    }
}

/// Refuse an output that is the input (through links or `..` paths), that exists without
/// `force`, or that is anything but a regular file or a symbolic link; check that its
/// directory exists.
pub fn check_destination(input: &Path, output: &Path, force: bool) -> Result<()> {
    check_file_path(output)?;
    if same_file(input, output) {
        return Err(Error::write(
            output,
            format!(
                "is the input file {} (the same file on disk); choose another output path",
                input.display()
            ),
        ));
    }
    check_replaceable(output, force)
}

/// [`check_destination`] for an output made from no input file (a figure of values held in
/// memory).
pub fn check_output(output: &Path, force: bool) -> Result<()> {
    check_file_path(output)?;
    check_replaceable(output, force)
}

/// The path names a file in a directory that exists.
fn check_file_path(output: &Path) -> Result<()> {
    if output.as_os_str().as_bytes().ends_with(b"/") {
        return Err(Error::write(
            output,
            "ends with a slash, so it names a directory; give a file path for the output",
        ));
    }
    check_parent(output)
}

/// Nothing is there, or a regular file (or a link to one) that `force` allows to replace.
fn check_replaceable(output: &Path, force: bool) -> Result<()> {
    let Ok(here) = fs::symlink_metadata(output) else {
        return Ok(());
    };
    let through_link = fs::metadata(output).ok();
    if here.is_dir() || through_link.as_ref().is_some_and(Metadata::is_dir) {
        return Err(Error::write(
            output,
            "is a directory; give a file path for the output",
        ));
    }
    if let Some(what) = unreplaceable_file(&here, through_link.as_ref()) {
        return Err(Error::write(
            output,
            format!("is {what}; posgrid replaces only regular files (and symbolic links to them), even with --force"),
        ));
    }
    if !force {
        return Err(Error::write(
            output,
            "already exists; pass --force to replace it",
        ));
    }
    Ok(())
}

fn check_parent(output: &Path) -> Result<()> {
    if output.file_name().is_none() {
        return Err(Error::write(output, "does not name a file"));
    }
    let dir = parent_dir(output);
    match fs::metadata(&dir) {
        Ok(m) if m.is_dir() => Ok(()),
        Ok(_) => Err(Error::write(
            output,
            format!("{} is not a directory", dir.display()),
        )),
        Err(_) => Err(Error::write(
            output,
            format!("output directory {} does not exist", dir.display()),
        )),
    }
}

/// What is wrong with replacing a file at a path, given its own metadata and (if it is a
/// link that leads somewhere) its target's: anything but a regular file, or a link to a
/// regular file or to nothing, is kept (`/dev/stdout` is a link to a device).
fn unreplaceable_file(here: &Metadata, target: Option<&Metadata>) -> Option<String> {
    if here.is_file() {
        return None;
    }
    if !here.file_type().is_symlink() {
        return Some(kind_name(here).to_string());
    }
    match target {
        Some(t) if !t.is_file() => Some(format!("a symbolic link to {}", kind_name(t))),
        _ => None,
    }
}

/// Both paths exist and are the same file (device and inode).
fn same_file(a: &Path, b: &Path) -> bool {
    match (fs::metadata(a), fs::metadata(b)) {
        (Ok(a), Ok(b)) => a.dev() == b.dev() && a.ino() == b.ino(),
        _ => false,
    }
}

/// Where a path leads: its directory resolved (links, `..`), then the name, then the name
/// resolved too if it exists.
fn resolved(path: &Path) -> PathBuf {
    let name = path.file_name().unwrap_or_default();
    let dir = fs::canonicalize(parent_dir(path)).unwrap_or_else(|_| parent_dir(path));
    let joined = dir.join(name);
    fs::canonicalize(&joined).unwrap_or(joined)
}

/// Whether two output paths lead to the same place (the same name through links or `..`,
/// or the same file on disk).
pub fn same_destination(a: &Path, b: &Path) -> bool {
    same_file(a, b) || resolved(a) == resolved(b)
}

/// Whether `path` leads to a place inside directory `dir` (or is it).
pub fn inside(path: &Path, dir: &Path) -> bool {
    resolved(path).starts_with(resolved(dir))
}

/// Refuse an output file inside the directory of an input set: it could replace a shard, the
/// index or a file copied beside them.
pub fn outside_set(output: &Path, set_dir: &Path) -> Result<()> {
    if inside(output, set_dir) {
        return Err(Error::write(
            output,
            format!(
                "is inside the directory of the input set {}; choose a path outside it",
                set_dir.display()
            ),
        ));
    }
    Ok(())
}

fn parent_dir(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// Create a hidden temporary sibling of `final_path` (same directory, so the final rename
/// stays on one file system) with `make`, which must fail if the name exists, and register it
/// for removal on interruption. Stale temporaries of dead processes for the same output are
/// removed first.
fn create_sibling<T>(
    final_path: &Path,
    is_dir: bool,
    make: impl Fn(&Path) -> io::Result<T>,
) -> Result<(PathBuf, T)> {
    let what = if is_dir { "directory" } else { "file" };
    temp::remove_stale(final_path, is_dir);
    let dir = parent_dir(final_path);
    let base = final_path.file_name().unwrap_or_default().as_bytes();
    let mut list = temporaries();
    if interrupted() {
        return Err(Error::Interrupted {
            path: final_path.to_path_buf(),
        });
    }
    for attempt in 0..100u32 {
        let temp_path = dir.join(temp::name(base, std::process::id(), attempt));
        match make(&temp_path) {
            Ok(made) => {
                list.push(Temporary {
                    path: temp_path.clone(),
                    output: final_path.to_path_buf(),
                    is_dir,
                });
                return Ok((temp_path, made));
            }
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(e) => {
                return Err(write_error(
                    final_path,
                    &format!("cannot create a temporary {what} beside it"),
                    e,
                ))
            }
        }
    }
    Err(Error::write(
        final_path,
        format!("cannot find a free temporary {what} name beside it"),
    ))
}

/// Remove a temporary (if it is still there) and forget it.
fn discard(path: &Path, is_dir: bool) {
    let mut list = temporaries();
    let _ = if is_dir {
        fs::remove_dir_all(path)
    } else {
        fs::remove_file(path)
    };
    deregister(&mut list, path);
}

/// The permission bits to give a replacement now, if `rules` allow replacing what is at
/// `final_path`: its own bits, narrowed to the input's.
fn kept_mode(final_path: &Path, rules: &OutputRules, is_dir: bool) -> Option<u32> {
    let m = fs::symlink_metadata(final_path).ok()?;
    let same_kind = if is_dir { m.is_dir() } else { m.is_file() };
    (rules.replace && same_kind).then_some(m.mode() & rules.mode_limit & 0o777)
}

/// A temporary file that becomes `final_path` on [`AtomicFile::commit`] and is removed if
/// dropped before that.
pub struct AtomicFile {
    final_path: PathBuf,
    temp_path: PathBuf,
    file: Option<File>,
    rules: OutputRules,
    /// Bytes written so far.
    position: u64,
    /// Where the bytes whose writeback has not been started begin.
    writeback_from: u64,
    /// Bytes written through the page cache since then.
    dirty: u64,
    /// Whether the kernel clones whole blocks into this file (known after the first try).
    clones: Option<bool>,
    /// The file system's block size: runs copied at the same offset modulo it can be shared.
    block: u64,
    /// The kernel copies between the input and this file (false after it refused once).
    kernel_copy: bool,
}

impl AtomicFile {
    /// Create a new temporary file in the directory of `final_path`, for an output that must
    /// not exist at the rename (permission bits: read and write, less the umask).
    pub fn create(final_path: &Path, sync: bool) -> Result<Self> {
        let rules = OutputRules {
            sync,
            replace: false,
            mode_limit: 0o666,
        };
        Self::create_with(final_path, &rules)
    }

    /// Create a temporary file for `final_path` under `rules`: its permission bits are the
    /// limit's read and write bits less the umask, or, when replacing a regular file, that
    /// file's bits within the limit.
    pub fn create_with(final_path: &Path, rules: &OutputRules) -> Result<Self> {
        let (temp_path, file) = create_sibling(final_path, false, |p| {
            OpenOptions::new()
                .write(true)
                .create_new(true)
                .mode(rules.mode_limit & 0o666)
                .open(p)
        })?;
        let mut made = AtomicFile {
            final_path: final_path.to_path_buf(),
            temp_path,
            block: share::block_size_of(&file),
            file: Some(file),
            rules: *rules,
            position: 0,
            writeback_from: 0,
            dirty: 0,
            clones: None,
            kernel_copy: true,
        };
        if let Some(mode) = kept_mode(final_path, rules, false) {
            made.file()
                .set_permissions(fs::Permissions::from_mode(mode))
                .map_err(|e| write_error(final_path, "cannot set the permissions", e))?;
        }
        Ok(made)
    }

    /// The open temporary file.
    pub fn file(&mut self) -> &mut File {
        self.file.as_mut().expect("file is open until commit")
    }

    /// The path the file will have after commit.
    pub fn final_path(&self) -> &Path {
        &self.final_path
    }

    /// Flush, sync (unless disabled), rename into place and sync the directory.
    pub fn commit(self) -> Result<()> {
        commit_all(vec![Pending::File(self)]).map(|_| ())
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if !self.temp_path.as_os_str().is_empty() {
            self.file.take();
            discard(&self.temp_path, false);
        }
    }
}

/// A write error in plain words; disk-full and file-size-limit errors are named as such.
pub fn write_error(path: &Path, what: &str, e: io::Error) -> Error {
    let reason = match e.raw_os_error() {
        Some(libc::ENOSPC) => "no space left on the device".to_string(),
        Some(libc::EFBIG) => {
            "file too large for the file system or the process's file-size limit".to_string()
        }
        Some(libc::EDQUOT) => "disk quota exceeded".to_string(),
        Some(libc::EACCES) | Some(libc::EPERM) | Some(libc::EROFS) => {
            format!("permission denied ({e})")
        }
        _ => e.to_string(),
    };
    Error::write(path, format!("{what}: {reason}; nothing was written"))
}

/// Progress reporting on stderr for long copies.
pub trait Progress {
    fn advance(&mut self, bytes: u64);
    fn finish(&mut self) {}
}

/// No progress output.
pub struct Silent;

impl Progress for Silent {
    fn advance(&mut self, _bytes: u64) {}
}

/// A one-line bar on stderr, redrawn in place.
pub struct Bar {
    total: u64,
    done: u64,
    shown: u64,
}

impl Bar {
    pub fn new(total: u64) -> Self {
        Bar {
            total,
            done: 0,
            shown: u64::MAX,
        }
    }
}

impl Progress for Bar {
    fn advance(&mut self, bytes: u64) {
        self.done += bytes;
        let percent = (self.done * 100).checked_div(self.total).unwrap_or(100);
        if percent != self.shown {
            self.shown = percent;
            let filled = (percent / 4) as usize;
            // After SIGHUP the terminal is gone; a failed redraw must not end the write.
            let _ = write!(
                io::stderr(),
                "\r  writing [{}{}] {percent:>3}%  {} / {} MiB",
                "#".repeat(filled),
                " ".repeat(25 - filled.min(25)),
                self.done >> 20,
                self.total >> 20
            );
        }
    }
    fn finish(&mut self) {
        let _ = writeln!(io::stderr());
    }
}

impl AtomicFile {
    /// Bytes written so far: the output offset the next write or copy lands at.
    pub fn position(&self) -> u64 {
        self.position
    }

    /// The block size of the output's file system (see [`share::block_size_of`]).
    pub fn block(&self) -> u64 {
        self.block
    }

    /// Copy `len` bytes starting at `offset` of `input` (read from `input_path`) to the end
    /// of the output, in the kernel. When the source and output offsets agree modulo the
    /// block size, the run is copied in pieces cut at block boundaries, so a file system that
    /// shares extents clones its whole blocks instead of copying them. An input that ends
    /// early is an input problem, reported against it.
    pub fn copy_from(
        &mut self,
        input: &File,
        input_path: &Path,
        offset: u64,
        len: u64,
        progress: &mut dyn Progress,
    ) -> Result<()> {
        let source_len = input
            .metadata()
            .map_err(|e| Error::read(input_path, e))?
            .len();
        let mut at = offset;
        for piece in share::pieces(offset, self.position, len, self.block, source_len) {
            let mut left = piece;
            while left > 0 {
                self.check_interrupt()?;
                // CHUNK is a multiple of every block size, so chunks keep the alignment.
                let step = left.min(CHUNK);
                let start = self.position;
                self.copy_step(input, input_path, at, step)?;
                let whole_blocks = start % self.block == 0
                    && at % self.block == 0
                    && (step >= self.block || at + step == source_len);
                let cloned = whole_blocks && self.kernel_copy && self.clones(start, step);
                self.written(step, !cloned);
                progress.advance(step);
                at += step;
                left -= step;
            }
        }
        Ok(())
    }

    /// Whether the kernel clones whole blocks into this file, read once from the extent map
    /// of the first range of whole blocks it copied (at `start`, `len` bytes).
    fn clones(&mut self, start: u64, len: u64) -> bool {
        if let Some(known) = self.clones {
            return known;
        }
        let out = self.file.as_ref().expect("file is open until commit");
        let shared = share::shared_bytes_in(out, start, start + len).unwrap_or(0) > 0;
        self.clones = Some(shared);
        shared
    }

    /// Copy one chunk: in the kernel while it will, else through user space.
    fn copy_step(&mut self, input: &File, input_path: &Path, at: u64, len: u64) -> Result<()> {
        let mut done = 0;
        if self.kernel_copy {
            let out = self.file.as_ref().expect("file is open until commit");
            match share::kernel_copy(input, at, out, len)
                .map_err(|e| write_error(&self.final_path, "cannot write", e))?
            {
                share::Copied::All => return Ok(()),
                share::Copied::SourceEnded(_) => return Err(self.shrank(input_path)),
                share::Copied::Unsupported(n) => {
                    self.kernel_copy = false;
                    done = n;
                }
            }
        }
        let mut reader = input;
        reader
            .seek(SeekFrom::Start(at + done))
            .map_err(|e| Error::read(input_path, e))?;
        let want = len - done;
        let copied = io::copy(&mut Read::take(reader, want), self.file())
            .map_err(|e| write_error(&self.final_path, "cannot write", e))?;
        if copied != want {
            return Err(self.shrank(input_path));
        }
        Ok(())
    }

    fn shrank(&self, input_path: &Path) -> Error {
        Error::read(
            input_path,
            io::Error::new(
                io::ErrorKind::UnexpectedEof,
                format!(
                    "the file shrank while it was being copied; {} was not written",
                    self.final_path.display()
                ),
            ),
        )
    }

    /// Write `bytes` to the end of the output.
    pub fn write(&mut self, bytes: &[u8], progress: &mut dyn Progress) -> Result<()> {
        for chunk in bytes.chunks(CHUNK as usize) {
            self.check_interrupt()?;
            let path = self.final_path.clone();
            self.file()
                .write_all(chunk)
                .map_err(|e| write_error(&path, "cannot write", e))?;
            self.written(chunk.len() as u64, true);
            progress.advance(chunk.len() as u64);
        }
        Ok(())
    }

    fn check_interrupt(&self) -> Result<()> {
        if interrupted() {
            return Err(Error::Interrupted {
                path: self.final_path.clone(),
            });
        }
        Ok(())
    }

    /// Account for bytes written (`dirty`: through the page cache, not cloned); for a durable
    /// write, start the writeback of the output so far whenever another `WRITEBACK_STEP` dirty
    /// bytes have accumulated (sync_file_range), so the final sync overlaps with the copy
    /// instead of following it. Cloned blocks have nothing to write back, and starting the
    /// writeback of a few small records at a time would only send the disk small writes.
    fn written(&mut self, len: u64, dirty: bool) {
        self.position += len;
        if dirty {
            self.dirty += len;
        }
        if !self.rules.sync || self.dirty < WRITEBACK_STEP {
            return;
        }
        if let Some(f) = &self.file {
            use std::os::fd::AsRawFd;
            // SAFETY: a plain system call on an open descriptor; failure only loses the
            // head start, the final fsync still makes the data durable.
            unsafe {
                libc::sync_file_range(
                    f.as_raw_fd(),
                    self.writeback_from as i64,
                    (self.position - self.writeback_from) as i64,
                    libc::SYNC_FILE_RANGE_WRITE,
                );
            }
        }
        self.writeback_from = self.position;
        self.dirty = 0;
    }
}

/// Refuse an output directory that is the input directory, inside it, or holds it, or that
/// exists without `force`; with `force`, refuse one that is not recognisably an earlier
/// output set (see [`recognise_previous_set`]); check that its parent exists.
pub fn check_destination_dir(input_dir: &Path, output: &Path, force: bool) -> Result<()> {
    let recognise = |out: &Path| recognise_previous_set(out, input_dir);
    check_destination_dir_with(input_dir, output, force, &recognise)
}

/// As [`check_destination_dir`] for a model directory's output: `--force` replaces only a
/// directory that looks like an earlier output of the same model directory.
pub fn check_destination_model_dir(md: &ModelDir, output: &Path, force: bool) -> Result<()> {
    let recognise = |out: &Path| recognise_previous_model_dir(out, md);
    check_destination_dir_with(&md.dir, output, force, &recognise)
}

fn check_destination_dir_with(
    input_dir: &Path,
    output: &Path,
    force: bool,
    recognise: &dyn Fn(&Path) -> Result<()>,
) -> Result<()> {
    let parent = parent_dir(output);
    if !parent.is_dir() {
        return Err(Error::write(
            output,
            format!("parent directory {} does not exist", parent.display()),
        ));
    }
    let input = fs::canonicalize(input_dir).map_err(|e| Error::read(input_dir, e))?;
    if output.file_name().is_none() {
        return Err(Error::write(output, "is not a directory name"));
    }
    let out = resolved(output);
    if out == input || out.starts_with(&input) || input.starts_with(&out) {
        return Err(Error::write(
            output,
            format!(
                "overlaps the input directory {}; choose a directory outside it",
                input_dir.display()
            ),
        ));
    }
    let Ok(here) = fs::symlink_metadata(output) else {
        return Ok(());
    };
    if !here.is_dir() {
        return Err(Error::write(
            output,
            format!(
                "exists and is {}; a set is written as a new directory",
                kind_name(&here)
            ),
        ));
    }
    if !force {
        return Err(Error::write(
            output,
            "already exists; pass --force to replace it",
        ));
    }
    recognise(output)
}

/// `--force` replaces a model directory's output only if it holds nothing but what posgrid
/// writes there for `md`: regular files and directories at the places of the files and
/// sub-directories it copies. Anything else is refused with the reason, and nothing is
/// removed.
pub fn recognise_previous_model_dir(output: &Path, md: &ModelDir) -> Result<()> {
    let (files, dirs) = md.written();
    let mut pending = vec![PathBuf::new()];
    while let Some(rel) = pending.pop() {
        let here = output.join(&rel);
        for entry in fs::read_dir(&here).map_err(|e| Error::read(&here, e))? {
            let entry = entry.map_err(|e| Error::read(&here, e))?;
            let at = rel.join(entry.file_name());
            let meta = fs::symlink_metadata(entry.path()).map_err(|e| Error::read(&here, e))?;
            let why = if meta.is_dir() && dirs.contains(&at) {
                pending.push(at);
                continue;
            } else if !meta.is_file() {
                format!("holds \"{}\", which is {}", at.display(), kind_name(&meta))
            } else if !files.contains(&at) {
                format!(
                    "holds \"{}\", which is not a file of the input directory",
                    at.display()
                )
            } else {
                continue;
            };
            return Err(Error::write(
                output,
                format!("{why}; --force replaces only a directory that posgrid wrote from this model directory, so it was left as it is"),
            ));
        }
    }
    Ok(())
}

/// `--force` replaces a directory only if it looks like an earlier output set of posgrid:
/// a real directory (not a link) holding exactly one `*.safetensors.index.json`, no
/// sub-directories or special files, and only files posgrid writes into a set: the index, the
/// shards it names, and files named like the regular files of the input set's directory
/// (posgrid copies those). Anything else is refused with the reason, and nothing is removed.
pub fn recognise_previous_set(output: &Path, input_dir: &Path) -> Result<()> {
    let refuse = |why: String| {
        Err(Error::write(
            output,
            format!("{why}; --force replaces only a directory that posgrid wrote as a set, so it was left as it is"),
        ))
    };
    let mut names = Vec::new();
    for entry in fs::read_dir(output).map_err(|e| Error::read(output, e))? {
        let entry = entry.map_err(|e| Error::read(output, e))?;
        let name = entry.file_name().to_string_lossy().into_owned();
        let meta = fs::symlink_metadata(entry.path()).map_err(|e| Error::read(output, e))?;
        if !meta.is_file() {
            return refuse(format!("holds \"{name}\", which is {}", kind_name(&meta)));
        }
        names.push(name);
    }
    let indexes: Vec<&String> = names
        .iter()
        .filter(|n| n.ends_with(".safetensors.index.json"))
        .collect();
    let [index] = indexes.as_slice() else {
        return refuse(format!(
            "holds {} *.safetensors.index.json files, not one",
            indexes.len()
        ));
    };
    let listed = match index_shards(&output.join(index)) {
        Some(l) => l,
        None => {
            return refuse(format!(
                "its index \"{index}\" is not a shard index that posgrid wrote (it has no \"posgrid\" record in its metadata)"
            ))
        }
    };
    let copied = input_files(input_dir);
    for name in &names {
        if name != *index && !listed.contains(name) && !copied.contains(name) {
            return refuse(format!(
                "holds \"{name}\", which is neither a shard of its index nor a file of the input set"
            ));
        }
    }
    Ok(())
}

/// The shard names an index lists, if it is a small JSON file with a `weight_map` of strings.
fn index_shards(path: &Path) -> Option<Vec<String>> {
    // Non-blocking: a FIFO swapped in after the listing must not hang the run.
    let file = OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NONBLOCK)
        .open(path)
        .ok()?;
    let meta = file.metadata().ok()?;
    if !meta.is_file() || meta.len() > INDEX_LIMIT {
        return None;
    }
    let mut text = Vec::new();
    file.take(INDEX_LIMIT).read_to_end(&mut text).ok()?;
    let index: serde_json::Value = serde_json::from_slice(&text).ok()?;
    // posgrid records its provenance in the index of every set it writes.
    index
        .get("metadata")?
        .get(crate::checkpoint::safetensors::PROVENANCE_KEY)?;
    let map = index.get("weight_map")?.as_object()?;
    map.values()
        .map(|v| v.as_str().map(str::to_string))
        .collect()
}

/// Names of the visible regular files of a directory.
fn input_files(dir: &Path) -> Vec<String> {
    let Ok(entries) = fs::read_dir(dir) else {
        return Vec::new();
    };
    entries
        .flatten()
        // Links count as what they point at, as when the input directory is read.
        .filter(|e| fs::metadata(e.path()).is_ok_and(|m| m.is_file()))
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect()
}

/// A temporary directory that becomes `final_path` on [`AtomicDir::commit`] and is removed
/// with everything in it if dropped before that.
pub struct AtomicDir {
    final_path: PathBuf,
    temp_path: PathBuf,
    rules: OutputRules,
}

impl AtomicDir {
    /// A temporary directory for `final_path` under `rules` (its permission bits: the limit
    /// less the umask, or, when replacing a directory, that directory's bits within the limit).
    pub fn create_with(final_path: &Path, rules: &OutputRules) -> Result<Self> {
        let (temp_path, ()) = create_sibling(final_path, true, |p| {
            fs::DirBuilder::new().mode(rules.mode_limit).create(p)
        })?;
        let made = AtomicDir {
            final_path: final_path.to_path_buf(),
            temp_path,
            rules: *rules,
        };
        if let Some(mode) = kept_mode(final_path, rules, true) {
            fs::set_permissions(&made.temp_path, fs::Permissions::from_mode(mode))
                .map_err(|e| write_error(final_path, "cannot set the permissions", e))?;
        }
        Ok(made)
    }

    /// Where to put the files until the commit.
    pub fn path(&self) -> &Path {
        &self.temp_path
    }

    /// Rename into place (replacing an existing directory only if the rules allow it).
    /// Returns warnings: an old directory that could not be removed entirely is named.
    pub fn commit(self) -> Result<Vec<String>> {
        commit_all(vec![Pending::Dir(self)])
    }
}

impl Drop for AtomicDir {
    fn drop(&mut self) {
        if !self.temp_path.as_os_str().is_empty() {
            discard(&self.temp_path, true);
        }
    }
}

/// A finished temporary waiting for its rename.
pub enum Pending {
    File(AtomicFile),
    Dir(AtomicDir),
}

impl Pending {
    fn parts(&self) -> (&Path, &Path, bool, &OutputRules) {
        match self {
            Pending::File(f) => (&f.temp_path, &f.final_path, false, &f.rules),
            Pending::Dir(d) => (&d.temp_path, &d.final_path, true, &d.rules),
        }
    }

    /// Close and sync the data (outside the lock: a sync may take long).
    fn prepare(&mut self) -> Result<()> {
        match self {
            Pending::File(f) => {
                let file = f.file.take().expect("file is open until commit");
                if f.rules.sync {
                    file.sync_all().map_err(|e| {
                        write_error(&f.final_path, "cannot sync the data to disk", e)
                    })?;
                }
            }
            Pending::Dir(d) => {
                if d.rules.sync {
                    let _ = File::open(&d.temp_path).and_then(|dir| dir.sync_all());
                }
            }
        }
        Ok(())
    }

    /// After the rename: nothing to remove on drop.
    fn settle(&mut self) -> PathBuf {
        match self {
            Pending::File(f) => std::mem::take(&mut f.temp_path),
            Pending::Dir(d) => std::mem::take(&mut d.temp_path),
        }
    }
}

/// How an output went into place, so that it can be undone if a later one fails.
enum Installed {
    /// Nothing was there.
    New,
    /// The old one now sits at the temporary's path.
    Swapped,
    /// The old directory was moved aside to this (registered) path.
    Aside(PathBuf),
}

/// Put every pending output in place, all or nothing: each is renamed (or swapped with what
/// it replaces); if one fails, those already in place are put back. Old versions are removed
/// at the end; one that cannot be removed entirely is reported as a warning naming it.
pub fn commit_all(mut items: Vec<Pending>) -> Result<Vec<String>> {
    for item in &mut items {
        item.prepare()?;
    }
    let mut list = temporaries();
    if interrupted() {
        return Err(Error::Interrupted {
            path: items[0].parts().1.to_path_buf(),
        });
    }
    let mut done = Vec::new();
    for item in &items {
        match install(item, &mut list) {
            Ok(how) => done.push(how),
            Err(e) => {
                for (item, how) in items.iter().zip(&done).rev() {
                    undo(item, how, &mut list);
                }
                return Err(e);
            }
        }
    }
    // From here the outputs are in place: an interruption must not say otherwise.
    signals::mark_committed();
    let mut leftovers = Vec::new();
    for (item, how) in items.iter_mut().zip(done) {
        let (_, final_path, is_dir, _) = item.parts();
        let (final_path, is_dir) = (final_path.to_path_buf(), is_dir);
        let temp = item.settle();
        match how {
            Installed::Swapped => leftovers.push(Leftover {
                old: temp,
                final_path,
                is_dir,
            }),
            Installed::Aside(old) => leftovers.push(Leftover {
                old,
                final_path,
                is_dir,
            }),
            Installed::New => deregister(&mut list, &temp),
        }
    }
    drop(list);
    let warnings = remove_old(leftovers);
    for item in &items {
        let (_, final_path, _, rules) = item.parts();
        if rules.sync {
            let _ = File::open(parent_dir(final_path)).and_then(|d| d.sync_all());
        }
    }
    Ok(warnings)
}

/// Rename one output into place under its rules.
fn install(item: &Pending, list: &mut Vec<Temporary>) -> Result<Installed> {
    let (temp, final_path, is_dir, rules) = item.parts();
    let existing = match fs::symlink_metadata(final_path) {
        Ok(m) => Some(m),
        Err(e) if e.kind() == io::ErrorKind::NotFound => None,
        Err(e) => return Err(write_error(final_path, "cannot check the output path", e)),
    };
    let Some(existing) = existing.filter(|_| rules.replace) else {
        return rename::rename_noreplace(temp, final_path, is_dir)
            .map(|()| Installed::New)
            .map_err(|e| appeared_or(final_path, e));
    };
    let refused = if is_dir {
        (!existing.is_dir()).then(|| kind_name(&existing).to_string())
    } else {
        unreplaceable_file(&existing, fs::metadata(final_path).ok().as_ref())
    };
    if let Some(what) = refused {
        return Err(Error::write(
            final_path,
            format!("is now {what}, which posgrid does not replace; it was left as it is and nothing was written"),
        ));
    }
    let failed = |e| {
        write_error(
            final_path,
            "cannot rename the finished output into place",
            e,
        )
    };
    if rename::exchange(temp, final_path).map_err(failed)? {
        return Ok(Installed::Swapped);
    }
    // No exchange on this file system: the old output is moved aside (registered, so an
    // interruption removes nothing that is not ours) and can be put back if a later step fails.
    let base = final_path.file_name().unwrap_or_default().as_bytes();
    let aside = parent_dir(final_path).join(temp::name(base, std::process::id(), 100));
    fs::rename(final_path, &aside).map_err(failed)?;
    list.push(Temporary {
        path: aside.clone(),
        output: final_path.to_path_buf(),
        is_dir,
    });
    if let Err(e) = fs::rename(temp, final_path) {
        let _ = fs::rename(&aside, final_path);
        deregister(list, &aside);
        return Err(failed(e));
    }
    Ok(Installed::Aside(aside))
}

/// A failed no-replace rename: "exists" means something appeared during the run.
fn appeared_or(final_path: &Path, e: io::Error) -> Error {
    let exists = e.kind() == io::ErrorKind::AlreadyExists
        || matches!(
            e.raw_os_error(),
            Some(libc::ENOTEMPTY) | Some(libc::ENOTDIR)
        );
    if exists {
        Error::write(
            final_path,
            "appeared while posgrid was writing; it was left as it is and the output was not written (pass --force to replace it)",
        )
    } else {
        write_error(
            final_path,
            "cannot rename the finished output into place",
            e,
        )
    }
}

/// Put back what [`install`] did, best effort (a later failure must not lose the old output).
fn undo(item: &Pending, how: &Installed, list: &mut Vec<Temporary>) {
    let (temp, final_path, _, _) = item.parts();
    let _ = match how {
        Installed::New => fs::rename(final_path, temp),
        Installed::Swapped => rename::exchange(temp, final_path).map(|_| ()),
        Installed::Aside(old) => {
            let back = fs::rename(final_path, temp).and_then(|()| fs::rename(old, final_path));
            deregister(list, old);
            back
        }
    };
}

/// An old version displaced by a commit, to be removed.
struct Leftover {
    old: PathBuf,
    final_path: PathBuf,
    is_dir: bool,
}

/// Remove replaced old versions; one that cannot be removed entirely is named in a warning
/// (it stays under its temporary name, and a later run removes it once this process is gone).
fn remove_old(leftovers: Vec<Leftover>) -> Vec<String> {
    let mut warnings = Vec::new();
    for Leftover {
        old,
        final_path,
        is_dir,
    } in leftovers
    {
        let removed = if is_dir {
            fs::remove_dir_all(&old)
        } else {
            fs::remove_file(&old)
        };
        if let Err(e) = removed {
            warnings.push(format!(
                "{} was replaced, but its previous contents, moved to {}, could not be removed entirely ({e}); remove them yourself",
                final_path.display(),
                old.display()
            ));
        }
        deregister(&mut temporaries(), &old);
    }
    warnings
}
