//! Engine benchmark: bicubic resampling of large position tables against a plain copy of a
//! buffer the size of the output, measured in the same run. Run with `cargo bench --bench
//! resample`. Reports medians and their ratio; the target is a ratio of at most 4.

use std::hint::black_box;
use std::time::{Duration, Instant};

use posgrid::resample::{resample, Options};

fn median(mut v: Vec<Duration>) -> Duration {
    v.sort();
    v[v.len() / 2]
}

fn main() {
    let runs = 25;
    let mut worst_ratio = 0.0f64;
    for (src, dst, d) in [((37, 37), (74, 74), 1024), ((64, 64), (128, 128), 1280)] {
        let table: Vec<f32> = (0..src.0 * src.1 * d)
            .map(|i| ((i * 7919) % 1000) as f32 / 1000.0)
            .collect();
        let out_len = dst.0 * dst.1 * d;
        let copy_source: Vec<f32> = vec![0.5; out_len];
        let opts = Options::default();
        let (mut t_resample, mut t_copy) = (Vec::new(), Vec::new());
        // Alternate the two so drift on a noisy machine affects both alike.
        for _ in 0..runs {
            let start = Instant::now();
            let out = resample(black_box(&table), src, d, dst, &opts).unwrap();
            t_resample.push(start.elapsed());
            black_box(out);
            let start = Instant::now();
            let copy = black_box(&copy_source).clone();
            t_copy.push(start.elapsed());
            black_box(copy);
        }
        let (r, c) = (median(t_resample), median(t_copy));
        let ratio = r.as_secs_f64() / c.as_secs_f64();
        worst_ratio = worst_ratio.max(ratio);
        println!(
            "bicubic {}x{} -> {}x{}, D = {d}, f32: resample {:.2} ms, copy of output {:.2} ms ({:.1} MB), ratio {ratio:.2}",
            src.0,
            src.1,
            dst.0,
            dst.1,
            r.as_secs_f64() * 1e3,
            c.as_secs_f64() * 1e3,
            out_len as f64 * 4.0 / 1e6
        );
    }
    println!("worst ratio {worst_ratio:.2} (target <= 4)");
}
