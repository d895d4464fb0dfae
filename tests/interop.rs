//! Interop with the real clients: files written by the reference safetensors library and numpy
//! (F32, F16, BF16, with metadata) are read by posgrid, and posgrid's outputs load there with
//! every untouched tensor equal and the table of the expected shape. A model directory's output
//! (weights, configuration files, the rest) reads there too: Python's own `json` module reads
//! the configurations at the new size, the reference library the weights.
//!
//! The Python side runs in a venv with tests/interop/requirements.txt: `$POSGRID_PYTHON` if
//! set (CI sets it), otherwise one made under target/. If it cannot be made, the test fails.

use std::path::{Path, PathBuf};
use std::process::Command;

/// The venv's Python, made once per test run: the tests run in parallel, and two of them
/// creating the same venv at once break each other.
fn python() -> PathBuf {
    static PYTHON: std::sync::OnceLock<PathBuf> = std::sync::OnceLock::new();
    PYTHON.get_or_init(make_python).clone()
}

fn make_python() -> PathBuf {
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

/// Resize `input` to 36 px (a 9x9 grid) and have the Python side check the output with `verb`.
fn resize_and_check(py: &Path, script: &Path, verb: &str, input: &Path, output: &Path) {
    run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .arg("resize")
        .arg(input)
        .arg("-o")
        .arg(output)
        .args(["--image", "36", "--quiet"]));
    check_with(py, script, verb, input, output, "9");
}

/// Have the Python side check `output` against `input` with `verb` (the new grid's side given).
fn check_with(py: &Path, script: &Path, verb: &str, input: &Path, output: &Path, side: &str) {
    let said = run(Command::new(py)
        .arg(script)
        .arg(verb)
        .arg(input)
        .arg(output)
        .arg(side));
    assert!(said.starts_with("ok"), "{said}");
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
        resize_and_check(&py, &script, "check", &input, &output);
    }
}

fn posgrid(args: &[&std::ffi::OsStr]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .args(args)
        .output()
        .unwrap()
}

#[test]
fn npz_archives_written_by_numpy_round_trip() {
    let py = python();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/interop/clients.py");
    let dir = tempfile::tempdir().unwrap();
    run(Command::new(&py)
        .arg(&script)
        .arg("write-npz")
        .arg(dir.path()));
    for (input, output) in [
        ("plain.npz", "plain-36.npz"),
        ("compressed.npz", "compressed-36.npz"),
        ("compressed.npz", "compressed-36.safetensors"),
    ] {
        let input = dir.path().join(input);
        let scan = run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
            .arg("scan")
            .arg(&input)
            .arg("--json"));
        let v: serde_json::Value = serde_json::from_str(&scan).unwrap();
        assert_eq!(v["format"], "npz");
        assert_eq!(v["tables"][0]["grid"], serde_json::json!([6, 6]));
        assert_eq!(v["tables"][0]["patch"], 4, "channels-last embedding/kernel");
        let output = dir.path().join(output);
        resize_and_check(&py, &script, "check-npz", &input, &output);
    }
    // A Fortran-order table is refused with the reason; nothing is written.
    let fortran = dir.path().join("fortran.npz");
    let out = dir.path().join("fortran-36.npz");
    let o = posgrid(&[
        "resize".as_ref(),
        fortran.as_os_str(),
        "-o".as_ref(),
        out.as_os_str(),
        "--grid".as_ref(),
        "9".as_ref(),
        "--tensor".as_ref(),
        "Transformer/posembed_input/pos_embedding".as_ref(),
    ]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(6), "{err}");
    assert!(err.contains("Fortran"), "{err}");
    assert!(!out.exists());
}

#[test]
fn sharded_sets_from_the_reference_library_round_trip() {
    let py = python();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/interop/clients.py");
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("set");
    std::fs::create_dir(&input).unwrap();
    run(Command::new(&py)
        .arg(&script)
        .arg("write-sharded")
        .arg(&input));
    let index = input.join("model.safetensors.index.json");
    for target in [&input, &index] {
        let scan = run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
            .arg("scan")
            .arg(target)
            .arg("--json"));
        let v: serde_json::Value = serde_json::from_str(&scan).unwrap();
        assert_eq!(v["format"], "safetensors-sharded");
        assert_eq!(
            v["tables"][0]["companions"],
            serde_json::json!(["vision_model.embeddings.position_ids"])
        );
    }
    let output = dir.path().join("set-36");
    let json = run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .arg("resize")
        .arg(&input)
        .arg("-o")
        .arg(&output)
        .args(["--image", "36", "--json"]));
    let v: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(
        v["shards_copied"],
        serde_json::json!(["model-00003-of-00003.safetensors"])
    );
    assert_eq!(v["shards_rewritten"].as_array().unwrap().len(), 2);
    let said = run(Command::new(&py)
        .arg(&script)
        .arg("check-sharded")
        .arg(&input)
        .arg(&output)
        .arg("9"));
    assert!(said.starts_with("ok"), "{said}");
    // An existing OUTDIR needs --force; a broken set writes nothing.
    let o = posgrid(&[
        "resize".as_ref(),
        input.as_os_str(),
        "-o".as_ref(),
        output.as_os_str(),
        "--grid".as_ref(),
        "9".as_ref(),
    ]);
    assert_eq!(o.status.code(), Some(5));
    std::fs::remove_file(input.join("model-00003-of-00003.safetensors")).unwrap();
    let other = dir.path().join("set-other");
    let o = posgrid(&[
        "resize".as_ref(),
        input.as_os_str(),
        "-o".as_ref(),
        other.as_os_str(),
        "--grid".as_ref(),
        "9".as_ref(),
    ]);
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(!other.exists());
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert_eq!(
        leftovers.len(),
        2,
        "no temporary directory left: {leftovers:?}"
    );
}

#[test]
fn model_directories_read_back_with_json_and_the_reference_library() {
    let py = python();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/interop/clients.py");
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("model");
    std::fs::create_dir(&input).unwrap();
    run(Command::new(&py)
        .arg(&script)
        .arg("write-model-dir")
        .arg(&input));
    let output = dir.path().join("model-36");
    let json = run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .arg("resize")
        .arg(&input)
        .arg("-o")
        .arg(&output)
        .args(["--image", "36", "--json"]));
    let v: serde_json::Value = serde_json::from_str(&json).unwrap();
    // config.json's image_size; the preprocessing crop and shortest edge (24 px, the old size).
    assert_eq!(v["config_changes"].as_array().unwrap().len(), 3, "{v}");
    check_with(&py, &script, "check-model-dir", &input, &output, "9");
}

#[test]
fn tables_moved_to_the_end_of_the_data_area_load_in_the_reference_library() {
    // Two one-block tables between large tensors: posgrid moves the resized tables to the end
    // of the data area so the tensors after them keep their offsets modulo the block; the
    // reference library and numpy must read that layout.
    let py = python();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/interop/clients.py");
    let dir = tempfile::tempdir().unwrap();
    run(Command::new(&py)
        .arg(&script)
        .arg("write-moving")
        .arg(dir.path()));
    let input = dir.path().join("moving.safetensors");
    let output = dir.path().join("moving-5.safetensors");
    run(Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .arg("resize")
        .arg(&input)
        .arg("-o")
        .arg(&output)
        .args(["--grid", "5", "--quiet"]));
    check_with(&py, &script, "check-moving", &input, &output, "5");
}
