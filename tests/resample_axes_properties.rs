//! The general entry point `resample_grid` against the 2-D `resample` and against itself on
//! other ranks. Separability (common practice: a separable resampler is one 1-D pass per
//! axis, each reading only along its axis) makes these equalities exact, bit for bit:
//! - a 2-D grid through `resample_grid` is `resample`, and both are the two passes the 2-D
//!   engine has always made, written plainly in this test (rows, then columns; each output the
//!   first tap's product plus the others' in tap order);
//! - a 3-D grid whose first axis keeps its size is its frames resampled one by one in 2-D;
//! - one axis is a 1xN grid whose first axis keeps its size;
//! - changing only the first axis reads everything inside it as one long row of channels.
//!
//! The refusals follow the project's rule that bad input gets an error value, never a panic.

use posgrid::resample::{
    axis_weights, resample, resample_grid, Antialias, AxisWeights, Coords, Edges, Kernel, Options,
    ResampleError,
};
use proptest::prelude::*;

fn any_options() -> impl Strategy<Value = Options> {
    (
        prop::sample::select(Kernel::ALL.to_vec()),
        prop::sample::select(Coords::ALL.to_vec()),
        prop::sample::select(Edges::ALL.to_vec()),
        prop::sample::select(Antialias::ALL.to_vec()),
        -1.0f64..0.0,
    )
        .prop_map(|(kernel, coords, edges, antialias, cubic_a)| Options {
            kernel,
            coords: if kernel == Kernel::Area {
                Coords::HalfPixel
            } else {
                coords
            },
            edges,
            antialias,
            cubic_a,
        })
}

fn side() -> impl Strategy<Value = usize> {
    1usize..12
}

/// `n` values from a seed, spread over [-1, 1).
fn values(n: usize, seed: u64) -> Vec<f32> {
    let mut state = seed | 1;
    (0..n)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state % 20_000) as f32 / 10_000.0 - 1.0
        })
        .collect()
}

fn bits(v: &[f32]) -> Vec<u32> {
    v.iter().map(|x| x.to_bits()).collect()
}

/// Output `o` of one axis from `read(i)`, the source line at index `i`: the first tap's
/// product, then each further tap's added, element by element.
fn taps_summed<'a>(weights: &AxisWeights, o: usize, read: impl Fn(usize) -> &'a [f32]) -> Vec<f32> {
    let mut sum: Vec<f32> = Vec::new();
    for (k, (i, w)) in weights.taps_of(o).enumerate() {
        let (w, line) = (w as f32, read(i));
        if k == 0 {
            sum = line.iter().map(|&s| w * s).collect();
        } else {
            sum.iter_mut().zip(line).for_each(|(acc, &s)| *acc += w * s);
        }
    }
    sum
}

/// The 2-D engine's two passes, plainly: along every row (W -> W') when the width changes,
/// then down the columns (H -> H') when the height changes.
fn two_passes_plainly(
    src: &[f32],
    (h, w): (usize, usize),
    d: usize,
    (oh, ow): (usize, usize),
    opts: &Options,
) -> Vec<f32> {
    let rows: Vec<f32> = if w == ow {
        src.to_vec()
    } else {
        let across = axis_weights(w, ow, opts);
        (0..h)
            .flat_map(|r| {
                let row = &src[r * w * d..(r + 1) * w * d];
                (0..ow)
                    .flat_map(|o| taps_summed(&across, o, |i| &row[i * d..(i + 1) * d]))
                    .collect::<Vec<_>>()
            })
            .collect()
    };
    if h == oh {
        return rows;
    }
    let down = axis_weights(h, oh, opts);
    let line = ow * d;
    (0..oh)
        .flat_map(|o| taps_summed(&down, o, |i| &rows[i * line..(i + 1) * line]))
        .collect()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    #[test]
    fn two_axes_through_the_grid_entry_point_are_resample_bit_for_bit(
        opts in any_options(), h in side(), w in side(), oh in side(), ow in side(),
        d in 1usize..5, seed in any::<u64>(),
    ) {
        let table = values(h * w * d, seed);
        let old = resample(&table, (h, w), d, (oh, ow), &opts).unwrap();
        let new = resample_grid(&table, &[h, w], d, &[oh, ow], &opts).unwrap();
        prop_assert_eq!(bits(&new), bits(&old));
        prop_assert_eq!(bits(&new), bits(&two_passes_plainly(&table, (h, w), d, (oh, ow), &opts)));
    }

    #[test]
    fn a_volume_with_its_time_kept_resamples_frame_by_frame(
        opts in any_options(), t in 1usize..5, h in side(), w in side(), oh in side(), ow in side(),
        d in 1usize..4, seed in any::<u64>(),
    ) {
        let table = values(t * h * w * d, seed);
        let volume = resample_grid(&table, &[t, h, w], d, &[t, oh, ow], &opts).unwrap();
        let frames: Vec<f32> = table
            .chunks(h * w * d)
            .flat_map(|frame| resample(frame, (h, w), d, (oh, ow), &opts).unwrap())
            .collect();
        prop_assert_eq!(bits(&volume), bits(&frames));
    }

    #[test]
    fn one_axis_is_a_single_row_grid(
        opts in any_options(), n in 1usize..40, m in 1usize..40, d in 1usize..5, seed in any::<u64>(),
    ) {
        let table = values(n * d, seed);
        let line = resample_grid(&table, &[n], d, &[m], &opts).unwrap();
        let row = resample(&table, (1, n), d, (1, m), &opts).unwrap();
        prop_assert_eq!(bits(&line), bits(&row));
    }

    #[test]
    fn changing_only_the_first_axis_treats_the_rest_as_channels(
        opts in any_options(), t in side(), ot in side(), h in 1usize..5, w in 1usize..5,
        d in 1usize..3, seed in any::<u64>(),
    ) {
        let table = values(t * h * w * d, seed);
        let volume = resample_grid(&table, &[t, h, w], d, &[ot, h, w], &opts).unwrap();
        let line = resample_grid(&table, &[t], h * w * d, &[ot], &opts).unwrap();
        prop_assert_eq!(bits(&volume), bits(&line));
    }

    #[test]
    fn constants_stay_constant_on_every_rank(
        opts in any_options(), from in prop::collection::vec(side(), 1..=3), seed in any::<u64>(),
        c in -100.0f32..100.0,
    ) {
        // Any kernel's weights sum to 1 (common practice), on every axis.
        let to: Vec<usize> = from.iter().enumerate().map(|(i, &n)| 1 + (n * 7 + i + seed as usize % 5) % 13).collect();
        let table = vec![c; from.iter().product::<usize>() * 2];
        let out = resample_grid(&table, &from, 2, &to, &opts).unwrap();
        prop_assert_eq!(out.len(), to.iter().product::<usize>() * 2);
        for v in out {
            prop_assert!((v - c).abs() <= 1e-4 * c.abs().max(1.0), "{} vs {}", v, c);
        }
    }

    #[test]
    fn an_unchanged_grid_is_an_exact_copy(
        opts in any_options(), from in prop::collection::vec(side(), 1..=3), v in prop::collection::vec(any::<f32>(), 1..50),
    ) {
        let n: usize = from.iter().product();
        let table: Vec<f32> = (0..n).map(|i| v[i % v.len()]).collect();
        let out = resample_grid(&table, &from, 1, &from, &opts).unwrap();
        prop_assert_eq!(bits(&out), bits(&table));
    }

    #[test]
    fn any_shape_request_is_answered_without_panic(
        from in prop::collection::vec(0usize..6, 0..5), to in prop::collection::vec(0usize..6, 0..5),
        d in 0usize..3, len in 0usize..200, opts in any_options(),
    ) {
        let table = vec![0.5f32; len];
        let _ = resample_grid(&table, &from, d, &to, &opts);
    }
}

fn refusal(from: &[usize], d: usize, to: &[usize], len: usize) -> ResampleError {
    resample_grid(&vec![0f32; len], from, d, to, &Options::default()).unwrap_err()
}

#[test]
fn ranks_that_are_not_one_to_three_or_differ_are_refused() {
    assert_eq!(refusal(&[], 1, &[], 0), ResampleError::UnsupportedRank(0));
    assert_eq!(
        refusal(&[2, 2, 2, 2], 1, &[3, 3, 3, 3], 16),
        ResampleError::UnsupportedRank(4)
    );
    assert_eq!(
        refusal(&[4, 4], 1, &[2, 4, 4], 16),
        ResampleError::RankMismatch { from: 2, to: 3 }
    );
}

#[test]
fn empty_axes_and_wrong_lengths_are_refused() {
    let empty = refusal(&[3, 0, 2], 1, &[3, 2, 2], 0);
    assert_eq!(
        empty,
        ResampleError::EmptyAxis {
            from: vec![3, 0, 2],
            to: vec![3, 2, 2]
        }
    );
    assert!(empty.to_string().contains("3x0x2"), "{empty}");
    assert_eq!(
        refusal(&[2, 3, 4], 2, &[2, 5, 5], 47),
        ResampleError::GridLengthMismatch {
            found: 47,
            expected: 48,
            grid: vec![2, 3, 4],
            d: 2
        }
    );
}

#[test]
fn sizes_whose_product_overflows_are_refused_before_any_work() {
    let huge = usize::MAX / 2;
    let err = refusal(&[2, 2, 2], 1, &[2, huge, 3], 8);
    assert!(matches!(err, ResampleError::SizeOverflow { .. }), "{err}");
    let err = refusal(&[1], usize::MAX, &[2], 0);
    assert!(matches!(err, ResampleError::SizeOverflow { .. }), "{err}");
}

#[test]
fn an_output_beyond_memory_is_an_error_value() {
    // 2^50 cells of f32 is more than any address space holds.
    let err = refusal(&[2], 1, &[1 << 50], 2);
    assert!(matches!(err, ResampleError::OutOfMemory { .. }), "{err}");
}

#[test]
fn options_are_checked_on_every_rank() {
    let area_corners = Options {
        kernel: Kernel::Area,
        coords: Coords::AlignCorners,
        ..Options::default()
    };
    assert_eq!(
        resample_grid(&[0f32; 4], &[4], 1, &[2], &area_corners).unwrap_err(),
        ResampleError::AreaNeedsHalfPixel
    );
    let bad_a = Options {
        cubic_a: f64::NAN,
        ..Options::default()
    };
    assert_eq!(
        resample_grid(&[0f32; 8], &[2, 2, 2], 1, &[3, 3, 3], &bad_a).unwrap_err(),
        ResampleError::BadCubicA
    );
}
