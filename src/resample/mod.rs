//! The resampling engine: a grid of 1, 2 or 3 axes whose cells hold D contiguous values
//! (`[N, D]`, `[H, W, D]`, `[T, H, W, D]`, row-major) to a new grid of the same rank, by one
//! separable pass per axis whose size changes, over per-axis weight tables. No file knowledge
//! lives here.

pub mod geometric;
pub mod kernels;
pub mod options;
mod passes;
pub mod weights;

use std::borrow::Cow;

pub use options::{Antialias, Coords, Edges, Kernel, Options, DEFAULT_CUBIC_A};
use passes::{pass_along_axis, AxisLayout};
pub use weights::{
    axis_weights, scaled_side, try_axis_weights, try_axis_weights_mapped, try_scaled_side,
    AxisWeights, ScaleProblem,
};

/// The most grid axes the engine resamples: time, height, width.
pub const MAX_AXES: usize = 3;

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
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
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
    #[error("a grid has 1 to 3 axes (got {0})")]
    UnsupportedRank(usize),
    #[error("the source grid has {from} axes but the target grid has {to}")]
    RankMismatch { from: usize, to: usize },
    #[error("grid sizes must be at least 1 on every axis (got {} to {})", shape_text(.from), shape_text(.to))]
    EmptyAxis { from: Vec<usize>, to: Vec<usize> },
    #[error("table holds {found} values but a {} grid of width {d} needs {expected}", shape_text(.grid))]
    GridLengthMismatch {
        found: usize,
        expected: usize,
        grid: Vec<usize>,
        d: usize,
    },
    #[error("resampling a {} grid of width {d} to {} needs more values than memory can address", shape_text(.from), shape_text(.to))]
    SizeOverflow {
        from: Vec<usize>,
        to: Vec<usize>,
        d: usize,
    },
    #[error("weights made for {found} samples cannot resample axis {axis} of {expected} samples")]
    WeightsMismatch {
        axis: usize,
        expected: usize,
        found: usize,
    },
    #[error("axis {axis} of {input} samples cannot be scaled by {scale}: {problem}")]
    BadScale {
        axis: usize,
        input: usize,
        scale: f64,
        problem: ScaleProblem,
    },
    #[error("a grid of {axes} axes needs {axes} scales (got {scales})")]
    ScaleCountMismatch { axes: usize, scales: usize },
    /// A working buffer could not be allocated.
    #[error("cannot allocate {} MiB for the resampled values", bytes.div_ceil(1 << 20))]
    OutOfMemory { bytes: usize },
}

impl From<crate::values::OutOfMemory> for ResampleError {
    fn from(e: crate::values::OutOfMemory) -> Self {
        ResampleError::OutOfMemory { bytes: e.bytes }
    }
}

/// Grid sizes as they are written on the command line: `8x14x14`.
fn shape_text(sizes: &[usize]) -> String {
    let parts: Vec<String> = sizes.iter().map(usize::to_string).collect();
    parts.join("x")
}

/// Check options and sizes of a 2-D request without doing any work.
pub fn validate(
    src: (usize, usize),
    dst: (usize, usize),
    opts: &Options,
) -> Result<(), ResampleError> {
    if src.0 == 0 || src.1 == 0 || dst.0 == 0 || dst.1 == 0 {
        return Err(ResampleError::EmptyGrid(src.0, src.1, dst.0, dst.1));
    }
    validate_options(opts)
}

fn validate_options(opts: &Options) -> Result<(), ResampleError> {
    if opts.kernel == Kernel::Area && opts.coords != Coords::HalfPixel {
        return Err(ResampleError::AreaNeedsHalfPixel);
    }
    if !opts.cubic_a.is_finite() {
        return Err(ResampleError::BadCubicA);
    }
    Ok(())
}

/// Check a request on a grid of 1 to 3 axes whose cells hold `d` values without doing any
/// work: ranks, sizes, options, and that every buffer's length can be counted.
pub fn validate_grid(
    from: &[usize],
    to: &[usize],
    d: usize,
    opts: &Options,
) -> Result<(), ResampleError> {
    if from.len() != to.len() {
        return Err(ResampleError::RankMismatch {
            from: from.len(),
            to: to.len(),
        });
    }
    if from.is_empty() || from.len() > MAX_AXES {
        return Err(ResampleError::UnsupportedRank(from.len()));
    }
    if from.iter().chain(to).any(|&n| n == 0) {
        return Err(ResampleError::EmptyAxis {
            from: from.to_vec(),
            to: to.to_vec(),
        });
    }
    validate_options(opts)?;
    // Every buffer of every pass is at most the larger size of each axis, multiplied out.
    let largest = from
        .iter()
        .zip(to)
        .try_fold(1usize, |n, (&a, &b)| n.checked_mul(a.max(b)))
        .and_then(|cells| cells.checked_mul(d.max(1)));
    match largest {
        Some(_) => Ok(()),
        None => Err(ResampleError::SizeOverflow {
            from: from.to_vec(),
            to: to.to_vec(),
            d,
        }),
    }
}

/// Resample `src`, a row-major grid of sizes `from` (1 to 3 axes, the last fastest) whose
/// cells hold `d` contiguous values, to sizes `to`. Each axis uses the same options; an axis
/// whose size is unchanged is not touched (its values are copied exactly).
pub fn resample_grid<T: Sample>(
    src: &[T],
    from: &[usize],
    d: usize,
    to: &[usize],
    opts: &Options,
) -> Result<Vec<T>, ResampleError> {
    resample_grid_after(&[], src, from, d, to, opts)
}

/// [`resample_grid`], its output preceded by `head` (a table's class rows, copied as they are)
/// in the same buffer, so that the resampled grid is not copied again to join them.
pub fn resample_grid_after<T: Sample>(
    head: &[T],
    src: &[T],
    from: &[usize],
    d: usize,
    to: &[usize],
    opts: &Options,
) -> Result<Vec<T>, ResampleError> {
    validate_grid(from, to, d, opts)?;
    check_grid_length(src.len(), from, d)?;
    separable(head, src, from, d, to, |axis| {
        Ok(Cow::Owned(try_axis_weights(from[axis], to[axis], opts)?))
    })
}

/// Resample `src`, a row-major grid of sizes `from` whose cells hold `d` values, by a scale
/// factor per axis, with the ONNX Resize `scales` semantics: each output side is
/// `floor(in·s)` (in f64) and half-pixel coordinates, the area footprint and the antialias
/// stretch follow 1/s rather than in/out (align-corners uses the sizes, ignoring s). Returns
/// the values and the output sizes. An axis whose scale is exactly 1 is copied untouched.
pub fn resample_grid_scaled<T: Sample>(
    src: &[T],
    from: &[usize],
    d: usize,
    scales: &[f64],
    opts: &Options,
) -> Result<(Vec<T>, Vec<usize>), ResampleError> {
    let to = scaled_sizes(from, scales)?;
    validate_grid(from, &to, d, opts)?;
    check_grid_length(src.len(), from, d)?;
    let out = separable_mapped(
        &[],
        src,
        from,
        d,
        &to,
        |axis| !weights::is_identity_mapping(from[axis], to[axis], Some(scales[axis]), opts.coords),
        |axis| {
            let weights = try_axis_weights_mapped(from[axis], to[axis], Some(scales[axis]), opts)
                .map_err(|e| on_axis(e, axis))?;
            Ok(Cow::Owned(weights))
        },
    )?;
    Ok((out, to))
}

/// The output sizes `floor(in·s)` of a scaled grid, or why there are none. An empty input
/// axis keeps 0, for the grid check to name.
fn scaled_sizes(from: &[usize], scales: &[f64]) -> Result<Vec<usize>, ResampleError> {
    if from.is_empty() || from.len() > MAX_AXES {
        return Err(ResampleError::UnsupportedRank(from.len()));
    }
    if scales.len() != from.len() {
        return Err(ResampleError::ScaleCountMismatch {
            axes: from.len(),
            scales: scales.len(),
        });
    }
    from.iter()
        .zip(scales)
        .enumerate()
        .map(
            |(axis, (&input, &scale))| match try_scaled_side(input, scale) {
                Ok(side) => Ok(side),
                Err(ScaleProblem::NothingLeft) if input == 0 => Ok(0),
                Err(problem) => Err(ResampleError::BadScale {
                    axis,
                    input,
                    scale,
                    problem,
                }),
            },
        )
        .collect()
}

/// A per-axis refusal, renamed to the axis it concerns.
fn on_axis(e: ResampleError, axis: usize) -> ResampleError {
    match e {
        ResampleError::BadScale {
            input,
            scale,
            problem,
            ..
        } => ResampleError::BadScale {
            axis,
            input,
            scale,
            problem,
        },
        other => other,
    }
}

/// That `found` values are exactly a grid `from` of cells of `d` values (the sizes validated).
fn check_grid_length(found: usize, from: &[usize], d: usize) -> Result<(), ResampleError> {
    // Cannot overflow: validate_grid bounded the product.
    let expected = from.iter().product::<usize>() * d;
    if found != expected {
        return Err(ResampleError::GridLengthMismatch {
            found,
            expected,
            grid: from.to_vec(),
            d,
        });
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
    check_length(src.len(), (h, w), d)?;
    resample_grid(src, &[h, w], d, &[oh, ow], opts)
}

/// The 2-D length check, with its 2-D error (an uncountable size is left to the grid check).
fn check_length(found: usize, (h, w): (usize, usize), d: usize) -> Result<(), ResampleError> {
    match h.checked_mul(w).and_then(|n| n.checked_mul(d)) {
        Some(expected) if expected != found => Err(ResampleError::LengthMismatch {
            found,
            expected,
            h,
            w,
            d,
        }),
        _ => Ok(()),
    }
}

/// `head` followed by `src`, in a new buffer.
fn joined<T: Sample>(head: &[T], src: &[T]) -> Result<Vec<T>, ResampleError> {
    let mut v = crate::values::try_with_capacity(head.len().saturating_add(src.len()))?;
    v.extend_from_slice(head);
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

/// Apply precomputed weight tables to a row-major `[h, w, d]` grid: first along rows
/// (W → W'), then down columns (H → H'); an axis whose size is unchanged is skipped.
pub fn apply<T: Sample>(
    src: &[T],
    (h, w): (usize, usize),
    d: usize,
    down: &AxisWeights,
    across: &AxisWeights,
) -> Result<Vec<T>, ResampleError> {
    for (axis, size, weights) in [(0, h, down), (1, w, across)] {
        if weights.input != size {
            return Err(ResampleError::WeightsMismatch {
                axis,
                expected: size,
                found: weights.input,
            });
        }
    }
    let to = [down.output, across.output];
    validate_grid(&[h, w], &to, d, &Options::default())?;
    check_length(src.len(), (h, w), d)?;
    separable(&[], src, &[h, w], d, &to, |axis| {
        Ok(Cow::Borrowed(if axis == 0 { down } else { across }))
    })
}

/// One pass per axis whose size changes, innermost axis first (for `[H, W, D]`: along rows,
/// then down columns); `weights_of(axis)` gives that axis's table. The output starts with
/// `head`. Buffers are allocated fallibly: their size comes from the input. The caller has
/// validated the sizes.
fn separable<'w, T: Sample>(
    head: &[T],
    src: &[T],
    from: &[usize],
    d: usize,
    to: &[usize],
    weights_of: impl FnMut(usize) -> Result<Cow<'w, AxisWeights>, ResampleError>,
) -> Result<Vec<T>, ResampleError> {
    separable_mapped(
        head,
        src,
        from,
        d,
        to,
        |axis| from[axis] != to[axis],
        weights_of,
    )
}

/// [`separable`], resampling exactly the axes for which `moves(axis)` holds (with a scale, a
/// side can stay while its coordinates move). Only the last pass writes `head` ahead of its
/// values.
fn separable_mapped<'w, T: Sample>(
    head: &[T],
    src: &[T],
    from: &[usize],
    d: usize,
    to: &[usize],
    moves: impl Fn(usize) -> bool,
    mut weights_of: impl FnMut(usize) -> Result<Cow<'w, AxisWeights>, ResampleError>,
) -> Result<Vec<T>, ResampleError> {
    let passes: Vec<usize> = (0..from.len())
        .rev()
        .filter(|&axis| moves(axis) && d > 0)
        .collect();
    let mut shape = from.to_vec();
    let mut current: Option<Vec<T>> = None;
    for (k, &axis) in passes.iter().enumerate() {
        let weights = weights_of(axis)?;
        let input = current.as_deref().unwrap_or(src);
        let prefix = if k + 1 == passes.len() { head } else { &[] };
        let next = pass_along_axis(input, AxisLayout::of(&shape, axis, d), &weights, prefix)?;
        shape[axis] = to[axis];
        current = Some(next);
    }
    match current {
        Some(v) => Ok(v),
        None => joined(head, src),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Property: the head comes first, unchanged, and the rest is exactly resample_grid's.
    #[test]
    fn a_head_precedes_the_resampled_grid_unchanged() {
        let head = [7.5f32, -1.0, 0.25];
        let cases: [(&[usize], &[usize]); 5] = [
            (&[5], &[9]),
            (&[4, 3], &[6, 7]),
            (&[4, 3], &[4, 5]),
            (&[2, 3, 4], &[3, 3, 2]),
            (&[3, 3], &[3, 3]),
        ];
        for (from, to) in cases {
            let d = 3;
            let n: usize = from.iter().product::<usize>() * d;
            let src: Vec<f32> = (0..n).map(|i| (i as f32 * 0.37).sin()).collect();
            let opts = Options::default();
            let plain = resample_grid(&src, from, d, to, &opts).unwrap();
            let after = resample_grid_after(&head, &src, from, d, to, &opts).unwrap();
            assert_eq!(&after[..head.len()], &head, "{from:?} -> {to:?}");
            assert_eq!(&after[head.len()..], &plain[..], "{from:?} -> {to:?}");
        }
    }
}
