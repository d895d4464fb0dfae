//! Values and memory: output values that round to infinity, non-finite class rows, undefined
//! fidelity, the memory guard over fidelity and maps, and allocation failure under an
//! address-space limit. Each run checks the exit code, the message and that nothing is left.

mod common;

use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use common::*;
use safetensors::Dtype;

/// A table `[1, 1 + side², d]` whose every grid row steps from -peak to +peak halfway across:
/// a bicubic kernel overshoots a step by up to about 17 %.
fn step(dir: &Path, dtype: Dtype, peak: f64, side: usize, d: usize) -> PathBuf {
    let mut v = vec![0.0; d];
    for _r in 0..side {
        for c in 0..side {
            let sign = if c < side / 2 { -1.0 } else { 1.0 };
            v.extend(std::iter::repeat_n(sign * peak, d));
        }
    }
    write(
        dir,
        "peak.safetensors",
        &[floats("pos_embed", dtype, &[1, 1 + side * side, d], &v)],
        None,
    )
}

#[test]
fn values_that_round_to_infinity_are_refused_for_every_float_dtype() {
    for (dtype, peak) in [
        (Dtype::F16, 65000.0),
        (Dtype::BF16, 3.0e38),
        (Dtype::F32, 3.0e38),
        (Dtype::F64, 1.7e308),
    ] {
        let dir = tempfile::tempdir().unwrap();
        let input = step(dir.path(), dtype, peak, 6, 4);
        let out = dir.path().join("out.safetensors");
        let o = posgrid(&["resize", s(&input), "-o", s(&out), "--grid", "9"]);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(6), "{dtype}: {err}");
        assert!(
            err.contains("pos_embed")
                && err.contains("bilinear")
                && err.contains("--allow-nonfinite"),
            "{dtype}: names the table and what to do: {err}"
        );
        assert!(err.contains("infinite"), "{dtype}: {err}");
        assert_eq!(entries(dir.path()), ["peak.safetensors"], "{dtype}");
        // A kernel that cannot overshoot keeps the values finite.
        let o = posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "9",
            "--kernel",
            "bilinear",
        ]);
        assert_eq!(o.status.code(), Some(0), "{dtype}: {}", stderr(&o));
        // And the flag lets the infinities through, as it says.
        std::fs::remove_file(&out).unwrap();
        let o = posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "9",
            "--allow-nonfinite",
        ]);
        assert_eq!(o.status.code(), Some(0), "{dtype}: {}", stderr(&o));
    }
}

#[test]
fn a_non_finite_class_row_is_refused() {
    for bad in [f64::NAN, f64::INFINITY] {
        let dir = tempfile::tempdir().unwrap();
        let d = 8;
        let mut table = smooth_table(1, 4, 4, d, 5);
        table[3] = bad;
        let input = write(
            dir.path(),
            "cls.safetensors",
            &[floats("pos_embed", Dtype::F32, &[1, 17, d], &table)],
            None,
        );
        let out = dir.path().join("out.safetensors");
        let o = posgrid(&["resize", s(&input), "-o", s(&out), "--grid", "6"]);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(6), "{err}");
        assert!(
            err.contains("pos_embed") && err.contains("class") && err.contains("--allow-nonfinite"),
            "{err}"
        );
        assert!(!out.exists());
        let o = posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "6",
            "--allow-nonfinite",
        ]);
        assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    }
}

#[test]
fn an_all_zero_table_has_an_undefined_fidelity() {
    let dir = tempfile::tempdir().unwrap();
    let d = 8;
    let input = write(
        dir.path(),
        "zero.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 17, d],
            &vec![0.0; 17 * d],
        )],
        None,
    );
    let out = dir.path().join("out.safetensors");
    let o = posgrid(&["resize", s(&input), "-o", s(&out), "--grid", "6", "--json"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(report["tables"][0]["fidelity"].is_null(), "{report}");
    let warnings = report["warnings"].to_string();
    assert!(warnings.contains("undefined"), "{report}");

    let text = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&dir.path().join("text.safetensors")),
        "--grid",
        "6",
    ]);
    let all = format!("{}{}", String::from_utf8_lossy(&text.stdout), stderr(&text));
    assert!(all.contains("fidelity undefined"), "{all}");
    assert!(!all.contains("fidelity 1.000"), "{all}");

    let png = dir.path().join("m.png");
    let o = posgrid(&["map", s(&input), s(&out), "-o", s(&png), "--json"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let m: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(m["fidelity"]["score"].is_null(), "{m}");
    let o = posgrid(&["map", s(&input), s(&out), "-o", s(&png), "--force"]);
    let all = format!("{}{}", String::from_utf8_lossy(&o.stdout), stderr(&o));
    assert!(all.contains("fidelity undefined"), "{all}");
}

#[test]
fn map_of_two_tables_of_different_widths_is_a_table_error() {
    let dir = tempfile::tempdir().unwrap();
    let a = write(
        dir.path(),
        "a.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 17, 8],
            &smooth_table(1, 4, 4, 8, 1),
        )],
        None,
    );
    let b = write(
        dir.path(),
        "b.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 37, 4],
            &smooth_table(1, 6, 6, 4, 1),
        )],
        None,
    );
    let png = dir.path().join("m.png");
    let o = posgrid(&["map", s(&a), s(&b), "-o", s(&png)]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(4), "{err}");
    assert!(
        err.contains("b.safetensors") && err.contains("width"),
        "{err}"
    );
    assert!(!png.exists());
}

/// A table `[1, 1 + side², 1]`: tiny in the file, with a large grid.
fn tall_thin(dir: &Path, side: usize) -> PathBuf {
    let v = noise(1 + side * side, 9, 1.0);
    write(
        dir,
        "thin.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 1 + side * side, 1],
            &v,
        )],
        None,
    )
}

/// Run the binary; its output, peak resident memory (from wait4) and wall time.
#[allow(clippy::zombie_processes)] // reaped by wait4, which also gives its peak memory
fn run_measured(args: &[&str]) -> (Output, u64, std::time::Duration) {
    let start = std::time::Instant::now();
    let child = Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .args(args)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let pid = child.id() as libc::pid_t;
    let mut status = 0;
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // The outputs here are small enough for the pipes' buffers, so waiting first is safe.
    // SAFETY: wait4 on our own child, with valid pointers.
    let r = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    assert_eq!(r, pid);
    let elapsed = start.elapsed();
    let mut stdout = Vec::new();
    let mut stderr = Vec::new();
    use std::io::Read;
    child.stdout.unwrap().read_to_end(&mut stdout).unwrap();
    child.stderr.unwrap().read_to_end(&mut stderr).unwrap();
    let status = std::os::unix::process::ExitStatusExt::from_raw(status);
    (
        Output {
            status,
            stdout,
            stderr,
        },
        usage.ru_maxrss as u64 * 1024,
        elapsed,
    )
}

#[test]
fn fidelity_stays_inside_the_memory_guard() {
    let dir = tempfile::tempdir().unwrap();
    let input = tall_thin(dir.path(), 1024);
    let out = dir.path().join("out.safetensors");
    let (o, peak, took) = run_measured(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "1100",
        "--memory-limit",
        "256M",
        "--json",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(peak < 256 << 20, "peak {} MiB", peak >> 20);
    assert!(took.as_secs() < 20, "{took:?}");
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(
        report["tables"][0]["fidelity"].as_f64().is_some(),
        "{report}"
    );
}

#[test]
fn maps_stay_inside_the_memory_guard() {
    let dir = tempfile::tempdir().unwrap();
    let input = tall_thin(dir.path(), 1024);
    let png = dir.path().join("m.png");
    let (o, peak, took) = run_measured(&[
        "map",
        s(&input),
        "-o",
        s(&png),
        "--memory-limit",
        "256M",
        "--json",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(peak < 256 << 20, "peak {} MiB", peak >> 20);
    assert!(took.as_secs() < 20, "{took:?}");
    let m: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let refs = m["refs"][0].as_u64().unwrap();
    assert!(refs < 16, "fewer references for a large grid: {m}");
    assert!(m["warnings"].to_string().contains("reference"), "{m}");
    // A guard too small for even the table is a refusal with the reason.
    let o = posgrid(&[
        "map",
        s(&input),
        "-o",
        s(&dir.path().join("n.png")),
        "--memory-limit",
        "1M",
    ]);
    assert_eq!(o.status.code(), Some(6), "{}", stderr(&o));
    assert!(stderr(&o).contains("--memory-limit"), "{}", stderr(&o));
}

/// Run the binary under an address-space limit: room for the program and its worker
/// threads, not for a table of a gigabyte.
fn run_address_limited(args: &[&str]) -> Output {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_posgrid"));
    cmd.args(args);
    // SAFETY: only async-signal-safe libc calls between fork and exec.
    unsafe {
        cmd.pre_exec(|| {
            let limit = libc::rlimit {
                rlim_cur: 768 << 20,
                rlim_max: 768 << 20,
            };
            if libc::setrlimit(libc::RLIMIT_AS, &limit) != 0 {
                return Err(std::io::Error::last_os_error());
            }
            Ok(())
        });
    }
    cmd.output().unwrap()
}

#[test]
fn allocation_failure_is_a_refusal_not_an_abort() {
    let dir = tempfile::tempdir().unwrap();
    // A 64x64 grid of width 64 to 2048x2048: the output alone needs 1 GiB.
    let d = 64;
    let input = write(
        dir.path(),
        "in.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 1 + 64 * 64, d],
            &smooth_table(1, 64, 64, d, 3),
        )],
        None,
    );
    let out = dir.path().join("out.safetensors");
    let o = run_address_limited(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "2048",
        "--memory-limit",
        "64G",
    ]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(6), "{err}");
    assert!(err.contains("memory") && err.contains("pos_embed"), "{err}");
    assert_eq!(entries(dir.path()), ["in.safetensors"]);
}

#[test]
fn a_table_too_large_to_read_is_a_refusal_not_an_abort() {
    let dir = tempfile::tempdir().unwrap();
    // A 1 GiB table in a sparse file (no disk used): [1, 1 + 8192², 4] F32.
    let rows: u64 = 1 + 8192 * 8192;
    let len = rows * 4 * 4;
    let header = format!(
        r#"{{"pos_embed":{{"dtype":"F32","shape":[1,{rows},4],"data_offsets":[0,{len}]}}}}"#
    );
    let input = crafted(dir.path(), "big.safetensors", &header, &[]);
    let f = std::fs::OpenOptions::new()
        .write(true)
        .open(&input)
        .unwrap();
    f.set_len(8 + header.len() as u64 + len).unwrap();
    let out = dir.path().join("out.safetensors");
    let o = run_address_limited(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "8000",
        "--memory-limit",
        "64G",
    ]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(6), "{err}");
    assert!(err.contains("memory") && err.contains("pos_embed"), "{err}");
    let png = dir.path().join("m.png");
    let o = run_address_limited(&["map", s(&input), "-o", s(&png), "--memory-limit", "64G"]);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(6), "{err}");
    assert!(err.contains("memory") && err.contains("pos_embed"), "{err}");
    assert_eq!(entries(dir.path()), ["big.safetensors"]);
}
