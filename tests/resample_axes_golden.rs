//! The engine on one and three grid axes against golden files made by two general-purpose
//! references, stored by the reference safetensors library (fixtures/golden/make_axes_golden.py):
//! - "onnx": the onnx package's reference evaluator, Resize (opset 19) given output sizes, on
//!   [1, D, N] and [1, D, T, H, W] inputs — linear and cubic, half-pixel and align-corners,
//!   antialias off and on;
//! - "torch": the tensor framework's interpolate given `size=`, modes 'linear' and 'trilinear',
//!   align_corners false and true.
//!
//! Tolerance: 1e-5 of the largest |value| of the reference output.

mod common;

use common::golden::{case_options, Golden};
use posgrid::resample::resample_grid;
use serde_json::Value;

const GOLDEN: &str = "fixtures/golden/axes_cases.safetensors";

fn sizes(case: &Value, key: &str) -> Vec<usize> {
    case[key]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_u64().unwrap() as usize)
        .collect()
}

/// The worst error of one case relative to the largest |value| of its reference output.
fn check_case(golden: &Golden, case: &Value) -> f64 {
    let name = case["name"].as_str().unwrap();
    let source = case["source"].as_str().unwrap();
    let (from, to) = (sizes(case, "from"), sizes(case, "to"));
    let (input, in_shape) = golden.read(case["input"].as_str().unwrap());
    let (expected, out_shape) = golden.read(&format!("{name}.output"));
    let d = *in_shape.last().unwrap();
    assert_eq!(in_shape[..from.len()], from[..], "{name}: input shape");
    assert_eq!(out_shape[..to.len()], to[..], "{name}: output shape");
    let got = resample_grid(&input, &from, d, &to, &case_options(case)).unwrap();
    assert_eq!(got.len(), expected.len(), "{name} ({source}): size");
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

/// Every case of one reference and grid rank; returns how many there were.
fn check_all(source: &str, rank: usize) -> usize {
    let golden = Golden::open(GOLDEN);
    let chosen: Vec<&Value> = golden
        .cases
        .iter()
        .filter(|c| c["source"] == source && sizes(c, "from").len() == rank)
        .collect();
    let worst = chosen
        .iter()
        .map(|c| check_case(&golden, c))
        .fold(0.0, f64::max);
    eprintln!(
        "{source}, {rank} axes: worst relative error over {} cases {worst:.2e}",
        chosen.len()
    );
    chosen.len()
}

#[test]
fn one_axis_matches_the_onnx_reference_evaluator() {
    // Linear and cubic, both coordinate modes, antialias off and on, on 27->47, 13->23,
    // 47->27; the frameworks' antialiased bicubic (a = -0.5, exclude_outside); 127->191.
    assert_eq!(check_all("onnx", 1), 3 * (8 + 1) + 1);
}

#[test]
fn one_axis_matches_the_framework_linear_interpolate() {
    assert_eq!(check_all("torch", 1), 3 * 2 + 1);
}

#[test]
fn three_axes_match_the_onnx_reference_evaluator() {
    // 8x14x14 -> 8x16x16 (time kept), 8x6x6 -> 4x9x9, 3x5x4 -> 6x7x9; linear and cubic.
    assert_eq!(check_all("onnx", 3), 2 + 2 * 6);
}

#[test]
fn three_axes_match_the_framework_trilinear_interpolate() {
    assert_eq!(check_all("torch", 3), 3 * 2);
}

#[test]
fn the_golden_file_holds_only_one_and_three_axis_cases() {
    let golden = Golden::open(GOLDEN);
    assert_eq!(golden.cases.len(), 28 + 7 + 14 + 6);
}
