//! Cosine-similarity maps of a position table and the fidelity score that compares them before
//! and after resampling. Pure maths on row-major `[h·w, d]` grids; no drawing here.
//!
//! Cost is (reference positions) × (grid cells) × D: each map is one pass of dot products
//! against pre-normalised rows. Memory and time are bounded by a [`Budget`]: the fidelity
//! score is computed one reference at a time (no map is kept), stored maps (for drawing) are
//! limited to what fits, and large grids get fewer reference positions, with a note.

use rayon::prelude::*;
use serde::Serialize;

use crate::resample::{self, Antialias, Coords, Edges, Kernel, Options};
use crate::values::{try_collect, try_filled, OutOfMemory};

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

/// Work (multiply-adds) below which a table is scored on the calling thread: waking the worker
/// threads costs tens of microseconds, about what this much work takes, and a file may hold
/// tens of thousands of small tables.
const PARALLEL_WORK: u64 = 1 << 18;

/// Unit-length copies of every row (zero rows stay zero).
fn normalised(g: Grid) -> Result<Vec<f32>, OutOfMemory> {
    let mut out = try_collect(g.rows.len(), g.rows.iter().copied())?;
    let to_unit = |row: &mut [f32]| {
        let norm = row
            .iter()
            .map(|v| (*v as f64) * (*v as f64))
            .sum::<f64>()
            .sqrt();
        if norm > 0.0 {
            let inv = (1.0 / norm) as f32;
            row.iter_mut().for_each(|v| *v *= inv);
        }
    };
    if (out.len() as u64) < PARALLEL_WORK {
        out.chunks_mut(g.d.max(1)).for_each(to_unit);
    } else {
        out.par_chunks_mut(g.d.max(1)).for_each(to_unit);
    }
    Ok(out)
}

/// Whether cosine similarity to row `i` is defined: the row is finite and not zero.
fn defined_row(g: Grid, i: usize) -> bool {
    let row = &g.rows[i * g.d..][..g.d];
    row.iter().all(|v| v.is_finite()) && row.iter().any(|v| *v != 0.0)
}

/// The map of one reference row into `out`: its cosine similarity to every unit row.
fn map_into(unit: &[f32], d: usize, reference: &[f32], out: &mut [f32]) {
    for (v, row) in out.iter_mut().zip(unit.chunks_exact(d.max(1))) {
        *v = dot(row, reference).clamp(-1.0, 1.0);
    }
}

/// Dot product. On x86-64 processors with AVX2 and FMA (checked once, at run time) the same
/// sums run eight lanes wide with fused multiply-adds; elsewhere the portable loop, whose
/// independent partial sums let the compiler vectorise it.
fn dot(a: &[f32], b: &[f32]) -> f32 {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma") {
        // SAFETY: the processor has both features, checked just above.
        return unsafe { dot_avx2_fma(a, b) };
    }
    dot_lanes::<false>(a, b)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_avx2_fma(a: &[f32], b: &[f32]) -> f32 {
    dot_lanes::<true>(a, b)
}

/// Thirty-two independent partial sums (four registers of eight lanes, enough to hide the
/// latency of each addition), fused when `FUSED` (only where the processor fuses natively).
#[inline(always)]
fn dot_lanes<const FUSED: bool>(a: &[f32], b: &[f32]) -> f32 {
    const LANES: usize = 32;
    let mut acc = [0.0f32; LANES];
    let (ca, cb) = (a.chunks_exact(LANES), b.chunks_exact(LANES));
    let tail: f32 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for k in 0..LANES {
            acc[k] = if FUSED {
                x[k].mul_add(y[k], acc[k])
            } else {
                acc[k] + x[k] * y[k]
            };
        }
    }
    acc.iter().sum::<f32>() + tail
}

/// The cosine-similarity map of every reference cell `(r, c)`: `h·w` values in [-1, 1] each
/// (0 against a zero row, where the similarity is undefined).
pub fn maps(g: Grid, refs: &[(usize, usize)]) -> Result<Vec<Vec<f32>>, OutOfMemory> {
    let unit = normalised(g)?;
    let d = g.d;
    // Every map is kept, so they may as well be computed side by side.
    refs.par_iter()
        .map(|&(r, c)| {
            let reference = &unit[(r * g.w + c) * d..][..d];
            let mut map = try_filled(g.h * g.w, 0.0f32)?;
            for (v, row) in map.iter_mut().zip(unit.chunks_exact(d.max(1))) {
                *v = dot(row, reference).clamp(-1.0, 1.0);
            }
            Ok(map)
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
    pub fn spread(g: Grid, n: usize) -> Result<Self, OutOfMemory> {
        Self::at(g, spread(g.h, n), spread(g.w, n))
    }

    /// Maps at the given reference rows and columns.
    pub fn at(g: Grid, ref_rows: Vec<usize>, ref_cols: Vec<usize>) -> Result<Self, OutOfMemory> {
        let refs = pairs(&ref_rows, &ref_cols);
        let maps = maps(g, &refs)?;
        let profile = profile(g, &refs, &maps);
        Ok(MapSet {
            h: g.h,
            w: g.w,
            ref_rows,
            ref_cols,
            maps,
            profile,
        })
    }

    /// Maps of `after` at the cells matching this set's references.
    pub fn matching(&self, after: Grid) -> Result<Self, OutOfMemory> {
        let (rows, cols) = matching_refs(&self.ref_rows, &self.ref_cols, (self.h, self.w), after);
        Self::at(after, rows, cols)
    }
}

fn pairs(rows: &[usize], cols: &[usize]) -> Vec<(usize, usize)> {
    rows.iter()
        .flat_map(|&r| cols.iter().map(move |&c| (r, c)))
        .collect()
}

/// The reference rows and columns of `after` that match those of a `(h, w)` grid.
fn matching_refs(
    rows: &[usize],
    cols: &[usize],
    (h, w): (usize, usize),
    after: Grid,
) -> (Vec<usize>, Vec<usize>) {
    (
        rows.iter().map(|&r| matching_cell(r, h, after.h)).collect(),
        cols.iter().map(|&c| matching_cell(c, w, after.w)).collect(),
    )
}

/// How well the spatial structure survived.
#[derive(Debug, Clone, Serialize)]
pub struct Fidelity {
    /// Mean over reference positions of the Pearson correlation between the before-map
    /// (bilinearly resampled to the new grid) and the after-map. `None` (null) when it is
    /// undefined at every reference: cosine similarity needs non-zero, finite rows.
    pub score: Option<f64>,
    /// The lowest correlation.
    pub min: Option<f64>,
    /// The reference cell (on the source grid) with the lowest correlation.
    pub worst: Option<[usize; 2]>,
    /// Reference positions per axis.
    pub refs: [usize; 2],
    /// Reference positions left out because their similarity is undefined (a zero or
    /// non-finite row, before or after).
    pub undefined: usize,
}

impl Fidelity {
    /// A sentence for the warnings when the score is undefined or leaves references out.
    pub fn note(&self, table: &str) -> Option<String> {
        let total = self.refs[0] * self.refs[1];
        match (self.score, self.undefined) {
            (None, _) => Some(format!(
                "\"{table}\": fidelity undefined: cosine similarity is undefined for zero (or non-finite) rows, and every reference position has one"
            )),
            (Some(_), 0) => None,
            (Some(_), n) => Some(format!(
                "\"{table}\": fidelity left out {n} of {total} reference positions whose rows are zero (or non-finite); cosine similarity is undefined there"
            )),
        }
    }

    fn from_scores(scores: &[Option<f64>], rows: &[usize], cols: &[usize]) -> Self {
        let defined: Vec<(usize, f64)> = scores
            .iter()
            .enumerate()
            .filter_map(|(i, s)| s.map(|s| (i, s)))
            .collect();
        let worst =
            defined
                .iter()
                .copied()
                .fold(None, |acc: Option<(usize, f64)>, (i, s)| match acc {
                    Some((_, m)) if m <= s => acc,
                    _ => Some((i, s)),
                });
        let n = cols.len();
        Fidelity {
            score: (!defined.is_empty())
                .then(|| defined.iter().map(|d| d.1).sum::<f64>() / defined.len() as f64),
            min: worst.map(|w| w.1),
            worst: worst.map(|(i, _)| [rows[i / n], cols[i % n]]),
            refs: [rows.len(), n],
            undefined: scores.len() - defined.len(),
        }
    }
}

fn bilinear() -> Options {
    Options {
        kernel: Kernel::Bilinear,
        coords: Coords::HalfPixel,
        edges: Edges::Clamp,
        antialias: Antialias::Off,
        cubic_a: resample::DEFAULT_CUBIC_A,
    }
}

/// The correlation of one before-map (moved to the after grid) with its after-map; `None`
/// when undefined.
fn correlation(
    before_map: &[f32],
    (h, w): (usize, usize),
    after_map: &[f32],
    (ah, aw): (usize, usize),
) -> Result<Option<f64>, OutOfMemory> {
    let moved = match resample::resample(before_map, (h, w), 1, (ah, aw), &bilinear()) {
        Ok(m) => m,
        Err(resample::ResampleError::OutOfMemory { bytes }) => return Err(OutOfMemory { bytes }),
        // Only an empty grid is refused, and its correlation is undefined anyway.
        Err(_) => return Ok(None),
    };
    let r = pearson(&moved, after_map);
    Ok(r.is_finite().then_some(r))
}

/// Compare maps before and after (the after set made by [`MapSet::matching`]). One resampled
/// map per worker thread is alive at a time.
pub fn fidelity(
    before: &MapSet,
    after: &MapSet,
    defined: &[bool],
) -> Result<Fidelity, OutOfMemory> {
    let scores: Vec<Option<f64>> = before
        .maps
        .par_iter()
        .zip(&after.maps)
        .zip(defined)
        .map(|((b, a), ok)| match ok {
            true => correlation(b, (before.h, before.w), a, (after.h, after.w)),
            false => Ok(None),
        })
        .collect::<Result<_, _>>()?;
    Ok(Fidelity::from_scores(
        &scores,
        &before.ref_rows,
        &before.ref_cols,
    ))
}

/// Whether the similarity at each reference pair (row-major) is defined before and after.
pub fn defined_refs(before: Grid, b: &MapSet, after: Grid, a: &MapSet) -> Vec<bool> {
    let at = |g: Grid, r: usize, c: usize| defined_row(g, r * g.w + c);
    pairs(&b.ref_rows, &b.ref_cols)
        .iter()
        .zip(pairs(&a.ref_rows, &a.ref_cols))
        .map(|(&(br, bc), (ar, ac))| at(before, br, bc) && at(after, ar, ac))
        .collect()
}

/// Bytes of f32 values.
fn f32_bytes(n: usize) -> u64 {
    (n as u64).saturating_mul(4)
}

/// Memory for the fidelity of two grids, one reference per worker thread at a time: unit-length
/// copies of both grids, and per worker one before-map, its move to the new grid and one
/// after-map.
pub fn fidelity_bytes(before: (usize, usize), after: (usize, usize), d: usize) -> u64 {
    let (b, a) = (before.0 * before.1, after.0 * after.1);
    let workers = rayon::current_num_threads() as u64;
    f32_bytes(b + a)
        .saturating_mul(d as u64)
        .saturating_add(f32_bytes(b + 2 * a).saturating_mul(workers))
}

/// Work (multiply-adds) per reference position: one pass over both grids.
fn work_per_ref(before: (usize, usize), after: Option<(usize, usize)>, d: usize) -> u64 {
    let cells = before.0 * before.1 + after.map_or(0, |a| a.0 * a.1);
    // Each cell costs a dot product of width d plus its share of resampling, correlation and
    // profile (about 16 operations).
    (cells as u64).saturating_mul(d as u64 + 16)
}

/// The time bound on maps and scores: about 2^33 multiply-adds (a second or two on two cores).
pub const WORK_BUDGET: u64 = 1 << 33;

/// Limits on the memory and the work that maps and fidelity may use.
#[derive(Debug, Clone, Copy)]
pub struct Budget {
    /// Bytes the maps and scores may allocate.
    pub memory: u64,
    /// Multiply-adds they may spend.
    pub work: u64,
}

impl Budget {
    /// `memory` bytes and the default time bound.
    pub fn memory(memory: u64) -> Self {
        Budget {
            memory,
            work: WORK_BUDGET,
        }
    }
}

/// Why maps or a score were not computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum MapsError {
    #[error("the similarity maps need about {} MiB, over the {} MiB guard; raise it with --memory-limit", needed >> 20, limit >> 20)]
    OverBudget { needed: u64, limit: u64 },
    #[error(transparent)]
    OutOfMemory(#[from] OutOfMemory),
}

/// The reference count per axis (at most `n`) whose maps fit the budget, given `fixed` bytes,
/// `stored` bytes kept per reference and `work` per reference; and a note when it is below `n`.
fn refs_within(
    (h, w): (usize, usize),
    n: usize,
    fixed: u64,
    stored: u64,
    work: u64,
    budget: Budget,
) -> Result<(usize, Option<String>), MapsError> {
    let count = |k: usize| (spread(h, k).len() * spread(w, k).len()) as u64;
    let fits = |k: usize| {
        fixed.saturating_add(count(k).saturating_mul(stored)) <= budget.memory
            && count(k).saturating_mul(work) <= budget.work
    };
    let needed = fixed.saturating_add(stored);
    if needed > budget.memory {
        return Err(MapsError::OverBudget {
            needed,
            limit: budget.memory,
        });
    }
    let k = (1..=n.max(1)).rev().find(|&k| fits(k)).unwrap_or(1);
    let full = spread(h, n).len().max(spread(w, n).len());
    let note = (k < n && spread(h, k).len().max(spread(w, k).len()) < full).then(|| {
        format!(
            "{k}x{k} reference positions instead of {n}x{n}: the {h}x{w} grid is too large for more within the time and memory bounds"
        )
    });
    Ok((k, note))
}

/// Fidelity of a resampling, from the two grids directly, one reference at a time: memory
/// is [`fidelity_bytes`], whatever the number of references; large grids get fewer
/// references (the returned note says so).
pub fn score(
    before: Grid,
    after: Grid,
    refs: usize,
    budget: Budget,
) -> Result<(Fidelity, Option<String>), MapsError> {
    let (bs, as_) = ((before.h, before.w), (after.h, after.w));
    let fixed = fidelity_bytes(bs, as_, before.d);
    let work = work_per_ref(bs, Some(as_), before.d);
    let (n, note) = refs_within(bs, refs, fixed, 0, work, budget)?;
    let (rows, cols) = (spread(before.h, n), spread(before.w, n));
    let (arows, acols) = matching_refs(&rows, &cols, bs, after);
    let (bu, au) = (normalised(before)?, normalised(after)?);
    let d = before.d;
    let refs: Vec<_> = pairs(&rows, &cols)
        .into_iter()
        .zip(pairs(&arows, &acols))
        .collect();
    let maps = || -> Result<_, OutOfMemory> {
        Ok((
            try_filled(bs.0 * bs.1, 0.0f32)?,
            try_filled(as_.0 * as_.1, 0.0f32)?,
        ))
    };
    let score_one = |maps: &mut Result<(Vec<f32>, Vec<f32>), OutOfMemory>,
                     &((r, c), (ar, ac)): &((usize, usize), (usize, usize))| {
        let (bmap, amap) = maps.as_mut().map_err(|e| *e)?;
        if !defined_row(before, r * before.w + c) || !defined_row(after, ar * after.w + ac) {
            return Ok(None);
        }
        map_into(&bu, d, &bu[(r * before.w + c) * d..][..d], bmap);
        map_into(&au, d, &au[(ar * after.w + ac) * d..][..d], amap);
        correlation(bmap, bs, amap, as_)
    };
    let scores: Vec<Option<f64>> = if work.saturating_mul(refs.len() as u64) < PARALLEL_WORK {
        // Handing a small table to the worker threads costs more than scoring it here.
        let mut pair = maps();
        refs.iter()
            .map(|r| score_one(&mut pair, r))
            .collect::<Result<_, _>>()?
    } else {
        // References side by side, each worker with its own pair of maps (what
        // fidelity_bytes counts per thread).
        refs.par_iter()
            .map_init(maps, score_one)
            .collect::<Result<_, _>>()?
    };
    Ok((Fidelity::from_scores(&scores, &rows, &cols), note))
}

/// Maps of `before` (and the matching maps of `after`) at up to `refs` references per axis,
/// kept for drawing, with the fidelity when `after` is given. The maps, the unit-length
/// copies and the fidelity's one moved map fit `budget`; large grids get fewer references.
pub fn map_sets(
    before: Grid,
    after: Option<Grid>,
    refs: usize,
    budget: Budget,
) -> Result<MapSets, MapsError> {
    let bs = (before.h, before.w);
    let a_cells = after.map_or(0, |a| a.h * a.w);
    let cells = bs.0 * bs.1 + a_cells;
    // Unit-length copies of both grids (one at a time for maps, but both for safety), one
    // moved map per worker for the fidelity, and per reference one map before and one after.
    let threads = rayon::current_num_threads();
    let fixed = f32_bytes(cells)
        .saturating_mul(before.d as u64)
        .saturating_add(f32_bytes(a_cells).saturating_mul(threads as u64));
    let stored = f32_bytes(cells);
    let work = work_per_ref(bs, after.map(|a| (a.h, a.w)), before.d);
    let (n, note) = refs_within(bs, refs, fixed, stored, work, budget)?;
    let b = MapSet::spread(before, n)?;
    let after = match after {
        Some(a) => {
            let set = b.matching(a)?;
            let defined = defined_refs(before, &b, a, &set);
            let f = fidelity(&b, &set, &defined)?;
            Some((set, f))
        }
        None => None,
    };
    Ok(MapSets {
        before: b,
        after,
        note,
    })
}

/// What [`map_sets`] computes.
pub struct MapSets {
    pub before: MapSet,
    pub after: Option<(MapSet, Fidelity)>,
    /// Set when fewer references were drawn than asked for.
    pub note: Option<String>,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Both dot-product paths against the sum in f64, over lengths with and without a tail
    /// (the f32 error bound of a sum of n products is about n·ε·Σ|xy|).
    #[test]
    fn dot_products_agree_with_the_f64_sum() {
        for n in [0, 1, 7, 31, 32, 33, 100, 768, 1025] {
            let a: Vec<f32> = (0..n)
                .map(|i| ((i * 37 % 101) as f32 - 50.0) / 7.0)
                .collect();
            let b: Vec<f32> = (0..n)
                .map(|i| ((i * 53 % 97) as f32 - 48.0) / 5.0)
                .collect();
            let exact: f64 = a.iter().zip(&b).map(|(x, y)| *x as f64 * *y as f64).sum();
            let bound: f64 = a
                .iter()
                .zip(&b)
                .map(|(x, y)| (*x as f64 * *y as f64).abs())
                .sum::<f64>()
                * (n as f64 + 1.0)
                * f32::EPSILON as f64;
            for (path, got) in [
                ("portable", dot_lanes::<false>(&a, &b)),
                ("dispatched", dot(&a, &b)),
            ] {
                assert!(
                    (got as f64 - exact).abs() <= bound,
                    "{path}, n = {n}: {got} against {exact}"
                );
            }
        }
    }
}
