//! Properties any correct separable resampler has (common practice): constants stay constant,
//! a linear ramp survives bilinear align-corners exactly, flipping an axis commutes with
//! resampling, finite input gives finite output, and the source grid is an exact copy.

use posgrid::resample::{resample, Antialias, Coords, Edges, Kernel, Options};
use proptest::prelude::*;

fn any_options() -> impl Strategy<Value = Options> {
    (
        prop::sample::select(Kernel::ALL.to_vec()),
        prop::sample::select(Coords::ALL.to_vec()),
        prop::sample::select(Edges::ALL.to_vec()),
        prop::sample::select(Antialias::ALL.to_vec()),
        -1.0f64..0.0,
    )
        .prop_map(|(kernel, coords, edges, antialias, cubic_a)| {
            let coords = if kernel == Kernel::Area {
                Coords::HalfPixel
            } else {
                coords
            };
            Options {
                kernel,
                coords,
                edges,
                antialias,
                cubic_a,
            }
        })
}

fn grid() -> impl Strategy<Value = (usize, usize)> {
    (1usize..14, 1usize..14)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    #[test]
    fn constants_stay_constant(opts in any_options(), src in grid(), dst in grid(), c in -100.0f32..100.0, d in 1usize..4) {
        let table = vec![c; src.0 * src.1 * d];
        let out = resample(&table, src, d, dst, &opts).unwrap();
        prop_assert_eq!(out.len(), dst.0 * dst.1 * d);
        for v in out {
            prop_assert!((v - c).abs() <= 1e-4 * c.abs().max(1.0), "{} vs {}", v, c);
        }
    }

    #[test]
    fn linear_ramp_survives_bilinear_align_corners(src in (2usize..12, 2usize..12), dst in (2usize..24, 2usize..24),
                                                   a in -5.0f64..5.0, b in -5.0f64..5.0, c in -5.0f64..5.0) {
        let opts = Options { kernel: Kernel::Bilinear, coords: Coords::AlignCorners, antialias: Antialias::Off, ..Options::default() };
        let table: Vec<f64> = (0..src.0 * src.1).map(|i| a * (i / src.1) as f64 + b * (i % src.1) as f64 + c).collect();
        let out = resample(&table, src, 1, dst, &opts).unwrap();
        for (i, v) in out.iter().enumerate() {
            let y = (i / dst.1) as f64 * (src.0 - 1) as f64 / (dst.0 - 1) as f64;
            let x = (i % dst.1) as f64 * (src.1 - 1) as f64 / (dst.1 - 1) as f64;
            let expected = a * y + b * x + c;
            prop_assert!((v - expected).abs() <= 1e-9, "at {}: {} vs {}", i, v, expected);
        }
    }

    #[test]
    fn flipping_commutes_with_resampling(opts in any_options(), src in grid(), dst in grid(), seed in any::<u64>()) {
        prop_assume!(opts.kernel != Kernel::Nearest); // round_prefer_floor breaks ties one way
        // align-corners maps a single output sample to source 0 (ONNX), which is not symmetric.
        prop_assume!(opts.coords != Coords::AlignCorners || (dst.0 > 1 && dst.1 > 1));
        let (h, w) = src;
        let mut state = seed | 1;
        let table: Vec<f64> = (0..h * w * 2).map(|_| {
            state ^= state << 13; state ^= state >> 7; state ^= state << 17;
            (state % 2000) as f64 / 1000.0 - 1.0
        }).collect();
        let flip_rows = |t: &[f64], (h, w): (usize, usize)| -> Vec<f64> {
            (0..h).rev().flat_map(|r| t[r * w * 2..(r + 1) * w * 2].to_vec()).collect()
        };
        let flip_cols = |t: &[f64], (h, w): (usize, usize)| -> Vec<f64> {
            (0..h).flat_map(|r| (0..w).rev().flat_map(move |c| [t[(r * w + c) * 2], t[(r * w + c) * 2 + 1]])).collect()
        };
        let direct = resample(&table, src, 2, dst, &opts).unwrap();
        let via_rows = flip_rows(&resample(&flip_rows(&table, src), src, 2, dst, &opts).unwrap(), dst);
        let via_cols = flip_cols(&resample(&flip_cols(&table, src), src, 2, dst, &opts).unwrap(), dst);
        for i in 0..direct.len() {
            prop_assert!((direct[i] - via_rows[i]).abs() <= 1e-9);
            prop_assert!((direct[i] - via_cols[i]).abs() <= 1e-9);
        }
    }

    #[test]
    fn finite_in_finite_out(opts in any_options(), src in grid(), dst in grid(), v in prop::collection::vec(-1e30f32..1e30, 1..200)) {
        let n = src.0 * src.1;
        let table: Vec<f32> = (0..n).map(|i| v[i % v.len()]).collect();
        let out = resample(&table, src, 1, dst, &opts).unwrap();
        prop_assert!(out.iter().all(|x| x.is_finite()));
    }

    #[test]
    fn array_views_in_any_layout_give_the_same_result(opts in any_options(), src in grid(), dst in grid(), seed in any::<u64>()) {
        // A [W, H, D] array with its first two axes swapped is an [H, W, D] view that is not
        // contiguous; the result must equal resampling the same values laid out row-major.
        let (h, w) = src;
        let d = 3;
        let values: Vec<f32> = (0..h * w * d).map(|i| ((i as u64 * 2654435761 + seed) % 1000) as f32 / 500.0 - 1.0).collect();
        let transposed = ndarray::Array3::from_shape_vec((w, h, d), values).unwrap();
        let view = transposed.view().permuted_axes([1, 0, 2]);
        let flat: Vec<f32> = view.iter().copied().collect();
        let expected = resample(&flat, src, d, dst, &opts).unwrap();
        let got = posgrid::resample::resample_array(view, dst, &opts).unwrap();
        prop_assert_eq!(got.dim(), (dst.0, dst.1, d));
        prop_assert_eq!(got.iter().copied().collect::<Vec<f32>>(), expected);
    }

    #[test]
    fn same_grid_is_an_exact_copy(opts in any_options(), src in grid(), v in prop::collection::vec(any::<f32>(), 1..50)) {
        let n = src.0 * src.1;
        let table: Vec<f32> = (0..n).map(|i| v[i % v.len()]).collect();
        let out = resample(&table, src, 1, src, &opts).unwrap();
        prop_assert_eq!(out.iter().map(|x| x.to_bits()).collect::<Vec<_>>(), table.iter().map(|x| x.to_bits()).collect::<Vec<_>>());
    }
}
