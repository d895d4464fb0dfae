//! The fixed 2-D sine-cosine position table (a fact of the trade): half the channels encode one
//! grid axis, half the other; each half of width `d` is `[sin(p·ω_k), cos(p·ω_k)]` for
//! `k < d/2`, with `ω_k = 1 / 10000^(k / (d/2))` and `p` the integer row or column index.

use serde::Serialize;

/// Which grid axis the first half of the channels encodes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum FirstAxis {
    /// Channels `[0, D/2)` encode the row (height) index.
    Row,
    /// Channels `[0, D/2)` encode the column (width) index.
    Column,
}

/// ω_k = 1 / 10000^(k / quarter) for k < quarter (a quarter of the channels per sin or cos).
fn frequencies(quarter: usize) -> Vec<f64> {
    (0..quarter)
        .map(|k| 1.0 / 10000f64.powf(k as f64 / quarter as f64))
        .collect()
}

/// Build the `[h·w, dim]` grid rows, row-major. `dim` must be a multiple of 4.
pub fn build(h: usize, w: usize, dim: usize, first: FirstAxis) -> Option<Vec<f64>> {
    if dim == 0 || dim % 4 != 0 {
        return None;
    }
    let half = dim / 2;
    let quarter = half / 2;
    let omega = frequencies(quarter);
    let mut out = vec![0.0; h * w * dim];
    for r in 0..h {
        for c in 0..w {
            let row = &mut out[(r * w + c) * dim..][..dim];
            let (a, b) = match first {
                FirstAxis::Row => (r as f64, c as f64),
                FirstAxis::Column => (c as f64, r as f64),
            };
            for (k, om) in omega.iter().enumerate() {
                row[k] = (a * om).sin();
                row[quarter + k] = (a * om).cos();
                row[half + k] = (b * om).sin();
                row[half + quarter + k] = (b * om).cos();
            }
        }
    }
    Some(out)
}

/// Which construction (if any) `grid_rows` (`[h·w, dim]`, row-major) follows within `tol`.
/// Checks value by value and stops at the first mismatch, so a learned table costs little.
pub fn matches(grid_rows: &[f64], h: usize, w: usize, dim: usize, tol: f64) -> Option<FirstAxis> {
    if dim == 0 || dim % 4 != 0 || grid_rows.len() != h * w * dim {
        return None;
    }
    let quarter = dim / 4;
    let omega = frequencies(quarter);
    [FirstAxis::Row, FirstAxis::Column]
        .into_iter()
        .find(|&first| {
            grid_rows.chunks_exact(dim).enumerate().all(|(cell, row)| {
                let (r, c) = ((cell / w) as f64, (cell % w) as f64);
                let (a, b) = match first {
                    FirstAxis::Row => (r, c),
                    FirstAxis::Column => (c, r),
                };
                omega.iter().enumerate().all(|(k, om)| {
                    let close = |i: usize, v: f64| (row[i] - v).abs() <= tol;
                    close(k, (a * om).sin())
                        && close(quarter + k, (a * om).cos())
                        && close(2 * quarter + k, (b * om).sin())
                        && close(3 * quarter + k, (b * om).cos())
                })
            })
        })
}
