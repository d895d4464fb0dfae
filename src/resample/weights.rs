//! Per-axis weight tables: for every output coordinate, the source indices it reads and their
//! weights. Computed once per axis in f64, apart from the loops that apply them.

use super::kernels;
use super::options::{Coords, Edges, Kernel, Options};
use super::ResampleError;
use crate::values::{self, OutOfMemory};

/// The taps of one axis: `taps` (index, weight) pairs per output coordinate, padded with zero
/// weights so every output has the same count.
#[derive(Debug, Clone, PartialEq)]
pub struct AxisWeights {
    pub input: usize,
    pub output: usize,
    pub taps: usize,
    pub index: Vec<usize>,
    pub weight: Vec<f64>,
}

impl AxisWeights {
    /// The (index, weight) pairs of output coordinate `o`.
    pub fn taps_of(&self, o: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        let r = o * self.taps..(o + 1) * self.taps;
        self.index[r.clone()]
            .iter()
            .copied()
            .zip(self.weight[r].iter().copied())
    }

    /// Whether this axis maps every output to the same-numbered input with weight 1.
    pub fn is_identity(&self) -> bool {
        self.input == self.output
            && (0..self.output).all(|o| {
                self.taps_of(o)
                    .all(|(i, w)| (i == o && w == 1.0) || w == 0.0)
                    && self.taps_of(o).any(|(i, w)| i == o && w == 1.0)
            })
    }
}

/// How one axis's output samples map back onto its input: by the two sizes (the ratio in/out),
/// or by a scale factor s given beside them (the ratio 1/s, as the ONNX Resize `scales` input
/// and a framework's interpolate with a scale factor use it; out = floor(in·s) need not equal
/// in·s, so the two differ).
#[derive(Debug, Clone, Copy, PartialEq)]
struct Mapping {
    input: usize,
    output: usize,
    /// Source samples per output sample: in/out, or 1/s.
    step: f64,
    /// Whether the axis shrinks: out < in, or s < 1.
    shrinks: bool,
}

impl Mapping {
    fn new(input: usize, output: usize, scale: Option<f64>) -> Self {
        match scale {
            Some(s) => Mapping {
                input,
                output,
                step: 1.0 / s,
                shrinks: s < 1.0,
            },
            None => Mapping {
                input,
                output,
                step: input as f64 / output as f64,
                shrinks: output < input,
            },
        }
    }

    /// The source coordinate of output `o`. Align-corners uses the sizes alone, whatever the
    /// scale (as the ONNX operator does).
    fn source(&self, o: usize, coords: Coords) -> f64 {
        match coords {
            Coords::HalfPixel => (o as f64 + 0.5) * self.step - 0.5,
            Coords::AlignCorners if self.output > 1 => {
                o as f64 * (self.input as f64 - 1.0) / (self.output as f64 - 1.0)
            }
            Coords::AlignCorners => 0.0,
        }
    }
}

/// The source coordinate (in sample units, sample centres at integers) of output `o`.
pub fn source_coordinate(o: usize, input: usize, output: usize, coords: Coords) -> f64 {
    Mapping::new(input, output, None).source(o, coords)
}

/// [`source_coordinate`] with an optional scale factor: with `Some(s)` the half-pixel
/// coordinate is `(o + 0.5)/s − 0.5` (computed as `(o + 0.5)·(1/s) − 0.5`).
pub fn source_coordinate_mapped(
    o: usize,
    input: usize,
    output: usize,
    scale: Option<f64>,
    coords: Coords,
) -> f64 {
    Mapping::new(input, output, scale).source(o, coords)
}

/// The output side of an axis of `input` samples scaled by `scale`: `floor(input·scale)`,
/// computed in f64 as the frameworks compute it. `None` when the scale is not finite or not
/// above 0, when no sample would be left, or when the side does not fit a `usize`.
pub fn scaled_side(input: usize, scale: f64) -> Option<usize> {
    if !scale.is_finite() || scale <= 0.0 {
        return None;
    }
    let side = (input as f64 * scale).floor();
    // usize::MAX as f64 rounds up to a power of two, which itself does not fit.
    (side >= 1.0 && side < usize::MAX as f64).then_some(side as usize)
}

/// Why an axis cannot be scaled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum ScaleProblem {
    #[error("a scale must be finite and above 0")]
    NotPositive,
    #[error("floor(size·scale) leaves no sample")]
    NothingLeft,
    #[error("floor(size·scale) is more samples than memory can address")]
    TooLarge,
    #[error("the output has {output} samples, not floor(size·scale) = {side}")]
    SizeNotScaled { output: usize, side: usize },
}

/// [`scaled_side`], saying why when there is no side.
pub fn try_scaled_side(input: usize, scale: f64) -> Result<usize, ScaleProblem> {
    if !scale.is_finite() || scale <= 0.0 {
        return Err(ScaleProblem::NotPositive);
    }
    scaled_side(input, scale).ok_or(if input as f64 * scale < 1.0 {
        ScaleProblem::NothingLeft
    } else {
        ScaleProblem::TooLarge
    })
}

/// Whether resampling an axis this way leaves every value where it was: same size and either
/// the ratio is exactly 1 or the coordinates ignore it (align-corners). With a scale, a side
/// can stay while the coordinates move (floor(10·1.05) = 10), and then the axis is resampled.
pub fn is_identity_mapping(
    input: usize,
    output: usize,
    scale: Option<f64>,
    coords: Coords,
) -> bool {
    input == output
        && (coords == Coords::AlignCorners || Mapping::new(input, output, scale).step == 1.0)
}

/// Build the weight table of one axis going from `input` to `output` samples.
/// `input` and `output` must be at least 1 (the caller checks). Aborts like any infallible
/// allocation if memory runs out; the engine uses [`try_axis_weights`].
pub fn axis_weights(input: usize, output: usize, opts: &Options) -> AxisWeights {
    try_axis_weights(input, output, opts).unwrap_or_else(|e| {
        let layout = std::alloc::Layout::array::<u8>(e.bytes)
            .unwrap_or_else(|_| std::alloc::Layout::new::<u8>());
        std::alloc::handle_alloc_error(layout)
    })
}

/// [`axis_weights`], with every buffer (their sizes follow the request) allocated fallibly.
pub fn try_axis_weights(
    input: usize,
    output: usize,
    opts: &Options,
) -> Result<AxisWeights, OutOfMemory> {
    weights_of(Mapping::new(input, output, None), opts)
}

/// [`try_axis_weights`] with an optional scale factor `s`: coordinates, the area footprint, the
/// antialias stretch and whether the axis shrinks all follow 1/s instead of in/out (ONNX Resize
/// `scales` semantics); align-corners uses the sizes alone (its antialias stretch too, where
/// the ONNX operator would stretch by 1/s). `output` must be
/// `floor(input·s)` ([`scaled_side`]), which also keeps every footprint within the input's
/// reach. A refused scale is reported on axis 0: the caller knows which axis it asked for.
pub fn try_axis_weights_mapped(
    input: usize,
    output: usize,
    scale: Option<f64>,
    opts: &Options,
) -> Result<AxisWeights, ResampleError> {
    if input == 0 || output == 0 {
        return Err(ResampleError::EmptyAxis {
            from: vec![input],
            to: vec![output],
        });
    }
    if let Some(s) = scale {
        let problem = match try_scaled_side(input, s) {
            Ok(side) if side == output => None,
            Ok(side) => Some(ScaleProblem::SizeNotScaled { output, side }),
            Err(problem) => Some(problem),
        };
        if let Some(problem) = problem {
            return Err(ResampleError::BadScale {
                axis: 0,
                input,
                scale: s,
                problem,
            });
        }
    }
    // Align-corners ignores the scale altogether, the antialias stretch included: the result
    // is the size-based one for floor(in·s).
    let scale = scale.filter(|_| opts.coords == Coords::HalfPixel);
    Ok(weights_of(Mapping::new(input, output, scale), opts)?)
}

/// The weight table of one mapped axis.
fn weights_of(map: Mapping, opts: &Options) -> Result<AxisWeights, OutOfMemory> {
    let Mapping { input, output, .. } = map;
    // All rows back to back, then padded to the longest one.
    let mut flat: Vec<(usize, f64)> = Vec::new();
    let mut ends = values::try_with_capacity(output)?;
    for o in 0..output {
        let row = match opts.kernel {
            Kernel::Nearest => vec![nearest_tap(o, &map, opts.coords)],
            Kernel::Area => area_taps(o, &map)?,
            _ => kernel_taps(o, &map, opts)?,
        };
        reserve(&mut flat, row.len())?;
        flat.extend_from_slice(&row);
        ends.push(flat.len());
    }
    let starts = std::iter::once(0).chain(ends.iter().copied());
    let rows = || starts.clone().zip(ends.iter().copied());
    let taps = rows().map(|(a, b)| b - a).max().unwrap_or(1).max(1);
    let mut index = values::try_with_capacity(output.saturating_mul(taps))?;
    let mut weight = values::try_with_capacity(output.saturating_mul(taps))?;
    for (a, b) in rows() {
        let row = &flat[a..b];
        let padding = (row.last().map_or(0, |t| t.0), 0.0);
        for &(i, w) in row
            .iter()
            .chain(std::iter::repeat_n(&padding, taps - row.len()))
        {
            index.push(i);
            weight.push(w);
        }
    }
    Ok(AxisWeights {
        input,
        output,
        taps,
        index,
        weight,
    })
}

/// Grow `v` by `extra` elements' room, or say how much was asked.
fn reserve<T>(v: &mut Vec<T>, extra: usize) -> Result<(), OutOfMemory> {
    v.try_reserve(extra).map_err(|_| OutOfMemory {
        bytes: extra.saturating_mul(std::mem::size_of::<T>()),
    })
}

/// ONNX `round_prefer_floor`: the nearest sample, a tie going to the lower one.
fn nearest_tap(o: usize, map: &Mapping, coords: Coords) -> (usize, f64) {
    let x = map.source(o, coords);
    let i = (x - 0.5).ceil().clamp(0.0, (map.input - 1) as f64) as usize;
    (i, 1.0)
}

/// The fraction of output cell `o`'s footprint `[o·step, (o+1)·step)` each source cell covers
/// (step = in/out, or 1/s).
fn area_taps(o: usize, map: &Mapping) -> Result<Vec<(usize, f64)>, OutOfMemory> {
    let (step, input) = (map.step, map.input);
    let lo = o as f64 * step;
    let hi = (o as f64 + 1.0) * step;
    let first = lo.floor() as usize;
    let last = ((hi.ceil() as usize).max(first + 1)).min(input);
    values::try_collect(
        last.saturating_sub(first),
        (first..last).filter_map(|j| {
            let overlap = hi.min(j as f64 + 1.0) - lo.max(j as f64);
            (overlap > 0.0).then_some((j, overlap / step))
        }),
    )
}

/// Linear, cubic and Lanczos taps: every integer j strictly within the (stretched) support of
/// the source coordinate, weighted by the kernel at (j - x) / stretch.
fn kernel_taps(o: usize, map: &Mapping, opts: &Options) -> Result<Vec<(usize, f64)>, OutOfMemory> {
    let (support, kernel): (f64, Box<dyn Fn(f64) -> f64>) = match opts.kernel {
        Kernel::Bilinear => (1.0, Box::new(kernels::triangle)),
        Kernel::Bicubic => {
            let a = opts.cubic_a;
            (2.0, Box::new(move |x| kernels::cubic(x, a)))
        }
        Kernel::Lanczos3 => (3.0, Box::new(kernels::lanczos3)),
        Kernel::Nearest | Kernel::Area => unreachable!("handled by their own tap builders"),
    };
    let antialias = opts.antialias_applies_when(map.shrinks);
    let stretch = if antialias && map.shrinks {
        map.step
    } else {
        1.0
    };
    let x = map.source(o, opts.coords);
    let reach = support * stretch;
    let lo = (x - reach).floor() as i64 + 1;
    let hi = (x + reach).ceil() as i64 - 1;
    // A strongly shrinking antialiased axis has as many taps as source samples.
    let count = usize::try_from(hi - lo + 1).unwrap_or(0);
    let mut taps: Vec<(i64, f64)> = values::try_collect(
        count,
        (lo..=hi).map(|j| (j, kernel((j as f64 - x) / stretch))),
    )?;
    // Stretched kernels (and Lanczos, whose lobes do not sum to 1) are normalised over all
    // their taps, as the ONNX antialiased coefficients are.
    if antialias || opts.kernel == Kernel::Lanczos3 {
        let sum: f64 = taps.iter().map(|t| t.1).sum();
        if sum != 0.0 {
            taps.iter_mut().for_each(|t| t.1 /= sum);
        }
    }
    let last = map.input as i64 - 1;
    let inside = |j: i64| (0..=last).contains(&j);
    let renormalised = match opts.edges {
        Edges::Renormalize => {
            let mut kept: Vec<(usize, f64)> = values::try_collect(
                taps.len(),
                taps.iter()
                    .filter(|t| inside(t.0))
                    .map(|&(j, w)| (j as usize, w)),
            )?;
            let sum: f64 = kept.iter().map(|t| t.1).sum();
            (sum != 0.0).then(|| {
                kept.iter_mut().for_each(|t| t.1 /= sum);
                kept
            })
        }
        Edges::Clamp => None,
    };
    if let Some(kept) = renormalised {
        return Ok(kept);
    }
    // Clamp: an out-of-range tap reads the border sample; merge taps on the same sample.
    let mut merged: Vec<(usize, f64)> = values::try_with_capacity(taps.len())?;
    for (j, w) in taps {
        let j = j.clamp(0, last) as usize;
        match merged.last_mut() {
            Some(m) if m.0 == j => m.1 += w,
            _ => merged.push((j, w)),
        }
    }
    Ok(merged)
}
