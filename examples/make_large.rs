//! Writes a large F32 checkpoint with the tensor shapes of a 24-block, width-1024 vision
//! transformer (a 14x14 table with one class slot; about 1.2 GB of random weights), for the
//! performance benchmark (bench/resize.sh). Streams the data, so it needs little memory.
//!
//!     cargo run --release --example make_large -- OUT.safetensors [OUT.pth]
//!
//! With a second path, the same checkpoint is also written as a PyTorch file (one ordered dict
//! of tensors, as the framework saves a state dict) by posgrid's own PyTorch writer.

use std::io::{BufWriter, Write};

use posgrid::checkpoint::safetensors::encode_header;
use posgrid::checkpoint::Dtype;

const D: usize = 1024;
const BLOCKS: usize = 24;

fn shapes() -> Vec<(String, Vec<usize>)> {
    let mut v: Vec<(String, Vec<usize>)> = vec![
        ("cls_token".into(), vec![1, 1, D]),
        ("pos_embed".into(), vec![1, 197, D]),
        ("patch_embed.proj.weight".into(), vec![D, 3, 16, 16]),
        ("patch_embed.proj.bias".into(), vec![D]),
    ];
    for b in 0..BLOCKS {
        for (name, shape) in [
            ("norm1.weight", vec![D]),
            ("norm1.bias", vec![D]),
            ("attn.qkv.weight", vec![3 * D, D]),
            ("attn.qkv.bias", vec![3 * D]),
            ("attn.proj.weight", vec![D, D]),
            ("attn.proj.bias", vec![D]),
            ("norm2.weight", vec![D]),
            ("norm2.bias", vec![D]),
            ("mlp.fc1.weight", vec![4 * D, D]),
            ("mlp.fc1.bias", vec![4 * D]),
            ("mlp.fc2.weight", vec![D, 4 * D]),
            ("mlp.fc2.bias", vec![D]),
        ] {
            v.push((format!("blocks.{b}.{name}"), shape));
        }
    }
    v.push(("norm.weight".into(), vec![D]));
    v.push(("norm.bias".into(), vec![D]));
    v.push(("head.weight".into(), vec![1000, D]));
    v.push(("head.bias".into(), vec![1000]));
    v
}

fn main() {
    let out = std::env::args()
        .nth(1)
        .expect("usage: make_large OUT.safetensors");
    let mut entries = Vec::new();
    let mut offset = 0u64;
    for (name, shape) in shapes() {
        let len = shape.iter().product::<usize>() as u64 * 4;
        entries.push((name, Dtype::F32, shape, offset, offset + len));
        offset += len;
    }
    let meta = vec![(
        "note".to_string(),
        "random weights for the posgrid benchmark".to_string(),
    )];
    let header = encode_header(&entries, Some(&meta), 0);
    let mut w =
        BufWriter::with_capacity(1 << 20, std::fs::File::create(&out).expect("create output"));
    w.write_all(&header).expect("write header");
    let mut state = 0x9E37_79B9_7F4A_7C15u64;
    let mut buf = Vec::with_capacity(1 << 20);
    for (name, _, shape, ..) in &entries {
        let n: usize = shape.iter().product();
        for i in 0..n {
            let v = if name == "pos_embed" {
                // A smooth table, like a trained one.
                let (cell, k) = (i / D, i % D);
                let (r, c) = (
                    (cell.saturating_sub(1) / 14) as f32,
                    (cell.saturating_sub(1) % 14) as f32,
                );
                0.02 * ((0.2 + (k % 11) as f32 * 0.03) * r
                    + (0.15 + (k % 5) as f32 * 0.05) * c
                    + k as f32)
                    .cos()
            } else {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                ((state >> 40) as f32 / (1u64 << 24) as f32 - 0.5) * 0.04
            };
            buf.extend_from_slice(&v.to_le_bytes());
            if buf.len() >= 1 << 20 {
                w.write_all(&buf).expect("write data");
                buf.clear();
            }
        }
    }
    w.write_all(&buf).expect("write data");
    w.flush().expect("flush");
    drop(w);
    println!(
        "wrote {out} ({:.2} GB)",
        (header.len() as u64 + offset) as f64 / 1e9
    );
    if let Some(pth) = std::env::args().nth(2) {
        write_pth(&out, &pth);
        println!("wrote {pth}");
    }
}

/// The same tensors as a PyTorch file, through posgrid's writer interface.
fn write_pth(input: &str, pth: &str) {
    use posgrid::checkpoint::writer::{self, Destination, OutEntry, Output};
    use posgrid::checkpoint::{Format, Source, TensorSource};
    let source = Source::open(input).expect("open the safetensors file");
    let output = Output {
        source: source.reader(),
        entries: source
            .entries()
            .iter()
            .map(|t| OutEntry {
                name: t.name.clone(),
                shape: t.shape.clone(),
                origin: t,
                new: None,
            })
            .collect(),
        provenance: serde_json::json!({}),
        left_out: Default::default(),
    };
    let dest = Destination {
        path: std::path::Path::new(pth),
        sync: false,
        force: true,
        like: std::path::Path::new(input),
    };
    let written = writer::for_format(Format::PyTorch)
        .write(&output, &dest, &mut posgrid::write::Silent)
        .expect("write the PyTorch file");
    posgrid::write::commit_all(vec![written.pending]).expect("commit");
}
