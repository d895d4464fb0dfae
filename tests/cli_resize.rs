//! End-to-end `posgrid resize` and `posgrid scan` runs on checkpoints written by the reference
//! safetensors serializer; outputs are read back with the reference deserializer.

mod common;

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use common::*;
use safetensors::{Dtype, SafeTensors};

/// A ViT-like file: table [1, 197, 16] F32, kernel, two other tensors, and metadata.
fn vit(dir: &Path, dt: Dtype) -> PathBuf {
    let d = 16;
    write(
        dir,
        "vit.safetensors",
        &[
            floats(
                "pos_embed",
                dt,
                &[1, 197, d],
                &smooth_table(1, 14, 14, d, 1),
            ),
            floats(
                "patch_embed.proj.weight",
                dt,
                &[d, 3, 16, 16],
                &noise(d * 768, 2, 0.1),
            ),
            floats("cls_token", dt, &[1, 1, d], &noise(d, 3, 0.1)),
            floats("head.weight", dt, &[10, d], &noise(10 * d, 4, 0.1)),
        ],
        Some(&[("format", "pt"), ("note", "test file")]),
    )
}

fn load(path: &Path) -> Vec<u8> {
    std::fs::read(path).unwrap()
}

fn header_names(bytes: &[u8]) -> Vec<String> {
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let text = std::str::from_utf8(&bytes[8..8 + n]).unwrap();
    // Key order as written, read with a streaming pass over the top-level object.
    let v: serde_json::Value = serde_json::from_str(text).unwrap();
    v.as_object()
        .unwrap()
        .keys()
        .filter(|k| *k != "__metadata__")
        .cloned()
        .collect()
}

#[test]
fn resize_changes_the_table_and_nothing_else() {
    for dt in [Dtype::F32, Dtype::BF16, Dtype::F16, Dtype::F64] {
        let dir = tempfile::tempdir().unwrap();
        let input = vit(dir.path(), dt);
        let before = load(&input);
        let out = dir.path().join("out.safetensors");
        let o = posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--image",
            "384",
            "--json",
        ]);
        assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
        assert_eq!(load(&input), before, "input unchanged");
        let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        assert_eq!(report["tables"][0]["from"], serde_json::json!([14, 14]));
        assert_eq!(report["tables"][0]["to"], serde_json::json!([24, 24]));
        assert_eq!(report["tables"][0]["slots"], 1);
        assert_eq!(report["tables"][0]["antialias"], false);
        assert_eq!(report["tables"][0]["kernel"], "bicubic");
        assert_eq!(report["tables"][0]["dtype"], dt.to_string());
        assert!(
            report["tables"][0]["fidelity"].as_f64().unwrap() > 0.9,
            "fidelity of a smooth table"
        );
        assert_eq!(report["dry_run"], false);
        assert_eq!(report["copied"].as_array().unwrap().len(), 3);

        let after = load(&out);
        assert_eq!(report["bytes_written"], after.len() as u64);
        // Shared (cloned) and copied bytes make up the output, whatever the file system
        // (tests/reflink.rs checks the sharing itself).
        let shared = report["bytes_shared"].as_u64().unwrap();
        assert_eq!(
            shared + report["bytes_copied"].as_u64().unwrap(),
            after.len() as u64
        );
        let a = SafeTensors::deserialize(&before).unwrap();
        let b = SafeTensors::deserialize(&after).unwrap();
        for name in ["patch_embed.proj.weight", "cls_token", "head.weight"] {
            let (x, y) = (a.tensor(name).unwrap(), b.tensor(name).unwrap());
            assert_eq!(
                (x.dtype(), x.shape(), x.data()),
                (y.dtype(), y.shape(), y.data()),
                "{name} {dt}"
            );
        }
        let t = b.tensor("pos_embed").unwrap();
        assert_eq!(t.dtype(), dt);
        assert_eq!(t.shape(), &[1, 1 + 24 * 24, 16]);
        let elem = dt.bitsize() / 8;
        assert_eq!(
            &t.data()[..16 * elem],
            &a.tensor("pos_embed").unwrap().data()[..16 * elem],
            "class slot bit-exact"
        );
        assert_eq!(
            header_names(&before),
            header_names(&after),
            "tensor order kept"
        );
        let (_, meta) = SafeTensors::read_metadata(&after).unwrap();
        let meta = meta.metadata().clone().unwrap();
        assert_eq!(meta["format"], "pt");
        assert_eq!(meta["note"], "test file");
        let prov: serde_json::Value = serde_json::from_str(&meta["posgrid"]).unwrap();
        assert_eq!(prov["tables"][0]["to"], serde_json::json!([24, 24]));
        assert_eq!(prov["version"], env!("CARGO_PKG_VERSION"));
        // No temporary files left beside the output.
        let names: Vec<_> = std::fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 2, "{names:?}");
    }
}

#[test]
fn dual_tower_resize_rewrites_position_ids_and_leaves_the_text_tower() {
    let dir = tempfile::tempdir().unwrap();
    let d = 8;
    let input = write(
        dir.path(),
        "clip.safetensors",
        &[
            floats(
                "vision_model.embeddings.position_embedding.weight",
                Dtype::F32,
                &[50, d],
                &smooth_table(1, 7, 7, d, 5),
            ),
            ids("vision_model.embeddings.position_ids", &[1, 50]),
            floats(
                "vision_model.embeddings.patch_embedding.weight",
                Dtype::F32,
                &[d, 3, 32, 32],
                &noise(d * 3072, 6, 0.1),
            ),
            floats(
                "text_model.embeddings.position_embedding.weight",
                Dtype::F32,
                &[77, d],
                &noise(77 * d, 7, 0.1),
            ),
            ids("text_model.embeddings.position_ids", &[1, 77]),
        ],
        None,
    );
    let out = dir.path().join("clip-336.safetensors");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--image",
        "320",
        "--kernel",
        "bilinear",
        "--json",
    ]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(
        report["companions"],
        serde_json::json!(["vision_model.embeddings.position_ids"])
    );
    let bytes = load(&out);
    let st = SafeTensors::deserialize(&bytes).unwrap();
    assert_eq!(
        st.tensor("vision_model.embeddings.position_embedding.weight")
            .unwrap()
            .shape(),
        &[101, d]
    );
    let ids_t = st.tensor("vision_model.embeddings.position_ids").unwrap();
    assert_eq!(
        (ids_t.dtype(), ids_t.shape()),
        (Dtype::I64, &[1usize, 101][..])
    );
    let values: Vec<i64> = ids_t
        .data()
        .chunks(8)
        .map(|c| i64::from_le_bytes(c.try_into().unwrap()))
        .collect();
    assert_eq!(values, (0..101).collect::<Vec<i64>>());
    assert_eq!(
        st.tensor("text_model.embeddings.position_ids")
            .unwrap()
            .shape(),
        &[1, 77]
    );
    assert_eq!(
        st.tensor("text_model.embeddings.position_embedding.weight")
            .unwrap()
            .shape(),
        &[77, d]
    );
}

#[test]
fn grid_shaped_table_keeps_its_layout() {
    let dir = tempfile::tempdir().unwrap();
    let input = write(
        dir.path(),
        "sam.safetensors",
        &[floats(
            "image_encoder.pos_embed",
            Dtype::BF16,
            &[1, 8, 8, 8],
            &smooth_table(0, 8, 8, 8, 8),
        )],
        None,
    );
    let out = dir.path().join("o.safetensors");
    let o = posgrid(&["resize", s(&input), "-o", s(&out), "--grid", "12x16"]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let bytes = load(&out);
    let st = SafeTensors::deserialize(&bytes).unwrap();
    assert_eq!(
        st.tensor("image_encoder.pos_embed").unwrap().shape(),
        &[1, 12, 16, 8]
    );
}

#[test]
fn dry_run_and_already_at_target_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let input = vit(dir.path(), Dtype::F32);
    let out = dir.path().join("out.safetensors");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "24",
        "--dry-run",
        "--json",
    ]);
    assert_eq!(code(&o), 0);
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(report["dry_run"], true);
    assert_eq!(report["bytes_written"], 0);
    assert!(report["output_size"].as_u64().unwrap() > 0);
    assert!(!out.exists());
    let o = posgrid(&["resize", s(&input), "-o", s(&out), "--grid", "14x14"]);
    assert_eq!(code(&o), 0);
    assert!(String::from_utf8_lossy(&o.stdout).contains("already at the target"));
    assert!(!out.exists());
}

#[test]
fn outputs_that_would_lose_data_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let input = vit(dir.path(), Dtype::F32);
    let before = load(&input);
    // The input itself, through a relative `..` path, a symlink and a hard link.
    let sub = dir.path().join("sub");
    std::fs::create_dir(&sub).unwrap();
    let dotted = sub.join("..").join("vit.safetensors");
    let link = dir.path().join("link.safetensors");
    std::os::unix::fs::symlink(&input, &link).unwrap();
    let hard = dir.path().join("hard.safetensors");
    std::fs::hard_link(&input, &hard).unwrap();
    for target in [&input, &dotted, &link, &hard] {
        for force in [false, true] {
            let mut args = vec!["resize", s(&input), "-o", s(target), "--grid", "24"];
            if force {
                args.push("--force");
            }
            let o = posgrid(&args);
            assert_eq!(
                code(&o),
                5,
                "{}: {}",
                target.display(),
                String::from_utf8_lossy(&o.stderr)
            );
            assert!(String::from_utf8_lossy(&o.stderr).contains("input"));
        }
    }
    assert_eq!(load(&input), before);
    // An existing output needs --force; a missing directory is an error.
    let existing = dir.path().join("existing.safetensors");
    std::fs::write(&existing, b"keep me").unwrap();
    let o = posgrid(&["resize", s(&input), "-o", s(&existing), "--grid", "24"]);
    assert_eq!(code(&o), 5);
    assert!(String::from_utf8_lossy(&o.stderr).contains("--force"));
    assert_eq!(std::fs::read(&existing).unwrap(), b"keep me");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&existing),
        "--grid",
        "24",
        "--force",
    ]);
    assert_eq!(code(&o), 0);
    assert!(SafeTensors::deserialize(&load(&existing)).is_ok());
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&dir.path().join("no/such/dir/o.safetensors")),
        "--grid",
        "24",
    ]);
    assert_eq!(code(&o), 5);
    assert!(String::from_utf8_lossy(&o.stderr).contains("does not exist"));
}

#[test]
fn exit_codes_for_each_kind_of_failure() {
    let dir = tempfile::tempdir().unwrap();
    let input = vit(dir.path(), Dtype::F32);
    let out = dir.path().join("o.safetensors");
    // 2: usage (clap, and values that do not fit together).
    assert_eq!(code(&posgrid(&["resize", s(&input), "-o", s(&out)])), 2);
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "0x3"
        ])),
        2
    );
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--image",
            "385"
        ])),
        2
    );
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "8",
            "--kernel",
            "area",
            "--coords",
            "align-corners"
        ])),
        2
    );
    // 3: invalid input.
    let broken = raw(dir.path(), "broken.safetensors", b"\x05\0\0\0\0\0\0\0{oops");
    let o = posgrid(&["resize", s(&broken), "-o", s(&out), "--grid", "24"]);
    assert_eq!(code(&o), 3);
    assert!(String::from_utf8_lossy(&o.stderr).contains("broken.safetensors"));
    assert_eq!(code(&posgrid(&["scan", s(&dir.path().join("missing"))])), 3);
    // 4: no table, unknown tensor, ambiguous table.
    let none = write(
        dir.path(),
        "none.safetensors",
        &[floats("w", Dtype::F32, &[4, 4], &noise(16, 1, 1.0))],
        None,
    );
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&none),
            "-o",
            s(&out),
            "--grid",
            "24"
        ])),
        4
    );
    assert_eq!(code(&posgrid(&["scan", s(&none)])), 4);
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "24",
            "--tensor",
            "nope"
        ])),
        4
    );
    let amb = write(
        dir.path(),
        "amb.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 12, 8],
            &noise(96, 1, 1.0),
        )],
        None,
    );
    let o = posgrid(&["resize", s(&amb), "-o", s(&out), "--grid", "4"]);
    assert_eq!(code(&o), 4);
    assert!(String::from_utf8_lossy(&o.stderr).contains("--slots"));
    let resolved = dir.path().join("resolved.safetensors");
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&amb),
            "-o",
            s(&resolved),
            "--grid",
            "4",
            "--slots",
            "3"
        ])),
        0
    );
    // 6: refused values or size.
    let mut bad = smooth_table(1, 4, 4, 8, 2);
    bad[40] = f64::NAN;
    let nan = write(
        dir.path(),
        "nan.safetensors",
        &[floats("pos_embed", Dtype::F32, &[1, 17, 8], &bad)],
        None,
    );
    let o2 = dir.path().join("o2.safetensors");
    let o = posgrid(&["resize", s(&nan), "-o", s(&o2), "--grid", "8"]);
    assert_eq!(code(&o), 6);
    assert!(String::from_utf8_lossy(&o.stderr).contains("--allow-nonfinite"));
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&nan),
            "-o",
            s(&o2),
            "--grid",
            "8",
            "--allow-nonfinite"
        ])),
        0
    );
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "100000",
        "--memory-limit",
        "64M",
    ]);
    assert_eq!(code(&o), 6);
    assert!(String::from_utf8_lossy(&o.stderr).contains("--memory-limit"));
    assert!(!out.exists());
    let ints = write(
        dir.path(),
        "int.safetensors",
        &[ids("pos_embed", &[1, 17, 1])],
        None,
    );
    let o = posgrid(&[
        "resize",
        s(&ints),
        "-o",
        s(&out),
        "--grid",
        "8",
        "--tensor",
        "pos_embed",
    ]);
    assert_eq!(code(&o), 6, "{}", String::from_utf8_lossy(&o.stderr));
}

#[test]
fn scan_json_carries_the_contract_fields() {
    let dir = tempfile::tempdir().unwrap();
    let input = vit(dir.path(), Dtype::BF16);
    let o = posgrid(&["scan", s(&input), "--json"]);
    assert_eq!(code(&o), 0);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["format"], "safetensors");
    assert_eq!(v["file"], s(&input));
    assert!(v["warnings"].is_array());
    let t = &v["tables"][0];
    for field in [
        "name",
        "dtype",
        "shape",
        "slots",
        "grid",
        "dim",
        "patch",
        "kind",
        "companions",
    ] {
        assert!(!t[field].is_null(), "field {field}");
    }
    assert_eq!(
        (t["grid"].clone(), t["patch"].clone(), t["kind"].clone()),
        (
            serde_json::json!([14, 14]),
            serde_json::json!(16),
            serde_json::json!("learned")
        )
    );
    let text = posgrid(&["scan", s(&input)]);
    assert!(String::from_utf8_lossy(&text.stdout).contains("1 slot (from tokens) + 14x14 grid"));
}

#[test]
fn map_command_draws_before_and_after_and_scores_them() {
    let dir = tempfile::tempdir().unwrap();
    let input = vit(dir.path(), Dtype::BF16);
    let out = dir.path().join("out.safetensors");
    let png = dir.path().join("resize-maps.png");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "20",
        "--map",
        s(&png),
        "--json",
    ]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(report["map"], s(&png));
    assert!(image::open(&png).is_ok());
    let png2 = dir.path().join("maps.png");
    let o = posgrid(&[
        "map",
        s(&input),
        s(&out),
        "-o",
        s(&png2),
        "--json",
        "--refs",
        "8",
    ]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let m: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(m["refs"], serde_json::json!([8, 8]));
    assert_eq!(m["after_grid"], serde_json::json!([20, 20]));
    let f = m["fidelity"]["score"].as_f64().unwrap();
    assert!(f > 0.9 && f <= 1.0, "{f}");
    assert!(m["fidelity"]["min"].as_f64().unwrap() <= f);
    // Several tables and no --tensor: exit 4 naming them.
    let two = write(
        dir.path(),
        "two.safetensors",
        &[
            floats(
                "pos_embed",
                Dtype::F32,
                &[1, 17, 8],
                &smooth_table(1, 4, 4, 8, 1),
            ),
            floats(
                "decoder_pos_embed",
                Dtype::F32,
                &[1, 17, 8],
                &smooth_table(1, 4, 4, 8, 2),
            ),
        ],
        None,
    );
    let o = posgrid(&["map", s(&two), "-o", s(&dir.path().join("x.png"))]);
    assert_eq!(code(&o), 4);
    assert!(String::from_utf8_lossy(&o.stderr).contains("--tensor"));
    let o = posgrid(&[
        "map",
        s(&two),
        "-o",
        s(&dir.path().join("x.png")),
        "--tensor",
        "decoder_pos_embed",
    ]);
    assert_eq!(code(&o), 0);
}

#[test]
fn sine_cosine_tables_can_be_built_anew_on_the_target_grid() {
    // The reference is the trade's formula, written independently in tests/common.
    let dir = tempfile::tempdir().unwrap();
    let d = 32;
    let input = write(
        dir.path(),
        "mae.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 65, d],
            &sincos_table(1, 8, 8, d),
        )],
        None,
    );
    let out = dir.path().join("o.safetensors");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "12",
        "--rebuild-sincos",
        "--json",
    ]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(report["tables"][0]["method"], "rebuilt");
    let bytes = load(&out);
    let st = SafeTensors::deserialize(&bytes).unwrap();
    let t = st.tensor("pos_embed").unwrap();
    let got: Vec<f32> = t
        .data()
        .chunks(4)
        .map(|c| f32::from_le_bytes(c.try_into().unwrap()))
        .collect();
    let expected = sincos_table(1, 12, 12, d);
    assert_eq!(got.len(), expected.len());
    for (g, e) in got.iter().zip(&expected) {
        assert!((*g as f64 - e).abs() < 1e-6, "{g} vs {e}");
    }
    // Without the flag the table is resampled like any other, so it no longer follows the formula.
    let out2 = dir.path().join("o2.safetensors");
    assert_eq!(
        code(&posgrid(&[
            "resize",
            s(&input),
            "-o",
            s(&out2),
            "--grid",
            "12"
        ])),
        0
    );
    let scan: serde_json::Value =
        serde_json::from_slice(&posgrid(&["scan", s(&out2), "--json"]).stdout).unwrap();
    assert_eq!(scan["tables"][0]["kind"], "learned");
    let scan: serde_json::Value =
        serde_json::from_slice(&posgrid(&["scan", s(&out), "--json"]).stdout).unwrap();
    assert_eq!(scan["tables"][0]["kind"], "sincos");
}

/// Each tensor's absolute file offset and data, by name.
type Placed = HashMap<String, (usize, Vec<u8>)>;

/// Absolute file offset and data of every tensor, by the reference crate's reading of the
/// header (offsets sorted by the crate, so `offset_keys` is the data order).
fn placed(bytes: &[u8]) -> (Vec<String>, Placed) {
    let (n, meta) = SafeTensors::read_metadata(bytes).unwrap();
    let st = SafeTensors::deserialize(bytes).unwrap();
    let at = meta
        .tensors()
        .into_iter()
        .map(|(name, info)| {
            let data = st.tensor(&name).unwrap().data().to_vec();
            (name, (8 + n + info.data_offsets.0, data))
        })
        .collect();
    (meta.offset_keys(), at)
}

#[test]
fn untouched_tensors_keep_their_offset_modulo_4096_when_resized_tables_move_to_the_end() {
    // Two tables of exactly one 4 KiB block each (16 rows of 64 F32: a 4x4 grid, no class
    // slot) between large tensors, resized to 5x5 (6400 bytes, not a whole number of blocks):
    // left in place they would shift the tensors after them off their blocks; moved to the end
    // of the data area, every untouched tensor keeps its offset modulo 4096, as a file system
    // that shares extents needs (tests/reflink.rs checks the sharing itself on XFS).
    let dir = tempfile::tempdir().unwrap();
    let d = 64;
    let input = write(
        dir.path(),
        "mae.safetensors",
        &[
            floats(
                "blocks.0.mlp.weight",
                Dtype::F32,
                &[d, 300],
                &noise(d * 300, 1, 0.1),
            ),
            floats(
                "decoder_pos_embed",
                Dtype::F32,
                &[1, 16, d],
                &smooth_table(0, 4, 4, d, 2),
            ),
            floats(
                "head.weight",
                Dtype::F32,
                &[d, 200],
                &noise(d * 200, 3, 0.1),
            ),
            floats(
                "pos_embed",
                Dtype::F32,
                &[1, 16, d],
                &smooth_table(0, 4, 4, d, 4),
            ),
            floats(
                "proj.weight",
                Dtype::F32,
                &[d, 100],
                &noise(d * 100, 5, 0.1),
            ),
        ],
        None,
    );
    let out = dir.path().join("mae-5.safetensors");
    let o = posgrid(&["resize", s(&input), "-o", s(&out), "--grid", "5", "--quiet"]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let (before, after) = (load(&input), load(&out));
    assert_eq!(
        header_names(&after),
        header_names(&before),
        "header order kept"
    );
    let (_, old) = placed(&before);
    let (order, new) = placed(&after);
    assert_eq!(
        &order[order.len() - 2..],
        ["decoder_pos_embed", "pos_embed"]
    );
    for name in ["blocks.0.mlp.weight", "head.weight", "proj.weight"] {
        let ((a, x), (b, y)) = (&old[name], &new[name]);
        assert_eq!(x, y, "{name} unchanged");
        assert_eq!(a % 4096, b % 4096, "{name} at {b}, was at {a}");
    }
    assert_eq!(new["pos_embed"].1.len(), 25 * d * 4);
}
