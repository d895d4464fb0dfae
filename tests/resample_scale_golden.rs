//! Resampling by scale factor (output side floor(in·s), coordinates by 1/s) against a golden
//! file made by two general-purpose references and stored by the reference safetensors library
//! (fixtures/golden/make_scale_golden.py):
//! - "onnx": the onnx package's reference evaluator, Resize (opset 19) given the `scales` input
//!   (float32) and no `sizes` — linear and cubic, half-pixel, antialias 0 and 1, cubic_coeff_a
//!   -0.75 and -0.5, exclude_outside 0 and 1;
//! - "torch": the tensor framework's interpolate given `scale_factor=` with
//!   recompute_scale_factor False and None, bilinear and bicubic, align_corners false and true,
//!   antialias off and on, in float64.
//!
//! Scales: plain (24/14, 16/37), nudged ((24+0.1)/14, (16+0.1)/37), exact in float32 (55/32,
//! 7/16), and a side kept while its coordinates move (floor(10·1.05) = 10). Each case holds the
//! scale its reference used (for onnx the float32 value), which the engine is given.
//!
//! Tolerance: 1e-5 of the largest |value| of the reference output.
//!
//! The properties at the end are checked against the engine's own size-based path, whose
//! golden files are tests/resample_golden.rs and tests/resample_axes_golden.rs.

mod common;

use common::golden::{case_options, Golden};
use posgrid::resample::weights::{source_coordinate, source_coordinate_mapped};
use posgrid::resample::{
    resample_grid, resample_grid_scaled, scaled_side, try_axis_weights, try_axis_weights_mapped,
    Antialias, Coords, Edges, Kernel, Options, ResampleError, ScaleProblem,
};
use proptest::prelude::*;
use serde_json::Value;

const GOLDEN: &str = "fixtures/golden/scale_cases.safetensors";

fn sizes(case: &Value, key: &str) -> Vec<usize> {
    let list = case[key].as_array().unwrap();
    list.iter().map(|v| v.as_u64().unwrap() as usize).collect()
}

/// The scales the reference used, exactly (stored as the bits of an f64).
fn scales_used(case: &Value) -> Vec<f64> {
    let bits = case["scale_bits"].as_array().unwrap();
    bits.iter()
        .map(|b| f64::from_bits(b.as_u64().unwrap()))
        .collect()
}

/// The scales as they were meant, "24.1/14" read as 24.1 / 14 in f64.
fn scales_meant(case: &Value) -> Vec<f64> {
    let texts = case["scale_text"].as_array().unwrap();
    texts
        .iter()
        .map(|t| {
            let (a, b) = t.as_str().unwrap().split_once('/').unwrap();
            a.parse::<f64>().unwrap() / b.parse::<f64>().unwrap()
        })
        .collect()
}

/// The worst error of the engine given `scales` on one case, relative to the largest |value|
/// of the reference output; panics past 1e-5.
fn check_case(golden: &Golden, case: &Value, scales: &[f64]) -> f64 {
    let name = case["name"].as_str().unwrap();
    let source = case["source"].as_str().unwrap();
    let (from, to) = (sizes(case, "from"), sizes(case, "to"));
    let (input, in_shape) = golden.read(case["input"].as_str().unwrap());
    let (expected, out_shape) = golden.read(&format!("{name}.output"));
    let d = *in_shape.last().unwrap();
    assert_eq!(in_shape[..from.len()], from[..], "{name}: input shape");
    assert_eq!(out_shape[..to.len()], to[..], "{name}: output shape");
    let (got, got_sizes) = resample_grid_scaled(&input, &from, d, scales, &case_options(case))
        .unwrap_or_else(|e| panic!("{name}: {e}"));
    assert_eq!(
        got_sizes, to,
        "{name}: the sizes the {source} reference produced"
    );
    let scale = expected.iter().fold(0.0f64, |m, v| m.max(v.abs() as f64));
    let mut worst = 0.0f64;
    for (i, (g, e)) in got.iter().zip(&expected).enumerate() {
        let err = (*g as f64 - *e as f64).abs() / scale;
        worst = worst.max(err);
        assert!(
            err <= 1e-5,
            "{name} against the {source} reference ({case}) at {i}: got {g}, reference {e}"
        );
    }
    worst
}

/// The scales to give the engine for a torch case: where the framework left a kept side
/// untouched (recorded per axis by the generator), the engine's identity, s = 1.
fn torch_scales(case: &Value) -> Vec<f64> {
    let copied = case["kept_axes_copied"].as_array().unwrap();
    let used = scales_used(case);
    used.iter()
        .zip(copied)
        .map(|(&s, c)| if c == true { 1.0 } else { s })
        .collect()
}

/// Every case of one reference and scale kind; returns how many there were.
fn check_all(source: &str, kind: &str) -> usize {
    let golden = Golden::open(GOLDEN);
    let chosen: Vec<&Value> = golden
        .cases
        .iter()
        .filter(|c| c["source"] == source && c["scale_kind"] == kind)
        .collect();
    let worst = chosen
        .iter()
        .map(|c| {
            let scales = match source {
                "torch" => torch_scales(c),
                _ => scales_used(c),
            };
            check_case(&golden, c, &scales)
        })
        .fold(0.0, f64::max);
    eprintln!(
        "{source}, {kind} scales: worst relative error over {} cases {worst:.2e}",
        chosen.len()
    );
    chosen.len()
}

// 14x37 -> 24x16 (first axis enlarging, second shrinking): onnx linear (exclude 0/1,
// antialias 0/1) and cubic (a -0.75/-0.5, exclude 0/1, antialias 0/1); the nudged kind also
// 37x14 -> 16x24, linear and the frameworks' antialiased cubic.

#[test]
fn plain_scales_match_the_onnx_reference_evaluator() {
    assert_eq!(check_all("onnx", "plain"), 12);
}

#[test]
fn nudged_scales_match_the_onnx_reference_evaluator() {
    assert_eq!(check_all("onnx", "nudged"), 12 + 2);
}

#[test]
fn float32_exact_scales_match_the_onnx_reference_evaluator() {
    assert_eq!(check_all("onnx", "dyadic"), 12);
}

#[test]
fn a_kept_side_is_resampled_as_the_onnx_reference_evaluator_does() {
    // 10x37 by (1.05, 16.1/37): the first side stays 10 but its coordinates move.
    assert_eq!(check_all("onnx", "kept side"), 2);
}

// torch: bilinear and bicubic, antialias off and on, recompute_scale_factor False and None,
// plus align_corners with each mode.

#[test]
fn plain_scales_match_the_framework_interpolate() {
    assert_eq!(check_all("torch", "plain"), 10);
}

#[test]
fn nudged_scales_match_the_framework_interpolate() {
    assert_eq!(check_all("torch", "nudged"), 10 + 4);
}

#[test]
fn float32_exact_scales_match_the_framework_interpolate() {
    assert_eq!(check_all("torch", "dyadic"), 10);
}

#[test]
fn a_kept_side_matches_the_framework_where_it_uses_the_scale() {
    // The framework's linear kernels and its antialiased ones leave a kept side as it is
    // (recorded per axis by the generator); its plain bicubic moves it, as the operator does.
    let golden = Golden::open(GOLDEN);
    let copied: Vec<(String, Value)> = golden
        .cases
        .iter()
        .filter(|c| c["source"] == "torch" && c["scale_kind"] == "kept side")
        .map(|c| {
            let mode = format!("{} antialias {}", c["mode"], c["antialias"]);
            (mode, c["kept_axes_copied"].clone())
        })
        .collect();
    let expected = [
        ("\"bilinear\" antialias 0", [true, false]),
        ("\"bilinear\" antialias 1", [true, false]),
        ("\"bicubic\" antialias 0", [false, false]),
        ("\"bicubic\" antialias 1", [true, false]),
    ];
    assert_eq!(copied.len(), expected.len());
    for ((mode, flags), (want_mode, want)) in copied.iter().zip(expected) {
        assert_eq!(mode, want_mode);
        assert_eq!(flags, &serde_json::json!(want), "{mode}");
    }
    assert_eq!(check_all("torch", "kept side"), 4);
}

#[test]
fn the_scale_as_meant_stays_within_tolerance_of_the_float32_one() {
    // The onnx cases use the float32 rounding of s; the rounding moves values by about 1e-6
    // of max |x| (recorded by the generator), so the scale as meant passes the same bound and
    // gives the same sizes.
    let golden = Golden::open(GOLDEN);
    let onnx: Vec<&Value> = golden
        .cases
        .iter()
        .filter(|c| c["source"] == "onnx")
        .collect();
    for case in &onnx {
        check_case(&golden, case, &scales_meant(case));
    }
    let recorded = golden.meta_json("onnx_against_torch");
    for kind in ["plain", "nudged"] {
        let moved = recorded[kind]["linear"].as_f64().unwrap();
        assert!(moved > 0.0 && moved < 1e-5, "{kind}: {moved}");
    }
    assert_eq!(recorded["dyadic"]["linear"].as_f64(), Some(0.0));
}

#[test]
fn every_case_is_in_the_file() {
    let golden = Golden::open(GOLDEN);
    assert_eq!(golden.cases.len(), (12 + 10) * 3 + (2 + 4) * 2);
    let kinds = ["plain", "nudged", "dyadic", "kept side"];
    assert!(golden
        .cases
        .iter()
        .all(|c| kinds.contains(&c["scale_kind"].as_str().unwrap())));
}

#[test]
fn the_worked_example_samples_where_the_scale_says() {
    // 37 -> 16 with a nudge of 0.1 (s = 16.1/37): output cell 15 samples
    // (15 + 0.5)·37/16.1 - 0.5 = 35.121..., not the size-based 35.34375. Values from the
    // generator, which checked them against both references on a ramp.
    let example = Golden::open(GOLDEN).meta_json("worked_example");
    let s = 16.1 / 37.0;
    assert_eq!(scaled_side(37, s), Some(16));
    let x = source_coordinate_mapped(15, 37, 16, Some(s), Coords::HalfPixel);
    assert!(
        (x - example["source"].as_f64().unwrap()).abs() < 1e-12,
        "{x}"
    );
    assert!((x - 35.121118).abs() < 1e-6, "{x}");
    let by_size = source_coordinate(15, 37, 16, Coords::HalfPixel);
    assert_eq!(by_size, example["by_size"].as_f64().unwrap());
    assert_eq!(by_size, 35.34375);
    // A ramp (value = index) resampled linearly reads back its source coordinates.
    let ramp: Vec<f64> = (0..37).map(f64::from).collect();
    let opts = Options {
        kernel: Kernel::Bilinear,
        antialias: Antialias::Off,
        ..Options::default()
    };
    let (out, to) = resample_grid_scaled(&ramp, &[37], 1, &[s], &opts).unwrap();
    assert_eq!(to, [16]);
    assert!((out[15] - x).abs() < 1e-12, "{}", out[15]);
}

#[test]
fn float32_rounding_can_change_a_side() {
    // 24/37 rounded to float32 lies below 24/37: floor(37·s32) = 23 (recorded by the generator,
    // which therefore does not use that scale).
    let recorded = Golden::open(GOLDEN).meta_json("refused_plain_scale");
    let s32 = f64::from((24.0f64 / 37.0) as f32);
    assert_eq!(scaled_side(37, 24.0 / 37.0), Some(24));
    assert_eq!(scaled_side(37, s32), Some(23));
    assert_eq!(recorded["float32_side"], 23);
}

#[test]
fn scaled_sides_are_floor_of_in_times_s() {
    assert_eq!(scaled_side(14, 24.1 / 14.0), Some(24));
    assert_eq!(scaled_side(14, 2.0), Some(28));
    assert_eq!(scaled_side(10, 1.05), Some(10));
    assert_eq!(scaled_side(10, 0.1), Some(1));
    assert_eq!(scaled_side(10, 0.09), None);
    assert_eq!(scaled_side(0, 2.0), None);
    for bad in [0.0, -1.0, f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
        assert_eq!(scaled_side(10, bad), None, "{bad}");
    }
    assert_eq!(scaled_side(usize::MAX, 2.0), None);
    assert_eq!(scaled_side(1, 1e300), None);
}

fn refusal(from: &[usize], d: usize, scales: &[f64], len: usize) -> ResampleError {
    resample_grid_scaled(&vec![0.0f32; len], from, d, scales, &Options::default()).unwrap_err()
}

fn bad_scale(axis: usize, input: usize, scale: f64, problem: ScaleProblem) -> ResampleError {
    ResampleError::BadScale {
        axis,
        input,
        scale,
        problem,
    }
}

#[test]
fn bad_scales_are_refused_as_values() {
    use ScaleProblem::*;
    assert_eq!(
        refusal(&[4, 4], 1, &[2.0, 0.0], 16),
        bad_scale(1, 4, 0.0, NotPositive)
    );
    assert_eq!(
        refusal(&[4, 4], 1, &[-2.0, 2.0], 16),
        bad_scale(0, 4, -2.0, NotPositive)
    );
    let nan = refusal(&[4], 1, &[f64::NAN], 4);
    assert!(
        matches!(
            nan,
            ResampleError::BadScale {
                problem: NotPositive,
                ..
            }
        ),
        "{nan}"
    );
    assert_eq!(
        refusal(&[4], 1, &[f64::INFINITY], 4),
        bad_scale(0, 4, f64::INFINITY, NotPositive)
    );
    assert_eq!(
        refusal(&[4, 4], 1, &[0.2, 1.0], 16),
        bad_scale(0, 4, 0.2, NothingLeft)
    );
    assert_eq!(
        refusal(&[4], 1, &[1e300], 4),
        bad_scale(0, 4, 1e300, TooLarge)
    );
    assert_eq!(
        refusal(&[4, 4], 1, &[2.0], 16),
        ResampleError::ScaleCountMismatch { axes: 2, scales: 1 }
    );
    assert_eq!(refusal(&[], 1, &[], 0), ResampleError::UnsupportedRank(0));
    assert_eq!(
        refusal(&[2, 2, 2, 2], 1, &[1.0; 4], 16),
        ResampleError::UnsupportedRank(4)
    );
    assert!(matches!(
        refusal(&[0, 4], 1, &[2.0, 2.0], 0),
        ResampleError::EmptyAxis { .. }
    ));
    assert!(matches!(
        refusal(&[4, 4], 1, &[2.0, 2.0], 15),
        ResampleError::GridLengthMismatch { .. }
    ));
    // Sides that fit one by one but not multiplied out.
    let big = 1usize << 40;
    assert!(matches!(
        refusal(&[big, big], 1, &[4.0, 4.0], 0),
        ResampleError::SizeOverflow { .. }
    ));
    // The message names the axis, its size, the scale and the problem.
    let text = refusal(&[4, 4], 1, &[2.0, 0.2], 16).to_string();
    assert!(text.contains("axis 1") && text.contains("0.2"), "{text}");
}

#[test]
fn mapped_weights_need_the_scaled_size() {
    let opts = Options::default();
    let err = try_axis_weights_mapped(37, 17, Some(16.1 / 37.0), &opts).unwrap_err();
    assert!(
        matches!(
            err,
            ResampleError::BadScale {
                problem: ScaleProblem::SizeNotScaled {
                    output: 17,
                    side: 16
                },
                ..
            }
        ),
        "{err}"
    );
    assert!(try_axis_weights_mapped(0, 1, None, &opts).is_err());
    assert!(try_axis_weights_mapped(5, 0, Some(2.0), &opts).is_err());
    // Without a scale, the mapped weights are the size-based ones.
    for (i, o) in [(14, 24), (37, 16), (5, 5)] {
        assert_eq!(
            try_axis_weights_mapped(i, o, None, &opts).unwrap(),
            try_axis_weights(i, o, &opts).unwrap()
        );
    }
}

fn kernel() -> impl Strategy<Value = Kernel> {
    prop::sample::select(Kernel::ALL.to_vec())
}

fn options(coords: Coords) -> impl Strategy<Value = Options> {
    (
        kernel(),
        prop::sample::select(Edges::ALL.to_vec()),
        prop::sample::select(Antialias::ALL.to_vec()),
        prop::sample::select(vec![-0.75, -0.5]),
    )
        .prop_filter("area is half-pixel only", move |(k, ..)| {
            coords == Coords::HalfPixel || *k != Kernel::Area
        })
        .prop_map(move |(kernel, edges, antialias, cubic_a)| Options {
            kernel,
            coords,
            edges,
            antialias,
            cubic_a,
        })
}

/// An axis whose scale k/2^m is exact and whose size is a multiple of 2^m: s = out/in exactly.
fn exact_axis() -> impl Strategy<Value = (usize, f64)> {
    (0u32..4, 1usize..24, 1usize..6).prop_map(|(m, k, j)| {
        let den = 1usize << m;
        (den * j, k as f64 / den as f64)
    })
}

fn grid_values(cells: usize) -> Vec<f32> {
    // Values from a fixed sine, so every cell differs (no library involved).
    (0..cells).map(|i| ((i as f32) * 0.7311).sin()).collect()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(192))]

    /// s = out/in exactly (k/2^m) gives the size-based result bit for bit: 1/s and in/out are
    /// then the same real number, rounded once each.
    #[test]
    fn an_exact_scale_is_the_size_based_result(
        axes in prop::collection::vec(exact_axis(), 1..=3),
        d in 1usize..4,
        opts in prop::sample::select(Coords::ALL.to_vec()).prop_flat_map(options),
    ) {
        let from: Vec<usize> = axes.iter().map(|a| a.0).collect();
        let scales: Vec<f64> = axes.iter().map(|a| a.1).collect();
        let to: Vec<usize> = axes.iter().map(|&(n, s)| (n as f64 * s) as usize).collect();
        let src = grid_values(from.iter().product::<usize>() * d);
        let (got, sizes) = resample_grid_scaled(&src, &from, d, &scales, &opts).unwrap();
        prop_assert_eq!(&sizes, &to);
        let by_size = resample_grid(&src, &from, d, &to, &opts).unwrap();
        prop_assert!(got.iter().zip(&by_size).all(|(a, b)| a.to_bits() == b.to_bits()));
    }

    /// The same, over every kernel, edge and antialias option on one axis.
    #[test]
    fn an_exact_scale_is_the_size_based_result_for_every_option(
        (n, s) in exact_axis(),
        opts in options(Coords::HalfPixel),
    ) {
        let to = (n as f64 * s) as usize;
        let src = grid_values(n * 2);
        let (got, _) = resample_grid_scaled(&src, &[n], 2, &[s], &opts).unwrap();
        let by_size = resample_grid(&src, &[n], 2, &[to], &opts).unwrap();
        prop_assert!(got.iter().zip(&by_size).all(|(a, b)| a.to_bits() == b.to_bits()));
    }

    /// Align-corners uses the sizes only: any scale gives the size-based result for
    /// floor(in·s), bit for bit (and a kept side stays untouched).
    #[test]
    fn align_corners_ignores_the_scale(
        n in 1usize..40,
        m in 1usize..40,
        nudge in 0.0f64..0.99,
        opts in options(Coords::AlignCorners),
    ) {
        let s = (m as f64 + nudge) / n as f64;
        prop_assume!(scaled_side(n, s) == Some(m));
        let src = grid_values(n * 3);
        let (got, sizes) = resample_grid_scaled(&src, &[n], 3, &[s], &opts).unwrap();
        prop_assert_eq!(sizes, vec![m]);
        let by_size = resample_grid(&src, &[n], 3, &[m], &opts).unwrap();
        prop_assert!(got.iter().zip(&by_size).all(|(a, b)| a.to_bits() == b.to_bits()));
    }

    /// A nudged scale anchors the output at the top-left: cell x samples (x + 0.5)/s - 0.5,
    /// which for s > out/in lies left of the size-based coordinate.
    #[test]
    fn a_nudge_moves_coordinates_towards_the_origin(
        n in 2usize..60,
        m in 1usize..60,
    ) {
        let s = (m as f64 + 0.1) / n as f64;
        prop_assume!(scaled_side(n, s) == Some(m));
        for x in 0..m {
            let by_scale = source_coordinate_mapped(x, n, m, Some(s), Coords::HalfPixel);
            let by_size = source_coordinate(x, n, m, Coords::HalfPixel);
            prop_assert!(by_scale < by_size, "{x}: {by_scale} vs {by_size}");
            prop_assert!((by_scale - ((x as f64 + 0.5) / s - 0.5)).abs() < 1e-9);
        }
    }
}

#[test]
fn a_scale_of_one_copies_and_a_kept_side_with_another_scale_does_not() {
    let src = grid_values(10 * 9 * 2);
    let opts = Options::default();
    let (same, to) = resample_grid_scaled(&src, &[10, 9], 2, &[1.0, 1.0], &opts).unwrap();
    assert_eq!(to, [10, 9]);
    assert!(same
        .iter()
        .zip(&src)
        .all(|(a, b)| a.to_bits() == b.to_bits()));
    let (moved, to) = resample_grid_scaled(&src, &[10, 9], 2, &[1.05, 1.0], &opts).unwrap();
    assert_eq!(to, [10, 9]);
    assert_ne!(moved, src);
    // The second axis (s = 1) is untouched: moving only the first axis equals the 1-D result
    // on every column.
    let column =
        |j: usize, c: usize| -> Vec<f32> { (0..10).map(|i| src[(i * 9 + j) * 2 + c]).collect() };
    for j in 0..9 {
        for c in 0..2 {
            let (one, _) = resample_grid_scaled(&column(j, c), &[10], 1, &[1.05], &opts).unwrap();
            let got: Vec<f32> = (0..10).map(|i| moved[(i * 9 + j) * 2 + c]).collect();
            assert_eq!(got, one);
        }
    }
}
