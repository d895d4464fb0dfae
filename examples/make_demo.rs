//! Builds the bundled demo checkpoint, `fixtures/demo/pollen-vit-tiny.safetensors`.
//!
//! The scenario is invented: "pollen-vit-tiny", a small vision transformer said to classify
//! pollen grains in 112-pixel microscope tiles with 8-pixel patches (a 14x14 grid, one class
//! slot, width 96, four blocks), stored in BF16. The weights are random; the position table is
//! made smooth (each channel a sum of a few slow waves over the grid, plus a little noise) so
//! that, like a trained table, neighbouring positions are similar.
//!
//!     cargo run --release --example make_demo

use std::collections::HashMap;
use std::f64::consts::PI;

use half::bf16;
use safetensors::tensor::{serialize_to_file, Dtype, TensorView};

const GRID: usize = 14;
const PATCH: usize = 8;
const DIM: usize = 96;
const BLOCKS: usize = 4;
const CLASSES: usize = 12;

/// A small deterministic generator (xorshift64*), so the file rebuilds byte for byte.
struct Rng(u64);

impl Rng {
    fn next_f64(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        (self.0.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        let (u, v) = (self.next_f64().max(1e-12), self.next_f64());
        (-2.0 * u.ln()).sqrt() * (2.0 * PI * v).cos()
    }
}

fn bf16_bytes(values: &[f64]) -> Vec<u8> {
    values
        .iter()
        .flat_map(|v| bf16::from_f64(*v).to_le_bytes())
        .collect()
}

fn random(rng: &mut Rng, n: usize, scale: f64) -> Vec<f64> {
    (0..n).map(|_| rng.normal() * scale).collect()
}

fn smooth_table(rng: &mut Rng) -> Vec<f64> {
    let mut table = vec![0.0; (1 + GRID * GRID) * DIM];
    // The class slot: unrelated to the grid, as a learned class row is.
    for v in &mut table[..DIM] {
        *v = rng.normal() * 0.02;
    }
    for k in 0..DIM {
        let waves: Vec<(f64, f64, f64)> = (0..3)
            .map(|_| {
                let angle = rng.next_f64() * 2.0 * PI;
                let freq = 0.15 + rng.next_f64() * 0.45; // radians per cell: slow waves
                (
                    freq * angle.cos(),
                    freq * angle.sin(),
                    rng.next_f64() * 2.0 * PI,
                )
            })
            .collect();
        for r in 0..GRID {
            for c in 0..GRID {
                let wave: f64 = waves
                    .iter()
                    .map(|(fy, fx, ph)| (fy * r as f64 + fx * c as f64 + ph).cos())
                    .sum();
                table[(1 + r * GRID + c) * DIM + k] = 0.02 * wave + 0.002 * rng.normal();
            }
        }
    }
    table
}

fn main() {
    let mut rng = Rng(0x706f_6c6c_656e); // "pollen"
    let mut tensors: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
    let mut add = |name: &str, shape: Vec<usize>, values: Vec<f64>| {
        tensors.push((name.to_string(), shape, bf16_bytes(&values)));
    };
    add(
        "backbone.pos_embed",
        vec![1, 1 + GRID * GRID, DIM],
        smooth_table(&mut rng),
    );
    add(
        "backbone.cls_token",
        vec![1, 1, DIM],
        random(&mut rng, DIM, 0.02),
    );
    add(
        "backbone.patch_embed.proj.weight",
        vec![DIM, 3, PATCH, PATCH],
        random(&mut rng, DIM * 3 * PATCH * PATCH, 0.05),
    );
    add("backbone.patch_embed.proj.bias", vec![DIM], vec![0.0; DIM]);
    for b in 0..BLOCKS {
        let p = format!("backbone.blocks.{b}");
        add(&format!("{p}.norm1.weight"), vec![DIM], vec![1.0; DIM]);
        add(&format!("{p}.norm1.bias"), vec![DIM], vec![0.0; DIM]);
        add(
            &format!("{p}.attn.qkv.weight"),
            vec![3 * DIM, DIM],
            random(&mut rng, 3 * DIM * DIM, 0.05),
        );
        add(
            &format!("{p}.attn.qkv.bias"),
            vec![3 * DIM],
            vec![0.0; 3 * DIM],
        );
        add(
            &format!("{p}.attn.proj.weight"),
            vec![DIM, DIM],
            random(&mut rng, DIM * DIM, 0.05),
        );
        add(&format!("{p}.attn.proj.bias"), vec![DIM], vec![0.0; DIM]);
        add(&format!("{p}.norm2.weight"), vec![DIM], vec![1.0; DIM]);
        add(&format!("{p}.norm2.bias"), vec![DIM], vec![0.0; DIM]);
        add(
            &format!("{p}.mlp.fc1.weight"),
            vec![4 * DIM, DIM],
            random(&mut rng, 4 * DIM * DIM, 0.05),
        );
        add(
            &format!("{p}.mlp.fc1.bias"),
            vec![4 * DIM],
            vec![0.0; 4 * DIM],
        );
        add(
            &format!("{p}.mlp.fc2.weight"),
            vec![DIM, 4 * DIM],
            random(&mut rng, 4 * DIM * DIM, 0.05),
        );
        add(&format!("{p}.mlp.fc2.bias"), vec![DIM], vec![0.0; DIM]);
    }
    add("backbone.norm.weight", vec![DIM], vec![1.0; DIM]);
    add("backbone.norm.bias", vec![DIM], vec![0.0; DIM]);
    add(
        "head.weight",
        vec![CLASSES, DIM],
        random(&mut rng, CLASSES * DIM, 0.05),
    );
    add("head.bias", vec![CLASSES], vec![0.0; CLASSES]);

    let views: Vec<(String, TensorView)> = tensors
        .iter()
        .map(|(n, s, b)| {
            (
                n.clone(),
                TensorView::new(Dtype::BF16, s.clone(), b).expect("consistent"),
            )
        })
        .collect();
    let meta = HashMap::from([
        ("format".to_string(), "pt".to_string()),
        (
            "model".to_string(),
            "pollen-vit-tiny (invented demo; random weights)".to_string(),
        ),
        ("image_size".to_string(), (GRID * PATCH).to_string()),
    ]);
    let out = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures/demo/pollen-vit-tiny.safetensors");
    std::fs::create_dir_all(out.parent().expect("has a parent")).expect("create fixtures/demo");
    serialize_to_file(views, Some(meta), &out).expect("write the demo checkpoint");
    println!("wrote {}", out.display());
}
