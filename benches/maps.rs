//! Similarity-map benchmark: a 64x64 table with D = 1280 (f32), 16x16 reference positions,
//! before and after a 64x64 -> 96x96 resize: maps, fidelity and the PNG. Target: well under
//! 10 s on a 2-core machine. Run with `cargo bench --bench maps`.

use std::time::Instant;

use posgrid::figure::{figure, GridRows};
use posgrid::resample::{resample, Options};

fn main() {
    let (h, w, d) = (64, 64, 1280);
    let rows: Vec<f32> = (0..h * w * d)
        .map(|i| {
            let (cell, k) = (i / d, i % d);
            let (r, c) = ((cell / w) as f32, (cell % w) as f32);
            ((0.05 + (k % 13) as f32 * 0.01) * r + (0.04 + (k % 7) as f32 * 0.02) * c + k as f32)
                .sin()
        })
        .collect();
    let up = resample(&rows, (h, w), d, (96, 96), &Options::default()).unwrap();
    let table = |grid: [usize; 2]| posgrid::kinds::Table {
        name: "pos_embed".into(),
        dtype: safetensors::Dtype::F32,
        shape: vec![1, grid[0] * grid[1], d],
        layout: posgrid::kinds::Layout::BatchRows,
        slots: 0,
        grid,
        dim: d,
        patch: None,
        patch_source: None,
        kind: posgrid::kinds::Kind::Learned,
        sincos_first_axis: None,
        frames: None,
        tubelet: None,
        slots_from: posgrid::kinds::absolute::SlotsFrom::Rows,
        companions: vec![],
        copy_of: None,
        notes: vec![],
    };
    let before = GridRows {
        table: table([h, w]),
        rows: rows.into(),
    };
    let after = GridRows {
        table: table([96, 96]),
        rows: up.into(),
    };
    let mut times = Vec::new();
    for _ in 0..3 {
        let start = Instant::now();
        let drawn = figure(
            std::path::Path::new("bench"),
            &before,
            Some(&after),
            16,
            posgrid::similarity::Budget::memory(4 << 30),
        )
        .unwrap();
        times.push(start.elapsed().as_secs_f64());
        std::hint::black_box(drawn.png);
    }
    times.sort_by(f64::total_cmp);
    println!(
        "maps 64x64 -> 96x96, D = {d}, 16x16 references (maps, fidelity, PNG): median {:.2} s (target well under 10 s)",
        times[1]
    );
}
