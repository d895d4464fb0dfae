//! Faults while writing: disk full (a file-size limit, RLIMIT_FSIZE, with SIGXFSZ ignored by
//! the caller or not), SIGINT, SIGTERM and SIGHUP mid-copy, and an output directory that
//! cannot be written. In every case the final path is untouched, no temporary file remains and
//! the input is unchanged. Interruptions are honoured within a second in every phase.

mod common;

use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use safetensors::Dtype;

fn small_vit(dir: &Path) -> PathBuf {
    let d = 64;
    write(
        dir,
        "in.safetensors",
        &[
            floats(
                "pos_embed",
                Dtype::F32,
                &[1, 197, d],
                &smooth_table(1, 14, 14, d, 1),
            ),
            floats(
                "blocks.0.mlp.fc1.weight",
                Dtype::F32,
                &[4 * d, 4 * d * 4],
                &noise(64 * d * d, 2, 0.1),
            ),
        ],
        None,
    )
}

/// A valid checkpoint whose second tensor is `len` zero bytes in a sparse file (no disk used
/// until copied), so a copy takes long enough to be interrupted.
fn big_sparse(dir: &Path, len: u64) -> PathBuf {
    let header = format!(
        r#"{{"pos_embed":{{"dtype":"F32","shape":[1,17,4],"data_offsets":[0,272]}},"big":{{"dtype":"U8","shape":[{len}],"data_offsets":[272,{}]}}}}"#,
        272 + len
    );
    let path = crafted(dir, "big.safetensors", &header, &[0u8; 272]);
    let f = std::fs::OpenOptions::new().write(true).open(&path).unwrap();
    f.set_len(8 + header.len() as u64 + 272 + len).unwrap();
    path
}

#[test]
fn disk_full_leaves_nothing_behind() {
    disk_full(true);
}

#[test]
fn a_file_size_limit_is_a_write_error_even_when_sigxfsz_is_not_ignored() {
    disk_full(false);
}

fn disk_full(ignore_sigxfsz: bool) {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path());
    let before = std::fs::read(&input).unwrap();
    let out = dir.path().join("out.safetensors");
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_posgrid"));
    cmd.args([
        "resize",
        input.to_str().unwrap(),
        "-o",
        out.to_str().unwrap(),
        "--grid",
        "24",
    ]);
    // SAFETY: only async-signal-safe libc calls between fork and exec.
    unsafe {
        cmd.pre_exec(move || {
            let disposition = if ignore_sigxfsz {
                libc::SIG_IGN
            } else {
                libc::SIG_DFL
            };
            libc::signal(libc::SIGXFSZ, disposition);
            let limit = libc::rlimit {
                rlim_cur: 100_000,
                rlim_max: 100_000,
            };
            if libc::setrlimit(libc::RLIMIT_FSIZE, &limit) != 0 {
                return Err(std::io::Error::last_os_error());
            }
            Ok(())
        });
    }
    let o = cmd.output().unwrap();
    assert_eq!(
        o.status.code(),
        Some(5),
        "{:?} {}",
        o.status,
        String::from_utf8_lossy(&o.stderr)
    );
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("file-size limit") || err.contains("space"),
        "{err}"
    );
    assert_eq!(entries(dir.path()), ["in.safetensors"]);
    assert_eq!(std::fs::read(&input).unwrap(), before);
}

#[test]
fn unwritable_output_directory_leaves_nothing_behind() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path());
    // As root, permission bits do not stop writes, so use a directory no one can create in.
    let locked = if unsafe { libc::geteuid() } == 0 {
        PathBuf::from("/proc/self")
    } else {
        let p = dir.path().join("ro");
        std::fs::create_dir(&p).unwrap();
        std::fs::set_permissions(&p, std::os::unix::fs::PermissionsExt::from_mode(0o555)).unwrap();
        p
    };
    let out = locked.join("out.safetensors");
    let o = Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .args([
            "resize",
            input.to_str().unwrap(),
            "-o",
            out.to_str().unwrap(),
            "--grid",
            "24",
        ])
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(5),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stderr).contains("temporary file"));
    assert!(!out.exists());
}

fn interrupt_mid_copy(signal: i32) {
    let dir = tempfile::tempdir().unwrap();
    let input = big_sparse(dir.path(), 3 << 30);
    let out = dir.path().join("out.safetensors");
    let mut child = Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .args([
            "resize",
            input.to_str().unwrap(),
            "-o",
            out.to_str().unwrap(),
            "--grid",
            "8",
            "--slots",
            "1",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Wait until the temporary file exists: the copy is under way.
    let start = Instant::now();
    while entries(dir.path()).len() < 2 {
        assert!(
            start.elapsed() < Duration::from_secs(20),
            "no temporary file appeared"
        );
        if child.try_wait().unwrap().is_some() {
            panic!("posgrid finished before it could be interrupted");
        }
        std::thread::sleep(Duration::from_millis(1));
    }
    unsafe { libc::kill(child.id() as i32, signal) };
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(130), "signal {signal}");
    assert!(!out.exists());
    assert_eq!(
        entries(dir.path()),
        ["big.safetensors"],
        "no temporary file remains"
    );
}

#[test]
fn sigint_mid_copy_leaves_nothing_behind() {
    interrupt_mid_copy(libc::SIGINT);
}

#[test]
fn sigterm_mid_copy_leaves_nothing_behind() {
    interrupt_mid_copy(libc::SIGTERM);
}

#[test]
fn sighup_mid_copy_leaves_nothing_behind() {
    interrupt_mid_copy(libc::SIGHUP);
}

/// Start posgrid, let it work for a moment, send `signal`, and check that it ends within a
/// second with exit 130, leaving `dir` as it was.
fn interrupt_within_a_second(dir: &Path, args: &[&std::ffi::OsStr], signal: i32) {
    let before = entries(dir);
    let mut child = Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .args(args)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    std::thread::sleep(Duration::from_millis(300));
    assert!(
        child.try_wait().unwrap().is_none(),
        "the phase under test ended before the signal"
    );
    unsafe { libc::kill(child.id() as i32, signal) };
    let sent = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if sent.elapsed() > Duration::from_secs(30) {
            child.kill().unwrap();
            panic!("not ended 30 s after signal {signal}");
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    let took = sent.elapsed();
    let mut err = String::new();
    std::io::Read::read_to_string(&mut child.stderr.take().unwrap(), &mut err).unwrap();
    assert_eq!(status.code(), Some(130), "{status:?} {err}");
    assert!(err.contains("interrupted"), "{err}");
    assert!(
        took < Duration::from_secs(1),
        "ended {took:?} after the signal"
    );
    assert_eq!(entries(dir), before, "nothing left behind");
}

/// A safetensors file whose header describes `n` one-element tensors (about 70 bytes each):
/// slow to parse and check.
fn huge_header(dir: &Path, n: usize) -> PathBuf {
    let mut header = String::from("{");
    for i in 0..n {
        if i > 0 {
            header.push(',');
        }
        header.push_str(&format!(
            r#""t{i:07}":{{"dtype":"F32","shape":[1],"data_offsets":[{},{}]}}"#,
            4 * i,
            4 * i + 4
        ));
    }
    header.push('}');
    let path = crafted(dir, "huge-header.safetensors", &header, &[]);
    let f = std::fs::OpenOptions::new().write(true).open(&path).unwrap();
    f.set_len(8 + header.len() as u64 + 4 * n as u64).unwrap();
    path
}

#[test]
fn interrupt_while_parsing_a_huge_header() {
    let dir = tempfile::tempdir().unwrap();
    let input = huge_header(dir.path(), 1_300_000);
    interrupt_within_a_second(
        dir.path(),
        &["scan".as_ref(), input.as_os_str()],
        libc::SIGINT,
    );
}

#[test]
fn interrupt_while_reading_a_large_shard_index() {
    let dir = tempfile::tempdir().unwrap();
    let set = dir.path().join("set");
    std::fs::create_dir(&set).unwrap();
    crafted(
        &set,
        "model-00001-of-00001.safetensors",
        r#"{"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]}}"#,
        &[0; 4],
    );
    // About 70 MB of weight_map entries: seconds to read and check.
    let mut index =
        String::from(r#"{"metadata":{},"weight_map":{"a":"model-00001-of-00001.safetensors""#);
    for i in 0..1_500_000 {
        index.push_str(&format!(r#","t{i:07}":"model-00001-of-00001.safetensors""#));
    }
    index.push_str("}}");
    std::fs::write(set.join("model.safetensors.index.json"), index).unwrap();
    interrupt_within_a_second(
        dir.path(),
        &["scan".as_ref(), set.as_os_str()],
        libc::SIGINT,
    );
}

/// A 192x192 table of width 384 (56 MB): resampling it, scoring its fidelity and drawing its
/// maps take seconds.
fn large_table(dir: &Path) -> PathBuf {
    let (g, d) = (192, 384);
    let values: Vec<f64> = (0..(1 + g * g) * d)
        .map(|i| ((i % 9973) as f64 * 0.37).sin())
        .collect();
    write(
        dir,
        "large.safetensors",
        &[floats("pos_embed", Dtype::F32, &[1, 1 + g * g, d], &values)],
        None,
    )
}

#[test]
fn interrupt_while_computing_tables_and_fidelity() {
    let dir = tempfile::tempdir().unwrap();
    let input = large_table(dir.path());
    let out = dir.path().join("out.safetensors");
    let png = dir.path().join("maps.png");
    let args = [
        "resize".as_ref(),
        input.as_os_str(),
        "-o".as_ref(),
        out.as_os_str(),
        "--grid".as_ref(),
        "256".as_ref(),
        "--map".as_ref(),
        png.as_os_str(),
    ];
    interrupt_within_a_second(dir.path(), &args, libc::SIGTERM);
}

#[test]
fn interrupt_while_drawing_maps() {
    let dir = tempfile::tempdir().unwrap();
    let input = large_table(dir.path());
    let png = dir.path().join("maps.png");
    let args = [
        "map".as_ref(),
        input.as_os_str(),
        "-o".as_ref(),
        png.as_os_str(),
    ];
    interrupt_within_a_second(dir.path(), &args, libc::SIGHUP);
}

const STUCK_WRITER_OUT: &str = "POSGRID_TEST_STUCK_WRITER_OUT";

/// Run by the next test in a child process: a library caller that installs the handler,
/// starts writing an output, and then never looks at the interruption flag again.
#[test]
#[ignore = "a helper process for interrupting_a_writer_that_never_checks_removes_its_temporary"]
fn stuck_writer() {
    let Some(out) = std::env::var_os(STUCK_WRITER_OUT) else {
        return;
    };
    posgrid::write::install_interrupt_handler();
    let mut file = posgrid::write::AtomicFile::create(Path::new(&out), false).unwrap();
    file.write(b"partial", &mut posgrid::write::Silent).unwrap();
    loop {
        std::thread::sleep(Duration::from_secs(60));
    }
}

#[test]
fn interrupting_a_writer_that_never_checks_removes_its_temporary() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.safetensors");
    let mut child = Command::new(std::env::current_exe().unwrap())
        .args(["stuck_writer", "--exact", "--ignored", "--nocapture"])
        .env(STUCK_WRITER_OUT, &out)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    while entries(dir.path()).is_empty() {
        assert!(start.elapsed() < Duration::from_secs(20), "no temporary");
        std::thread::sleep(Duration::from_millis(1));
    }
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    let sent = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if sent.elapsed() > Duration::from_secs(10) {
            child.kill().unwrap();
            child.wait().unwrap();
            panic!(
                "not ended 10 s after SIGTERM; left: {:?}",
                entries(dir.path())
            );
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    assert_eq!(status.code(), Some(130), "{status:?}");
    assert!(
        sent.elapsed() < Duration::from_secs(1),
        "{:?}",
        sent.elapsed()
    );
    assert!(entries(dir.path()).is_empty(), "{:?}", entries(dir.path()));
}
