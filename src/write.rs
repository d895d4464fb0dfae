//! Writing: a temporary file beside the output, filled by streaming, synced, then renamed into
//! place. Until the rename the final path is untouched; on any failure or interruption the
//! temporary file is removed.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, OnceLock};

use crate::error::{Error, Result};

/// Copy chunk between progress updates and interruption checks.
const CHUNK: u64 = 64 << 20;

static INTERRUPTED: OnceLock<Arc<AtomicBool>> = OnceLock::new();

/// Route SIGINT and SIGTERM to a flag that writes check between chunks, so an interrupted
/// write can remove its temporary file. Called once by the binary; harmless to call again.
pub fn install_interrupt_handler() {
    INTERRUPTED.get_or_init(|| {
        let flag = Arc::new(AtomicBool::new(false));
        for signal in [signal_hook::consts::SIGINT, signal_hook::consts::SIGTERM] {
            // Registration fails only for forbidden signals; these two are allowed.
            let _ = signal_hook::flag::register(signal, Arc::clone(&flag));
        }
        flag
    });
}

/// Whether SIGINT or SIGTERM has arrived.
pub fn interrupted() -> bool {
    INTERRUPTED.get().is_some_and(|f| f.load(Ordering::Relaxed))
}

/// Refuse an output that is the input (through links or `..` paths) or that exists without
/// `force`; check that its directory exists.
pub fn check_destination(input: &Path, output: &Path, force: bool) -> Result<()> {
    let dir = parent_dir(output);
    match fs::metadata(&dir) {
        Ok(m) if m.is_dir() => {}
        Ok(_) => {
            return Err(Error::write(
                output,
                format!("{} is not a directory", dir.display()),
            ))
        }
        Err(_) => {
            return Err(Error::write(
                output,
                format!("output directory {} does not exist", dir.display()),
            ))
        }
    }
    if let (Ok(a), Ok(b)) = (fs::metadata(input), fs::metadata(output)) {
        if a.dev() == b.dev() && a.ino() == b.ino() {
            return Err(Error::write(
                output,
                format!(
                    "is the input file {} (the same file on disk); choose another output path",
                    input.display()
                ),
            ));
        }
    }
    if fs::symlink_metadata(output).is_ok() {
        if fs::metadata(output).is_ok_and(|m| m.is_dir()) {
            return Err(Error::write(
                output,
                "is a directory; give a file path for the output",
            ));
        }
        if !force {
            return Err(Error::write(
                output,
                "already exists; pass --force to replace it",
            ));
        }
    }
    Ok(())
}

fn parent_dir(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// Create a hidden temporary sibling of `final_path` (same directory, so the final rename stays
/// on one file system) with `make`, which must fail if the name exists.
fn create_sibling<T>(
    final_path: &Path,
    what: &str,
    make: impl Fn(&Path) -> io::Result<T>,
) -> Result<(PathBuf, T)> {
    let dir = parent_dir(final_path);
    let base = final_path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    for attempt in 0..100u32 {
        let temp_path = dir.join(format!(
            ".{base}.posgrid-{}-{attempt}.tmp",
            std::process::id()
        ));
        match make(&temp_path) {
            Ok(made) => return Ok((temp_path, made)),
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

/// A temporary file that becomes `final_path` on [`AtomicFile::commit`] and is removed if
/// dropped before that.
pub struct AtomicFile {
    final_path: PathBuf,
    temp_path: PathBuf,
    file: Option<File>,
    sync: bool,
    /// Bytes written so far.
    position: u64,
}

impl AtomicFile {
    /// Create a new temporary file in the directory of `final_path`.
    pub fn create(final_path: &Path, sync: bool) -> Result<Self> {
        let (temp_path, file) = create_sibling(final_path, "file", |p| {
            OpenOptions::new().write(true).create_new(true).open(p)
        })?;
        Ok(AtomicFile {
            final_path: final_path.to_path_buf(),
            temp_path,
            file: Some(file),
            sync,
            position: 0,
        })
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
    pub fn commit(mut self) -> Result<()> {
        let file = self.file.take().expect("file is open until commit");
        if interrupted() {
            return Err(Error::Interrupted {
                path: self.final_path.clone(),
            });
        }
        if self.sync {
            file.sync_all()
                .map_err(|e| write_error(&self.final_path, "cannot sync the data to disk", e))?;
        }
        drop(file);
        fs::rename(&self.temp_path, &self.final_path).map_err(|e| {
            write_error(
                &self.final_path,
                "cannot rename the finished file into place",
                e,
            )
        })?;
        if self.sync {
            if let Ok(dir) = File::open(parent_dir(&self.final_path)) {
                let _ = dir.sync_all();
            }
        }
        self.temp_path = PathBuf::new();
        Ok(())
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if !self.temp_path.as_os_str().is_empty() {
            self.file.take();
            let _ = fs::remove_file(&self.temp_path);
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
            eprint!(
                "\r  writing [{}{}] {percent:>3}%  {} / {} MiB",
                "#".repeat(filled),
                " ".repeat(25 - filled.min(25)),
                self.done >> 20,
                self.total >> 20
            );
        }
    }
    fn finish(&mut self) {
        eprintln!();
    }
}

impl AtomicFile {
    /// Copy `len` bytes starting at `offset` of `input` to the end of the output. File to
    /// file, std uses copy_file_range on Linux, so the bytes stay in the kernel.
    pub fn copy_from(
        &mut self,
        input: &File,
        offset: u64,
        len: u64,
        progress: &mut dyn Progress,
    ) -> Result<()> {
        let mut reader = input;
        reader
            .seek(SeekFrom::Start(offset))
            .map_err(|e| write_error(&self.final_path, "cannot read the input", e))?;
        let mut left = len;
        while left > 0 {
            self.check_interrupt()?;
            let step = left.min(CHUNK);
            let copied = io::copy(&mut Read::take(reader, step), self.file())
                .map_err(|e| write_error(&self.final_path, "cannot write", e))?;
            if copied != step {
                return Err(Error::write(
                    &self.final_path,
                    "the input file shrank while it was being copied; nothing was written",
                ));
            }
            self.written(step);
            left -= step;
            progress.advance(step);
        }
        Ok(())
    }

    /// Write `bytes` to the end of the output.
    pub fn write(&mut self, bytes: &[u8], progress: &mut dyn Progress) -> Result<()> {
        for chunk in bytes.chunks(CHUNK as usize) {
            self.check_interrupt()?;
            let path = self.final_path.clone();
            self.file()
                .write_all(chunk)
                .map_err(|e| write_error(&path, "cannot write", e))?;
            self.written(chunk.len() as u64);
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

    /// Account for bytes written; for a durable write, start their writeback to disk now
    /// (sync_file_range), so the final sync overlaps with the copy instead of following it.
    fn written(&mut self, len: u64) {
        let start = self.position;
        self.position += len;
        if self.sync {
            if let Some(f) = &self.file {
                use std::os::fd::AsRawFd;
                // SAFETY: a plain system call on an open descriptor; failure only loses the
                // head start, the final fsync still makes the data durable.
                unsafe {
                    libc::sync_file_range(
                        f.as_raw_fd(),
                        start as i64,
                        len as i64,
                        libc::SYNC_FILE_RANGE_WRITE,
                    );
                }
            }
        }
    }
}

/// Refuse an output directory that is the input directory, inside it, or holds it, or that
/// exists without `force`; check that its parent exists.
pub fn check_destination_dir(input_dir: &Path, output: &Path, force: bool) -> Result<()> {
    let parent = parent_dir(output);
    if !parent.is_dir() {
        return Err(Error::write(
            output,
            format!("parent directory {} does not exist", parent.display()),
        ));
    }
    let input = fs::canonicalize(input_dir).map_err(|e| Error::read(input_dir, e))?;
    let name = output
        .file_name()
        .ok_or_else(|| Error::write(output, "is not a directory name"))?;
    let out = fs::canonicalize(&parent)
        .map_err(|e| Error::read(&parent, e))?
        .join(name);
    let out = fs::canonicalize(&out).unwrap_or(out);
    if out == input || out.starts_with(&input) || input.starts_with(&out) {
        return Err(Error::write(
            output,
            format!(
                "overlaps the input set {}; choose a directory outside it",
                input_dir.display()
            ),
        ));
    }
    if fs::symlink_metadata(output).is_ok() {
        if !fs::metadata(output).is_ok_and(|m| m.is_dir()) {
            return Err(Error::write(output, "exists and is not a directory"));
        }
        if !force {
            return Err(Error::write(
                output,
                "already exists; pass --force to replace it",
            ));
        }
    }
    Ok(())
}

/// A temporary directory that becomes `final_path` on [`AtomicDir::commit`] and is removed
/// with everything in it if dropped before that.
pub struct AtomicDir {
    final_path: PathBuf,
    temp_path: PathBuf,
    sync: bool,
}

impl AtomicDir {
    pub fn create(final_path: &Path, sync: bool) -> Result<Self> {
        let (temp_path, ()) = create_sibling(final_path, "directory", |p| fs::create_dir(p))?;
        Ok(AtomicDir {
            final_path: final_path.to_path_buf(),
            temp_path,
            sync,
        })
    }

    /// Where to put the files until the commit.
    pub fn path(&self) -> &Path {
        &self.temp_path
    }

    /// Rename into place; with `replace`, an existing directory is moved aside first and
    /// removed after the new one is in place.
    pub fn commit(mut self, replace: bool) -> Result<()> {
        if interrupted() {
            return Err(Error::Interrupted {
                path: self.final_path.clone(),
            });
        }
        if self.sync {
            if let Ok(d) = File::open(&self.temp_path) {
                let _ = d.sync_all();
            }
        }
        let mut aside = None;
        if replace && self.final_path.exists() {
            let old = self.temp_path.with_extension("old");
            fs::rename(&self.final_path, &old).map_err(|e| {
                write_error(
                    &self.final_path,
                    "cannot move the existing directory aside",
                    e,
                )
            })?;
            aside = Some(old);
        }
        if let Err(e) = fs::rename(&self.temp_path, &self.final_path) {
            if let Some(old) = &aside {
                let _ = fs::rename(old, &self.final_path);
            }
            return Err(write_error(
                &self.final_path,
                "cannot rename the finished directory into place",
                e,
            ));
        }
        self.temp_path = PathBuf::new();
        if let Some(old) = aside {
            let _ = fs::remove_dir_all(old);
        }
        if self.sync {
            if let Ok(d) = File::open(parent_dir(&self.final_path)) {
                let _ = d.sync_all();
            }
        }
        Ok(())
    }
}

impl Drop for AtomicDir {
    fn drop(&mut self) {
        if !self.temp_path.as_os_str().is_empty() {
            let _ = fs::remove_dir_all(&self.temp_path);
        }
    }
}
