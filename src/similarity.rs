//! Cosine-similarity maps of a position table and the fidelity score that compares them before
//! and after resampling. Pure maths on row-major `[h·w, d]` grids; no drawing here.
//!
//! Cost is (reference positions) × (grid cells) × D: each map is one pass of dot products
//! against pre-normalised rows.

use rayon::prelude::*;
use serde::Serialize;

use crate::resample::{self, Antialias, Coords, Edges, Kernel, Options};

/// Default number of reference positions per axis.
pub const DEFAULT_REFS: usize = 16;

/// A grid of row vectors: `h·w` rows of width `d`, row-major.
#[derive(Debug, Clone, Copy)]
pub struct Grid<'a> {
    pub rows: &'a [f32],
    pub h: usize,
    pub w: usize,
    pub d: usize,
}

/// Reference cells spread evenly over an axis of `side` cells: at most `n`, one per cell.
pub fn spread(side: usize, n: usize) -> Vec<usize> {
    let n = n.clamp(1, side.max(1));
    (0..n)
        .map(|i| ((i as f64 + 0.5) * side as f64 / n as f64).floor() as usize)
        .collect()
}

/// The cell of a grid of `new` cells that holds the centre of cell `i` of a grid of `old`.
pub fn matching_cell(i: usize, old: usize, new: usize) -> usize {
    (((i as f64 + 0.5) * new as f64 / old as f64).floor() as usize).min(new - 1)
}

/// Unit-length copies of every row (zero rows stay zero).
fn normalised(g: Grid) -> Vec<f32> {
    let mut out = g.rows.to_vec();
    out.par_chunks_mut(g.d.max(1)).for_each(|row| {
        let norm = row
            .iter()
            .map(|v| (*v as f64) * (*v as f64))
            .sum::<f64>()
            .sqrt();
        if norm > 0.0 {
            let inv = (1.0 / norm) as f32;
            row.iter_mut().for_each(|v| *v *= inv);
        }
    });
    out
}

/// Dot product with eight independent partial sums, so the loop vectorises.
fn dot(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0.0f32; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f32 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for k in 0..8 {
            acc[k] += x[k] * y[k];
        }
    }
    acc.iter().sum::<f32>() + tail
}

/// The cosine-similarity map of every reference cell `(r, c)`: `h·w` values in [-1, 1] each.
pub fn maps(g: Grid, refs: &[(usize, usize)]) -> Vec<Vec<f32>> {
    let unit = normalised(g);
    let d = g.d;
    refs.par_iter()
        .map(|&(r, c)| {
            let reference = &unit[(r * g.w + c) * d..][..d];
            unit.chunks_exact(d)
                .map(|row| dot(row, reference).clamp(-1.0, 1.0))
                .collect()
        })
        .collect()
}

/// Pearson correlation of two equally long series; 1 for two constant equal series, 0 when
/// only one is constant.
pub fn pearson(a: &[f32], b: &[f32]) -> f64 {
    let n = a.len() as f64;
    let ma = a.iter().map(|v| *v as f64).sum::<f64>() / n;
    let mb = b.iter().map(|v| *v as f64).sum::<f64>() / n;
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a.iter().zip(b) {
        let (dx, dy) = (*x as f64 - ma, *y as f64 - mb);
        sab += dx * dy;
        saa += dx * dx;
        sbb += dy * dy;
    }
    match (saa > 1e-18, sbb > 1e-18) {
        (true, true) => (sab / (saa.sqrt() * sbb.sqrt())).clamp(-1.0, 1.0),
        (false, false) if a.iter().zip(b).all(|(x, y)| (x - y).abs() <= 1e-6) => 1.0,
        _ => 0.0,
    }
}

/// Mean similarity against distance from the reference cell, in fractions of the image side.
#[derive(Debug, Clone, Serialize)]
pub struct Profile {
    /// Bin centres.
    pub distance: Vec<f64>,
    /// Mean similarity per bin (null where a bin is empty).
    pub mean: Vec<Option<f64>>,
}

/// Number of distance bins in a profile.
pub const PROFILE_BINS: usize = 24;
/// The largest distance a profile covers (the diagonal of the unit square).
pub const PROFILE_MAX: f64 = std::f64::consts::SQRT_2;

/// The similarity-against-distance profile of a set of maps.
pub fn profile(g: Grid, refs: &[(usize, usize)], maps: &[Vec<f32>]) -> Profile {
    let mut sum = [0.0; PROFILE_BINS];
    let mut count = [0usize; PROFILE_BINS];
    for (&(rr, rc), map) in refs.iter().zip(maps) {
        for (i, v) in map.iter().enumerate() {
            let dy = (i / g.w) as f64 / g.h as f64 - rr as f64 / g.h as f64;
            let dx = (i % g.w) as f64 / g.w as f64 - rc as f64 / g.w as f64;
            let dist = (dy * dy + dx * dx).sqrt();
            let bin = ((dist / PROFILE_MAX) * PROFILE_BINS as f64).floor() as usize;
            let bin = bin.min(PROFILE_BINS - 1);
            sum[bin] += *v as f64;
            count[bin] += 1;
        }
    }
    Profile {
        distance: (0..PROFILE_BINS)
            .map(|b| (b as f64 + 0.5) * PROFILE_MAX / PROFILE_BINS as f64)
            .collect(),
        mean: sum
            .iter()
            .zip(&count)
            .map(|(s, n)| (*n > 0).then(|| s / *n as f64))
            .collect(),
    }
}

/// Maps of one table at `n` reference positions per axis.
#[derive(Debug, Clone)]
pub struct MapSet {
    pub h: usize,
    pub w: usize,
    /// Reference rows and columns (the tiles are their product).
    pub ref_rows: Vec<usize>,
    pub ref_cols: Vec<usize>,
    /// One map per (row, column) reference, row-major over the references.
    pub maps: Vec<Vec<f32>>,
    pub profile: Profile,
}

impl MapSet {
    /// Maps at references spread evenly over the grid.
    pub fn spread(g: Grid, n: usize) -> Self {
        Self::at(g, spread(g.h, n), spread(g.w, n))
    }

    /// Maps at the given reference rows and columns.
    pub fn at(g: Grid, ref_rows: Vec<usize>, ref_cols: Vec<usize>) -> Self {
        let refs: Vec<(usize, usize)> = ref_rows
            .iter()
            .flat_map(|&r| ref_cols.iter().map(move |&c| (r, c)))
            .collect();
        let maps = maps(g, &refs);
        let profile = profile(g, &refs, &maps);
        MapSet {
            h: g.h,
            w: g.w,
            ref_rows,
            ref_cols,
            maps,
            profile,
        }
    }

    /// Maps of `after` at the cells matching this set's references.
    pub fn matching(&self, after: Grid) -> Self {
        let rows = self
            .ref_rows
            .iter()
            .map(|&r| matching_cell(r, self.h, after.h))
            .collect();
        let cols = self
            .ref_cols
            .iter()
            .map(|&c| matching_cell(c, self.w, after.w))
            .collect();
        Self::at(after, rows, cols)
    }
}

/// How well the spatial structure survived.
#[derive(Debug, Clone, Serialize)]
pub struct Fidelity {
    /// Mean over reference positions of the Pearson correlation between the before-map
    /// (bilinearly resampled to the new grid) and the after-map.
    pub score: f64,
    /// The lowest correlation.
    pub min: f64,
    /// The reference cell (on the source grid) with the lowest correlation.
    pub worst: [usize; 2],
    /// Reference positions per axis.
    pub refs: [usize; 2],
}

/// Compare maps before and after (the after set made by [`MapSet::matching`]).
pub fn fidelity(before: &MapSet, after: &MapSet) -> Fidelity {
    let opts = Options {
        kernel: Kernel::Bilinear,
        coords: Coords::HalfPixel,
        edges: Edges::Clamp,
        antialias: Antialias::Off,
        cubic_a: resample::DEFAULT_CUBIC_A,
    };
    let scores: Vec<f64> = before
        .maps
        .par_iter()
        .zip(&after.maps)
        .map(|(b, a)| {
            let moved = resample::resample(b, (before.h, before.w), 1, (after.h, after.w), &opts)
                .expect("grids are non-empty");
            pearson(&moved, a)
        })
        .collect();
    let (worst_index, min) =
        scores
            .iter()
            .copied()
            .enumerate()
            .fold(
                (0, f64::INFINITY),
                |acc, (i, s)| if s < acc.1 { (i, s) } else { acc },
            );
    let cols = before.ref_cols.len();
    Fidelity {
        score: scores.iter().sum::<f64>() / scores.len() as f64,
        min,
        worst: [
            before.ref_rows[worst_index / cols],
            before.ref_cols[worst_index % cols],
        ],
        refs: [before.ref_rows.len(), cols],
    }
}

/// Fidelity of a resampling, from the two grids directly.
pub fn score(before: Grid, after: Grid, refs: usize) -> Fidelity {
    let b = MapSet::spread(before, refs);
    let a = b.matching(after);
    fidelity(&b, &a)
}
