//! One separable pass: resample a row-major grid along one axis. Everything inside that axis
//! (the later axes and the channels) is one contiguous slab, so each output slab is a weighted
//! sum of whole input slabs — one long loop per tap, whichever axis it is.

use rayon::prelude::*;

use super::{AxisWeights, ResampleError, Sample};

/// Values per parallel task at least, so small slabs (a width pass with few channels) are not
/// scheduled one by one.
const VALUES_PER_TASK: usize = 1 << 16;

/// The layout of a grid around one axis: `outer` blocks of `along` slabs of `slab` values.
#[derive(Debug, Clone, Copy)]
pub struct AxisLayout {
    pub outer: usize,
    pub along: usize,
    pub slab: usize,
}

impl AxisLayout {
    /// The layout of axis `axis` of a row-major grid `shape` whose cells hold `d` values.
    pub fn of(shape: &[usize], axis: usize, d: usize) -> Self {
        let product = |s: &[usize]| s.iter().fold(1usize, |n, &k| n.saturating_mul(k));
        AxisLayout {
            outer: product(&shape[..axis]),
            along: shape[axis],
            slab: product(&shape[axis + 1..]).saturating_mul(d),
        }
    }
}

/// Resample `input` (laid out as `layout`) along its axis with `weights`, whose input size is
/// `layout.along`, into a new buffer that starts with `head` (copied as it is). The buffer is
/// allocated fallibly: its size comes from the request.
pub fn pass_along_axis<T: Sample>(
    input: &[T],
    layout: AxisLayout,
    weights: &AxisWeights,
    head: &[T],
) -> Result<Vec<T>, ResampleError> {
    let AxisLayout { along, slab, .. } = layout;
    let out_len = layout
        .outer
        .saturating_mul(weights.output)
        .saturating_mul(slab);
    let mut buffer = crate::values::try_with_capacity(head.len().saturating_add(out_len))?;
    buffer.extend_from_slice(head);
    buffer.resize(head.len() + out_len, T::default());
    let out = &mut buffer[head.len()..];
    if out_len == 0 {
        return Ok(buffer);
    }
    let wt: Vec<T> = crate::values::try_collect(
        weights.weight.len(),
        weights.weight.iter().map(|&v| T::from_f64(v)),
    )?;
    let slabs_per_task = VALUES_PER_TASK.div_ceil(slab).max(1);
    out.par_chunks_mut(slab)
        .with_min_len(slabs_per_task)
        .enumerate()
        .for_each(|(k, out_slab)| {
            let (block, o) = (k / weights.output, k % weights.output);
            let block = &input[block * along * slab..(block + 1) * along * slab];
            let taps = o * weights.taps..(o + 1) * weights.taps;
            combine(
                out_slab,
                weights.index[taps.clone()]
                    .iter()
                    .zip(&wt[taps])
                    .map(|(&i, &w)| (&block[i * slab..(i + 1) * slab], w)),
            );
        });
    Ok(buffer)
}

/// `dst = Σ weight · source` over the taps, element-wise; the loops vectorise over the slab.
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
