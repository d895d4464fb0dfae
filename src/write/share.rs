//! Letting the kernel share blocks between the input and the output. On file systems that
//! share extents between files (XFS with reflink, btrfs, ...), the in-kernel copy clones a
//! range instead of copying it when both ends start on a block boundary: the copy is then a
//! metadata operation and costs no new disk. A writer that keeps an untouched run of bytes at
//! its source offset modulo the block size and hands it to [`kernel_copy`] split at block
//! boundaries gets that for free; elsewhere the same call is an ordinary in-kernel copy.
//!
//! What was shared is measured afterwards from the file's extent map ([`shared_bytes`]), not
//! assumed.

use std::fs::File;
use std::io;
use std::os::fd::AsRawFd;
use std::os::unix::fs::FileExt;
use std::path::Path;

/// The block size assumed where the file system reports none that fits.
pub const DEFAULT_BLOCK: u64 = 4096;
/// The largest block size aligned to: larger reported sizes (network file systems report
/// their transfer size) would pad headers by more than they could save.
const LARGEST_BLOCK: u64 = 65536;

/// The block size outputs on the file system of `file` are aligned to: its reported block
/// size when that is a power of two from 4 KiB to 64 KiB, else 4 KiB.
pub fn block_size_of(file: &File) -> u64 {
    // SAFETY: fstatvfs fills the struct it is given; the descriptor is open.
    let mut s: libc::statvfs = unsafe { std::mem::zeroed() };
    let ok = unsafe { libc::fstatvfs(file.as_raw_fd(), &mut s) } == 0;
    fitting_block(ok.then_some(s.f_bsize as u64))
}

/// The block size for outputs written into the directory that holds `path` (see
/// [`block_size_of`]).
pub fn block_size_at(path: &Path) -> u64 {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    File::open(dir).map_or(DEFAULT_BLOCK, |d| block_size_of(&d))
}

fn fitting_block(reported: Option<u64>) -> u64 {
    match reported {
        Some(b) if b.is_power_of_two() && (DEFAULT_BLOCK..=LARGEST_BLOCK).contains(&b) => b,
        _ => DEFAULT_BLOCK,
    }
}

/// Bytes of the run `[at, at + len)` that lie in whole blocks: what a clone of the run could
/// share when it keeps its offset modulo `block`.
pub fn whole_block_bytes(at: u64, len: u64, block: u64) -> u64 {
    let first = at.div_ceil(block) * block;
    let last = (at + len) / block * block;
    last.saturating_sub(first)
}

/// The pieces a run of `len` bytes from source offset `from` to output offset `to` is copied
/// in, as lengths: when both offsets agree modulo `block`, a head up to the first block
/// boundary, the whole blocks (through the end of the source, when the run reaches it: the
/// kernel clones a last partial block too), and the tail; otherwise the run in one piece.
pub fn pieces(from: u64, to: u64, len: u64, block: u64, source_len: u64) -> Vec<u64> {
    if from % block != to % block {
        return vec![len];
    }
    let head = ((block - from % block) % block).min(len);
    let rest = len - head;
    let (body, tail) = if from + len >= source_len {
        (rest, 0)
    } else {
        (rest / block * block, rest % block)
    };
    [head, body, tail].into_iter().filter(|&n| n > 0).collect()
}

/// How a kernel copy ended.
#[derive(Debug, PartialEq, Eq)]
pub enum Copied {
    /// Every byte asked for.
    All,
    /// The source ended after this many bytes.
    SourceEnded(u64),
    /// The kernel cannot copy between these files (after this many bytes): copy in user space.
    Unsupported(u64),
}

/// Copy `len` bytes from `input` at `offset` to `output` at its file position (which moves),
/// in the kernel (`copy_file_range`, which clones whole blocks where the file system can).
pub fn kernel_copy(input: &File, offset: u64, output: &File, len: u64) -> io::Result<Copied> {
    let mut off_in = offset as libc::loff_t;
    let mut done = 0u64;
    while done < len {
        let step = (len - done).min(1 << 30) as usize;
        // SAFETY: both descriptors are open; off_in is a valid pointer; a null output offset
        // means the output's file position, which the kernel advances.
        let n = unsafe {
            libc::copy_file_range(
                input.as_raw_fd(),
                &mut off_in,
                output.as_raw_fd(),
                std::ptr::null_mut(),
                step,
                0,
            )
        };
        if n < 0 {
            let e = io::Error::last_os_error();
            match e.raw_os_error() {
                Some(libc::EINTR) => continue,
                Some(
                    libc::ENOSYS
                    | libc::EXDEV
                    | libc::EOPNOTSUPP
                    | libc::EINVAL
                    | libc::EPERM
                    | libc::EBADF
                    | libc::ETXTBSY,
                ) => return Ok(Copied::Unsupported(done)),
                _ => return Err(e),
            }
        }
        if n == 0 {
            // Some file systems answer 0 without being at the end: look before concluding.
            let mut probe = [0u8; 1];
            return Ok(match input.read_at(&mut probe, off_in as u64) {
                Ok(0) => Copied::SourceEnded(done),
                _ => Copied::Unsupported(done),
            });
        }
        done += n as u64;
    }
    Ok(Copied::All)
}

/// `struct fiemap` of the kernel's extent-map interface, with room for a batch of extents.
#[repr(C)]
struct FiemapRequest {
    start: u64,
    length: u64,
    flags: u32,
    mapped_extents: u32,
    extent_count: u32,
    reserved: u32,
    extents: [FiemapExtent; EXTENTS_PER_CALL],
}

/// `struct fiemap_extent`.
#[repr(C)]
#[derive(Clone, Copy)]
struct FiemapExtent {
    logical: u64,
    physical: u64,
    length: u64,
    reserved64: [u64; 2],
    flags: u32,
    reserved: [u32; 3],
}

const EXTENTS_PER_CALL: usize = 256;
/// `_IOWR('f', 11, struct fiemap)`.
const FS_IOC_FIEMAP: u64 = 0xC020_660B;
const FIEMAP_EXTENT_LAST: u32 = 0x1;
const FIEMAP_EXTENT_SHARED: u32 = 0x2000;

/// Bytes of `file` whose blocks the file system reports as shared with another file (the
/// extent map's shared flag). Errors where the file system has no extent map (tmpfs).
pub fn shared_bytes(file: &File) -> io::Result<u64> {
    shared_bytes_in(file, 0, file.metadata()?.len())
}

/// As [`shared_bytes`], for the bytes `[from, size)` of `file` only.
pub fn shared_bytes_in(file: &File, from: u64, size: u64) -> io::Result<u64> {
    let mut request: Box<FiemapRequest> = Box::new(FiemapRequest {
        start: 0,
        length: 0,
        flags: 0,
        mapped_extents: 0,
        extent_count: 0,
        reserved: 0,
        extents: [FiemapExtent {
            logical: 0,
            physical: 0,
            length: 0,
            reserved64: [0; 2],
            flags: 0,
            reserved: [0; 3],
        }; EXTENTS_PER_CALL],
    });
    let mut at = from;
    let mut shared = 0u64;
    while at < size {
        request.start = at;
        request.length = u64::MAX - at;
        request.flags = 0;
        request.mapped_extents = 0;
        request.extent_count = EXTENTS_PER_CALL as u32;
        // SAFETY: the request is a valid `struct fiemap` followed by `extent_count` extents.
        let r = unsafe {
            libc::ioctl(
                file.as_raw_fd(),
                FS_IOC_FIEMAP as _,
                &mut *request as *mut FiemapRequest,
            )
        };
        if r != 0 {
            return Err(io::Error::last_os_error());
        }
        let mapped = (request.mapped_extents as usize).min(EXTENTS_PER_CALL);
        if mapped == 0 {
            break;
        }
        let mut last = false;
        for e in &request.extents[..mapped] {
            // Extents may start before the asked offset and end past the file's end.
            let begin = e.logical.max(at);
            let end = e.logical.saturating_add(e.length).min(size);
            if e.flags & FIEMAP_EXTENT_SHARED != 0 {
                shared += end.saturating_sub(begin);
            }
            last |= e.flags & FIEMAP_EXTENT_LAST != 0;
        }
        let tail = &request.extents[mapped - 1];
        let next = tail.logical.saturating_add(tail.length);
        if last || next <= at {
            break;
        }
        at = next;
    }
    Ok(shared)
}

/// Bytes shared with other files by the output at `path`: a file, or the regular files of a
/// directory. 0 where the file system cannot say (it then shares nothing either).
pub fn shared_bytes_at(path: &Path) -> u64 {
    let of_file = |p: &Path| File::open(p).and_then(|f| shared_bytes(&f)).unwrap_or(0);
    match std::fs::symlink_metadata(path) {
        Ok(m) if m.is_dir() => std::fs::read_dir(path)
            .map(|entries| {
                entries
                    .flatten()
                    .filter(|e| e.file_type().is_ok_and(|t| t.is_file()))
                    .map(|e| of_file(&e.path()))
                    .sum()
            })
            .unwrap_or(0),
        Ok(m) if m.is_file() => of_file(path),
        _ => 0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_split_at_block_boundaries_only_when_the_offsets_agree() {
        // Same offset modulo 4096: a head to the boundary, whole blocks, a tail.
        assert_eq!(pieces(5000, 904, 20000, 4096, 1 << 20), [3192, 16384, 424]);
        // Already on a boundary: no head.
        assert_eq!(pieces(8192, 4096, 8192, 4096, 1 << 20), [8192]);
        // A run to the end of its source takes the last partial block with it.
        assert_eq!(pieces(5000, 904, 20000, 4096, 25000), [3192, 16808]);
        // Different offsets modulo the block: one piece.
        assert_eq!(pieces(5000, 900, 20000, 4096, 1 << 20), [20000]);
        // Shorter than the way to the boundary: all head.
        assert_eq!(pieces(5000, 904, 100, 4096, 1 << 20), [100]);
    }

    #[test]
    fn whole_blocks_of_a_run() {
        assert_eq!(whole_block_bytes(5000, 20000, 4096), 16384);
        assert_eq!(whole_block_bytes(0, 4095, 4096), 0);
        assert_eq!(whole_block_bytes(4095, 4098, 4096), 4096);
        assert_eq!(whole_block_bytes(100, 200, 4096), 0);
    }

    #[test]
    fn reported_block_sizes_that_do_not_fit_fall_back_to_4k() {
        assert_eq!(fitting_block(Some(4096)), 4096);
        assert_eq!(fitting_block(Some(65536)), 65536);
        assert_eq!(fitting_block(Some(1 << 20)), 4096);
        assert_eq!(fitting_block(Some(512)), 4096);
        assert_eq!(fitting_block(Some(12288)), 4096);
        assert_eq!(fitting_block(None), 4096);
    }

    #[test]
    fn a_file_written_anew_shares_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("f");
        std::fs::write(&p, vec![7u8; 100_000]).unwrap();
        assert_eq!(shared_bytes_at(&p), 0);
        assert_eq!(shared_bytes_at(dir.path()), 0);
    }
}
