//! Discovery across the naming conventions of released checkpoints (names and shapes as those
//! releases use them: common practice, recalled from memory), in F32 and BF16.

mod common;

use common::*;
use posgrid::checkpoint::Checkpoint;
use posgrid::kinds::{discover, Hints, Kind, Layout};
use safetensors::Dtype;

fn scan(path: &std::path::Path, hints: &Hints) -> posgrid::kinds::Discovery {
    discover(&Checkpoint::open(path).unwrap(), hints).unwrap()
}

const DTYPES: [Dtype; 2] = [Dtype::F32, Dtype::BF16];

#[test]
fn single_tower_with_class_slot_and_patch_kernel() {
    // Names common in image-classification releases: pos_embed [1, 1 + 14·14, D], patch_embed.proj.weight [D, 3, 16, 16].
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let d = 32;
        let p = write(
            dir.path(),
            "vit.safetensors",
            &[
                floats(
                    "pos_embed",
                    dt,
                    &[1, 197, d],
                    &smooth_table(1, 14, 14, d, 1),
                ),
                floats("cls_token", dt, &[1, 1, d], &noise(d, 2, 0.1)),
                floats(
                    "patch_embed.proj.weight",
                    dt,
                    &[d, 3, 16, 16],
                    &noise(d * 3 * 256, 3, 0.1),
                ),
                floats(
                    "blocks.0.attn.qkv.weight",
                    dt,
                    &[3 * d, d],
                    &noise(3 * d * d, 4, 0.1),
                ),
            ],
            None,
        );
        let found = scan(&p, &Hints::default());
        assert_eq!(found.tables.len(), 1, "{dt}");
        let t = &found.tables[0];
        assert_eq!(
            (t.slots, t.grid, t.dim, t.patch),
            (1, [14, 14], d, Some(16)),
            "{dt}"
        );
        assert_eq!(t.kind, Kind::Learned);
        assert_eq!(t.layout, Layout::BatchRows);
        assert!(found.ambiguous.is_empty() && found.warnings.is_empty());
    }
}

#[test]
fn framework_style_names_with_projection_kernel() {
    // embeddings.position_embeddings [1, 1 + 7·7, D] beside
    // embeddings.patch_embeddings.projection.weight [D, 3, 32, 32].
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let d = 24;
        let p = write(
            dir.path(),
            "hf.safetensors",
            &[
                floats(
                    "vit.embeddings.position_embeddings",
                    dt,
                    &[1, 50, d],
                    &smooth_table(1, 7, 7, d, 5),
                ),
                floats(
                    "vit.embeddings.patch_embeddings.projection.weight",
                    dt,
                    &[d, 3, 32, 32],
                    &noise(d * 3 * 1024, 6, 0.1),
                ),
            ],
            None,
        );
        let t = &scan(&p, &Hints::default()).tables[0];
        assert_eq!((t.slots, t.grid, t.patch), (1, [7, 7], Some(32)), "{dt}");
    }
}

#[test]
fn dual_tower_leaves_the_text_table_alone_and_finds_position_ids() {
    // Image-text model: an image table [1 + 7·7, D] with its position_ids [1, 50], and a text
    // table of 77 rows (a 1-D sequence) with its own position_ids [1, 77].
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let (d, dtext) = (32, 16);
        let p = write(
            dir.path(),
            "clip.safetensors",
            &[
                floats(
                    "vision_model.embeddings.position_embedding.weight",
                    dt,
                    &[50, d],
                    &smooth_table(1, 7, 7, d, 7),
                ),
                ids("vision_model.embeddings.position_ids", &[1, 50]),
                floats(
                    "vision_model.embeddings.patch_embedding.weight",
                    dt,
                    &[d, 3, 32, 32],
                    &noise(d * 3 * 1024, 8, 0.1),
                ),
                floats(
                    "text_model.embeddings.position_embedding.weight",
                    dt,
                    &[77, dtext],
                    &noise(77 * dtext, 9, 0.1),
                ),
                ids("text_model.embeddings.position_ids", &[1, 77]),
                floats(
                    "visual.positional_embedding",
                    dt,
                    &[50, d],
                    &smooth_table(1, 7, 7, d, 10),
                ),
                floats(
                    "positional_embedding",
                    dt,
                    &[77, dtext],
                    &noise(77 * dtext, 11, 0.1),
                ),
            ],
            None,
        );
        let found = scan(&p, &Hints::default());
        let names: Vec<&str> = found.tables.iter().map(|t| t.name.as_str()).collect();
        assert_eq!(
            names,
            [
                "vision_model.embeddings.position_embedding.weight",
                "visual.positional_embedding"
            ],
            "{dt}"
        );
        let image = &found.tables[0];
        assert_eq!(image.companions, ["vision_model.embeddings.position_ids"]);
        assert_eq!(
            (image.slots, image.grid, image.patch, image.layout),
            (1, [7, 7], Some(32), Layout::Rows)
        );
        assert!(found.tables[1].companions.is_empty());
        let skipped: Vec<&str> = found.skipped.iter().map(|s| s.name.as_str()).collect();
        assert!(skipped.contains(&"text_model.embeddings.position_embedding.weight"));
        assert!(skipped.contains(&"positional_embedding"));
    }
}

#[test]
fn table_without_class_slot() {
    // Global-pool models: 14·14 rows, no class row.
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let d = 16;
        let p = write(
            dir.path(),
            "gap.safetensors",
            &[
                floats(
                    "vision_model.embeddings.position_embedding.weight",
                    dt,
                    &[196, d],
                    &smooth_table(0, 14, 14, d, 12),
                ),
                floats(
                    "vision_model.embeddings.patch_embedding.weight",
                    dt,
                    &[d, 3, 14, 14],
                    &noise(d * 3 * 196, 13, 0.1),
                ),
            ],
            None,
        );
        let t = &scan(&p, &Hints::default()).tables[0];
        assert_eq!((t.slots, t.grid, t.patch), (0, [14, 14], Some(14)), "{dt}");
    }
}

#[test]
fn grid_shaped_table() {
    // Segmentation backbones store [1, H, W, D] directly.
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let d = 16;
        let p = write(
            dir.path(),
            "grid.safetensors",
            &[
                floats(
                    "image_encoder.pos_embed",
                    dt,
                    &[1, 8, 6, d],
                    &smooth_table(0, 8, 6, d, 14),
                ),
                floats(
                    "image_encoder.patch_embed.proj.weight",
                    dt,
                    &[d, 3, 16, 16],
                    &noise(d * 3 * 256, 15, 0.1),
                ),
            ],
            None,
        );
        let t = &scan(&p, &Hints::default()).tables[0];
        assert_eq!(
            (t.slots, t.grid, t.layout, t.patch),
            (0, [8, 6], Layout::Grid, Some(16)),
            "{dt}"
        );
    }
}

#[test]
fn encoder_and_decoder_tables_with_ema_copies() {
    // Masked-autoencoder style: fixed sine-cosine encoder and decoder tables with a zero class
    // row, and an EMA copy of each under another prefix.
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let (d, dd) = (32, 16);
        let enc = sincos_table(1, 8, 8, d);
        let dec = sincos_table(1, 8, 8, dd);
        let p = write(
            dir.path(),
            "mae.safetensors",
            &[
                floats("pos_embed", dt, &[1, 65, d], &enc),
                floats("decoder_pos_embed", dt, &[1, 65, dd], &dec),
                floats(
                    "patch_embed.proj.weight",
                    dt,
                    &[d, 3, 16, 16],
                    &noise(d * 768, 16, 0.1),
                ),
                floats("model_ema.pos_embed", dt, &[1, 65, d], &enc),
                floats("model_ema.decoder_pos_embed", dt, &[1, 65, dd], &dec),
                floats(
                    "model_ema.patch_embed.proj.weight",
                    dt,
                    &[d, 3, 16, 16],
                    &noise(d * 768, 17, 0.1),
                ),
            ],
            None,
        );
        let found = scan(&p, &Hints::default());
        assert_eq!(found.tables.len(), 4, "{dt}");
        for t in &found.tables {
            assert_eq!(
                (t.slots, t.grid, t.kind, t.patch),
                (1, [8, 8], Kind::Sincos, Some(16)),
                "{} {dt}",
                t.name
            );
        }
        let by = |n: &str| found.table(n).unwrap();
        assert_eq!(
            by("model_ema.pos_embed").copy_of.as_deref(),
            Some("pos_embed")
        );
        assert_eq!(
            by("model_ema.decoder_pos_embed").copy_of.as_deref(),
            Some("decoder_pos_embed")
        );
        assert!(by("decoder_pos_embed")
            .patch_source
            .as_deref()
            .unwrap()
            .contains("same grid"));
    }
}

#[test]
fn distilled_table_has_two_slots() {
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let d = 16;
        let p = write(
            dir.path(),
            "deit.safetensors",
            &[
                floats(
                    "pos_embed",
                    dt,
                    &[1, 198, d],
                    &smooth_table(2, 14, 14, d, 18),
                ),
                floats("cls_token", dt, &[1, 1, d], &noise(d, 19, 0.1)),
                floats("dist_token", dt, &[1, 1, d], &noise(d, 20, 0.1)),
            ],
            None,
        );
        let t = &scan(&p, &Hints::default()).tables[0];
        assert_eq!((t.slots, t.grid, t.patch), (2, [14, 14], None), "{dt}");
    }
}

#[test]
fn channels_last_kernel_and_slash_names() {
    // JAX-era names: Transformer/posembed_input/pos_embedding and embedding/kernel [p, p, C, D].
    for dt in DTYPES {
        let dir = tempfile::tempdir().unwrap();
        let d = 16;
        let p = write(
            dir.path(),
            "jax.safetensors",
            &[
                floats(
                    "Transformer/posembed_input/pos_embedding",
                    dt,
                    &[1, 145, d],
                    &smooth_table(1, 12, 12, d, 21),
                ),
                floats(
                    "embedding/kernel",
                    dt,
                    &[32, 32, 3, d],
                    &noise(32 * 32 * 3 * d, 22, 0.1),
                ),
                floats("embedding/bias", dt, &[d], &noise(d, 23, 0.1)),
            ],
            None,
        );
        let t = &scan(&p, &Hints::default()).tables[0];
        assert_eq!((t.slots, t.grid, t.patch), (1, [12, 12], Some(32)), "{dt}");
        assert_eq!(t.patch_source.as_deref(), Some("embedding/kernel"));
    }
}

#[test]
fn ambiguous_rows_are_reported_with_the_flag_that_resolves_them() {
    // 12 rows fit 3 slots + 3x3 and 8 slots + 2x2; neither is a usual slot count.
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "amb.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 12, 8],
            &noise(96, 24, 1.0),
        )],
        None,
    );
    let found = scan(&p, &Hints::default());
    assert!(found.tables.is_empty());
    assert_eq!(found.ambiguous.len(), 1);
    assert!(found.ambiguous[0].resolve_with.contains("--slots"));
    assert!(
        found.warnings[0].contains("--slots"),
        "{}",
        found.warnings[0]
    );
    let resolved = scan(
        &p,
        &Hints {
            slots: Some(3),
            ..Hints::default()
        },
    );
    assert_eq!(resolved.tables[0].grid, [3, 3]);
}

#[test]
fn a_second_explanation_is_named_not_hidden() {
    // 17 rows: 1 slot + 4x4 (taken, the usual count) or 8 slots + 3x3 (named in a note).
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "n17.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 17, 8],
            &smooth_table(1, 4, 4, 8, 25),
        )],
        None,
    );
    let t = &scan(&p, &Hints::default()).tables[0];
    assert_eq!((t.slots, t.grid), (1, [4, 4]));
    assert!(
        t.notes
            .iter()
            .any(|n| n.contains("8 slots + 3x3") && n.contains("--slots")),
        "{:?}",
        t.notes
    );
}

#[test]
fn non_square_grids_from_the_user_or_the_values() {
    let dir = tempfile::tempdir().unwrap();
    let d = 16;
    let p = write(
        dir.path(),
        "rect.safetensors",
        &[
            floats(
                "pos_embed",
                Dtype::F32,
                &[1, 1 + 6 * 8, d],
                &smooth_table(1, 6, 8, d, 26),
            ),
            floats(
                "decoder.pos_embed",
                Dtype::F32,
                &[1, 1 + 6 * 10, d],
                &sincos_table(1, 6, 10, d),
            ),
        ],
        None,
    );
    // Without help, 49 rows read as 1 slot + 7x7... so the user's grid must win.
    let plain = scan(&p, &Hints::default());
    assert_eq!(plain.table("pos_embed").unwrap().grid, [7, 7]);
    let told = scan(
        &p,
        &Hints {
            source_grid: Some((6, 8)),
            tensors: vec!["pos_embed".into()],
            ..Hints::default()
        },
    );
    assert_eq!(told.table("pos_embed").unwrap().grid, [6, 8]);
    // 61 rows have no square grid, but the sine-cosine values say 6x10.
    let dec = plain.table("decoder.pos_embed").unwrap();
    assert_eq!((dec.slots, dec.grid, dec.kind), (1, [6, 10], Kind::Sincos));
}

#[test]
fn forced_tensor_with_an_unusual_name() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "odd.safetensors",
        &[floats(
            "abs_pe",
            Dtype::F32,
            &[1, 50, 8],
            &smooth_table(1, 7, 7, 8, 27),
        )],
        None,
    );
    assert!(scan(&p, &Hints::default()).tables.is_empty());
    let forced = scan(
        &p,
        &Hints {
            tensors: vec!["abs_pe".into()],
            ..Hints::default()
        },
    );
    assert_eq!(forced.tables[0].grid, [7, 7]);
}

#[test]
fn integer_table_is_skipped_with_a_reason() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "int.safetensors",
        &[ids("pos_embed", &[1, 197])],
        None,
    );
    let found = scan(
        &p,
        &Hints {
            tensors: vec!["pos_embed".into()],
            ..Hints::default()
        },
    );
    assert!(found.tables.is_empty());
    assert!(
        found.skipped[0].reason.contains("shape") || found.skipped[0].reason.contains("integer")
    );
}

/// `[1, H, W, D]` values (row order) rearranged as `[1, D, H, W]`.
fn channels_first(v: &[f64], h: usize, w: usize, d: usize) -> Vec<f64> {
    (0..d)
        .flat_map(|k| (0..h * w).map(move |cell| v[cell * d + k]))
        .collect()
}

#[test]
fn channels_first_tables_are_recognised() {
    let dir = tempfile::tempdir().unwrap();
    let (h, w, d) = (6, 6, 32);
    let values = channels_first(&smooth_table(0, h, w, d, 21), h, w, d);
    let p = write(
        dir.path(),
        "cf.safetensors",
        &[floats("pos_embed", Dtype::F32, &[1, d, h, w], &values)],
        None,
    );
    let found = scan(&p, &Hints::default());
    let t = &found.tables[0];
    assert_eq!(
        (t.layout, t.grid, t.dim, t.slots),
        (Layout::GridChannelsFirst, [6, 6], 32, 0)
    );
    assert!(
        t.notes.iter().any(|n| n.contains("channels first")),
        "{t:?}"
    );

    // A sine-cosine table stored channels first is still recognised by its values.
    let sc = channels_first(&sincos_table(0, 4, 4, 16), 4, 4, 16);
    let p = write(
        dir.path(),
        "sc.safetensors",
        &[floats("pos_embed", Dtype::F32, &[1, 16, 4, 4], &sc)],
        None,
    );
    let t = &scan(&p, &Hints::default()).tables[0];
    assert_eq!(
        (t.layout, t.kind),
        (Layout::GridChannelsFirst, Kind::Sincos)
    );

    // Non-square: the patch kernel's width tells which dimension holds the channels.
    let p = write(
        dir.path(),
        "k.safetensors",
        &[
            floats(
                "pos_embed",
                Dtype::F32,
                &[1, 12, 8, 10],
                &noise(12 * 80, 3, 0.1),
            ),
            floats(
                "patch_embed.proj.weight",
                Dtype::F32,
                &[12, 3, 16, 16],
                &noise(12 * 768, 4, 0.1),
            ),
        ],
        None,
    );
    let t = &scan(&p, &Hints::default()).tables[0];
    assert_eq!(
        (t.layout, t.grid, t.dim, t.patch),
        (Layout::GridChannelsFirst, [8, 10], 12, Some(16))
    );
}

#[test]
fn a_four_dimensional_table_that_reads_two_ways_is_ambiguous_until_told() {
    let dir = tempfile::tempdir().unwrap();
    // [1, 10, 12, 11]: 10x12 of width 11, or 12x11 of width 10; nothing tells them apart.
    let p = write(
        dir.path(),
        "amb.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 10, 12, 11],
            &noise(10 * 12 * 11, 5, 0.1),
        )],
        None,
    );
    let found = scan(&p, &Hints::default());
    assert!(found.tables.is_empty());
    assert_eq!(found.ambiguous.len(), 1);
    assert!(found.ambiguous[0].resolve_with.contains("--channels"));
    for (channels, layout, grid, dim) in [
        (posgrid::kinds::Channels::Last, Layout::Grid, [10, 12], 11),
        (
            posgrid::kinds::Channels::First,
            Layout::GridChannelsFirst,
            [12, 11],
            10,
        ),
    ] {
        let t = scan(
            &p,
            &Hints {
                channels: Some(channels),
                ..Hints::default()
            },
        )
        .tables[0]
            .clone();
        assert_eq!((t.layout, t.grid, t.dim), (layout, grid, dim));
    }
    // --source-grid settles it too.
    let t = &scan(
        &p,
        &Hints {
            source_grid: Some((12, 11)),
            ..Hints::default()
        },
    )
    .tables[0];
    assert_eq!(t.layout, Layout::GridChannelsFirst);
    // A cube reads the same either way: channels last, with a warning naming the flag.
    let p = write(
        dir.path(),
        "cube.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 8, 8, 8],
            &noise(512, 6, 0.1),
        )],
        None,
    );
    let found = scan(&p, &Hints::default());
    assert_eq!(found.tables[0].layout, Layout::Grid);
    assert!(
        found
            .warnings
            .iter()
            .any(|w| w.contains("--channels first")),
        "{:?}",
        found.warnings
    );
}

#[test]
fn a_channels_first_table_is_resized_in_its_own_layout() {
    // The same table stored both ways must come out the same, each in its own layout.
    let dir = tempfile::tempdir().unwrap();
    let (h, w, d) = (6, 6, 16);
    let rows = smooth_table(0, h, w, d, 22);
    let last = write(
        dir.path(),
        "last.safetensors",
        &[floats("pos_embed", Dtype::F32, &[1, h, w, d], &rows)],
        None,
    );
    let first = write(
        dir.path(),
        "first.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, d, h, w],
            &channels_first(&rows, h, w, d),
        )],
        None,
    );
    let run = |input: &std::path::Path, out: &str| {
        let out = dir.path().join(out);
        let o = std::process::Command::new(env!("CARGO_BIN_EXE_posgrid"))
            .args(["resize", input.to_str().unwrap(), "-o"])
            .arg(&out)
            .args(["--grid", "9x12"])
            .output()
            .unwrap();
        assert_eq!(
            o.status.code(),
            Some(0),
            "{}",
            String::from_utf8_lossy(&o.stderr)
        );
        let bytes = std::fs::read(out).unwrap();
        let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        let t = st.tensor("pos_embed").unwrap();
        let v: Vec<f64> = t
            .data()
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes(c.try_into().unwrap()) as f64)
            .collect();
        (t.shape().to_vec(), v)
    };
    let (shape_last, v_last) = run(&last, "last-out.safetensors");
    let (shape_first, v_first) = run(&first, "first-out.safetensors");
    assert_eq!(shape_last, [1, 9, 12, d]);
    assert_eq!(shape_first, [1, d, 9, 12]);
    assert_eq!(v_first, channels_first(&v_last, 9, 12, d));
}

#[test]
fn a_long_table_without_a_square_grid_is_skipped_quickly() {
    // 2^31 + 11 rows of width 1 (4 GiB of F16 in a sparse file): looking for non-square grids
    // used to try every divisor up to rows / 2, nine times, and took many seconds.
    let dir = tempfile::tempdir().unwrap();
    let rows: u64 = (1 << 31) + 11;
    let len = rows * 2;
    let header = format!(
        r#"{{"pos_embed":{{"dtype":"F16","shape":[1,{rows},1],"data_offsets":[0,{len}]}}}}"#
    );
    let p = crafted(dir.path(), "long.safetensors", &header, &[]);
    let f = std::fs::OpenOptions::new().write(true).open(&p).unwrap();
    f.set_len(8 + header.len() as u64 + len).unwrap();
    let start = std::time::Instant::now();
    let found = scan(&p, &Hints::default());
    assert!(start.elapsed().as_secs_f64() < 2.0, "{:?}", start.elapsed());
    assert!(found.tables.is_empty());
    assert!(
        found.skipped[0].reason.contains("no square-grid"),
        "{found:?}"
    );
}

#[test]
fn non_square_explanations_are_every_divisor_pair() {
    // 60 rows (no square grid with 0-8 slots), read from the sine-cosine values: the grid is
    // found among all factorisations, whichever way round.
    let dir = tempfile::tempdir().unwrap();
    let d = 16;
    for (h, w) in [(6, 10), (10, 6), (4, 15), (3, 20)] {
        let p = write(
            dir.path(),
            "ns.safetensors",
            &[floats(
                "pos_embed",
                Dtype::F32,
                &[1, h * w, d],
                &sincos_table(0, h, w, d),
            )],
            None,
        );
        let t = &scan(&p, &Hints::default()).tables[0];
        assert_eq!((t.slots, t.grid), (0, [h, w]), "{h}x{w}");
    }
}

/// A table of `rows` rows with the given token tensors beside it (width 16).
fn with_tokens(dir: &std::path::Path, rows: usize, tokens: &[(&str, usize)]) -> std::path::PathBuf {
    let d = 16;
    let mut tensors = vec![floats(
        "pos_embed",
        Dtype::F32,
        &[1, rows, d],
        &noise(rows * d, 5, 0.1),
    )];
    for (i, (name, n)) in tokens.iter().enumerate() {
        tensors.push(floats(
            name,
            Dtype::F32,
            &[1, *n, d],
            &noise(n * d, 6 + i as u64, 0.1),
        ));
    }
    write(dir, "tokens.safetensors", &tensors, None)
}

#[test]
fn slots_are_decided_by_the_tokens_beside_the_table() {
    use posgrid::kinds::absolute::SlotsFrom;
    let dir = tempfile::tempdir().unwrap();
    // A class token has a position row in front of the grid (common practice).
    let found = scan(
        &with_tokens(dir.path(), 197, &[("cls_token", 1)]),
        &Hints::default(),
    );
    let t = &found.tables[0];
    assert_eq!(
        (t.slots, t.grid, t.slots_from),
        (1, [14, 14], SlotsFrom::Tokens)
    );

    // Class and distillation tokens: two rows (common practice in distilled classifiers).
    let found = scan(
        &with_tokens(dir.path(), 198, &[("cls_token", 1), ("dist_token", 1)]),
        &Hints::default(),
    );
    let t = &found.tables[0];
    assert_eq!(
        (t.slots, t.grid, t.slots_from),
        (2, [14, 14], SlotsFrom::Tokens)
    );

    // Register tokens have no position rows (common practice): still one slot, and said so.
    let found = scan(
        &with_tokens(dir.path(), 257, &[("cls_token", 1), ("reg_token", 4)]),
        &Hints::default(),
    );
    let t = &found.tables[0];
    assert_eq!(
        (t.slots, t.grid, t.slots_from),
        (1, [16, 16], SlotsFrom::Tokens)
    );
    assert!(
        t.notes.iter().any(|n| n.contains("reg_token")),
        "{:?}",
        t.notes
    );

    // A class token whose row was folded away: the table holds the grid alone.
    let found = scan(
        &with_tokens(dir.path(), 196, &[("cls_token", 1)]),
        &Hints::default(),
    );
    let t = &found.tables[0];
    assert_eq!(
        (t.slots, t.grid, t.slots_from),
        (0, [14, 14], SlotsFrom::Rows)
    );
    assert!(
        t.notes.iter().any(|n| n.contains("folded")),
        "{:?}",
        t.notes
    );

    // Without tokens the rows decide, and say so.
    let found = scan(&with_tokens(dir.path(), 197, &[]), &Hints::default());
    assert_eq!(found.tables[0].slots_from, SlotsFrom::Rows);
}

#[test]
fn tokens_and_rows_that_disagree_are_ambiguous_with_the_flag_that_settles_it() {
    // Two tokens expect 2 rows; 50 rows fit 1 + 7x7 only (and no grid alone): no silent guess.
    let dir = tempfile::tempdir().unwrap();
    let path = with_tokens(dir.path(), 50, &[("cls_token", 1), ("dist_token", 1)]);
    let found = scan(&path, &Hints::default());
    assert!(found.tables.is_empty());
    assert_eq!(found.ambiguous.len(), 1);
    assert!(found.ambiguous[0].resolve_with.contains("--slots"));
    let o = posgrid(&[
        "resize",
        s(&path),
        "-o",
        s(&dir.path().join("o.safetensors")),
        "--grid",
        "8",
    ]);
    assert_eq!(code(&o), 4, "{}", stderr(&o));
    let o = posgrid(&[
        "resize",
        s(&path),
        "-o",
        s(&dir.path().join("o.safetensors")),
        "--grid",
        "8",
        "--slots",
        "1",
    ]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
}

#[test]
fn a_non_square_grid_is_read_from_the_configuration_beside_the_file() {
    // 193 rows: 1 class row + a 12x16 grid, which no square grid explains. The model
    // configuration beside the file records image_size [192, 256] and patch_size 16 (key names
    // of a widely used model library's configuration files: common practice, from memory).
    let dir = tempfile::tempdir().unwrap();
    let path = with_tokens(dir.path(), 193, &[("cls_token", 1)]);
    let without = posgrid(&["scan", s(&path), "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&without.stdout).unwrap();
    assert!(v["tables"].as_array().unwrap().is_empty(), "{v}");
    std::fs::write(
        dir.path().join("config.json"),
        r#"{"image_size": [192, 256], "patch_size": 16, "hidden_size": 16}"#,
    )
    .unwrap();
    let with = posgrid(&["scan", s(&path), "--json"]);
    assert_eq!(code(&with), 0, "{}", stderr(&with));
    let v: serde_json::Value = serde_json::from_slice(&with.stdout).unwrap();
    let t = &v["tables"][0];
    assert_eq!(
        (t["slots"].clone(), t["grid"].clone()),
        (serde_json::json!(1), serde_json::json!([12, 16]))
    );
    assert_eq!(t["slots_from"], "config");
    // And the resize follows it: 12x16 -> 24x32.
    let out = dir.path().join("out.safetensors");
    let o = posgrid(&["resize", s(&path), "-o", s(&out), "--grid", "24x32"]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
}
