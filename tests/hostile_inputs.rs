//! Inputs crafted to hurt: files that are not regular files, headers that would leak a file's
//! bytes, archive members with dangerous or repeated names, shard indexes that lie, and
//! archives that inflate to far more than their size. Each must end in a clear error with
//! exit 3 (or, for a bomb, a normal run in bounded memory), never a hang or a leak.

mod common;

use std::io::Write;
use std::os::unix::ffi::OsStrExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use posgrid::checkpoint::npz::npy_header;
use safetensors::Dtype;

/// What a finished run left: exit code, stderr, and its peak resident memory in bytes.
struct Run {
    code: i32,
    stderr: String,
    peak_rss: u64,
}

/// Run posgrid, killing it (and failing the test) if it is still running after `limit`.
/// The child is reaped with `wait4`, which also gives its peak memory.
#[allow(clippy::zombie_processes)]
fn run_within(args: &[&std::ffi::OsStr], limit: Duration) -> Run {
    let mut child = Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let pid = child.id() as libc::pid_t;
    let start = Instant::now();
    let mut stderr_pipe = child.stderr.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut s = String::new();
        std::io::Read::read_to_string(&mut stderr_pipe, &mut s).unwrap();
        s
    });
    loop {
        let mut status = 0;
        // SAFETY: plain libc call on our own child; rusage is a zeroed out-parameter.
        let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
        let done = unsafe { libc::wait4(pid, &mut status, libc::WNOHANG, &mut usage) };
        if done == pid {
            let code = if libc::WIFEXITED(status) {
                libc::WEXITSTATUS(status)
            } else {
                128 + libc::WTERMSIG(status)
            };
            return Run {
                code,
                stderr: reader.join().unwrap(),
                peak_rss: usage.ru_maxrss as u64 * 1024,
            };
        }
        if start.elapsed() > limit {
            child.kill().unwrap();
            let _ = child.wait();
            panic!("posgrid {args:?} still running after {limit:?}: it hangs");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// `resize INPUT -o OUT --grid 6`, measured, within two minutes.
fn resize_to_grid_6(input: &Path, out: &Path) -> Run {
    run_within(
        &[
            "resize".as_ref(),
            input.as_os_str(),
            "-o".as_ref(),
            out.as_os_str(),
            "--grid".as_ref(),
            "6".as_ref(),
        ],
        Duration::from_secs(120),
    )
}

fn run(args: &[&dyn AsRef<std::ffi::OsStr>]) -> Run {
    let args: Vec<&std::ffi::OsStr> = args.iter().map(|a| a.as_ref()).collect();
    run_within(&args, Duration::from_secs(20))
}

fn scan(path: &Path) -> Run {
    run(&[&"scan", &path])
}

/// Expect exit 3 and a message that names the file and says `words`.
fn refused(r: &Run, path: &Path, words: &str) {
    assert_eq!(r.code, 3, "exit code; stderr: {}", r.stderr);
    assert!(
        r.stderr.contains(&path.display().to_string()),
        "names the file: {}",
        r.stderr
    );
    assert!(
        r.stderr.contains(words),
        "should say \"{words}\": {}",
        r.stderr
    );
}

fn mkfifo(path: &Path) {
    let c = std::ffi::CString::new(path.as_os_str().as_bytes()).unwrap();
    // SAFETY: a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
}

/// A small ViT-like checkpoint with a 4x4 table.
fn tensors() -> Vec<T> {
    vec![
        floats(
            "pos_embed",
            Dtype::F32,
            &[1, 17, 8],
            &smooth_table(1, 4, 4, 8, 1),
        ),
        floats("cls_token", Dtype::F32, &[1, 1, 8], &noise(8, 2, 0.1)),
    ]
}

/// A two-shard set in `dir` whose index is written from `weight_map` JSON text.
fn shard_set(dir: &Path, weight_map: &str) -> PathBuf {
    let [pos, cls]: [T; 2] = tensors().try_into().ok().unwrap();
    write(dir, "model-1.safetensors", &[pos], None);
    write(dir, "model-2.safetensors", &[cls], None);
    index(dir, weight_map)
}

fn index(dir: &Path, weight_map: &str) -> PathBuf {
    raw(
        dir,
        "model.safetensors.index.json",
        format!("{{\"metadata\":{{}},\"weight_map\":{weight_map}}}").as_bytes(),
    )
}

const GOOD_MAP: &str = r#"{"pos_embed":"model-1.safetensors","cls_token":"model-2.safetensors"}"#;

/// The CRC-32 of the ZIP format (reflected polynomial 0xEDB88320), for hand-made archives.
fn crc32(bytes: &[u8]) -> u32 {
    let mut crc = !0u32;
    for &b in bytes {
        crc ^= b as u32;
        for _ in 0..8 {
            crc = if crc & 1 != 0 {
                (crc >> 1) ^ 0xEDB8_8320
            } else {
                crc >> 1
            };
        }
    }
    !crc
}

/// A ZIP of stored members, written byte by byte from the format's layout (local headers,
/// central directory, end record), so names a ZIP library would refuse can be made.
fn stored_zip(members: &[(&[u8], Vec<u8>)]) -> Vec<u8> {
    let mut out = Vec::new();
    let mut central = Vec::new();
    for (name, data) in members {
        let offset = out.len() as u32;
        let (crc, len, name_len) = (crc32(data), data.len() as u32, name.len() as u16);
        out.extend(0x0403_4b50u32.to_le_bytes());
        out.extend([20, 0, 0, 0, 0, 0, 0, 0, 0, 0]); // version, flags, stored, time, date
        out.extend(crc.to_le_bytes());
        out.extend(len.to_le_bytes());
        out.extend(len.to_le_bytes());
        out.extend(name_len.to_le_bytes());
        out.extend(0u16.to_le_bytes());
        out.extend(*name);
        out.extend(data);
        central.extend(0x0201_4b50u32.to_le_bytes());
        central.extend([20, 0, 20, 0, 0, 0, 0, 0, 0, 0, 0, 0]);
        central.extend(crc.to_le_bytes());
        central.extend(len.to_le_bytes());
        central.extend(len.to_le_bytes());
        central.extend(name_len.to_le_bytes());
        central.extend([0u8; 12]); // extra, comment, disk, internal and external attributes
        central.extend(offset.to_le_bytes());
        central.extend(*name);
    }
    let dir_start = out.len() as u32;
    let count = members.len() as u16;
    out.extend(&central);
    out.extend(0x0605_4b50u32.to_le_bytes());
    out.extend([0u8; 4]);
    out.extend(count.to_le_bytes());
    out.extend(count.to_le_bytes());
    out.extend((central.len() as u32).to_le_bytes());
    out.extend(dir_start.to_le_bytes());
    out.extend(0u16.to_le_bytes());
    out
}

/// A `.npy` member holding `values` as little-endian f32.
fn npy_f32(shape: &[usize], values: &[f64]) -> Vec<u8> {
    let mut m = npy_header("<f4", shape);
    m.extend(values.iter().flat_map(|v| (*v as f32).to_le_bytes()));
    m
}

fn table_member() -> Vec<u8> {
    npy_f32(&[1, 17, 8], &smooth_table(1, 4, 4, 8, 1))
}

#[test]
fn a_fifo_as_checkpoint_shard_or_index_is_refused_without_hanging() {
    let dir = tempfile::tempdir().unwrap();
    let single = dir.path().join("pipe.safetensors");
    mkfifo(&single);
    refused(&scan(&single), &single, "FIFO");

    let npz = dir.path().join("pipe.npz");
    mkfifo(&npz);
    refused(&scan(&npz), &npz, "FIFO");

    let set = dir.path().join("set");
    std::fs::create_dir(&set).unwrap();
    let idx = shard_set(&set, GOOD_MAP);
    let shard = set.join("model-2.safetensors");
    std::fs::remove_file(&shard).unwrap();
    mkfifo(&shard);
    refused(&scan(&idx), &shard, "FIFO");
    let out = dir.path().join("out");
    let r = run(&[&"resize", &idx, &"-o", &out, &"--grid", &"6"]);
    refused(&r, &shard, "FIFO");

    std::fs::remove_file(&idx).unwrap();
    mkfifo(&idx);
    refused(&scan(&idx), &idx, "FIFO");
    refused(&scan(&set), &idx, "FIFO");
}

#[test]
fn devices_sockets_and_directories_are_named_for_what_they_are() {
    let dir = tempfile::tempdir().unwrap();
    let null = Path::new("/dev/null");
    refused(&scan(null), null, "character device");

    // Links are followed: what counts is the kind of file they lead to.
    let idx = dir.path().join("model.safetensors.index.json");
    std::os::unix::fs::symlink("/dev/null", &idx).unwrap();
    refused(&scan(&idx), &idx, "character device");
    let npz = dir.path().join("zero.npz");
    std::os::unix::fs::symlink("/dev/zero", &npz).unwrap();
    refused(&scan(&npz), &npz, "character device");

    let sock = dir.path().join("sock.safetensors");
    let _listener = std::os::unix::net::UnixListener::bind(&sock).unwrap();
    refused(&scan(&sock), &sock, "socket");
}

#[test]
fn a_header_length_never_shows_the_files_first_bytes() {
    let dir = tempfile::tempdir().unwrap();
    let secret = b"root:x:0:0:root:/root:/bin/bash\n";
    let leaked = u64::from_le_bytes(secret[..8].try_into().unwrap()).to_string();
    let passwd = raw(dir.path(), "passwd", secret);
    let r = scan(&passwd);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(!r.stderr.contains(&leaked), "leaks bytes: {}", r.stderr);

    // The same file given as a shard of a set.
    std::fs::copy(&passwd, dir.path().join("model-2.safetensors")).unwrap();
    let pos = tensors().remove(0);
    write(dir.path(), "model-1.safetensors", &[pos], None);
    let idx = index(dir.path(), GOOD_MAP);
    let r = scan(&idx);
    assert_eq!(r.code, 3, "{}", r.stderr);
    assert!(!r.stderr.contains(&leaked), "leaks bytes: {}", r.stderr);

    // A small prefix, past the end of the file, is not repeated either.
    let past = raw(
        dir.path(),
        "past.safetensors",
        &[77, 0, 0, 0, 0, 0, 0, 0, b'{', b'}'],
    );
    let r = scan(&past);
    refused(&r, &past, "truncated");
    assert!(!r.stderr.contains("77"), "{}", r.stderr);
}

#[test]
fn archive_members_with_unsafe_names_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let cases: [(&[u8], &str); 7] = [
        (b"../escape.npy", "\"..\""),
        (b"sub/../../escape.npy", "\"..\""),
        (b"/etc/abs.npy", "absolute"),
        (b"dir\\back.npy", "backslash"),
        (b"C:drive.npy", "drive letter"),
        (b"nul\0byte.npy", "NUL"),
        (b"", "empty name"),
    ];
    for (i, (name, words)) in cases.iter().enumerate() {
        let zip = stored_zip(&[
            (b"pos_embed.npy", table_member()),
            (name, npy_f32(&[2], &[1.0, 2.0])),
        ]);
        let path = raw(dir.path(), &format!("bad{i}.npz"), &zip);
        refused(&scan(&path), &path, words);
        let out = dir.path().join(format!("out{i}.npz"));
        let r = run(&[&"resize", &path, &"-o", &out, &"--grid", &"6"]);
        refused(&r, &path, words);
        assert!(!out.exists());
    }
}

#[test]
fn archive_members_with_the_same_name_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let zip = stored_zip(&[
        (b"pos_embed.npy", table_member()),
        (b"pos_embed.npy", npy_f32(&[1, 17, 8], &[0.0; 136])),
    ]);
    let path = raw(dir.path(), "twice.npz", &zip);
    refused(&scan(&path), &path, "same name");
}

#[test]
fn an_npz_name_that_is_not_an_archive_says_so() {
    let dir = tempfile::tempdir().unwrap();
    let empty = raw(dir.path(), "empty.npz", b"");
    refused(&scan(&empty), &empty, "is empty");
    let text = raw(
        dir.path(),
        "text.npz",
        b"this is a text file, not an archive\n",
    );
    refused(&scan(&text), &text, "not a ZIP archive");
    let empty = raw(dir.path(), "empty.safetensors", b"");
    refused(&scan(&empty), &empty, "empty");
}

#[test]
fn the_shard_index_is_size_checked_before_it_is_read() {
    let dir = tempfile::tempdir().unwrap();
    let idx = dir.path().join("model.safetensors.index.json");
    // Sparse: a gigabyte on paper, nothing on disk.
    std::fs::File::create(&idx)
        .unwrap()
        .set_len(1 << 30)
        .unwrap();
    let r = scan(&idx);
    refused(&r, &idx, "larger than");
    assert!(
        r.peak_rss < 200 << 20,
        "read {} MiB of an index it refuses",
        r.peak_rss >> 20
    );
}

#[test]
fn a_tensor_named_twice_in_the_index_is_reported_as_such() {
    let dir = tempfile::tempdir().unwrap();
    let idx = shard_set(
        dir.path(),
        r#"{"pos_embed":"model-1.safetensors","cls_token":"model-2.safetensors","pos_embed":"model-2.safetensors"}"#,
    );
    let r = scan(&idx);
    refused(&r, &idx, "twice");
    assert!(r.stderr.contains("pos_embed"), "{}", r.stderr);
}

#[test]
fn an_index_listing_itself_as_a_shard_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let idx = shard_set(
        dir.path(),
        r#"{"pos_embed":"model-1.safetensors","cls_token":"model.safetensors.index.json"}"#,
    );
    let r = scan(&idx);
    refused(&r, &idx, "lists itself");
}

#[test]
fn an_empty_shard_name_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let idx = shard_set(
        dir.path(),
        r#"{"pos_embed":"model-1.safetensors","cls_token":""}"#,
    );
    let r = scan(&idx);
    refused(&r, &idx, "shard name is empty");
}

#[test]
fn shards_in_sub_directories_are_refused_by_scan_and_resize_alike() {
    let dir = tempfile::tempdir().unwrap();
    let set = dir.path();
    shard_set(set, GOOD_MAP);
    std::fs::create_dir(set.join("sub")).unwrap();
    std::fs::rename(
        set.join("model-2.safetensors"),
        set.join("sub/model-2.safetensors"),
    )
    .unwrap();
    let idx = index(
        set,
        r#"{"pos_embed":"model-1.safetensors","cls_token":"sub/model-2.safetensors"}"#,
    );
    refused(&scan(&idx), &idx, "plain file name");
    let out = dir.path().join("out");
    let r = run(&[&"resize", &idx, &"-o", &out, &"--grid", &"6"]);
    refused(&r, &idx, "plain file name");
    assert!(!out.exists());
}

/// An archive whose one member inflates to `big` bytes of zeros, beside a resizable table.
fn bomb(path: &Path, big: usize) {
    use zip::write::SimpleFileOptions;
    let mut zip = zip::ZipWriter::new(std::fs::File::create(path).unwrap());
    let deflated = SimpleFileOptions::default()
        .compression_method(zip::CompressionMethod::Deflated)
        .compression_level(Some(1))
        .large_file(true);
    zip.start_file("pos_embed.npy", deflated).unwrap();
    zip.write_all(&table_member()).unwrap();
    zip.start_file("zeros.npy", deflated).unwrap();
    zip.write_all(&npy_header("<f4", &[big / 4])).unwrap();
    let chunk = vec![0u8; 1 << 20];
    for _ in 0..big >> 20 {
        zip.write_all(&chunk).unwrap();
    }
    zip.finish().unwrap();
}

#[test]
fn converting_an_inflating_archive_streams_through_a_fixed_buffer() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("bomb.npz");
    let big = 768 << 20;
    bomb(&input, big);
    assert!(
        std::fs::metadata(&input).unwrap().len() < 8 << 20,
        "a small archive"
    );
    let out = dir.path().join("out.safetensors");
    let r = resize_to_grid_6(&input, &out);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(std::fs::metadata(&out).unwrap().len() > big as u64);
    assert!(
        r.peak_rss < 256 << 20,
        "peak memory {} MiB for a {} MiB member",
        r.peak_rss >> 20,
        big >> 20
    );
    std::fs::remove_file(&out).unwrap();
}

#[test]
fn big_endian_members_are_swapped_chunk_by_chunk() {
    let dir = tempfile::tempdir().unwrap();
    // More than one copy chunk of big-endian f64, so the swap crosses chunk boundaries.
    let n = (1 << 20) / 8 * 3 + 5;
    let values: Vec<f64> = (0..n).map(|i| i as f64 * 0.5).collect();
    let mut be = npy_header(">f8", &[n]);
    be.extend(values.iter().flat_map(|v| v.to_be_bytes()));
    let zip = stored_zip(&[(b"pos_embed.npy", table_member()), (b"be.npy", be)]);
    let input = raw(dir.path(), "be.npz", &zip);
    let out = dir.path().join("out.safetensors");
    let r = run(&[&"resize", &input, &"-o", &out, &"--grid", &"6"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let bytes = std::fs::read(&out).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let got: Vec<f64> = st
        .tensor("be")
        .unwrap()
        .data()
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
        .collect();
    assert_eq!(got, values);
}

#[test]
fn converting_a_large_tensor_to_npz_streams_through_a_fixed_buffer() {
    let dir = tempfile::tempdir().unwrap();
    let big: u64 = 768 << 20;
    let table = tensors().remove(0);
    let t_len = table.bytes.len() as u64;
    let header = format!(
        r#"{{"pos_embed":{{"dtype":"F32","shape":[1,17,8],"data_offsets":[0,{t_len}]}},"zeros":{{"dtype":"F32","shape":[{}],"data_offsets":[{t_len},{}]}}}}"#,
        big / 4,
        t_len + big
    );
    let input = crafted(dir.path(), "big.safetensors", &header, &table.bytes);
    // Sparse: the zeros cost no disk.
    let file = std::fs::OpenOptions::new()
        .write(true)
        .open(&input)
        .unwrap();
    file.set_len(file.metadata().unwrap().len() + big).unwrap();
    let out = dir.path().join("out.npz");
    let r = resize_to_grid_6(&input, &out);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(std::fs::metadata(&out).unwrap().len() > big);
    assert!(
        r.peak_rss < 256 << 20,
        "peak memory {} MiB for a {} MiB tensor",
        r.peak_rss >> 20,
        big >> 20
    );
}
