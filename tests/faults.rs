//! Faults while writing: disk full (a file-size limit, RLIMIT_FSIZE, with SIGXFSZ ignored),
//! SIGINT and SIGTERM mid-copy, and an output directory that cannot be written. In every case
//! the final path is untouched, no temporary file remains and the input is unchanged.

mod common;

use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use safetensors::Dtype;

fn entries(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

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
        cmd.pre_exec(|| {
            libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
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
        "{}",
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
