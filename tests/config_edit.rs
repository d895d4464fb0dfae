//! Configuration files updated to a new input size: only the size values change, every other byte
//! stays.
//!
//! Sources beside each check:
//! - fixtures/config/: files written by Python's own `json` module in the layout model libraries
//!   use (`json.dumps(config, indent=2, sort_keys=True) + "\n"`, common practice, from memory),
//!   with the expected results made by the same module from the loaded dictionaries
//!   (fixtures/config/make_config_cases.py, the rules written there independently);
//! - configurations written in this file, shaped after widely used image classification and
//!   image-text models: key names (`image_size`, `patch_size`, `window_size`, `vision_config`, `text_config`,
//!   `max_position_embeddings`, `size`, `crop_size`, `shortest_edge`, `height`, `width`) as a
//!   widely used model library writes them, common practice, from memory; values invented;
//! - serde_json (the JSON grammar of RFC 8259) reading every output, compared value by value.

use std::path::Path;

use posgrid::config::{
    crop_fit_warnings, disagreements, recorded_sizes, text_from_bytes, unread_warnings, update,
    window_disagreements, Change, ConfigError, FileKind, Request, SizeKey, SizeValue, WindowMove,
    MAX_DEPTH, MAX_TEXT_BYTES,
};
use proptest::prelude::*;
use serde_json::{json, Value};

fn request(old_image: (usize, usize), new_image: (usize, usize), patch: (usize, usize)) -> Request {
    Request {
        old_image,
        new_image,
        old_patch: (patch.0, patch.0),
        new_patch: (patch.1, patch.1),
        windows: Vec::new(),
    }
}

/// 224 px with 16-px patches to 384 px, the patch kept.
const TO_384: Request = Request {
    old_image: (224, 224),
    new_image: (384, 384),
    old_patch: (16, 16),
    new_patch: (16, 16),
    windows: Vec::new(),
};

fn path(keys: &[&str]) -> Vec<String> {
    keys.iter().map(|k| k.to_string()).collect()
}

/// Everything outside the changed spans is byte-identical, and each span holds exactly the old
/// value in the input and the new one in the output (a span one byte too wide or too narrow would
/// not read as that value).
fn assert_only_spans_differ(input: &str, output: &str, changes: &[Change]) {
    let (mut in_at, mut out_at) = (0, 0);
    for change in changes {
        assert_eq!(
            &input[in_at..change.input_span.start],
            &output[out_at..change.output_span.start],
            "bytes before {:?} differ",
            change.path
        );
        let old: Value = serde_json::from_str(&input[change.input_span.clone()]).unwrap();
        let new: Value = serde_json::from_str(&output[change.output_span.clone()]).unwrap();
        assert_eq!((old, new), (change.old.clone(), change.new.clone()));
        in_at = change.input_span.end;
        out_at = change.output_span.end;
    }
    assert_eq!(
        &input[in_at..],
        &output[out_at..],
        "bytes after the last change differ"
    );
}

/// The output read as JSON equals the input read as JSON with exactly `expected` applied:
/// (key path, new value).
fn assert_values(input: &str, output: &str, expected: &[(Vec<String>, Value)]) {
    let mut want: Value = serde_json::from_str(input).unwrap();
    for (keys, new) in expected {
        let pointer = format!("/{}", keys.join("/"));
        *want.pointer_mut(&pointer).expect("path exists") = new.clone();
    }
    let got: Value = serde_json::from_str(output).expect("output is JSON");
    assert_eq!(got, want);
}

/// Run `update` and check it against the changes the test expects: (path, old, new).
fn assert_update(input: &str, req: &Request, expected: &[(&[&str], Value, Value)]) -> String {
    let (output, changes) = update(input, req).unwrap();
    let listed: Vec<(Vec<String>, Value, Value)> = changes
        .iter()
        .map(|c| (c.path.clone(), c.old.clone(), c.new.clone()))
        .collect();
    let wanted: Vec<(Vec<String>, Value, Value)> = expected
        .iter()
        .map(|(p, o, n)| (path(p), o.clone(), n.clone()))
        .collect();
    assert_eq!(listed, wanted);
    assert_only_spans_differ(input, &output, &changes);
    let applied: Vec<(Vec<String>, Value)> = wanted.into_iter().map(|(p, _, n)| (p, n)).collect();
    assert_values(input, &output, &applied);
    output
}

// ---------------------------------------------------------------------------------------------
// Files written by Python's json module

#[test]
fn python_written_configurations_become_exactly_what_python_writes() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("fixtures/config");
    let manifest: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).unwrap()).unwrap();
    let cases = manifest["cases"].as_array().unwrap();
    assert_eq!(cases.len(), 11);
    for case in cases {
        let read = |key: &str| std::fs::read_to_string(dir.join(case[key].as_str().unwrap()));
        let (input, expected) = (read("input").unwrap(), read("expected").unwrap());
        let side = |v: &Value| v.as_u64().unwrap() as usize;
        let pair = |v: &Value| (side(&v[0]), side(&v[1]));
        let r = &case["request"];
        let mut req = request(
            pair(&r["old_image"]),
            pair(&r["new_image"]),
            (side(&r["old_patch"]), side(&r["new_patch"])),
        );
        for moved in r["windows"].as_array().into_iter().flatten() {
            req.windows.push(WindowMove {
                old: pair(&moved["old"]),
                new: pair(&moved["new"]),
            });
        }
        let name = &case["input"];

        let kind = recorded_sizes(&input).unwrap().kind;
        let want_kind = match case["kind"].as_str() {
            Some("model") => FileKind::Model,
            _ => FileKind::Preprocessing,
        };
        assert_eq!(kind, want_kind, "{name}");

        let (output, changes) = update(&input, &req).unwrap();
        assert_eq!(
            output, expected,
            "{name}: Python's json.dumps of the resized dict"
        );
        let report = serde_json::to_value(&changes).unwrap();
        assert_eq!(report, case["changes"], "{name}: the change list");
        assert_only_spans_differ(&input, &output, &changes);
    }
}

// ---------------------------------------------------------------------------------------------
// Model configurations

/// A single-tower classifier's configuration, written by hand with tabs, CRLF line ends, numbers
/// in unusual spellings, string escapes and no trailing newline.
const CLASSIFIER: &str = "{\r\n\t\"architectures\": [\"ViTForImageClassification\"],\r\n\t\"hidden_size\" : 768,\r\n\t\"image_size\":224.0,\r\n\t\"initializer_range\": 0.0200,\r\n\t\"layer_norm_eps\": 1E-12,\r\n\t\"id2label\": {\"0\": \"caf\\u00e9 \\/ cr\\u00e8me\", \"1\": \"tab\\there \\\"quoted\\\"\"},\r\n\t\"num_channels\": 3,\r\n\t\"patch_size\": 16,\r\n\t\"qkv_bias\": true,\r\n\t\"encoder_stride\": 16\r\n}";

#[test]
fn single_tower_image_size_alone_changes() {
    let recorded = recorded_sizes(CLASSIFIER).unwrap();
    assert_eq!(recorded.kind, FileKind::Model);
    let found: Vec<_> = recorded
        .sizes
        .iter()
        .map(|s| (s.path.clone(), s.key, s.value))
        .collect();
    assert_eq!(
        found,
        [
            (
                path(&["image_size"]),
                SizeKey::ImageSize,
                SizeValue::Number(224)
            ),
            (
                path(&["patch_size"]),
                SizeKey::PatchSize,
                SizeValue::Number(16)
            ),
        ]
    );
    let output = assert_update(
        CLASSIFIER,
        &TO_384,
        &[(&["image_size"], json!(224.0), json!(384))],
    );
    // New numbers are integers; the untouched float spellings, escapes and CRLFs stay.
    assert!(output.contains("\"image_size\":384,\r\n"));
    assert!(output.contains("0.0200") && output.contains("1E-12"));
    assert!(output.contains("caf\\u00e9 \\/ cr\\u00e8me") && output.ends_with('}'));
}

#[test]
fn a_request_that_keeps_the_sizes_changes_nothing() {
    let same = request((224, 224), (224, 224), (16, 16));
    let (output, changes) = update(CLASSIFIER, &same).unwrap();
    assert_eq!(output, CLASSIFIER);
    assert!(changes.is_empty());
}

/// An image-text model: the vision tower nested, a text tower beside it whose numbers (some equal
/// to the image size on purpose) must not move.
const IMAGE_TEXT: &str = r#"{
  "architectures": ["CLIPModel"],
  "projection_dim": 224,
  "text_config": {
    "hidden_size": 224,
    "max_position_embeddings": 77,
    "patch_size": 16,
    "vocab_size": 49408
  },
  "vision_config": {
    "hidden_size": 768,
    "image_size": 224,
    "layer_norm_eps": 1e-05,
    "patch_size": 16,
    "prior_vision_config": {"image_size": [224, 224], "patch_size": {"height": 16, "width": 16}}
  },
  "vision": {"image_size": 224},
  "vision_config_path": "vision/config.json",
  "logit_scale_init_value": 2.6592
}
"#;

#[test]
fn dual_tower_changes_vision_sections_only() {
    let recorded = recorded_sizes(IMAGE_TEXT).unwrap();
    let paths: Vec<_> = recorded.sizes.iter().map(|s| s.path.join(".")).collect();
    assert_eq!(
        paths,
        [
            "vision_config.image_size",
            "vision_config.patch_size",
            "vision_config.prior_vision_config.image_size",
            "vision_config.prior_vision_config.patch_size",
            "vision.image_size",
        ]
    );
    let req = request((224, 224), (448, 448), (16, 14));
    let output = assert_update(
        IMAGE_TEXT,
        &req,
        &[
            (&["vision_config", "image_size"], json!(224), json!(448)),
            (&["vision_config", "patch_size"], json!(16), json!(14)),
            (
                &["vision_config", "prior_vision_config", "image_size"],
                json!([224, 224]),
                json!([448, 448]),
            ),
            (
                &["vision_config", "prior_vision_config", "patch_size"],
                json!({"height": 16, "width": 16}),
                json!({"height": 14, "width": 14}),
            ),
            (&["vision", "image_size"], json!(224), json!(448)),
        ],
    );
    let out: Value = serde_json::from_str(&output).unwrap();
    assert_eq!(out["text_config"]["max_position_embeddings"], 77);
    assert_eq!(out["text_config"]["hidden_size"], 224);
    assert_eq!(out["text_config"]["patch_size"], 16);
    assert_eq!(out["projection_dim"], 224);
    // Shapes kept: the array stays an array with its spacing, the object keeps its keys.
    assert!(output.contains(r#""prior_vision_config": {"image_size": [448, 448], "patch_size": {"height": 14, "width": 14}}"#));
}

#[test]
fn a_non_square_size_keeps_arrays_and_refuses_single_numbers() {
    let arrays = r#"{"vision_config": {"image_size": [224,224], "patch_size": 16}}"#;
    let req = request((224, 224), (384, 512), (16, 16));
    let output = assert_update(
        arrays,
        &req,
        &[(
            &["vision_config", "image_size"],
            json!([224, 224]),
            json!([384, 512]),
        )],
    );
    assert_eq!(
        output,
        r#"{"vision_config": {"image_size": [384,512], "patch_size": 16}}"#
    );

    let number = r#"{"image_size": 224, "patch_size": 16}"#;
    match update(number, &req) {
        Err(ConfigError::NotSquare {
            path,
            height: 384,
            width: 512,
        }) => assert_eq!(path, "image_size"),
        other => panic!("expected NotSquare, got {other:?}"),
    }
}

#[test]
fn escaped_key_names_are_read_as_python_reads_them_and_kept_as_written() {
    // "\u005f" is "_": Python's json reads these keys as vision_config and image_size.
    let text = r#"{"vision\u005fconfig": {"image\u005fsize": 224, "patch_size": 16}}"#;
    let output = assert_update(
        text,
        &TO_384,
        &[(&["vision_config", "image_size"], json!(224), json!(384))],
    );
    assert_eq!(
        output,
        r#"{"vision\u005fconfig": {"image\u005fsize": 384, "patch_size": 16}}"#
    );
}

// ---------------------------------------------------------------------------------------------
// Preprocessing configurations

#[test]
fn preprocessing_sizes_change_only_where_they_equal_the_old_input() {
    let text = r#"{
  "crop_size": {"height": 224, "width": 224},
  "do_center_crop": true,
  "do_resize": true,
  "image_mean": [0.48145466, 0.4578275, 0.40821073],
  "image_processor_type": "CLIPImageProcessor",
  "image_size": 256,
  "resample": 3,
  "size": {"shortest_edge": 224}
}
"#;
    let recorded = recorded_sizes(text).unwrap();
    assert_eq!(recorded.kind, FileKind::Preprocessing);
    let values: Vec<_> = recorded.sizes.iter().map(|s| (s.key, s.value)).collect();
    assert_eq!(
        values,
        [
            (SizeKey::CropSize, SizeValue::HeightWidth(224, 224)),
            (SizeKey::ImageSize, SizeValue::Number(256)),
            (SizeKey::Size, SizeValue::ShortestEdge(224)),
        ]
    );
    assert_update(
        text,
        &request((224, 224), (336, 336), (14, 14)),
        &[
            (
                &["crop_size"],
                json!({"height": 224, "width": 224}),
                json!({"height": 336, "width": 336}),
            ),
            (
                &["size"],
                json!({"shortest_edge": 224}),
                json!({"shortest_edge": 336}),
            ),
        ],
    );
}

#[test]
fn shortest_edge_follows_the_short_side_only() {
    let text = r#"{"do_resize": true, "size": {"shortest_edge": 224}}"#;
    // Old input 224x320: short side 224 -> new input 384x512: short side 384.
    assert_update(
        text,
        &request((224, 320), (384, 512), (16, 16)),
        &[(
            &["size"],
            json!({"shortest_edge": 224}),
            json!({"shortest_edge": 384}),
        )],
    );
    // A resize of 256 before a crop is a setting of its own and stays.
    let larger = r#"{"do_resize": true, "size": {"shortest_edge": 256}}"#;
    assert_update(larger, &TO_384, &[]);
}

#[test]
fn preprocessing_numbers_and_unknown_forms() {
    let text = "{\"feature_extractor_type\": \"ViTFeatureExtractor\", \"size\": 224, \"crop_size\": {\"height\": 224, \"width\": 256}, \"image_size\": {\"shortest_edge\": 224, \"longest_edge\": 1333}}\n";
    let recorded = recorded_sizes(text).unwrap();
    let skipped: Vec<_> = recorded.skipped.iter().map(|s| s.path.join(".")).collect();
    assert_eq!(
        skipped,
        ["image_size"],
        "an edge pair is not a size posgrid can keep consistent"
    );
    // The 224x256 crop is not the old input: it stays; the number 224 follows.
    assert_update(text, &TO_384, &[(&["size"], json!(224), json!(384))]);
}

// ---------------------------------------------------------------------------------------------
// Disagreements with the checkpoint

#[test]
fn disagreements_name_the_file_value_and_the_checkpoint() {
    let text = r#"{"vision_config": {"image_size": 256, "patch_size": 14}}"#;
    let warnings = disagreements(&recorded_sizes(text).unwrap(), (14, 14), 16);
    assert_eq!(warnings.len(), 2, "{warnings:?}");
    assert!(warnings[0].contains("vision_config.image_size") && warnings[0].contains("256"));
    assert!(warnings[0].contains("14x14") && warnings[0].contains("224x224"));
    assert!(warnings[1].contains("vision_config.patch_size") && warnings[1].contains("16 pixels"));

    // Agreeing values: 14 x 16 = 224 (and a non-square grid as [h, w]).
    let agreeing = r#"{"image_size": [224, 320], "patch_size": 16}"#;
    assert!(disagreements(&recorded_sizes(agreeing).unwrap(), (14, 20), 16).is_empty());
}

#[test]
fn a_resize_smaller_than_the_new_crop_is_reported_after_the_update() {
    let text = r#"{"crop_size": 224, "do_center_crop": true, "size": 256}"#;
    let (output, _) = update(text, &TO_384).unwrap();
    assert_eq!(
        output,
        r#"{"crop_size": 384, "do_center_crop": true, "size": 256}"#
    );
    let warnings = disagreements(&recorded_sizes(&output).unwrap(), (24, 24), 16);
    assert_eq!(warnings.len(), 1, "{warnings:?}");
    assert!(warnings[0].starts_with("size resizes images to 256"));
    assert!(disagreements(&recorded_sizes(text).unwrap(), (14, 14), 16).is_empty());
}

// ---------------------------------------------------------------------------------------------
// Attention windows (`window_size`, in patches)

/// A request moving one attention window, the input size and patch kept.
fn moves(old: (usize, usize), new: (usize, usize)) -> Request {
    Request {
        windows: vec![WindowMove { old, new }],
        ..Request::default()
    }
}

/// Stage windows of a windowed model written at the top level, in a vision section, as a pair,
/// and in a text section (not the vision tower's: kept).
const WINDOWED: &str = r#"{
  "image_size": 224,
  "patch_size": 4,
  "text_config": {"window_size": 7},
  "vision_config": {"window_size": [7, 7], "stage_window_size": 7},
  "window_size": 7
}
"#;

#[test]
fn window_sizes_equal_to_a_moving_window_take_the_new_one() {
    let recorded = recorded_sizes(WINDOWED).unwrap();
    let windows: Vec<_> = recorded
        .sizes
        .iter()
        .filter(|s| s.key == SizeKey::WindowSize)
        .map(|s| (s.path.join("."), s.value))
        .collect();
    assert_eq!(
        windows,
        [
            ("vision_config.window_size".into(), SizeValue::Array(7, 7)),
            ("window_size".into(), SizeValue::Number(7)),
        ]
    );
    // A square new window: a number stays a number, a pair stays a pair.
    let output = assert_update(
        WINDOWED,
        &moves((7, 7), (12, 12)),
        &[
            (
                &["vision_config", "window_size"],
                json!([7, 7]),
                json!([12, 12]),
            ),
            (&["window_size"], json!(7), json!(12)),
        ],
    );
    assert!(output.contains(r#""text_config": {"window_size": 7}"#));
    assert!(output.contains(r#""stage_window_size": 7"#));
    // Image and patch sizes stay: this request moves windows only.
    assert!(output.contains("\"image_size\": 224,\n  \"patch_size\": 4,"));
}

#[test]
fn a_non_square_window_goes_into_pairs_only() {
    let pair = r#"{"window_size": [8, 8], "pretrained_window_sizes": [8, 8, 8, 8]}"#;
    let output = assert_update(
        pair,
        &moves((8, 8), (8, 12)),
        &[(&["window_size"], json!([8, 8]), json!([8, 12]))],
    );
    assert_eq!(
        output,
        r#"{"window_size": [8, 12], "pretrained_window_sizes": [8, 8, 8, 8]}"#
    );
    match update(r#"{"window_size": 8}"#, &moves((8, 8), (8, 12))) {
        Err(ConfigError::NotSquare {
            path,
            height: 8,
            width: 12,
        }) => assert_eq!(path, "window_size"),
        other => panic!("expected NotSquare, got {other:?}"),
    }
}

#[test]
fn only_windows_that_move_change_where_stages_differ() {
    // Stages at windows 7 and 12, `--window 12`: the 7 moves, the 12 is already there; a key
    // recording 9 matches no stage and stays (a warning, below).
    let text =
        r#"{"window_size": 7, "vision_config": {"window_size": 12}, "vision": {"window_size": 9}}"#;
    let req = moves((7, 7), (12, 12));
    assert_update(text, &req, &[(&["window_size"], json!(7), json!(12))]);
    let warnings = window_disagreements(&recorded_sizes(text).unwrap(), &req.windows);
    assert_eq!(warnings.len(), 1, "{warnings:?}");
    for part in ["vision.window_size", "window 9", "7x7", "12x12"] {
        assert!(warnings[0].contains(part), "{part}: {warnings:?}");
    }
    // With no window moving nothing is known of the checkpoint's windows: no warning.
    assert!(window_disagreements(&recorded_sizes(text).unwrap(), &[]).is_empty());
}

#[test]
fn window_values_that_are_no_window_are_kept_without_failing_the_file() {
    // 0 stands for global attention in some configurations; a list per stage is not one window.
    let text = r#"{"image_size": 224, "patch_size": 16, "vision_config": {"window_size": 0}, "window_size": [7, 7, 7, 7]}"#;
    let recorded = recorded_sizes(text).unwrap();
    let skipped: Vec<_> = recorded.skipped.iter().map(|s| s.path.join(".")).collect();
    assert_eq!(skipped, ["vision_config.window_size", "window_size"]);
    assert_update(text, &TO_384, &[(&["image_size"], json!(224), json!(384))]);
    // A preprocessing file's window_size is no size posgrid reads.
    let pre = r#"{"do_resize": true, "size": 224, "window_size": 7}"#;
    assert!(recorded_sizes(pre)
        .unwrap()
        .sizes
        .iter()
        .all(|s| s.key != SizeKey::WindowSize));
    assert_update(pre, &moves((7, 7), (12, 12)), &[]);
}

// ---------------------------------------------------------------------------------------------
// A crop updated past the resize before it

/// The one crop-fit warning of `text` updated with `req`, checked to name both keys, the kept
/// resize, the new crop and the suggested value.
fn crop_warning(text: &str, req: &Request, kept: &str, suggested: &str) {
    let warnings = crop_fit_warnings(&recorded_sizes(text).unwrap(), req);
    assert_eq!(warnings.len(), 1, "{text}: {warnings:?}");
    let w = &warnings[0];
    let crop = format!("{}x{}", req.new_image.0, req.new_image.1);
    for part in ["crop_size", &crop, &format!("size stays {kept}")] {
        assert!(w.contains(part), "{part}: {w}");
    }
    assert!(
        w.contains(&format!("set size to {suggested} ")),
        "{suggested}: {w}"
    );
}

#[test]
fn a_kept_resize_smaller_than_the_new_crop_is_a_warning_with_the_ratio_kept() {
    // The suggested values: old resize × new crop / old crop, rounded (computed by hand):
    // 256 × 384 / 224 = 438.86 -> 439; 320 × 384 / 224 = 548.57 -> 549;
    // 256 × 512 / 224 = 585.14 -> 585.
    let number = r#"{"crop_size": 224, "do_center_crop": true, "size": 256}"#;
    crop_warning(number, &TO_384, "256", "439");
    let edge = r#"{"crop_size": {"height": 224, "width": 224}, "size": {"shortest_edge": 256}}"#;
    crop_warning(
        edge,
        &TO_384,
        "shortest edge 256",
        r#"{"shortest_edge": 439}"#,
    );
    let sides = r#"{"crop_size": [224, 224], "size": {"height": 256, "width": 320}}"#;
    crop_warning(
        sides,
        &TO_384,
        "256x320",
        r#"{"height": 439, "width": 549}"#,
    );
    let array = r#"{"crop_size": [224, 224], "size": [256, 320]}"#;
    crop_warning(array, &TO_384, "256x320", "[439, 549]");
    // A non-square new crop: one number must cover the longer side.
    let wide = request((224, 224), (384, 512), (16, 16));
    crop_warning(
        edge,
        &wide,
        "shortest edge 256",
        r#"{"shortest_edge": 585}"#,
    );
}

#[test]
fn no_crop_warning_where_the_crop_still_fits_or_does_not_move() {
    let none = |text: &str, req: &Request| {
        let warnings = crop_fit_warnings(&recorded_sizes(text).unwrap(), req);
        assert!(warnings.is_empty(), "{text}: {warnings:?}");
    };
    // A resize larger than the new crop on both sides.
    none(r#"{"crop_size": 224, "size": 400}"#, &TO_384);
    none(
        r#"{"crop_size": 224, "size": {"shortest_edge": 384}}"#,
        &TO_384,
    );
    // A resize equal to the old input follows it to the new one.
    none(r#"{"crop_size": 224, "size": 224}"#, &TO_384);
    // A crop that is not the old input stays, and so does its fit.
    none(r#"{"crop_size": 200, "size": 256}"#, &TO_384);
    // A request that keeps the size, and a model configuration.
    none(
        r#"{"crop_size": 224, "size": 256}"#,
        &request((224, 224), (224, 224), (16, 16)),
    );
    none(r#"{"image_size": 224, "patch_size": 16}"#, &TO_384);
}

// ---------------------------------------------------------------------------------------------
// Hostile inputs: errors, never panics

fn nested(levels: usize) -> String {
    format!(
        "{{\"vision_config\": {{\"image_size\": 224, \"x\": {}1{}}}}}",
        "[".repeat(levels),
        "]".repeat(levels)
    )
}

#[test]
fn nesting_is_bounded() {
    // The vision section is level 2: 62 arrays inside it reach MAX_DEPTH exactly.
    assert_eq!(MAX_DEPTH, 64);
    assert!(update(&nested(62), &TO_384).is_ok());
    assert_eq!(
        update(&nested(63), &TO_384).err(),
        Some(ConfigError::TooDeep { limit: 64 })
    );
    // Far beyond any parser's recursion: refused without exhausting the stack.
    let deep = nested(1_000_000);
    assert_eq!(
        recorded_sizes(&deep).err(),
        Some(ConfigError::TooDeep { limit: 64 })
    );
}

#[test]
fn repeated_keys_are_refused_at_every_level() {
    for (text, key) in [
        (r#"{"image_size": 224, "image_size": 384}"#, "image_size"),
        (
            r#"{"vision_config": {"patch_size": 16, "patch_size": 14}}"#,
            "patch_size",
        ),
        (
            r#"{"image_size": 224, "image\u005fsize": 384}"#,
            "image_size",
        ),
        (
            r#"{"size": {"height": 224, "height": 224, "width": 1}}"#,
            "height",
        ),
    ] {
        assert_eq!(
            update(text, &TO_384).err(),
            Some(ConfigError::DuplicateKey(key.into())),
            "{text}"
        );
    }
}

#[test]
fn numbers_that_are_no_size_are_refused() {
    for text in [
        r#"{"image_size": 100000000000000000000000000000}"#,
        r#"{"image_size": 18446744073709551616}"#,
        r#"{"image_size": 2000000}"#,
        r#"{"image_size": -224}"#,
        r#"{"image_size": 0}"#,
        r#"{"image_size": 224.5}"#,
        r#"{"vision_config": {"patch_size": [16, -1]}}"#,
        r#"{"do_resize": true, "size": {"height": 1e30, "width": 224}}"#,
    ] {
        match update(text, &TO_384) {
            Err(ConfigError::BadSize { .. }) => {}
            other => panic!("{text}: expected BadSize, got {other:?}"),
        }
    }
    // Out of range for a double: not JSON a reader can hold.
    assert!(matches!(
        update(r#"{"image_size": 1e400}"#, &TO_384),
        Err(ConfigError::Malformed(_))
    ));
    // A huge number elsewhere is not a size: it is kept as written.
    let kept = r#"{"seed": 123456789012345678901234567890, "image_size": 224}"#;
    assert_update(kept, &TO_384, &[(&["image_size"], json!(224), json!(384))]);
}

#[test]
fn text_that_is_not_a_json_object_is_refused() {
    for text in [
        "",
        "   ",
        "[]",
        "224",
        "{} {}",
        "{\"image_size\": 224,}",
        "{\"image_size\": 224",
        "{\"image_size\" 224}",
        "{\"a\": \"unterminated}",
        "{\"a\": NaN}",
        "{\"a\": tru}",
        "{\"a\": 01}",
        "{\"\\ud800\": 1}",
        "\u{feff}{}",
        "{\"a\": \"\u{1}\"}",
    ] {
        match update(text, &TO_384) {
            Err(ConfigError::Malformed(_)) => {}
            other => panic!("{text:?}: expected Malformed, got {other:?}"),
        }
    }
}

#[test]
fn bytes_are_checked_for_size_and_utf8() {
    assert_eq!(
        text_from_bytes(b"{\"a\": \"\xff\"}"),
        Err(ConfigError::NotUtf8 { at: 7 })
    );
    assert_eq!(text_from_bytes(b"{}"), Ok("{}"));
    let big = vec![b' '; MAX_TEXT_BYTES + 1];
    assert!(matches!(
        text_from_bytes(&big),
        Err(ConfigError::TooLarge { .. })
    ));
}

#[test]
fn control_characters_in_key_names_stay_out_of_printed_warnings() {
    let text = r#"{"\u001b[2J\u202evision_config": {"image_size": 256}}"#;
    let recorded = recorded_sizes(text).unwrap();
    assert_eq!(recorded.sizes.len(), 1);
    for warning in disagreements(&recorded, (14, 14), 16) {
        let shown = posgrid::visible::visible(&warning);
        assert!(!shown.contains('\u{1b}') && !shown.contains('\u{202e}'));
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// Truncated, cut and spliced configurations: an error or a valid update, never a panic; an
    /// accepted text changes only inside the reported spans.
    #[test]
    fn damaged_configurations_never_panic(
        cut in 0usize..IMAGE_TEXT.len(),
        len in 0usize..8,
        insert in prop::sample::select(vec!["", "{", "}", "[", "]", "\"", "\\", ",", ":", "1e999", "-", "\u{e9}"]),
    ) {
        let mut text = IMAGE_TEXT.to_string();
        let start = (0..=cut).rev().find(|&i| text.is_char_boundary(i)).unwrap_or(0);
        let end = (start + len..=text.len()).find(|&i| text.is_char_boundary(i)).unwrap_or(text.len());
        text.replace_range(start..end, insert);
        if let Ok(recorded) = recorded_sizes(&text) {
            let _ = disagreements(&recorded, (14, 14), 16);
        }
        if let Ok((output, changes)) = update(&text, &request((224, 224), (448, 448), (16, 14))) {
            assert_only_spans_differ(&text, &output, &changes);
            prop_assert!(serde_json::from_str::<Value>(&output).is_ok());
        }
    }
}

/// A size key posgrid does not read as a size (a string, a list of per-stage windows, an
/// object of other fields) stays as it is; where the request changes what it records, a
/// warning names it, since it may still record the old size (it used to stay without a word).
/// A window written as the number 0 stands for global attention: a setting, not warned about.
#[test]
fn size_keys_that_are_not_read_are_warned_about_when_their_size_changes() {
    let text = r#"{"image_size": "224", "patch_size": "16", "window_size": [7, 7, 7, 7], "vision_config": {"window_size": 0}}"#;
    let recorded = recorded_sizes(text).unwrap();
    let grows = Request {
        old_patch: (16, 16),
        new_patch: (14, 14),
        windows: vec![WindowMove {
            old: (7, 7),
            new: (12, 12),
        }],
        ..TO_384
    };
    let warnings = unread_warnings(&recorded, &grows);
    assert_eq!(warnings.len(), 3, "{warnings:?}");
    for (warning, key) in warnings
        .iter()
        .zip(["image_size", "patch_size", "window_size"])
    {
        assert!(warning.starts_with(key), "{warning}");
        assert!(warning.contains("left as it is"), "{warning}");
    }
    assert!(warnings[0].contains("a string"), "{warnings:?}");
    // Nothing changes: nothing to warn about.
    assert!(unread_warnings(&recorded, &Request::default()).is_empty());
    // Only the input size changes: only image_size.
    let only_image = unread_warnings(&recorded, &TO_384);
    assert_eq!(only_image.len(), 1, "{only_image:?}");
}

/// A hostile pair of inputs — a checkpoint whose blocks move 40 000 different windows and a
/// 15 MB configuration of 300 000 vision sections, each with a window_size — is rewritten and
/// compared in time linear in both (each key looked up once, not against every window): it
/// took about ten seconds on the development machine, and takes about one now (mostly reading
/// the text); the bound leaves room for a loaded machine.
#[test]
fn many_windows_against_many_window_keys_stay_linear() {
    let windows: Vec<WindowMove> = (0..40_000)
        .map(|n| WindowMove {
            old: (2 + n / 150, 2 + n % 150),
            new: (12, 12),
        })
        .collect();
    let req = Request {
        windows,
        ..Request::default()
    };
    // Windows of 300 rows and more: none of them moves, so every lookup misses.
    let sections: Vec<String> = (0..300_000)
        .map(|n| {
            format!(
                "\"s{n}_vision_config\": {{\"window_size\": [{}, 7]}}",
                300 + n % 97
            )
        })
        .collect();
    let text = format!("{{{}}}", sections.join(", "));
    let start = std::time::Instant::now();
    let recorded = recorded_sizes(&text).unwrap();
    let (output, changes) = update(&text, &req).unwrap();
    let warnings = window_disagreements(&recorded, &req.windows);
    let took = start.elapsed();
    assert!(changes.is_empty() && output == text);
    assert_eq!(warnings.len(), 300_000);
    assert!(took < std::time::Duration::from_secs(4), "{took:?}");
}
