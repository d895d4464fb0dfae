//! Interop with the real clients: files written by the reference safetensors library and numpy
//! (F32, F16, BF16, with metadata) are read by posgrid, and posgrid's outputs load there with
//! every untouched tensor equal and the table of the expected shape.
//!
//! The Python side runs in a venv with tests/interop/requirements.txt: `$POSGRID_PYTHON` if
//! set (CI sets it), otherwise one made under target/. If it cannot be made, the test fails.

use std::path::{Path, PathBuf};
use std::process::Command;

fn python() -> PathBuf {
    if let Some(p) = std::env::var_os("POSGRID_PYTHON") {
        return PathBuf::from(p);
    }
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let venv = root.join("target/interop-venv");
    let py = venv.join("bin/python");
    if !py.exists() {
        let ok = Command::new("python3")
            .args(["-m", "venv"])
            .arg(&venv)
            .status()
            .is_ok_and(|s| s.success());
        assert!(
            ok,
            "cannot create a Python venv at {} (python3 -m venv)",
            venv.display()
        );
        let req = root.join("tests/interop/requirements.txt");
        let ok = Command::new(&py)
            .args(["-m", "pip", "install", "-q", "-r"])
            .arg(&req)
            .status()
            .is_ok_and(|s| s.success());
        assert!(ok, "cannot install {} into the venv", req.display());
    }
    py
}

fn run(cmd: &mut Command) -> String {
    let out = cmd.output().unwrap();
    assert!(
        out.status.success(),
        "{cmd:?} failed:\n{}\n{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

#[test]
fn files_from_the_reference_library_round_trip() {
    let py = python();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/interop/clients.py");
    let dir = tempfile::tempdir().unwrap();
    run(Command::new(&py).arg(&script).arg("write").arg(dir.path()));
    for dtype in ["f32", "f16", "bf16"] {
        let input = dir.path().join(format!("{dtype}.safetensors"));
        let scan = run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
            .arg("scan")
            .arg(&input)
            .arg("--json"));
        let v: serde_json::Value = serde_json::from_str(&scan).unwrap();
        assert_eq!(v["tables"][0]["grid"], serde_json::json!([6, 6]), "{dtype}");
        assert_eq!(v["tables"][0]["patch"], 4, "{dtype}");
        let output = dir.path().join(format!("{dtype}-out.safetensors"));
        run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
            .arg("resize")
            .arg(&input)
            .arg("-o")
            .arg(&output)
            .args(["--image", "36", "--quiet"]));
        let said = run(Command::new(&py)
            .arg(&script)
            .arg("check")
            .arg(&input)
            .arg(&output)
            .arg("9"));
        assert!(said.starts_with("ok"), "{said}");
    }
}
