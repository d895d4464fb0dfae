//! Renames that decide atomically whether the destination may be replaced: `renameat2` with
//! RENAME_NOREPLACE (never replace) or RENAME_EXCHANGE (swap, so the old one can be put back
//! or removed afterwards), with safe fallbacks where a file system lacks them.

use std::ffi::CString;
use std::fs;
use std::io;
use std::os::unix::ffi::OsStrExt;
use std::path::Path;

fn c_path(path: &Path) -> io::Result<CString> {
    CString::new(path.as_os_str().as_bytes())
        .map_err(|_| io::Error::new(io::ErrorKind::InvalidInput, "path holds a NUL byte"))
}

fn renameat2(from: &Path, to: &Path, flags: libc::c_uint) -> io::Result<()> {
    let (from, to) = (c_path(from)?, c_path(to)?);
    // SAFETY: two valid NUL-terminated paths relative to the working directory; the call
    // only reads them.
    let r = unsafe {
        libc::syscall(
            libc::SYS_renameat2,
            libc::AT_FDCWD,
            from.as_ptr(),
            libc::AT_FDCWD,
            to.as_ptr(),
            flags,
        )
    };
    if r == 0 {
        Ok(())
    } else {
        Err(io::Error::last_os_error())
    }
}

/// The file system (or kernel) does not offer the requested rename flag.
fn unsupported(e: &io::Error) -> bool {
    matches!(
        e.raw_os_error(),
        Some(libc::EINVAL) | Some(libc::ENOSYS) | Some(libc::EOPNOTSUPP)
    )
}

/// Rename `from` to `to`, failing with `AlreadyExists` if anything is at `to`.
pub(crate) fn rename_noreplace(from: &Path, to: &Path, is_dir: bool) -> io::Result<()> {
    match renameat2(from, to, libc::RENAME_NOREPLACE) {
        Err(e) if unsupported(&e) && is_dir => dir_fallback(from, to),
        Err(e) if unsupported(&e) => file_fallback(from, to),
        other => other,
    }
}

/// A hard link fails if the name exists, which is the no-replace rule; then the temporary
/// name goes. Where hard links are not possible either, the last resort checks just before
/// a plain rename (a window of microseconds instead of the whole run).
pub(crate) fn file_fallback(from: &Path, to: &Path) -> io::Result<()> {
    match fs::hard_link(from, to) {
        Ok(()) => {
            let _ = fs::remove_file(from);
            Ok(())
        }
        Err(e) if e.kind() == io::ErrorKind::AlreadyExists => Err(e),
        Err(_) => last_resort(from, to),
    }
}

/// Claim the name with an empty directory (mkdir fails if it exists), then rename over it:
/// a rename replaces only an empty directory, so anything put there meanwhile survives.
pub(crate) fn dir_fallback(from: &Path, to: &Path) -> io::Result<()> {
    fs::create_dir(to)?;
    fs::rename(from, to).inspect_err(|_| {
        let _ = fs::remove_dir(to);
    })
}

fn last_resort(from: &Path, to: &Path) -> io::Result<()> {
    if fs::symlink_metadata(to).is_ok() {
        return Err(io::Error::from(io::ErrorKind::AlreadyExists));
    }
    fs::rename(from, to)
}

/// Swap `a` and `b` atomically. `Ok(false)` when the file system cannot.
pub(crate) fn exchange(a: &Path, b: &Path) -> io::Result<bool> {
    match renameat2(a, b, libc::RENAME_EXCHANGE) {
        Ok(()) => Ok(true),
        Err(e) if unsupported(&e) => Ok(false),
        Err(e) => Err(e),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fallbacks_never_replace() {
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("a"), dir.path().join("b"));
        fs::write(&a, "new").unwrap();
        fs::write(&b, "kept").unwrap();
        assert!(file_fallback(&a, &b).is_err());
        assert!(last_resort(&a, &b).is_err());
        assert_eq!(fs::read_to_string(&b).unwrap(), "kept");
        fs::remove_file(&b).unwrap();
        file_fallback(&a, &b).unwrap();
        assert_eq!(fs::read_to_string(&b).unwrap(), "new");
        assert!(!a.exists());

        let (d, e) = (dir.path().join("d"), dir.path().join("e"));
        fs::create_dir(&d).unwrap();
        fs::create_dir(&e).unwrap();
        fs::write(e.join("mine"), "kept").unwrap();
        assert!(dir_fallback(&d, &e).is_err());
        assert!(e.join("mine").exists() && d.exists());
        fs::remove_dir_all(&e).unwrap();
        dir_fallback(&d, &e).unwrap();
        assert!(e.is_dir() && !d.exists());
    }

    #[test]
    fn exchange_swaps() {
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("a"), dir.path().join("b"));
        fs::write(&a, "1").unwrap();
        fs::write(&b, "2").unwrap();
        if exchange(&a, &b).unwrap() {
            assert_eq!(fs::read_to_string(&b).unwrap(), "1");
            assert_eq!(fs::read_to_string(&a).unwrap(), "2");
        }
    }
}
