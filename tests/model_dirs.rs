//! Model directories end to end with the binary: a directory holding one checkpoint (or a
//! sharded set) beside its configuration, preprocessing configuration and other files, resized
//! with `posgrid resize DIR -o OUTDIR --image 384` (and `--window` for windowed models).
//!
//! Sources beside each check:
//! - the layouts and key names (`config.json` with `image_size`, `patch_size`, `window_size`,
//!   `hidden_size`, `max_position_embeddings`, `depths`, `num_heads`, `global_attn_indexes`, a
//!   nested `vision_config` and `text_config`;
//!   `preprocessor_config.json` with `size` as `{height, width}` or `{shortest_edge}` and
//!   `crop_size`; `pytorch_model.bin`, `training_args.bin`, `.gitattributes`, `README.md`,
//!   tokenizer files; shard names `model-0000i-of-0000n.safetensors` and the index's
//!   `metadata.total_size` and `weight_map`) are those a widely used model library and its hub
//!   write: common practice, from memory. Numbers are invented;
//! - the JSON files are written here in the layout that library writes (`indent=2`, sorted keys,
//!   a final newline), with the values posgrid must change left as `@NAME@` slots: the expected
//!   output is the same text with the new values in the slots, so every byte outside them is
//!   compared, independently of posgrid's own spans;
//! - serde_json (RFC 8259) reads every output configuration, compared key by key with the input
//!   plus the expected changes;
//! - the rules what changes (issue 15): `image_size` and `patch_size` at the top level or in a
//!   vision section take the new size; a preprocessing `size` or `crop_size` only where it equals
//!   the old input size (a 256 resize before a 224 crop stays, with a warning once the crop
//!   outgrows it); `window_size` takes the new window only where it equals a window that moves;
//! - window-relative index buffers are compared with the construction written in this file from
//!   its description (common practice of the trade); the per-axis weights with the same file
//!   resized alone, itself checked against torch's interpolate in tests/kinds_resize.rs;
//! - safetensors weights are read with the reference `safetensors` crate; PyTorch weights with
//!   posgrid's reader, itself checked against the framework's own manifest in
//!   tests/pytorch_files.rs, and the torch.save-written fixture fixtures/torch/plain.pth;
//! - the class slot is not part of the grid and is kept bit-exact; position ids count 0..n
//!   (common practice of the trade).

mod common;

use std::collections::BTreeMap;
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use common::*;
use posgrid::checkpoint::{Source, TensorSource};
use safetensors::{Dtype, SafeTensors};
use serde_json::{json, Value};

const D: usize = 16;

// ---------------------------------------------------------------------------------------------
// Configuration texts with slots for the values posgrid must change

/// A single-tower image classifier's config.json. `hidden_size` 16, `encoder_stride` 16 and
/// `max_position_embeddings` 224 must stay: they are not the input size, even where their
/// numbers equal it. The label strings hold a JSON escape and the old size as text.
const VIT_CONFIG: &str = r#"{
  "architectures": [
    "ViTForImageClassification"
  ],
  "attention_probs_dropout_prob": 0.0,
  "encoder_stride": 16,
  "hidden_act": "gelu",
  "hidden_dropout_prob": 0.0,
  "hidden_size": 16,
  "id2label": {
    "0": "caf\u00e9 224",
    "1": "tabby"
  },
  "image_size": @IMAGE@,
  "initializer_range": 0.02,
  "intermediate_size": 64,
  "label2id": {
    "caf\u00e9 224": 0,
    "tabby": 1
  },
  "layer_norm_eps": 1e-12,
  "max_position_embeddings": 224,
  "model_type": "vit",
  "num_attention_heads": 2,
  "num_channels": 3,
  "num_hidden_layers": 1,
  "patch_size": 16,
  "qkv_bias": true,
  "torch_dtype": "float32",
  "transformers_version": "4.40.0"
}
"#;

/// A preprocessing configuration resizing straight to the input size ({height, width}) with a
/// crop of the same size written as one number: both change.
const PRE_HEIGHT_WIDTH: &str = r#"{
  "crop_size": @CROP@,
  "do_center_crop": true,
  "do_normalize": true,
  "do_rescale": true,
  "do_resize": true,
  "image_mean": [
    0.5,
    0.5,
    0.5
  ],
  "image_processor_type": "ViTImageProcessor",
  "image_std": [
    0.5,
    0.5,
    0.5
  ],
  "resample": 2,
  "rescale_factor": 0.00392156862745098,
  "size": {
    "height": @HEIGHT@,
    "width": @WIDTH@
  }
}
"#;

/// A preprocessing configuration resizing the short side to 256, then cropping 224: the crop
/// changes, the 256 resize is another setting and stays. Written on one line, no final newline.
const PRE_RESIZE_256: &str = r#"{"do_center_crop": true, "do_resize": true, "size": {"shortest_edge": 256}, "crop_size": {"height": @CROP_H@, "width": @CROP_W@}, "resample": 3, "image_mean": [0.48145466, 0.4578275, 0.40821073]}"#;

/// An image-text model's config.json: the vision tower's size in `vision_config`; the text
/// tower's numbers (one equal to the old input size) stay.
const DUAL_CONFIG: &str = r#"{
  "architectures": [
    "CLIPModel"
  ],
  "initializer_factor": 1.0,
  "logit_scale_init_value": 2.6592,
  "model_type": "clip",
  "projection_dim": 8,
  "text_config": {
    "hidden_size": 224,
    "intermediate_size": 32,
    "max_position_embeddings": 77,
    "model_type": "clip_text_model",
    "num_attention_heads": 2,
    "num_hidden_layers": 1,
    "vocab_size": 49408
  },
  "torch_dtype": "float32",
  "transformers_version": "4.40.0",
  "vision_config": {
    "hidden_size": 8,
    "image_size": @IMAGE@,
    "intermediate_size": 32,
    "model_type": "clip_vision_model",
    "num_attention_heads": 2,
    "num_hidden_layers": 1,
    "patch_size": 16
  }
}
"#;

/// The image-text model's preprocessing: shortest edge and crop both at the old input size.
const DUAL_PREPROCESSOR: &str = r#"{
  "crop_size": {
    "height": @CROP_H@,
    "width": @CROP_W@
  },
  "do_center_crop": true,
  "do_convert_rgb": true,
  "do_normalize": true,
  "do_rescale": true,
  "do_resize": true,
  "image_mean": [
    0.48145466,
    0.4578275,
    0.40821073
  ],
  "image_processor_type": "CLIPImageProcessor",
  "image_std": [
    0.26862954,
    0.26130258,
    0.27577711
  ],
  "resample": 3,
  "rescale_factor": 0.00392156862745098,
  "size": {
    "shortest_edge": @EDGE@
  }
}
"#;

/// Tokenizer files of the image-text model: JSON beside the weights that records no image size.
const TOKENIZER_CONFIG: &str = r#"{
  "bos_token": "<|startoftext|>",
  "do_lower_case": true,
  "eos_token": "<|endoftext|>",
  "model_max_length": 77,
  "pad_token": "<|endoftext|>",
  "tokenizer_class": "CLIPTokenizer"
}
"#;
const SPECIAL_TOKENS: &str = r#"{"bos_token": "<|startoftext|>", "eos_token": "<|endoftext|>"}"#;

/// The hub's attribute file (hidden) and a model card mentioning the size in prose.
const GITATTRIBUTES: &str = "*.safetensors filter=lfs diff=lfs merge=lfs -text\n*.bin filter=lfs diff=lfs merge=lfs -text\n";
const README: &str = "# A tiny test model\n\nTrained at image_size 224 with patch_size 16.\n";

/// One configuration file: its text with slots, the values of the slots before and after, the
/// `config_changes` entries expected for it (key path, old, new), and the parts of the one
/// warning expected about it (none: no warning).
struct Config {
    file: &'static str,
    template: &'static str,
    slots: Vec<(&'static str, &'static str, &'static str)>,
    changes: Vec<(Vec<&'static str>, Value, Value)>,
    warns: &'static [&'static str],
}

impl Config {
    fn fill(&self, new: bool) -> String {
        self.slots
            .iter()
            .fold(self.template.to_string(), |text, (slot, old, fresh)| {
                text.replace(slot, if new { fresh } else { old })
            })
    }
    fn before(&self) -> String {
        self.fill(false)
    }
    fn after(&self) -> String {
        self.fill(true)
    }
    fn write(&self, dir: &Path) {
        std::fs::write(dir.join(self.file), self.before()).unwrap();
    }
    /// The `config_changes` entries as posgrid's JSON report writes them.
    fn expected_entries(&self) -> Vec<Value> {
        self.changes
            .iter()
            .map(
                |(path, old, new)| json!({"file": self.file, "path": path, "old": old, "new": new}),
            )
            .collect()
    }
}

fn vit_config(old: &'static str) -> Config {
    Config {
        file: "config.json",
        template: VIT_CONFIG,
        slots: vec![("@IMAGE@", old, "384")],
        changes: vec![(
            vec!["image_size"],
            json!(old.parse::<u64>().unwrap()),
            json!(384),
        )],
        warns: &[],
    }
}

fn pre_height_width() -> Config {
    Config {
        file: "preprocessor_config.json",
        template: PRE_HEIGHT_WIDTH,
        slots: vec![
            ("@CROP@", "224", "384"),
            ("@HEIGHT@", "224", "384"),
            ("@WIDTH@", "224", "384"),
        ],
        changes: vec![
            (vec!["crop_size"], json!(224), json!(384)),
            (
                vec!["size"],
                json!({"height": 224, "width": 224}),
                json!({"height": 384, "width": 384}),
            ),
        ],
        warns: &[],
    }
}

fn pre_resize_256() -> Config {
    Config {
        file: "preprocessor_config.json",
        template: PRE_RESIZE_256,
        slots: vec![("@CROP_H@", "224", "384"), ("@CROP_W@", "224", "384")],
        changes: vec![(
            vec!["crop_size"],
            json!({"height": 224, "width": 224}),
            json!({"height": 384, "width": 384}),
        )],
        // The kept 256 resize no longer covers the 384 crop: 256 × 384 / 224 = 438.9 keeps the
        // old ratio (computed by hand).
        warns: &[
            "crop_size",
            "size stays shortest edge 256",
            "384x384",
            r#"{"shortest_edge": 439}"#,
        ],
    }
}

fn dual_config() -> Config {
    Config {
        file: "config.json",
        template: DUAL_CONFIG,
        slots: vec![("@IMAGE@", "224", "384")],
        changes: vec![(vec!["vision_config", "image_size"], json!(224), json!(384))],
        warns: &[],
    }
}

fn dual_preprocessor() -> Config {
    Config {
        file: "preprocessor_config.json",
        template: DUAL_PREPROCESSOR,
        slots: vec![
            ("@CROP_H@", "224", "384"),
            ("@CROP_W@", "224", "384"),
            ("@EDGE@", "224", "384"),
        ],
        changes: vec![
            (
                vec!["crop_size"],
                json!({"height": 224, "width": 224}),
                json!({"height": 384, "width": 384}),
            ),
            (
                vec!["size"],
                json!({"shortest_edge": 224}),
                json!({"shortest_edge": 384}),
            ),
        ],
        warns: &[],
    }
}

/// A config.json with only the two size keys (for the sharded set and the fixture file).
const SMALL_CONFIG: &str =
    "{\n  \"image_size\": @IMAGE@,\n  \"model_type\": \"vit\",\n  \"patch_size\": @PATCH@\n}\n";

fn small_config(old_image: &'static str, patch: &'static str) -> Config {
    Config {
        file: "config.json",
        template: SMALL_CONFIG,
        slots: vec![("@IMAGE@", old_image, "384"), ("@PATCH@", patch, patch)],
        changes: vec![(
            vec!["image_size"],
            json!(old_image.parse::<u64>().unwrap()),
            json!(384),
        )],
        warns: &[],
    }
}

// ---------------------------------------------------------------------------------------------
// Weights

/// The tensors of a small single-tower model: a 14x14 grid of 16-pixel patches (224 px) and
/// one class slot.
fn vit_tensors(seed: u64) -> Vec<T> {
    let mut tensors = table_and_kernel(14, 16, seed);
    tensors.extend([
        floats(
            "cls_token",
            Dtype::F32,
            &[1, 1, D],
            &noise(D, seed + 2, 0.1),
        ),
        floats(
            "head.weight",
            Dtype::F32,
            &[2, D],
            &noise(2 * D, seed + 3, 0.1),
        ),
    ]);
    tensors
}

/// A position table on a `grid`x`grid` grid with one class slot, and a patch kernel of
/// `patch`-pixel patches beside it.
fn table_and_kernel(grid: usize, patch: usize, seed: u64) -> Vec<T> {
    vec![
        floats(
            "pos_embed",
            Dtype::F32,
            &[1, 1 + grid * grid, D],
            &smooth_table(1, grid, grid, D, seed),
        ),
        floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[D, 3, patch, patch],
            &noise(D * 3 * patch * patch, seed + 1, 0.1),
        ),
    ]
}

fn write_vit(dir: &Path, file: &str) -> PathBuf {
    write(dir, file, &vit_tensors(1), Some(&[("format", "pt")]))
}

/// Every tensor of the output equal to the input's (name, dtype, shape, bytes) except `table`,
/// which has `shape` and its first row (the class slot) kept, and the position-id tensors in
/// `ids`, which count 0..n over the new table's positions. The input's metadata is kept.
fn check_safetensors(input: &Path, output: &Path, table: &str, shape: &[usize], ids: &[&str]) {
    let (a_bytes, b_bytes) = (
        std::fs::read(input).unwrap(),
        std::fs::read(output).unwrap(),
    );
    let (a, b) = (
        SafeTensors::deserialize(&a_bytes).unwrap(),
        SafeTensors::deserialize(&b_bytes).unwrap(),
    );
    let mut names_a = a.names();
    let mut names_b = b.names();
    names_a.sort();
    names_b.sort();
    assert_eq!(names_a, names_b, "{}", output.display());
    for name in names_a {
        let (t, u) = (a.tensor(name).unwrap(), b.tensor(name).unwrap());
        assert_eq!(t.dtype(), u.dtype(), "{name}");
        if name == table {
            assert_eq!(u.shape(), shape, "{name}");
            let width = shape[shape.len() - 1];
            let row = t.data().len() / t.shape().iter().product::<usize>() * width;
            assert_eq!(u.data()[..row], t.data()[..row], "{name}: class slot kept");
        } else if ids.contains(&name) {
            let n = shape[shape.len() - 2];
            assert_eq!(u.shape(), [1, n], "{name}");
            let values: Vec<i64> = u
                .data()
                .chunks(8)
                .map(|c| i64::from_le_bytes(c.try_into().unwrap()))
                .collect();
            assert_eq!(values, (0..n as i64).collect::<Vec<_>>(), "{name}");
        } else {
            assert_eq!((t.shape(), t.data()), (u.shape(), u.data()), "{name}");
        }
    }
    let (_, meta_a) = SafeTensors::read_metadata(&a_bytes).unwrap();
    let (_, meta_b) = SafeTensors::read_metadata(&b_bytes).unwrap();
    for (k, v) in meta_a.metadata().clone().unwrap_or_default() {
        assert_eq!(
            meta_b.metadata().as_ref().and_then(|m| m.get(&k)),
            Some(&v),
            "metadata {k}"
        );
    }
}

/// The same check for PyTorch files, read through posgrid's reader.
fn check_pytorch(input: &Path, output: &Path, table: &str, shape: &[usize]) {
    let (a, b) = (Source::open(input).unwrap(), Source::open(output).unwrap());
    let names = |s: &Source| {
        let mut v: Vec<String> = s.entries().iter().map(|t| t.name.clone()).collect();
        v.sort();
        v
    };
    assert_eq!(names(&a), names(&b));
    for t in a.entries() {
        let u = b.find(&t.name).unwrap();
        assert_eq!(t.dtype, u.dtype, "{}", t.name);
        let (x, y) = (a.bytes(t).unwrap(), b.bytes(u).unwrap());
        if t.name == table {
            assert_eq!(u.shape, shape, "{}", t.name);
            let width = *t.shape.last().unwrap();
            let row = x.len() / t.shape.iter().product::<usize>() * width;
            assert_eq!(y[..row], x[..row], "class slot kept");
        } else {
            assert_eq!((&t.shape, x), (&u.shape, y), "{}", t.name);
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Running and comparing

fn resize(input: &Path, out: &Path, extra: &[&str]) -> Output {
    let mut args = vec!["resize", s(input), "-o", s(out)];
    args.extend(extra);
    posgrid(&args)
}

/// The warnings of a report.
fn warnings(report: &Value) -> Vec<&str> {
    report["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(Value::as_str)
        .collect()
}

/// The first warning of `report` that `matches`; the test fails, showing the report, if none.
fn warning(report: &Value, matches: impl Fn(&str) -> bool) -> &str {
    warnings(report)
        .into_iter()
        .find(|w| matches(w))
        .unwrap_or_else(|| panic!("no such warning: {report}"))
}

/// A run that must succeed with `--json`: its report.
fn resize_json(input: &Path, out: &Path, extra: &[&str]) -> Value {
    let mut args = vec!["--json"];
    args.extend(extra);
    let o = resize(input, out, &args);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    serde_json::from_slice(&o.stdout).unwrap()
}

/// Every regular file of `dir` (not recursive): name and bytes.
fn snapshot(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap())
        .filter(|e| e.file_type().unwrap().is_file())
        .map(|e| {
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect()
}

/// `entries` sorted by their JSON text, to compare lists whose order is not specified.
fn sorted(entries: &[Value]) -> Vec<Value> {
    let mut v = entries.to_vec();
    v.sort_by_key(|e| e.to_string());
    v
}

fn set_path(value: &mut Value, path: &[&str], new: Value) {
    let (last, parents) = path.split_last().unwrap();
    let mut at = value;
    for key in parents {
        at = &mut at[*key];
    }
    assert!(at.get(*last).is_some(), "{path:?} not in the input");
    at[*last] = new;
}

/// The output configuration: byte for byte the input with the new values in their slots; read
/// as JSON, the input with exactly the expected keys changed.
fn check_config(config: &Config, out_dir: &Path) {
    let got = std::fs::read_to_string(out_dir.join(config.file)).unwrap();
    let want = config.after();
    if got != want {
        let at = got
            .bytes()
            .zip(want.bytes())
            .position(|(a, b)| a != b)
            .unwrap_or(got.len().min(want.len()));
        panic!(
            "{}: differs from byte {at}\n--- got\n{got}\n--- want\n{want}",
            config.file
        );
    }
    let mut expected: Value = serde_json::from_str(&config.before()).unwrap();
    for (path, old, new) in &config.changes {
        let mut at = &expected;
        for key in path {
            at = &at[*key];
        }
        assert_eq!(at, old, "{}: {path:?} before", config.file);
        set_path(&mut expected, path, new.clone());
    }
    let read: Value = serde_json::from_str(&got).unwrap();
    assert_eq!(read, expected, "{}", config.file);
}

/// [`check_directory_with`] for a resize to 384 px.
fn check_directory(dir: &Path, configs: &[Config], weights: &[&str]) -> PathBuf {
    check_directory_with(dir, configs, weights, &["--image", "384"])
}

/// Resize `dir` with `args` into a fresh OUTDIR and check the directory as a whole: the same
/// file names; each configuration changed as `configs` says and reported in `config_changes`,
/// with the warnings it expects; every file that is neither weights nor a changed configuration
/// byte-identical; then the same with `--keep-config`, which leaves every configuration
/// byte-identical. The input directory is unchanged. `weights` names the files the caller
/// checks; returns OUTDIR.
fn check_directory_with(
    dir: &Path,
    configs: &[Config],
    weights: &[&str],
    args: &[&str],
) -> PathBuf {
    let before = snapshot(dir);
    let parent = dir.parent().unwrap();
    let out = parent.join("out");
    let report = resize_json(dir, &out, args);
    assert_eq!(entries(&out), entries(dir), "the input's file names");
    for config in configs {
        check_config(config, &out);
    }
    let expected: Vec<Value> = configs.iter().flat_map(Config::expected_entries).collect();
    assert_eq!(
        sorted(report["config_changes"].as_array().unwrap()),
        sorted(&expected),
        "config_changes"
    );
    // Problems with a configuration file are warnings that start with its name.
    let all = warnings(&report);
    for config in configs {
        let prefix = format!("{}:", config.file);
        let about: Vec<&str> = all
            .iter()
            .copied()
            .filter(|w| w.starts_with(&prefix))
            .collect();
        if config.warns.is_empty() {
            assert!(
                about.is_empty(),
                "no warning about {}: {about:?}",
                config.file
            );
        } else {
            assert_eq!(
                about.len(),
                1,
                "one warning about {}: {about:?}",
                config.file
            );
            for part in config.warns {
                assert!(about[0].contains(part), "{part}: {}", about[0]);
            }
        }
    }
    let changed: Vec<&str> = configs
        .iter()
        .filter(|c| !c.changes.is_empty())
        .map(|c| c.file)
        .collect();
    let after = snapshot(&out);
    for (name, bytes) in &before {
        if !weights.contains(&name.as_str()) && !changed.contains(&name.as_str()) {
            assert_eq!(&after[name], bytes, "{name} copied byte for byte");
        }
    }

    let kept = parent.join("out-kept");
    let mut keep_args = args.to_vec();
    keep_args.push("--keep-config");
    let report = resize_json(dir, &kept, &keep_args);
    assert_eq!(report["config_changes"], json!([]));
    assert_eq!(entries(&kept), entries(dir));
    let kept_files = snapshot(&kept);
    for (name, bytes) in &before {
        if !weights.contains(&name.as_str()) {
            assert_eq!(&kept_files[name], bytes, "--keep-config: {name} as it was");
        }
    }
    for name in weights {
        assert_eq!(kept_files[*name], after[*name], "{name}: same weights");
    }
    std::fs::remove_dir_all(&kept).unwrap();
    assert_eq!(snapshot(dir), before, "the input directory is unchanged");
    out
}

fn model_dir(root: &Path) -> PathBuf {
    let dir = root.join("model");
    std::fs::create_dir(&dir).unwrap();
    dir
}

fn write_side_files(dir: &Path) {
    std::fs::write(dir.join(".gitattributes"), GITATTRIBUTES).unwrap();
    std::fs::write(dir.join("README.md"), README).unwrap();
}

// ---------------------------------------------------------------------------------------------
// 1. Layouts

#[test]
fn single_safetensors_with_config_and_preprocessing() {
    for pre in [pre_height_width(), pre_resize_256()] {
        let root = tempfile::tempdir().unwrap();
        let dir = model_dir(root.path());
        let weights = write_vit(&dir, "model.safetensors");
        let configs = [vit_config("224"), pre];
        for c in &configs {
            c.write(&dir);
        }
        write_side_files(&dir);
        let scan = posgrid(&["scan", s(&dir), "--json"]);
        assert_eq!(code(&scan), 0, "{}", stderr(&scan));
        let scan: Value = serde_json::from_slice(&scan.stdout).unwrap();
        assert_eq!(scan["tables"][0]["grid"], json!([14, 14]));

        let out = check_directory(&dir, &configs, &["model.safetensors"]);
        let new = out.join("model.safetensors");
        check_safetensors(&weights, &new, "pos_embed", &[1, 577, D], &[]);
        // The weights are those of the file resized alone.
        let alone = root.path().join("alone.safetensors");
        resize_json(&weights, &alone, &["--image", "384"]);
        let (x, y) = (std::fs::read(&alone).unwrap(), std::fs::read(&new).unwrap());
        let (x, y) = (
            SafeTensors::deserialize(&x).unwrap(),
            SafeTensors::deserialize(&y).unwrap(),
        );
        assert_eq!(
            x.tensor("pos_embed").unwrap().data(),
            y.tensor("pos_embed").unwrap().data()
        );
    }
}

#[test]
fn the_text_summary_lists_every_configuration_change() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write_vit(&dir, "model.safetensors");
    vit_config("224").write(&dir);
    pre_height_width().write(&dir);
    let o = resize(&dir, &root.path().join("out"), &["--image", "384"]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    for (file, key) in [
        ("config.json", "image_size"),
        ("preprocessor_config.json", "crop_size"),
        ("preprocessor_config.json", "size"),
    ] {
        assert!(
            text.lines()
                .any(|l| l.contains(file) && l.contains(&format!(" {key} ")) && l.contains("384")),
            "{file} {key}: {text}"
        );
    }
}

/// A PyTorch `pytorch_model.bin` written by posgrid's PyTorch writer (a 12x12 table resized to
/// the 14x14 grid), beside config.json and a trainer's `training_args.bin`, which is not
/// weights and is copied.
#[test]
fn pytorch_bin_with_config() {
    let root = tempfile::tempdir().unwrap();
    let mut tensors = table_and_kernel(12, 16, 3);
    tensors.extend([
        floats("cls_token", Dtype::F32, &[1, 1, D], &noise(D, 5, 0.1)),
        floats("head.weight", Dtype::F32, &[2, D], &noise(2 * D, 6, 0.1)),
    ]);
    let small = write(root.path(), "small.safetensors", &tensors, None);
    let pth = root.path().join("made.pth");
    resize_json(&small, &pth, &["--image", "224", "--format", "pytorch"]);
    let dir = model_dir(root.path());
    let bin = dir.join("pytorch_model.bin");
    std::fs::rename(&pth, &bin).unwrap();
    std::fs::write(dir.join("training_args.bin"), b"PK\x03\x04 not weights").unwrap();
    let configs = [vit_config("224")];
    configs[0].write(&dir);
    write_side_files(&dir);
    let out = check_directory(&dir, &configs, &["pytorch_model.bin"]);
    check_pytorch(
        &bin,
        &out.join("pytorch_model.bin"),
        "pos_embed",
        &[1, 577, D],
    );
}

/// The framework's own torch.save output (fixtures/torch/plain.pth: a 4x4 grid of 4-pixel
/// patches, 16 px) as `pytorch_model.bin`.
#[test]
fn pytorch_bin_written_by_the_framework() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let bin = dir.join("pytorch_model.bin");
    std::fs::copy(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("fixtures/torch/plain.pth"),
        &bin,
    )
    .unwrap();
    let configs = [small_config("16", "4")];
    configs[0].write(&dir);
    write_side_files(&dir);
    let out = check_directory(&dir, &configs, &["pytorch_model.bin"]);
    // 384 px of 4-pixel patches: a 96x96 grid and the class slot; width 8 (manifest.json).
    check_pytorch(
        &bin,
        &out.join("pytorch_model.bin"),
        "pos_embed",
        &[1, 1 + 96 * 96, 8],
    );
}

/// Two shards, their index, config.json and a hidden file.
fn sharded_dir(root: &Path) -> PathBuf {
    let dir = model_dir(root);
    let tensors = vit_tensors(7);
    let (first, second) = tensors.split_at(2);
    let names = [
        "model-00001-of-00002.safetensors",
        "model-00002-of-00002.safetensors",
    ];
    let mut weight_map = serde_json::Map::new();
    let mut total = 0;
    for (name, part) in names.iter().zip([first, second]) {
        write(&dir, name, part, Some(&[("format", "pt")]));
        for t in part {
            weight_map.insert(t.name.clone(), json!(name));
            total += t.bytes.len();
        }
    }
    let index = json!({"metadata": {"total_size": total}, "weight_map": weight_map});
    std::fs::write(
        dir.join("model.safetensors.index.json"),
        serde_json::to_string_pretty(&index).unwrap(),
    )
    .unwrap();
    small_config("224", "16").write(&dir);
    std::fs::write(dir.join(".gitattributes"), GITATTRIBUTES).unwrap();
    dir
}

#[test]
fn sharded_set_with_config_and_hidden_file() {
    let root = tempfile::tempdir().unwrap();
    let dir = sharded_dir(root.path());
    let shards = [
        "model-00001-of-00002.safetensors",
        "model-00002-of-00002.safetensors",
    ];
    let index = "model.safetensors.index.json";
    let out = check_directory(
        &dir,
        &[small_config("224", "16")],
        &[shards[0], shards[1], index],
    );
    check_safetensors(
        &dir.join(shards[0]),
        &out.join(shards[0]),
        "pos_embed",
        &[1, 577, D],
        &[],
    );
    assert_eq!(
        std::fs::read(dir.join(shards[1])).unwrap(),
        std::fs::read(out.join(shards[1])).unwrap(),
        "a shard without a table is copied"
    );
    // The index: the same weight map; total_size the tensor bytes of the new set.
    let read = |d: &Path| -> Value {
        serde_json::from_slice(&std::fs::read(d.join(index)).unwrap()).unwrap()
    };
    let (a, b) = (read(&dir), read(&out));
    assert_eq!(a["weight_map"], b["weight_map"]);
    let grown = (577 - 197) * D * 4;
    assert_eq!(
        b["metadata"]["total_size"].as_u64().unwrap(),
        a["metadata"]["total_size"].as_u64().unwrap() + grown as u64
    );
}

/// An image-text model: the vision tower's table and position ids change, the text tower's
/// stay; the nested vision section of config.json changes, the text section stays.
#[test]
fn dual_tower_with_nested_vision_config() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let d = 8;
    let weights = write(
        &dir,
        "model.safetensors",
        &[
            floats(
                "vision_model.embeddings.position_embedding.weight",
                Dtype::F32,
                &[197, d],
                &smooth_table(1, 14, 14, d, 9),
            ),
            ids("vision_model.embeddings.position_ids", &[1, 197]),
            floats(
                "vision_model.embeddings.patch_embedding.weight",
                Dtype::F32,
                &[d, 3, 16, 16],
                &noise(d * 768, 10, 0.1),
            ),
            floats(
                "vision_model.embeddings.class_embedding",
                Dtype::F32,
                &[d],
                &noise(d, 11, 0.1),
            ),
            floats(
                "text_model.embeddings.position_embedding.weight",
                Dtype::F32,
                &[77, d],
                &noise(77 * d, 12, 0.1),
            ),
            ids("text_model.embeddings.position_ids", &[1, 77]),
        ],
        Some(&[("format", "pt")]),
    );
    let configs = [dual_config(), dual_preprocessor()];
    for c in &configs {
        c.write(&dir);
    }
    std::fs::write(dir.join("tokenizer_config.json"), TOKENIZER_CONFIG).unwrap();
    std::fs::write(dir.join("special_tokens_map.json"), SPECIAL_TOKENS).unwrap();
    write_side_files(&dir);
    let out = check_directory(&dir, &configs, &["model.safetensors"]);
    check_safetensors(
        &weights,
        &out.join("model.safetensors"),
        "vision_model.embeddings.position_embedding.weight",
        &[577, d],
        &["vision_model.embeddings.position_ids"],
    );
}

/// A config.json whose image_size (256) is not the checkpoint's 14x14 grid of 16-pixel
/// patches (224): a warning naming both. The model's own key still follows the resize (the
/// checkpoint decides the size; posgrid::config::update documents this).
#[test]
fn a_recorded_size_that_disagrees_with_the_checkpoint_is_a_warning() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write_vit(&dir, "model.safetensors");
    vit_config("256").write(&dir);
    let out = root.path().join("out");
    let o = resize(&dir, &out, &["--image", "384", "--json"]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    let report: Value = serde_json::from_slice(&o.stdout).unwrap();
    let warning = warning(&report, |w| w.contains("config.json")).to_string();
    for part in ["image_size", "256", "224", "14x14", "16"] {
        assert!(warning.contains(part), "{part}: {warning}");
    }
    assert!(stderr(&o).contains(&warning), "{}", stderr(&o));
    check_config(&vit_config("256"), &out);
    // With --keep-config the warning stays and the file is untouched.
    let kept = root.path().join("kept");
    let report = resize_json(&dir, &kept, &["--image", "384", "--keep-config"]);
    assert!(warnings(&report).contains(&warning.as_str()), "{report}");
    assert_eq!(
        std::fs::read(kept.join("config.json")).unwrap(),
        vit_config("256").before().as_bytes()
    );
}

// ---------------------------------------------------------------------------------------------
// 2. Refusals and safety

#[test]
fn several_checkpoints_or_none_are_refused_and_nothing_is_written() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write_vit(&dir, "model.safetensors");
    write_vit(&dir, "model_ema.safetensors");
    vit_config("224").write(&dir);
    let before = snapshot(&dir);
    let out = root.path().join("out");
    for args in [
        vec!["resize", s(&dir), "-o", s(&out), "--image", "384"],
        vec!["scan", s(&dir)],
    ] {
        let o = posgrid(&args);
        assert_eq!(code(&o), 3, "{args:?}: {}", stderr(&o));
        for name in ["model.safetensors", "model_ema.safetensors"] {
            assert!(stderr(&o).contains(name), "{name}: {}", stderr(&o));
        }
    }
    assert_eq!(entries(root.path()), ["model"]);
    assert_eq!(snapshot(&dir), before);

    let empty = root.path().join("empty");
    std::fs::create_dir(&empty).unwrap();
    vit_config("224").write(&empty);
    std::fs::write(empty.join("README.md"), README).unwrap();
    let o = resize(&empty, &out, &["--image", "384"]);
    assert_eq!(code(&o), 3, "{}", stderr(&o));
    assert!(stderr(&o).contains("no checkpoint"), "{}", stderr(&o));
    assert_eq!(entries(root.path()), ["empty", "model"]);
}

#[test]
fn an_existing_output_needs_force_and_force_replaces_only_an_earlier_output() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write_vit(&dir, "model.safetensors");
    vit_config("224").write(&dir);
    write_side_files(&dir);
    let out = root.path().join("out");
    resize_json(&dir, &out, &["--image", "384"]);
    let first = snapshot(&out);
    // Without --force: refused, the earlier output as it was.
    let o = resize(&dir, &out, &["--image", "320"]);
    assert_eq!(code(&o), 5, "{}", stderr(&o));
    assert!(stderr(&o).contains("--force"), "{}", stderr(&o));
    assert_eq!(snapshot(&out), first);
    // With --force: replaced by the new output (320 px: a 20x20 grid).
    resize_json(&dir, &out, &["--image", "320", "--force"]);
    assert_eq!(
        entries(root.path()),
        ["model", "out"],
        "nothing left beside it"
    );
    let bytes = std::fs::read(out.join("model.safetensors")).unwrap();
    let st = SafeTensors::deserialize(&bytes).unwrap();
    assert_eq!(st.tensor("pos_embed").unwrap().shape(), [1, 401, D]);
    let config: Value =
        serde_json::from_slice(&std::fs::read(out.join("config.json")).unwrap()).unwrap();
    assert_eq!(config["image_size"], 320);
    // A file of someone else's in it: refused, named, and nothing removed.
    std::fs::write(out.join("notes.txt"), "mine").unwrap();
    let held = snapshot(&out);
    let o = resize(&dir, &out, &["--image", "384", "--force"]);
    assert_eq!(code(&o), 5, "{}", stderr(&o));
    assert!(stderr(&o).contains("notes.txt"), "{}", stderr(&o));
    assert_eq!(snapshot(&out), held);
    assert_eq!(entries(root.path()), ["model", "out"]);
}

/// Run `resize DIR -o OUT --image 384` under a file-size limit (RLIMIT_FSIZE, SIGXFSZ ignored,
/// as tests/faults.rs does).
fn resize_with_file_limit(dir: &Path, out: &Path, limit: u64) -> Output {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_posgrid"));
    cmd.args(["resize", s(dir), "-o", s(out), "--image", "384"]);
    // SAFETY: only async-signal-safe libc calls between fork and exec.
    unsafe {
        cmd.pre_exec(move || {
            libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
            let limit = libc::rlimit {
                rlim_cur: limit as libc::rlim_t,
                rlim_max: limit as libc::rlim_t,
            };
            if libc::setrlimit(libc::RLIMIT_FSIZE, &limit) != 0 {
                return Err(std::io::Error::last_os_error());
            }
            Ok(())
        });
    }
    cmd.output().unwrap()
}

#[test]
fn a_failed_write_leaves_no_output_and_no_temporary_directory() {
    // The limit is met while writing the weights (a 1 MiB tensor), then while copying a side
    // file after the weights are written (a 200 kB model card beside small weights).
    for big_weights in [true, false] {
        let root = tempfile::tempdir().unwrap();
        let dir = model_dir(root.path());
        let mut tensors = vit_tensors(1);
        if big_weights {
            tensors.push(floats(
                "blocks.0.mlp.fc1.weight",
                Dtype::F32,
                &[256, 1024],
                &noise(256 * 1024, 13, 0.1),
            ));
            std::fs::write(dir.join("README.md"), README).unwrap();
        } else {
            std::fs::write(dir.join("README.md"), "model card\n".repeat(20_000)).unwrap();
        }
        write(&dir, "model.safetensors", &tensors, None);
        vit_config("224").write(&dir);
        pre_height_width().write(&dir);
        std::fs::write(dir.join(".gitattributes"), GITATTRIBUTES).unwrap();
        let before = snapshot(&dir);
        let out = root.path().join("out");
        let o = resize_with_file_limit(&dir, &out, 150_000);
        assert_eq!(code(&o), 5, "big weights {big_weights}: {}", stderr(&o));
        assert!(stderr(&o).contains("file-size limit"), "{}", stderr(&o));
        let failed_on = if big_weights {
            "model.safetensors"
        } else {
            "README.md"
        };
        assert!(stderr(&o).contains(failed_on), "{}", stderr(&o));
        assert_eq!(
            entries(root.path()),
            ["model"],
            "big weights {big_weights}: no OUTDIR, no temporary"
        );
        assert_eq!(snapshot(&dir), before, "the input directory is unchanged");
    }
}

#[test]
fn a_file_output_from_a_directory_warns_that_the_configs_keep_the_old_size() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let weights = write_vit(&dir, "model.safetensors");
    vit_config("224").write(&dir);
    pre_height_width().write(&dir);
    let before = snapshot(&dir);
    let out = root.path().join("out.safetensors");
    let report = resize_json(&dir, &out, &["--image", "384"]);
    assert!(out.is_file());
    assert_eq!(entries(root.path()), ["model", "out.safetensors"]);
    check_safetensors(&weights, &out, "pos_embed", &[1, 577, D], &[]);
    assert_eq!(report["config_changes"], json!([]));
    warning(&report, |w| {
        w.contains("config.json") && w.contains("old input size") && w.contains("directory")
    });
    assert_eq!(snapshot(&dir), before);
}

#[test]
fn a_single_file_with_a_config_beside_it_warns() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let weights = write_vit(&dir, "model.safetensors");
    let out = root.path().join("out.safetensors");
    // Control: no configuration beside it, no such warning.
    let report = resize_json(&weights, &out, &["--image", "384"]);
    let mentions_old_size = |r: &Value| {
        warnings(r)
            .iter()
            .any(|w| w.contains("config.json") && w.contains("old input size"))
    };
    assert!(!mentions_old_size(&report), "{report}");
    vit_config("224").write(&dir);
    let report = resize_json(&weights, &out, &["--image", "384", "--force"]);
    assert!(mentions_old_size(&report), "{report}");
    assert_eq!(
        std::fs::read(dir.join("config.json")).unwrap(),
        vit_config("224").before().as_bytes()
    );
}

/// A sharded set converted to one file leaves its config.json at the old size just as a model
/// directory does.
#[test]
fn a_file_output_from_a_sharded_set_warns_that_the_configs_keep_the_old_size() {
    let root = tempfile::tempdir().unwrap();
    let dir = sharded_dir(root.path());
    let out = root.path().join("out.safetensors");
    let report = resize_json(&dir, &out, &["--image", "384"]);
    assert!(out.is_file());
    warning(&report, |w| {
        w.contains("config.json") && w.contains("old input size")
    });
}

#[test]
fn another_container_for_a_directory_output_is_a_usage_error() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write_vit(&dir, "model.safetensors");
    vit_config("224").write(&dir);
    let out = root.path().join("out");
    let o = resize(&dir, &out, &["--image", "384", "--format", "npz"]);
    assert_eq!(code(&o), 2, "{}", stderr(&o));
    assert_eq!(entries(root.path()), ["model"]);
}

// ---------------------------------------------------------------------------------------------
// 3. Attention windows (`--window`)

/// A shifted-window classifier's config.json (4-pixel patches at 224 px, windows of 7 patches);
/// the stage lists (`depths`, `num_heads`) hold numbers that must not move.
const WINDOWED_CONFIG: &str = r#"{
  "architectures": [
    "SwinForImageClassification"
  ],
  "depths": [
    2,
    2
  ],
  "embed_dim": 8,
  "encoder_stride": 32,
  "hidden_size": 16,
  "image_size": 224,
  "model_type": "swin",
  "num_channels": 3,
  "num_heads": [
    2,
    4
  ],
  "patch_size": 4,
  "torch_dtype": "float32",
  "transformers_version": "4.40.0",
  "window_size": @WINDOW@
}
"#;

/// The preprocessing of the windowed classifier: the input size is kept by `--window`, so this
/// file stays byte for byte.
fn windowed_preprocessor() -> Config {
    Config {
        file: "preprocessor_config.json",
        template: PRE_HEIGHT_WIDTH,
        slots: vec![
            ("@CROP@", "224", "224"),
            ("@HEIGHT@", "224", "224"),
            ("@WIDTH@", "224", "224"),
        ],
        changes: vec![],
        warns: &[],
    }
}

fn windowed_config(old: &'static str, new: &'static str, new_value: Value) -> Config {
    Config {
        file: "config.json",
        template: WINDOWED_CONFIG,
        slots: vec![("@WINDOW@", old, new)],
        changes: vec![(
            vec!["window_size"],
            serde_json::from_str(old).unwrap(),
            new_value,
        )],
        warns: &[],
    }
}

/// The window-relative index of a `wh`x`ww` window without class rows, written here from its
/// description (common practice of the trade): cell q = (qy, qx) against cell k = (ky, kx) reads
/// row (qy - ky + wh - 1) · (2ww - 1) + (qx - kx + ww - 1).
fn relative_index(wh: usize, ww: usize) -> Vec<i64> {
    let cells = wh * ww;
    let mut index = Vec::with_capacity(cells * cells);
    for q in 0..cells {
        for k in 0..cells {
            let dy = (q / ww + wh - 1 - k / ww) as i64;
            let dx = (q % ww + ww - 1 - k % ww) as i64;
            index.push(dy * (2 * ww as i64 - 1) + dx);
        }
    }
    index
}

fn index_tensor(name: &str, wh: usize, ww: usize) -> T {
    T {
        name: name.into(),
        dtype: Dtype::I64,
        shape: vec![wh * ww, wh * ww],
        bytes: relative_index(wh, ww)
            .into_iter()
            .flat_map(i64::to_le_bytes)
            .collect(),
    }
}

/// Two stages of windowed blocks without masks: stage 0 at window 7 (the config's), stage 1
/// already at window 8.
fn windowed_tensors() -> Vec<T> {
    let mut tensors = vec![floats(
        "patch_embed.proj.weight",
        Dtype::F32,
        &[8, 3, 4, 4],
        &noise(384, 20, 0.1),
    )];
    for (stage, window, heads) in [(0, 7, 2), (1, 8, 4)] {
        let rows = (2 * window - 1) * (2 * window - 1);
        let block = format!("layers.{stage}.blocks.0.attn");
        tensors.push(floats(
            &format!("{block}.relative_position_bias_table"),
            Dtype::F32,
            &[rows, heads],
            &smooth_table(0, 2 * window - 1, 2 * window - 1, heads, 21 + stage as u64),
        ));
        tensors.push(index_tensor(
            &format!("{block}.relative_position_index"),
            window,
            window,
        ));
        tensors.push(floats(
            &format!("{block}.qkv.weight"),
            Dtype::F32,
            &[3 * heads, heads],
            &noise(3 * heads * heads, 30 + stage as u64, 0.1),
        ));
    }
    tensors
}

/// The output weights: stage 0's table at window `new` with its index rebuilt for it (the
/// construction above), every other tensor (stage 1's, already at window 8 for a square new
/// window) as it was.
fn check_windowed_weights(input: &Path, output: &Path, new: (usize, usize)) {
    let (a_bytes, b_bytes) = (
        std::fs::read(input).unwrap(),
        std::fs::read(output).unwrap(),
    );
    let (a, b) = (
        SafeTensors::deserialize(&a_bytes).unwrap(),
        SafeTensors::deserialize(&b_bytes).unwrap(),
    );
    let moved = |stage: usize| new != (8, 8) || stage == 0;
    let mut names = a.names();
    names.sort();
    let mut out_names = b.names();
    out_names.sort();
    assert_eq!(names, out_names);
    for name in names {
        let (t, u) = (a.tensor(name).unwrap(), b.tensor(name).unwrap());
        let stage = usize::from(name.starts_with("layers.1"));
        if name.ends_with("relative_position_bias_table") && moved(stage) {
            let rows = (2 * new.0 - 1) * (2 * new.1 - 1);
            assert_eq!(u.shape(), [rows, t.shape()[1]], "{name}");
        } else if name.ends_with("relative_position_index") && moved(stage) {
            let cells = new.0 * new.1;
            assert_eq!(u.shape(), [cells, cells], "{name}");
            let values: Vec<i64> = u
                .data()
                .chunks(8)
                .map(|c| i64::from_le_bytes(c.try_into().unwrap()))
                .collect();
            assert_eq!(values, relative_index(new.0, new.1), "{name}");
        } else {
            assert_eq!((t.shape(), t.data()), (u.shape(), u.data()), "{name}");
        }
    }
}

/// `--image 224 --window 8` (the input size kept) on a directory whose config.json records
/// window 7: window_size becomes 8 (a
/// number stays a number), image_size and patch_size stay, the preprocessing file and the side
/// files are copied byte for byte; `--keep-config` leaves the config as it was.
#[test]
fn window_size_follows_the_window() {
    for (old, new, value, args) in [
        ("7", "8", json!(8), ["--image", "224", "--window", "8"]),
        // A non-square window goes into a [rows, columns] pair, kept as a pair.
        (
            "[\n    7,\n    7\n  ]",
            "[\n    8,\n    12\n  ]",
            json!([8, 12]),
            ["--image", "224", "--window", "8x12"],
        ),
    ] {
        let root = tempfile::tempdir().unwrap();
        let dir = model_dir(root.path());
        let weights = write(&dir, "model.safetensors", &windowed_tensors(), None);
        let configs = [windowed_config(old, new, value), windowed_preprocessor()];
        for c in &configs {
            c.write(&dir);
        }
        write_side_files(&dir);
        let out = check_directory_with(&dir, &configs, &["model.safetensors"], &args);
        let shape = if args[3] == "8" { (8, 8) } else { (8, 12) };
        check_windowed_weights(&weights, &out.join("model.safetensors"), shape);
    }
}

/// A windowed model whose checkpoint holds no grid (window tables and their index buffers, no
/// masks) at a new input size and window: the configuration's image_size goes to the new size
/// with window_size, and the preprocessing sizes with it — the grid taken from what the
/// configuration records (224 / 4 = 56), the new one from --image (384 / 4 = 96).
#[test]
fn a_windowed_model_without_masks_gets_its_new_input_size_recorded() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let weights = write(&dir, "model.safetensors", &windowed_tensors(), None);
    let template: &'static str = Box::leak(
        WINDOWED_CONFIG
            .replace("\"image_size\": 224", "\"image_size\": @IMAGE@")
            .into_boxed_str(),
    );
    let config = Config {
        file: "config.json",
        template,
        slots: vec![("@IMAGE@", "224", "384"), ("@WINDOW@", "7", "12")],
        changes: vec![
            (vec!["image_size"], json!(224), json!(384)),
            (vec!["window_size"], json!(7), json!(12)),
        ],
        warns: &[],
    };
    let configs = [config, pre_height_width()];
    for c in &configs {
        c.write(&dir);
    }
    write_side_files(&dir);
    let args = ["--image", "384", "--window", "12"];
    let out = check_directory_with(&dir, &configs, &["model.safetensors"], &args);
    check_windowed_weights(&weights, &out.join("model.safetensors"), (12, 12));
}

/// A window_size that is neither the checkpoint's old window nor the new one is a warning
/// naming both and stays; a non-square window cannot go into a single number: the file is
/// copied as it is, with a warning saying why.
#[test]
fn a_window_size_that_disagrees_or_cannot_hold_the_window_is_a_warning() {
    for (recorded, args, parts) in [
        ("9", "8", &["window_size", "window 9", "7x7", "8x8"][..]),
        ("7", "8x12", &["window_size", "one number", "8x12"][..]),
    ] {
        let root = tempfile::tempdir().unwrap();
        let dir = model_dir(root.path());
        write(&dir, "model.safetensors", &windowed_tensors(), None);
        let text = WINDOWED_CONFIG.replace("@WINDOW@", recorded);
        std::fs::write(dir.join("config.json"), &text).unwrap();
        let out = root.path().join("out");
        let report = resize_json(&dir, &out, &["--image", "224", "--window", args]);
        assert_eq!(report["config_changes"], json!([]));
        let warning = warning(&report, |w| w.starts_with("config.json:"));
        for part in parts {
            assert!(warning.contains(part), "{part}: {warning}");
        }
        assert_eq!(
            std::fs::read_to_string(out.join("config.json")).unwrap(),
            text
        );
    }
}

/// A segmentation model's vision section (image 1024 of 16-pixel patches, windows of 14) over
/// the per-axis fixture of fixtures/kinds (a 64x64 grid, global and windowed blocks), resized
/// with the arguments its manifest records (`--grid 96 --window 21`): image_size becomes
/// 96 × 16 = 1536 and window_size 21; the weights are those of the file resized alone.
#[test]
fn per_axis_windows_and_the_grid_update_a_nested_vision_section() {
    const SEGMENTATION: &str = "{\n  \"model_type\": \"sam\",\n  \"vision_config\": {\n    \"global_attn_indexes\": [\n      1,\n      3\n    ],\n    \"image_size\": @IMAGE@,\n    \"patch_size\": 16,\n    \"window_size\": @WINDOW@\n  }\n}\n";
    let config = Config {
        file: "config.json",
        template: SEGMENTATION,
        slots: vec![("@IMAGE@", "1024", "1536"), ("@WINDOW@", "14", "21")],
        changes: vec![
            (
                vec!["vision_config", "image_size"],
                json!(1024),
                json!(1536),
            ),
            (vec!["vision_config", "window_size"], json!(14), json!(21)),
        ],
        warns: &[],
    };
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let fixture = Path::new(env!("CARGO_MANIFEST_DIR")).join("fixtures/kinds/axial.safetensors");
    std::fs::copy(&fixture, dir.join("model.safetensors")).unwrap();
    config.write(&dir);
    write_side_files(&dir);
    let args = ["--grid", "96", "--window", "21"];
    let out = check_directory_with(&dir, &[config], &["model.safetensors"], &args);
    let alone = root.path().join("alone.safetensors");
    resize_json(&fixture, &alone, &args);
    let (x, y) = (
        std::fs::read(&alone).unwrap(),
        std::fs::read(out.join("model.safetensors")).unwrap(),
    );
    let (x, y) = (
        SafeTensors::deserialize(&x).unwrap(),
        SafeTensors::deserialize(&y).unwrap(),
    );
    for (name, t) in x.tensors() {
        let u = y.tensor(&name).unwrap();
        assert_eq!((t.shape(), t.data()), (u.shape(), u.data()), "{name}");
    }
}

// ---------------------------------------------------------------------------------------------
// A new patch size

/// A non-square new patch (`--new-patch 16x14`, 448 px: a 28x32 grid) goes into a recorded
/// `[h, w]` patch size whole; a single number cannot hold it, so the file stays as it is with a
/// warning naming the key (as for a non-square window) — never a patch_size still saying 16.
#[test]
fn a_non_square_new_patch_goes_into_a_pair_or_a_warning() {
    for (recorded, patch, image) in [
        ("[16, 16]", json!([16, 14]), json!(448)),
        ("16", json!(16), json!(224)),
    ] {
        let root = tempfile::tempdir().unwrap();
        let dir = model_dir(root.path());
        write_vit(&dir, "model.safetensors");
        let text = format!("{{\"image_size\": 224, \"patch_size\": {recorded}}}\n");
        std::fs::write(dir.join("config.json"), &text).unwrap();
        let out = root.path().join("out");
        let report = resize_json(&dir, &out, &["--image", "448", "--new-patch", "16x14"]);
        let written: Value =
            serde_json::from_str(&std::fs::read_to_string(out.join("config.json")).unwrap())
                .unwrap();
        assert_eq!(written["patch_size"], patch, "{recorded}: {report}");
        assert_eq!(written["image_size"], image, "{recorded}: {report}");
        if recorded == "16" {
            warning(&report, |w| {
                w.starts_with("config.json:") && w.contains("patch_size") && w.contains("16x14")
            });
        }
    }
}

/// A 14-pixel backbone moved to 16-pixel patches at the same token count (224 px → 256 px, a
/// 16x16 grid both times): the position table is already at its grid and stays, the kernel
/// changes, and config.json's patch_size follows the kernel even where the file records no
/// input size to take the grid from.
#[test]
fn the_patch_size_follows_the_kernel_when_the_grid_stays() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    let tensors = table_and_kernel(16, 14, 4);
    write(&dir, "model.safetensors", &tensors, None);
    std::fs::write(dir.join("config.json"), "{\"patch_size\": 14}\n").unwrap();
    let out = root.path().join("out");
    let report = resize_json(&dir, &out, &["--image", "256", "--new-patch", "16"]);
    assert_eq!(
        report["config_changes"],
        json!([{"file": "config.json", "path": ["patch_size"], "old": 14, "new": 16}]),
        "{report}"
    );
    assert_eq!(
        std::fs::read_to_string(out.join("config.json")).unwrap(),
        "{\"patch_size\": 16}\n"
    );
}

/// A windowed model whose checkpoint holds no grid takes its input size from config.json
/// (224 px of 4-pixel patches). A target that cannot apply to that record — an image the
/// patch does not divide, a scale that leaves no patch, a grid whose input size overflows (it
/// wrapped to image_size 0) or passes the largest size a configuration may record — is a usage
/// error naming the problem (exit 2), nothing written, where it used to keep the old size (or
/// write 0) without a word; `--keep-config` leaves the file alone and resizes the weights.
#[test]
fn a_target_the_recorded_input_size_cannot_take_is_refused() {
    for (args, words) in [
        (
            &["--image", "383"][..],
            &["config.json", "383", "4-pixel"][..],
        ),
        (&["--scale", "1/1000"], &["config.json", "scale"]),
        (
            &["--grid", "4611686018427387904"],
            &["4611686018427387904", "--keep-config"],
        ),
        (&["--grid", "300000"], &["1200000", "--keep-config"]),
    ] {
        let root = tempfile::tempdir().unwrap();
        let dir = model_dir(root.path());
        write(&dir, "model.safetensors", &windowed_tensors(), None);
        std::fs::write(
            dir.join("config.json"),
            WINDOWED_CONFIG.replace("@WINDOW@", "7"),
        )
        .unwrap();
        let before = snapshot(&dir);
        let out = root.path().join("out");
        let all = [args, &["--window", "12"]].concat();
        let o = resize(&dir, &out, &all);
        assert_eq!(code(&o), 2, "{args:?}: {}", stderr(&o));
        for w in words {
            assert!(stderr(&o).contains(w), "{w}: {}", stderr(&o));
        }
        assert!(!out.exists(), "{args:?}");
        assert_eq!(snapshot(&dir), before);
        let kept = [&all[..], &["--keep-config"]].concat();
        let o = resize(&dir, &out, &kept);
        assert_eq!(code(&o), 0, "{args:?}: {}", stderr(&o));
        assert_eq!(
            std::fs::read(out.join("config.json")).unwrap(),
            before["config.json"]
        );
    }
}

/// A configuration of a thousand vision sections, each recording a window the checkpoint does
/// not have, gives a few warnings and a count of the rest, not a thousand lines (a 16 MB file
/// gave 300 000).
#[test]
fn a_configuration_full_of_disagreements_gives_a_bounded_list_of_warnings() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write(&dir, "model.safetensors", &windowed_tensors(), None);
    let sections: Vec<String> = (0..1000)
        .map(|n| format!("\"s{n}_vision_config\": {{\"window_size\": 9}}"))
        .collect();
    let text = format!("{{\"window_size\": 7, {}}}\n", sections.join(", "));
    std::fs::write(dir.join("config.json"), &text).unwrap();
    let out = root.path().join("out");
    let report = resize_json(&dir, &out, &["--image", "224", "--window", "12"]);
    let about_config: Vec<&str> = warnings(&report)
        .into_iter()
        .filter(|w| w.starts_with("config.json:"))
        .collect();
    assert!(about_config.len() <= 9, "{}", about_config.len());
    assert!(
        about_config.last().unwrap().contains("992 more"),
        "{about_config:?}"
    );
    assert_eq!(report["config_changes"][0]["path"], json!(["window_size"]));
}

/// Sub-directories of a model directory (an exported graph, a pooling module's folder) are
/// copied with everything in them, byte for byte; a repository's history (`.git`) and links to
/// directories are left out and named in a warning. `--force` recognises the output, nested
/// directories included, as posgrid's own; a device file deep in the tree is refused by name.
#[test]
fn sub_directories_are_copied_and_what_is_left_out_is_named() {
    let root = tempfile::tempdir().unwrap();
    let dir = model_dir(root.path());
    write(&dir, "model.safetensors", &vit_tensors(7), None);
    write_side_files(&dir);
    let nested = [
        ("onnx/model.onnx", &b"graph"[..]),
        ("1_Pooling/config.json", b"{\"image_size\": 224}\n"),
        ("a/b/c/.hidden", b"deep"),
        ("checkpoint-500/model.safetensors", b"an earlier checkpoint"),
        (".git/HEAD", b"ref: refs/heads/main\n"),
    ];
    for (rel, bytes) in nested {
        let path = dir.join(rel);
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        std::fs::write(path, bytes).unwrap();
    }
    std::fs::create_dir(dir.join("empty")).unwrap();
    std::os::unix::fs::symlink(root.path(), dir.join("elsewhere")).unwrap();
    // A name that is not UTF-8 keeps its bytes.
    let odd: &std::ffi::OsStr = std::os::unix::ffi::OsStrExt::from_bytes(b"w\xff.bin");
    std::fs::write(dir.join("onnx").join(odd), b"odd").unwrap();
    let out = root.path().join("out");
    let report = resize_json(&dir, &out, &["--image", "384"]);
    for (rel, bytes) in &nested[..4] {
        assert_eq!(std::fs::read(out.join(rel)).unwrap(), *bytes, "{rel}");
    }
    assert!(out.join("empty").is_dir());
    assert_eq!(std::fs::read(out.join("onnx").join(odd)).unwrap(), b"odd");
    assert!(!out.join(".git").exists() && !out.join("elsewhere").exists());
    // Only the top level's configuration records the model's size.
    let changed: Vec<&str> = report["config_changes"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|c| c["file"].as_str())
        .collect();
    assert!(
        !changed.iter().any(|f| f.contains("Pooling")),
        "{changed:?}"
    );
    let left_out = warning(&report, |w| w.contains("not copied"));
    for part in [
        "\".git\" (a repository's history)",
        "\"elsewhere\" (a link to a directory)",
    ] {
        assert!(left_out.contains(part), "{part}: {left_out}");
    }
    warning(&report, |w| {
        w.contains("at the old size: \"checkpoint-500/model.safetensors\"")
    });

    let again = resize(&dir, &out, &["--image", "448", "--force"]);
    assert_eq!(code(&again), 0, "{}", stderr(&again));
    // Something posgrid did not write, deep in the old output: --force leaves it alone.
    std::fs::write(out.join("a/b/stranger.txt"), b"mine").unwrap();
    let refused = resize(&dir, &out, &["--image", "448", "--force"]);
    assert_eq!(code(&refused), 5, "{}", stderr(&refused));
    assert!(
        stderr(&refused).contains("a/b/stranger.txt"),
        "{}",
        stderr(&refused)
    );
    assert!(out.join("a/b/stranger.txt").exists());

    let fifo = dir.join("a/b/pipe");
    let made = std::process::Command::new("mkfifo")
        .arg(&fifo)
        .status()
        .unwrap();
    assert!(made.success());
    let elsewhere = root.path().join("out-2");
    let o = resize(&dir, &elsewhere, &["--image", "384"]);
    assert_eq!(code(&o), 3, "{}", stderr(&o));
    assert!(stderr(&o).contains("\"pipe\""), "{}", stderr(&o));
    assert!(!elsewhere.exists());
}

/// A downloaded model's cache folder: every file of the revision's folder is a link to a blob
/// elsewhere (common practice of a widely used model hub's client, from memory). The links are
/// read through: the output holds regular files, the configuration updated, and the blobs are
/// unchanged. A dangling link or one to a device is refused, naming it, with nothing written.
#[test]
fn a_cache_folder_of_links_is_read_through_its_links() {
    let root = tempfile::tempdir().unwrap();
    let blobs = root.path().join("blobs");
    let snapshot = root.path().join("snapshots").join("0123abcd");
    std::fs::create_dir_all(&blobs).unwrap();
    std::fs::create_dir_all(&snapshot).unwrap();
    write(&blobs, "b1", &vit_tensors(3), None);
    let config = VIT_CONFIG.replace("@IMAGE@", "224");
    std::fs::write(blobs.join("b2"), &config).unwrap();
    for (name, blob) in [("model.safetensors", "b1"), ("config.json", "b2")] {
        std::os::unix::fs::symlink(format!("../../blobs/{blob}"), snapshot.join(name)).unwrap();
    }
    let before = snapshot_bytes(&blobs);
    let out = root.path().join("out");
    let report = resize_json(&snapshot, &out, &["--image", "384"]);
    assert_eq!(
        report["config_changes"].as_array().unwrap().len(),
        1,
        "{report}"
    );
    for name in ["model.safetensors", "config.json"] {
        let meta = std::fs::symlink_metadata(out.join(name)).unwrap();
        assert!(meta.is_file(), "{name} is a regular file in the output");
    }
    let written = std::fs::read_to_string(out.join("config.json")).unwrap();
    assert_eq!(written, VIT_CONFIG.replace("@IMAGE@", "384"));
    assert_eq!(snapshot_bytes(&blobs), before, "the blobs are unchanged");
    // The output of a folder of links is recognised as posgrid's own by --force.
    let again = resize(&snapshot, &out, &["--image", "448", "--force"]);
    assert_eq!(code(&again), 0, "{}", stderr(&again));

    for (name, target) in [
        ("dangling.json", "../../blobs/missing"),
        ("zero.json", "/dev/zero"),
    ] {
        let link = snapshot.join(name);
        std::os::unix::fs::symlink(target, &link).unwrap();
        let out = root.path().join(format!("out-{name}"));
        let o = resize(&snapshot, &out, &["--image", "384"]);
        assert_eq!(code(&o), 3, "{name}: {}", stderr(&o));
        assert!(stderr(&o).contains(name), "{name}: {}", stderr(&o));
        assert!(!out.exists());
        std::fs::remove_file(&link).unwrap();
    }
}

fn snapshot_bytes(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut files: Vec<_> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap())
        .map(|e| {
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect();
    files.sort();
    files
}
