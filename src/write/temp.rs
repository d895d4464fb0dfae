//! Names of temporaries: `.{base}.posgrid-{pid}-{n}.tmp` beside the output, where `base` is
//! the output's name (a long name is shortened to a prefix and a hash, so that any valid
//! output name leaves room within NAME_MAX) and `pid` the process that owns it. A later run to
//! the same output removes the temporaries of owners that no longer exist (left by SIGKILL or
//! a power loss).

use std::ffi::OsString;
use std::fs;
use std::os::unix::ffi::{OsStrExt, OsStringExt};
use std::path::Path;

/// Longest output name used as it is; longer ones are shortened (255 - room for the rest).
const LONGEST_BASE: usize = 200;
/// Bytes of a long name kept before its hash.
const KEPT_PREFIX: usize = 180;

/// 64-bit FNV-1a: a fixed, documented hash, so names are the same in every build.
fn fnv1a(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325, |h, &b| {
        (h ^ b as u64).wrapping_mul(0x0000_0100_0000_01b3)
    })
}

/// `.{base}.posgrid-`, the part of a temporary's name that names its output.
fn prefix(output_name: &[u8]) -> Vec<u8> {
    let mut p = b".".to_vec();
    if output_name.len() > LONGEST_BASE {
        p.extend_from_slice(&output_name[..KEPT_PREFIX]);
        p.extend_from_slice(format!("~{:016x}", fnv1a(output_name)).as_bytes());
    } else {
        p.extend_from_slice(output_name);
    }
    p.extend_from_slice(b".posgrid-");
    p
}

/// The name of temporary number `n` of process `pid` for an output named `output_name`.
pub(crate) fn name(output_name: &[u8], pid: u32, n: u32) -> OsString {
    let mut v = prefix(output_name);
    v.extend_from_slice(format!("{pid}-{n}.tmp").as_bytes());
    OsString::from_vec(v)
}

/// The owner's process id, if `name` is exactly a temporary's name for `output_name`.
pub(crate) fn owner(name: &[u8], output_name: &[u8]) -> Option<u32> {
    let rest = name.strip_prefix(prefix(output_name).as_slice())?;
    let rest = std::str::from_utf8(rest.strip_suffix(b".tmp")?).ok()?;
    let (pid, n) = rest.split_once('-')?;
    let digits = |s: &str| !s.is_empty() && s.bytes().all(|b| b.is_ascii_digit());
    if !digits(pid) || !digits(n) {
        return None;
    }
    pid.parse().ok()
}

/// Whether process `pid` is known not to exist any more.
fn gone(pid: u32) -> bool {
    let Ok(pid) = libc::pid_t::try_from(pid) else {
        return false;
    };
    if pid <= 0 {
        return false;
    }
    // SAFETY: signal 0 only checks whether the process exists.
    let r = unsafe { libc::kill(pid, 0) };
    r != 0 && std::io::Error::last_os_error().raw_os_error() == Some(libc::ESRCH)
}

/// Remove temporaries for `output` (beside it) whose owner process no longer exists.
/// Best effort: what cannot be removed stays for the next run.
pub(crate) fn remove_stale(output: &Path, output_is_dir: bool) {
    let Some(output_name) = output.file_name() else {
        return;
    };
    let Ok(entries) = fs::read_dir(super::parent_dir(output)) else {
        return;
    };
    let own = std::process::id();
    for entry in entries.flatten() {
        let owner = owner(entry.file_name().as_bytes(), output_name.as_bytes());
        let path = entry.path();
        // A name with this process's id that this process did not make was left by an earlier
        // process that had the same id (a container's first process always has).
        let stale = owner.is_some_and(|pid| {
            if pid == own {
                !super::signals::temporaries().iter().any(|t| t.path == path)
            } else {
                gone(pid)
            }
        });
        if !stale {
            continue;
        }
        // file_type does not follow links: a link is removed, never what it points to. A
        // directory is only ever a set's temporary: never removed beside a file output.
        let _ = match entry.file_type() {
            Ok(t) if t.is_dir() && output_is_dir => fs::remove_dir_all(&path),
            Ok(t) if t.is_dir() => Ok(()),
            _ => fs::remove_file(&path),
        };
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_fit_and_round_trip() {
        let long = vec![b'a'; 255];
        let n = name(&long, 4_294_967_295, 99);
        assert!(n.len() <= 255, "{}", n.len());
        assert_eq!(owner(n.as_bytes(), &long), Some(4_294_967_295));
        let other = [vec![b'a'; 254], b"b".to_vec()].concat();
        assert_eq!(
            owner(n.as_bytes(), &other),
            None,
            "another output's temporary"
        );
        let short = name(b"out.safetensors", 12, 0);
        assert_eq!(short, ".out.safetensors.posgrid-12-0.tmp");
        assert_eq!(owner(short.as_bytes(), b"out.safetensors"), Some(12));
        for bad in [
            ".out.safetensors.posgrid-12-0.tmp.x",
            ".out.safetensors.posgrid--0.tmp",
            ".out.safetensors.posgrid-1a-0.tmp",
            ".out.safetensors.posgrid-12.tmp",
        ] {
            assert_eq!(owner(bad.as_bytes(), b"out.safetensors"), None, "{bad}");
        }
    }

    #[test]
    fn leftovers_of_an_earlier_process_with_our_id_are_stale_but_directories_stay_beside_files() {
        // In a container every run may get the same process id: a temporary with our id that
        // this process did not make was left by an earlier run.
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("out.safetensors");
        let own = std::process::id();
        let left = dir.path().join(name(b"out.safetensors", own, 7));
        fs::write(&left, b"partial").unwrap();
        // A directory named like a file output's temporary is not ours to delete.
        let odd = dir.path().join(name(b"out.safetensors", own, 8));
        fs::create_dir(&odd).unwrap();
        fs::write(odd.join("user-file"), b"keep").unwrap();
        remove_stale(&out, false);
        assert!(!left.exists());
        assert!(odd.join("user-file").exists());
    }
}
