//! The resampling engine: a table `[H, W, D]` (channels last, D contiguous) to `[H', W', D]`,
//! by two separable passes over per-axis weight tables. No file knowledge lives here.

pub mod geometric;
pub mod kernels;
pub mod options;
pub mod weights;

use rayon::prelude::*;

pub use options::{Antialias, Coords, Edges, Kernel, Options, DEFAULT_CUBIC_A};
pub use weights::{axis_weights, AxisWeights};

/// An element type the engine computes in.
pub trait Sample:
    Copy + Send + Sync + Default + std::ops::Add<Output = Self> + std::ops::Mul<Output = Self> + 'static
{
    fn from_f64(v: f64) -> Self;
}

impl Sample for f32 {
    fn from_f64(v: f64) -> Self {
        v as f32
    }
}

impl Sample for f64 {
    fn from_f64(v: f64) -> Self {
        v
    }
}

/// Why a resampling request was refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ResampleError {
    #[error("grid sizes must be at least 1x1 (got {0}x{1} to {2}x{3})")]
    EmptyGrid(usize, usize, usize, usize),
    #[error("table holds {found} values but a {h}x{w} grid of width {d} needs {expected}")]
    LengthMismatch {
        found: usize,
        expected: usize,
        h: usize,
        w: usize,
        d: usize,
    },
    #[error("the area kernel is defined with half-pixel coordinates only")]
    AreaNeedsHalfPixel,
    #[error("cubic parameter a must be finite")]
    BadCubicA,
    /// A working buffer could not be allocated.
    #[error("cannot allocate {} MiB for the resampled values", bytes.div_ceil(1 << 20))]
    OutOfMemory { bytes: usize },
}

impl From<crate::values::OutOfMemory> for ResampleError {
    fn from(e: crate::values::OutOfMemory) -> Self {
        ResampleError::OutOfMemory { bytes: e.bytes }
    }
}

/// Check options and sizes without doing any work.
pub fn validate(
    src: (usize, usize),
    dst: (usize, usize),
    opts: &Options,
) -> Result<(), ResampleError> {
    if src.0 == 0 || src.1 == 0 || dst.0 == 0 || dst.1 == 0 {
        return Err(ResampleError::EmptyGrid(src.0, src.1, dst.0, dst.1));
    }
    if opts.kernel == Kernel::Area && opts.coords != Coords::HalfPixel {
        return Err(ResampleError::AreaNeedsHalfPixel);
    }
    if !opts.cubic_a.is_finite() {
        return Err(ResampleError::BadCubicA);
    }
    Ok(())
}

/// Resample `src`, a row-major `[h, w, d]` grid, to `[oh, ow, d]`.
pub fn resample<T: Sample>(
    src: &[T],
    (h, w): (usize, usize),
    d: usize,
    (oh, ow): (usize, usize),
    opts: &Options,
) -> Result<Vec<T>, ResampleError> {
    validate((h, w), (oh, ow), opts)?;
    if src.len() != h * w * d {
        return Err(ResampleError::LengthMismatch {
            found: src.len(),
            expected: h * w * d,
            h,
            w,
            d,
        });
    }
    if (h, w) == (oh, ow) || d == 0 {
        return copied(src);
    }
    let across = axis_weights(w, ow, opts);
    let down = axis_weights(h, oh, opts);
    apply(src, (h, w), d, &down, &across)
}

fn copied<T: Sample>(src: &[T]) -> Result<Vec<T>, ResampleError> {
    let mut v = crate::values::try_with_capacity(src.len())?;
    v.extend_from_slice(src);
    Ok(v)
}

/// Resample an `[H, W, D]` array view (any memory layout) to `[oh, ow, D]`.
pub fn resample_array<T: Sample>(
    table: ndarray::ArrayView3<'_, T>,
    (oh, ow): (usize, usize),
    opts: &Options,
) -> Result<ndarray::Array3<T>, ResampleError> {
    let (h, w, d) = table.dim();
    let contiguous = table.as_standard_layout();
    let flat = contiguous
        .as_slice()
        .expect("standard layout is contiguous");
    let out = resample(flat, (h, w), d, (oh, ow), opts)?;
    Ok(ndarray::Array3::from_shape_vec((oh, ow, d), out).expect("resample returns oh*ow*d values"))
}

/// Apply precomputed weight tables: first along rows (W → W'), then down columns (H → H').
/// Buffers are allocated fallibly: their size comes from the input.
pub fn apply<T: Sample>(
    src: &[T],
    (h, w): (usize, usize),
    d: usize,
    down: &AxisWeights,
    across: &AxisWeights,
) -> Result<Vec<T>, ResampleError> {
    let ow = across.output;
    let oh = down.output;
    let horizontal = if w == ow {
        None
    } else {
        let wx: Vec<T> = across.weight.iter().map(|&v| T::from_f64(v)).collect();
        let mut tmp =
            crate::values::try_filled(h.saturating_mul(ow).saturating_mul(d), T::default())?;
        tmp.par_chunks_mut(ow * d)
            .zip(src.par_chunks(w * d))
            .for_each(|(out_row, in_row)| {
                for (o, cell) in out_row.chunks_exact_mut(d).enumerate() {
                    let taps = o * across.taps..(o + 1) * across.taps;
                    let idx = &across.index[taps.clone()];
                    let wts = &wx[taps];
                    combine(
                        cell,
                        idx.iter()
                            .zip(wts)
                            .map(|(&i, &wt)| (&in_row[i * d..(i + 1) * d], wt)),
                    );
                }
            });
        Some(tmp)
    };
    let rows = horizontal.as_deref().unwrap_or(src);
    if h == oh {
        return match horizontal {
            Some(v) => Ok(v),
            None => copied(src),
        };
    }
    let wy: Vec<T> = down.weight.iter().map(|&v| T::from_f64(v)).collect();
    let row_len = ow * d;
    let mut out = crate::values::try_filled(oh.saturating_mul(row_len), T::default())?;
    out.par_chunks_mut(row_len)
        .enumerate()
        .for_each(|(o, out_row)| {
            let taps = o * down.taps..(o + 1) * down.taps;
            let idx = &down.index[taps.clone()];
            let wts = &wy[taps];
            // Each vertical tap scales a whole source row: one long contiguous loop per tap.
            combine(
                out_row,
                idx.iter()
                    .zip(wts)
                    .map(|(&i, &wt)| (&rows[i * row_len..(i + 1) * row_len], wt)),
            );
        });
    Ok(out)
}

/// `dst = Σ weight · source` over the taps, element-wise; the loops vectorise over D.
#[inline]
fn combine<'a, T: Sample>(dst: &mut [T], mut taps: impl Iterator<Item = (&'a [T], T)>) {
    let Some((first, w0)) = taps.next() else {
        dst.fill(T::default());
        return;
    };
    for (o, &s) in dst.iter_mut().zip(first) {
        *o = w0 * s;
    }
    for (source, wt) in taps {
        for (o, &s) in dst.iter_mut().zip(source) {
            *o = *o + wt * s;
        }
    }
}
