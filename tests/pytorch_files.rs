//! PyTorch checkpoint files: read, resized, written back and converted. The inputs are the
//! committed files in fixtures/torch/, written by the framework's own torch.save (and, for the
//! hostile ones, by hand with Python's zipfile); fixtures/torch/manifest.json records what the
//! framework says each holds (key paths, dtypes, shapes, storage offsets, strides, values).
//! The round trip through the framework's safe loader is scripts/torch_roundtrip.py (run by
//! hand; its last results are in DEVELOPERS.md).

mod common;

use common::{posgrid, s};

use std::path::{Path, PathBuf};

use posgrid::checkpoint::{Source, TensorSource};
use serde_json::Value;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures/torch")
        .join(name)
}

fn manifest() -> Value {
    let text = std::fs::read_to_string(fixture("manifest.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

/// A key path joined as posgrid names tensors: `/` between keys, `%` and `/` inside a string
/// key escaped, integer keys as `%{int N}`, list indices as numbers.
fn joined(path: &[Value], containers: &[Value]) -> String {
    let mut parts = Vec::new();
    for (i, key) in path.iter().enumerate() {
        let parent: Vec<Value> = path[..i].to_vec();
        let in_list = containers.iter().any(|c| {
            c["path"].as_array() == Some(&parent)
                && matches!(c["python_type"].as_str(), Some("list" | "tuple"))
        });
        parts.push(match key {
            Value::String(k) => k.replace('%', "%25").replace('/', "%2F"),
            Value::Number(n) if in_list => n.to_string(),
            Value::Number(n) => format!("%{{int {n}}}"),
            other => panic!("unexpected key {other}"),
        });
    }
    parts.join("/")
}

/// Little-endian bytes of the manifest's values in `dtype`.
fn encode(dtype: &str, values: &[Value]) -> Vec<u8> {
    let f = |v: &Value| {
        v.as_f64()
            .unwrap_or_else(|| v.as_bool().map_or(0.0, f64::from))
    };
    let i = |v: &Value| {
        v.as_i64()
            .unwrap_or_else(|| v.as_bool().map_or(0, i64::from))
    };
    values
        .iter()
        .flat_map(|v| match dtype {
            "F32" => (f(v) as f32).to_le_bytes().to_vec(),
            "F64" => f(v).to_le_bytes().to_vec(),
            "F16" => half::f16::from_f64(f(v)).to_le_bytes().to_vec(),
            "BF16" => half::bf16::from_f64(f(v)).to_le_bytes().to_vec(),
            "I64" => i(v).to_le_bytes().to_vec(),
            "I32" => (i(v) as i32).to_le_bytes().to_vec(),
            "I16" => (i(v) as i16).to_le_bytes().to_vec(),
            "I8" => vec![i(v) as i8 as u8],
            "U8" | "BOOL" => vec![i(v) as u8],
            d => panic!("dtype {d}"),
        })
        .collect()
}

#[test]
fn every_tensor_reads_as_the_framework_saved_it() {
    // Source: the framework's own description of each file (manifest.json), including
    // storage offsets, transposed and strided views, shared storages and every dtype.
    let m = manifest();
    let mut checked = 0;
    for (file, info) in m["files"].as_object().unwrap() {
        if info["format"] != "zip" || info["written_by"] != "torch.save" {
            continue;
        }
        let source = Source::open(fixture(file)).unwrap_or_else(|e| panic!("{file}: {e}"));
        let containers = info["containers"].as_array().cloned().unwrap_or_default();
        for t in info["tensors"].as_array().unwrap() {
            let name = joined(t["path"].as_array().unwrap(), &containers);
            let Some(entry) = source.find(&name) else {
                // A tensor object saved under two keys is one node, named by its first path.
                assert!(
                    info["tensors"]
                        .as_array()
                        .unwrap()
                        .iter()
                        .any(|o| o["storage"] == t["storage"] && o["path"] != t["path"]),
                    "{file}: {name} missing"
                );
                continue;
            };
            assert_eq!(
                entry.dtype.to_string(),
                t["dtype"].as_str().unwrap(),
                "{file}: {name}"
            );
            let shape: Vec<usize> = t["shape"]
                .as_array()
                .unwrap()
                .iter()
                .map(|d| d.as_u64().unwrap() as usize)
                .collect();
            assert_eq!(entry.shape, shape, "{file}: {name}");
            let want = encode(
                t["dtype"].as_str().unwrap(),
                t["values"].as_array().unwrap(),
            );
            assert_eq!(source.bytes(entry).unwrap(), want, "{file}: {name}");
            checked += 1;
        }
    }
    assert!(checked > 60, "only {checked} tensors checked");
}

#[test]
fn legacy_and_torchscript_files_are_refused_with_what_to_do() {
    for (file, says) in [("legacy.pth", "legacy"), ("scripted.pt", "TorchScript")] {
        let o = posgrid(&["scan", s(&fixture(file))]);
        assert_eq!(o.status.code(), Some(3), "{file}");
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(err.contains(says), "{file}: {err}");
    }
}

#[test]
fn hostile_files_are_refused_and_nothing_runs() {
    // Each file would create fixtures/torch/EXECUTED if its pickle were executed
    // (manifest.json, "hostile"); posgrid must refuse every one with exit 3 and write nothing.
    let marker = fixture("EXECUTED");
    let _ = std::fs::remove_file(&marker);
    let m = manifest();
    let dir = tempfile::tempdir().unwrap();
    for (file, info) in m["hostile"].as_object().unwrap() {
        let input = fixture(file);
        let out = dir.path().join("out.pth");
        for args in [
            vec!["scan", s(&input)],
            vec!["resize", s(&input), "-o", s(&out), "--grid", "6"],
        ] {
            let o = posgrid(&args);
            assert_eq!(
                o.status.code(),
                Some(3),
                "{file} ({}): {}",
                info["rule"],
                String::from_utf8_lossy(&o.stderr)
            );
            assert!(String::from_utf8_lossy(&o.stderr).contains(file.as_str()));
        }
    }
    assert!(!marker.exists(), "a pickle was executed");
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
}

/// Resize `file` to a 6x6 grid into `out`, returning the JSON report.
fn resize(file: &str, out: &Path, extra: &[&str]) -> Value {
    resize_path(&fixture(file), out, extra)
}

/// Resize `input` to a 6x6 grid (one class slot) into `out`; the JSON report of a run that
/// must succeed.
fn resize_path(input: &Path, out: &Path, extra: &[&str]) -> Value {
    let mut args = vec![
        "resize",
        s(input),
        "-o",
        s(out),
        "--grid",
        "6",
        "--slots",
        "1",
        "--json",
    ];
    args.extend(extra);
    let o = posgrid(&args);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}: {}",
        input.display(),
        String::from_utf8_lossy(&o.stderr)
    );
    serde_json::from_slice(&o.stdout).unwrap()
}

#[test]
fn written_back_every_other_tensor_is_unchanged_and_tables_match_safetensors_outputs() {
    let dir = tempfile::tempdir().unwrap();
    for file in [
        "plain.pth",
        "wrapped.pth",
        "ema.pth",
        "teacher_student.pth",
        "training.pth",
        "view.pth",
        "shared.pth",
        "parameters.pth",
        "f16.pth",
        "bf16.pth",
    ] {
        let out = dir.path().join(file);
        let report = resize(file, &out, &[]);
        let before = Source::open(fixture(file)).unwrap();
        let after = Source::open(&out).unwrap();
        let resized: Vec<&str> = report["tables"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t["name"].as_str().unwrap())
            .collect();
        assert!(!resized.is_empty(), "{file}");
        let names = |src: &Source| {
            src.entries()
                .iter()
                .map(|t| t.name.clone())
                .collect::<Vec<_>>()
        };
        assert_eq!(
            names(&before),
            names(&after),
            "{file}: same tensors, same order"
        );
        for (n, t) in before.entries().iter().enumerate() {
            let u = after.find(&t.name).unwrap();
            assert_eq!(t.dtype, u.dtype, "{file}: {}", t.name);
            if resized.contains(&t.name.as_str()) {
                // The same table resized into a safetensors file: the same bytes.
                let flat = dir.path().join(format!("{file}-{n}.safetensors"));
                let mut extra = vec!["--tensor", t.name.as_str()];
                if t.name.contains('/') {
                    extra.extend(["--state-dict", posgrid::selection::parent(&t.name)]);
                }
                resize(file, &flat, &extra);
                let flat = Source::open(&flat).unwrap();
                let inner = t.name.rsplit('/').next().unwrap();
                let f = flat.find(inner).unwrap();
                assert_eq!(
                    after.bytes(u).unwrap(),
                    flat.bytes(f).unwrap(),
                    "{file}: {}",
                    t.name
                );
            } else {
                assert_eq!(
                    before.bytes(t).unwrap(),
                    after.bytes(u).unwrap(),
                    "{file}: {}",
                    t.name
                );
            }
        }
    }
}

#[test]
fn written_records_are_aligned_and_carry_their_crc() {
    // The framework maps storages at 64-byte boundaries (its .storage_alignment record says
    // 64); the zip crate reads the archive and checks every record's CRC-32 as it reads it.
    use std::io::Read;
    let dir = tempfile::tempdir().unwrap();
    for (file, out_name) in [("training.pth", "t.pth"), ("plain.pth", "p.pth")] {
        let out = dir.path().join(out_name);
        resize(file, &out, &[]);
        let mut zip = zip::ZipArchive::new(std::fs::File::open(&out).unwrap()).unwrap();
        for i in 0..zip.len() {
            let mut member = zip.by_index(i).unwrap();
            assert_eq!(member.data_start().unwrap() % 64, 0, "{:?}", member.name());
            let mut data = Vec::new();
            member.read_to_end(&mut data).unwrap();
        }
    }
    // A conversion from safetensors too.
    let flat = dir.path().join("flat.safetensors");
    resize("plain.pth", &flat, &[]);
    let back = dir.path().join("back.pth");
    let o = posgrid(&["resize", s(&flat), "-o", s(&back), "--grid", "8"]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let mut zip = zip::ZipArchive::new(std::fs::File::open(&back).unwrap()).unwrap();
    for i in 0..zip.len() {
        let mut member = zip.by_index(i).unwrap();
        assert_eq!(member.data_start().unwrap() % 64, 0);
        std::io::copy(&mut member, &mut std::io::sink()).unwrap();
    }
    let reread = Source::open(&back).unwrap();
    assert_eq!(reread.find("pos_embed").unwrap().shape, vec![1, 65, 8]);
}

#[test]
fn flat_outputs_hold_one_state_dict() {
    let dir = tempfile::tempdir().unwrap();
    // One dict holds the table: it is picked, and its names lose the dict's path.
    let out = dir.path().join("w.safetensors");
    let report = resize("wrapped.pth", &out, &[]);
    let flat = Source::open(&out).unwrap();
    assert!(flat.find("pos_embed").is_some());
    assert!(flat.find("model/pos_embed").is_none());
    assert_eq!(report["dropped"], serde_json::json!([]));
    // Two dicts hold tables: the user must choose (exit 4, naming the flag).
    let o = posgrid(&[
        "resize",
        s(&fixture("ema.pth")),
        "-o",
        s(&dir.path().join("e.safetensors")),
        "--grid",
        "6",
    ]);
    assert_eq!(o.status.code(), Some(4));
    assert!(String::from_utf8_lossy(&o.stderr).contains("--state-dict"));
    // Chosen, with the data-parallel prefix stripped.
    let out = dir.path().join("s.safetensors");
    let report = resize(
        "teacher_student.pth",
        &out,
        &["--state-dict", "student", "--strip-prefix", "module."],
    );
    let flat = Source::open(&out).unwrap();
    assert!(flat.find("backbone.pos_embed").is_some());
    assert_eq!(
        report["tables"].as_array().unwrap().len(),
        1,
        "the teacher is not resized"
    );
    assert!(report["dropped"]
        .as_array()
        .unwrap()
        .iter()
        .any(|d| d == "teacher/module.backbone.pos_embed"));
}

#[test]
fn training_checkpoints_warn_of_stale_moments_and_can_keep_only_the_model() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("t.pth");
    let report = resize("training.pth", &out, &[]);
    let warnings = report["warnings"].to_string();
    assert!(warnings.contains("exp_avg"), "{warnings}");
    assert!(warnings.contains("--model-only"), "{warnings}");
    // The namespace and numpy scalar are carried through inert, and named.
    assert!(warnings.contains("argparse.Namespace"), "{warnings}");
    let out = dir.path().join("m.pth");
    let report = resize("training.pth", &out, &["--model-only"]);
    let dropped: Vec<&str> = report["dropped"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| d.as_str().unwrap())
        .collect();
    for value in ["epoch", "args", "scaler"] {
        assert!(dropped.contains(&value), "{dropped:?}");
    }
    let model = Source::open(&out).unwrap();
    assert!(model.find("pos_embed").is_some());
    assert!(model.entries().iter().all(|t| !t.name.contains('/')));
}

fn edge(name: &str) -> PathBuf {
    fixture("edge").join(name)
}

#[test]
fn storages_outside_named_tensors_are_kept_when_written_back() {
    // A bare storage beside the weights, and a parameter carrying a tensor attribute: both
    // written by the framework (fixtures/torch/make_edge_cases.py). Their records must survive.
    let dir = tempfile::tempdir().unwrap();
    for file in ["bare_storage.pth", "param_state_tensor.pth"] {
        let out = dir.path().join(file);
        resize_path(&edge(file), &out, &[]);
        let before = zip::ZipArchive::new(std::fs::File::open(edge(file)).unwrap()).unwrap();
        let after = zip::ZipArchive::new(std::fs::File::open(&out).unwrap()).unwrap();
        let storages = |z: &zip::ZipArchive<std::fs::File>| {
            z.file_names_raw()
                .filter(|n| n.windows(6).any(|w| w == b"/data/"))
                .count()
        };
        // The table's old storage is replaced by a new one: the count stays.
        assert_eq!(storages(&before), storages(&after), "{file}");
    }
}

#[test]
fn empty_and_expanded_tensors_are_read_or_refused_without_a_crash() {
    let dir = tempfile::tempdir().unwrap();
    // Empty and 0-dim tensors, as the framework writes them: converted like any other.
    let out = dir.path().join("z.safetensors");
    resize_path(&edge("zero_dims.pth"), &out, &[]);
    let flat = Source::open(&out).unwrap();
    assert_eq!(flat.find("empty_t").unwrap().shape, vec![0, 5]);
    assert_eq!(flat.find("scalar").unwrap().shape, Vec::<usize>::new());
    // 2^61 doubles expanded from one stored value: more bytes than a file can hold.
    let o = posgrid(&["scan", s(&edge("expand_wrap.pth"))]);
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stderr).contains("bias_all"));
}

#[test]
fn dangerous_objects_are_refused_wherever_they_sit() {
    // os.system handed to functools.partial, and timeit.timeit called on text: neither is the
    // callable of the call itself, and both must be refused, with nothing run.
    let marker = fixture("EXECUTED");
    for file in ["partial_system.pth", "timeit_text.pth"] {
        let o = posgrid(&["scan", s(&edge(file))]);
        assert_eq!(o.status.code(), Some(3), "{file}");
        assert!(
            String::from_utf8_lossy(&o.stderr).contains("never needs"),
            "{file}"
        );
    }
    assert!(!marker.exists());
}

#[test]
fn flat_outputs_take_keys_as_they_are_and_never_repeat_a_name() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("k.safetensors");
    resize_path(&edge("key_escapes.pth"), &out, &[]);
    let flat = Source::open(&out).unwrap();
    assert!(flat.find("a/b").is_some() && flat.find("100%").is_some());
    // module.head.bias and head.bias both become head.bias: refused, naming both.
    let input = edge("strip_dup.pth");
    let out = dir.path().join("d.safetensors");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "6",
        "--slots",
        "1",
        "--strip-prefix",
        "module.",
    ]);
    assert_eq!(o.status.code(), Some(4));
    assert!(String::from_utf8_lossy(&o.stderr).contains("model/module.head.bias"));
    assert!(!out.exists());
    // Flags that would be ignored are usage errors.
    let pth = dir.path().join("p.pth");
    for extra in [["--state-dict", "model"], ["--strip-prefix", "module."]] {
        let mut args = vec!["resize", s(&input), "-o", s(&pth), "--grid", "6"];
        args.extend(extra);
        assert_eq!(posgrid(&args).status.code(), Some(2), "{extra:?}");
    }
}

#[test]
fn ambiguous_names_and_lying_archives_are_refused() {
    for (file, says) in [
        ("dup_opaque_key.pth", "same name"),
        ("zip64_count_lie.pth", "ZIP"),
    ] {
        let o = posgrid(&["scan", s(&edge(file))]);
        assert_eq!(o.status.code(), Some(3), "{file}");
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(err.contains(says), "{file}: {err}");
        assert!(!err.contains("npz"), "{file}: {err}");
    }
}

#[test]
fn tensors_on_untyped_storages_are_read_and_kept() {
    // uint16 and float8 tensors, which the framework saves on untyped storages with their
    // element type named in the call (fixtures/torch/make_edge_cases.py). Values: 7 as uint16;
    // 0.5, -2 and 448 in float8 e4m3 are 0x30, 0xC0 and 0x7E (the OCP 8-bit floating point
    // specification: bias 7, 448 its largest normal value).
    let source = Source::open(edge("untyped.pth")).unwrap();
    let mask = source.find("mask").unwrap();
    assert_eq!(mask.dtype.to_string(), "U16");
    assert_eq!(source.bytes(mask).unwrap(), [7, 0, 7, 0, 7, 0, 7, 0]);
    let scales = source.find("scales").unwrap();
    assert_eq!(scales.dtype.to_string(), "F8_E4M3");
    assert_eq!(source.bytes(scales).unwrap(), [0x30, 0xC0, 0x7E]);
    // Written back beside a resized table, and converted: the same bytes.
    let dir = tempfile::tempdir().unwrap();
    for out in ["u.pth", "u.safetensors"] {
        let out = dir.path().join(out);
        resize_path(&edge("untyped.pth"), &out, &[]);
        let after = Source::open(&out).unwrap();
        for name in ["mask", "scales"] {
            let (a, b) = (source.find(name).unwrap(), after.find(name).unwrap());
            assert_eq!(a.dtype, b.dtype);
            assert_eq!(source.bytes(a).unwrap(), after.bytes(b).unwrap(), "{name}");
        }
    }
}
